"""A synthetic, deeper benchmark network built with onnx.helper (no torch).

Transformation: (blocks, widths, size, seed) -> an opset-17 ONNX classifier

    x [N, 3, S, S]
    -> ``blocks`` x [Conv 3x3 (pad 1, bias) -> SiLU written as x·Sigmoid(x)]
       (the first half of the blocks at widths[0] channels, the rest at widths[1])
    -> GlobalAveragePool -> Flatten -> Gemm (-> 10 class scores)

with random but fixed weights (He-normal Conv kernels, seeded), plus
:func:`scale_data`, a seeded synthetic input set for it. The SiLU is written
as the two-node ``Mul(x, Sigmoid(x))`` that exporters emit, so every block is
one decomposed activation site. Nothing here is trained: the benchmark labels
results on this model as synthetic and scores agreement, not accuracy.

Inputs are "per-sample colour offset + smooth spatial ramp + pixel noise" so
the global-average features (and so the predicted class) vary from sample to
sample; with i.i.d. pixel noise alone every sample would average to the same
features and top-1 agreement would be 1.0 whatever the swap did.
"""
from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from swapper.data.dataset import Dataset

logger = logging.getLogger(__name__)

INPUT_NAME = "image"
OUTPUT_NAME = "scores"
IN_CHANNELS = 3
CLASSES = 10
OPSET = 17
SYNTHETIC_PATH = Path("<synthetic scale data>")


def _conv_weight(rng: np.random.Generator, c_out: int, c_in: int) -> np.ndarray:
    # He et al. 2015 normal init, std = sqrt(2 / fan_in): keeps activation scale
    # roughly constant through 16 layers, so no block saturates or dies.
    fan_in = c_in * 9
    return rng.normal(0.0, np.sqrt(2.0 / fan_in), size=(c_out, c_in, 3, 3)).astype(np.float32)


def build_scale_model(
    *, blocks: int = 16, widths: tuple[int, int] = (16, 32), size: int = 32, seed: int = 0
) -> onnx.ModelProto:
    """The synthetic ``blocks``-deep Conv + SiLU network (checked with onnx.checker, shapes inferred)."""
    if blocks < 1:
        raise ValueError("blocks must be >= 1")
    rng = np.random.default_rng(seed)
    nodes, inits = [], []
    x, c_in = INPUT_NAME, IN_CHANNELS
    for i in range(1, blocks + 1):
        c_out = widths[0] if i <= (blocks + 1) // 2 else widths[1]
        w, b = f"block{i}.conv.weight", f"block{i}.conv.bias"
        inits.append(numpy_helper.from_array(_conv_weight(rng, c_out, c_in), w))
        inits.append(numpy_helper.from_array(rng.normal(0.0, 0.1, size=c_out).astype(np.float32), b))
        conv, sig, act = f"block{i}/conv", f"block{i}/sigmoid", f"block{i}/silu"
        nodes.append(helper.make_node("Conv", [x, w, b], [conv], name=f"block{i}.Conv",
                                      kernel_shape=[3, 3], pads=[1, 1, 1, 1]))
        nodes.append(helper.make_node("Sigmoid", [conv], [sig], name=f"block{i}.Sigmoid"))
        nodes.append(helper.make_node("Mul", [conv, sig], [act], name=f"block{i}.Mul"))
        x, c_in = act, c_out
    head_w = rng.normal(0.0, np.sqrt(1.0 / c_in), size=(CLASSES, c_in)).astype(np.float32)
    inits.append(numpy_helper.from_array(head_w, "head.weight"))
    inits.append(numpy_helper.from_array(np.zeros(CLASSES, np.float32), "head.bias"))
    nodes.append(helper.make_node("GlobalAveragePool", [x], ["pooled"], name="head.GlobalAveragePool"))
    nodes.append(helper.make_node("Flatten", ["pooled"], ["flat"], name="head.Flatten", axis=1))
    nodes.append(helper.make_node("Gemm", ["flat", "head.weight", "head.bias"], [OUTPUT_NAME],
                                  name="head.Gemm", transB=1))
    graph = helper.make_graph(
        nodes,
        f"swapper_scale_{blocks}x_silu",
        [helper.make_tensor_value_info(INPUT_NAME, TensorProto.FLOAT, ["N", IN_CHANNELS, size, size])],
        [helper.make_tensor_value_info(OUTPUT_NAME, TensorProto.FLOAT, ["N", CLASSES])],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="swapper.scale_model")
    model.ir_version = 8  # readable by every onnxruntime that supports opset 17
    _center_head(model, size)
    model = onnx.shape_inference.infer_shapes(model)
    onnx.checker.check_model(model, full_check=True)
    logger.debug("scale model: %d blocks, widths %s, %dx%d input", blocks, widths, size, size)
    return model


def _center_head(model: onnx.ModelProto, size: int) -> None:
    """Centre and scale the head's scores over a seeded reference batch (mean 0, sd 1 per class).

    Random Conv stacks give pooled features with a large common mean, which
    makes one or two classes win for every sample; centring the scores spreads
    the top-1 class over the classes, so top-1 agreement can detect a change.
    """
    from swapper.core.session import (  # onnxruntime: only needed here
        expose,
        open_session,
    )

    session = open_session(expose(model, ["flat"]))
    feats = session.run(["flat"], {INPUT_NAME: scale_inputs(64, size=size, seed=0)})[0].astype(np.float64)
    inits = {t.name: t for t in model.graph.initializer}
    weight = numpy_helper.to_array(inits["head.weight"]).astype(np.float64)
    scores = (feats - feats.mean(axis=0)) @ weight.T
    spread = np.maximum(scores.std(axis=0), 1e-6)[:, None]  # unit-variance scores per class
    weight = weight / spread
    bias = -weight @ feats.mean(axis=0)
    inits["head.weight"].CopyFrom(numpy_helper.from_array(weight.astype(np.float32), "head.weight"))
    inits["head.bias"].CopyFrom(numpy_helper.from_array(bias.astype(np.float32), "head.bias"))


def scale_inputs(n: int, *, size: int = 32, seed: int = 1) -> np.ndarray:
    """``n`` seeded synthetic images [n, 3, size, size] float32 (see module docstring)."""
    rng = np.random.default_rng(seed)
    offset = rng.normal(0.0, 1.0, size=(n, IN_CHANNELS, 1, 1))
    grid = np.linspace(-1.0, 1.0, size)
    slope = rng.normal(0.0, 1.0, size=(n, IN_CHANNELS, 2, 1, 1))
    ramp = slope[:, :, 0] * grid[None, None, :, None] + slope[:, :, 1] * grid[None, None, None, :]
    noise = rng.normal(0.0, 0.5, size=(n, IN_CHANNELS, size, size))
    return (offset + ramp + noise).astype(np.float32)


def scale_data(n: int, *, size: int = 32, seed: int = 1) -> Dataset:
    """An unlabelled in-memory Dataset of :func:`scale_inputs` for the scale model."""
    arr = scale_inputs(n, size=size, seed=seed)
    return Dataset(path=SYNTHETIC_PATH, arrays={INPUT_NAME: arr}, labels=None, expected=None, n=n,
                   dtypes={INPUT_NAME: np.dtype(np.float32)})
