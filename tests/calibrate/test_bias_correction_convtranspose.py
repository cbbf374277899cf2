"""Bias correction of a ConvTranspose consumer (the layers of swapper.plan.layers, ConvTranspose included).

Source of the rule: Nagel et al. 2019, "Data-Free Quantization Through Weight Equalization and Bias
Correction": after the correction the consumer's output has the original model's mean, per output
channel (here over samples and output positions, on the calibration set itself). A ConvTranspose's
border outputs gather fewer taps than the inner ones, so the shift is measured on the layer's own
output (run by onnxruntime), not taken as W·E[Δ]. Means are computed by onnxruntime on both models.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import onnx.parser
import onnxruntime as ort
import pytest
from onnx import numpy_helper

import swapper.calibrate.loop as cal
from swapper.core.graph import GraphIndex
from swapper.core.model_io import load_model
from swapper.data.dataset import Dataset
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

# Conv -> Tanh -> [pool] -> ConvTranspose (stride 2, pads 1: uneven tap counts at the borders)
TEXT = """
<ir_version: 8, opset_import: ["" : 17]>
convtranspose_tail (float[N, 2, 6, 6] X) => (float[N, 2, OUT, OUT] Y) {{
    H = Conv <kernel_shape = [3, 3], pads = [1, 1, 1, 1]> (X, W1, B1)
    T = Tanh(H)
    {pool}
    Y = ConvTranspose <kernel_shape = [3, 3], strides = [2, 2], pads = [1, 1, 1, 1]> (P, W2, B2)
}}
"""
POOLS = {
    "direct": "P = Identity(T)",
    "max_pool": "P = MaxPool <kernel_shape = [2, 2], strides = [2, 2]> (T)",  # not linear: pairs per batch
}


def _model(pool: str, tmp_path: Path) -> onnx.ModelProto:
    rng = np.random.default_rng(0)
    model = onnx.parser.parse_model(TEXT.format(pool=POOLS[pool]))
    weights = {"W1": rng.normal(size=(3, 2, 3, 3)), "B1": rng.normal(size=3),
               "W2": rng.normal(size=(3, 2, 3, 3)), "B2": rng.normal(size=2)}  # ConvTranspose W: [C, M, k, k]
    model.graph.initializer.extend(numpy_helper.from_array(v.astype(np.float32), k) for k, v in weights.items())
    onnx.save(model, tmp_path / "m.onnx")
    return load_model(tmp_path / "m.onnx").model


def _mean_y(model: onnx.ModelProto, x: np.ndarray) -> np.ndarray:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    y = sess.run(["Y"], {"X": x})[0].astype(np.float64)
    return y.mean(axis=(0, 2, 3))


@pytest.mark.parametrize("pool", sorted(POOLS))
def test_bias_correction_restores_convtranspose_mean(pool, tmp_path, monkeypatch):
    model = _model(pool, tmp_path)
    sites = find_sites(model)
    assert [s.function for s in sites] == ["tanh"]
    (ct,) = [n.name for n in model.graph.node if n.op_type == "ConvTranspose"]
    x = np.random.default_rng(3).normal(scale=1.5, size=(200, 2, 6, 6)).astype(np.float32)
    ds = Dataset(path=Path("<inline>"), arrays={"X": x}, labels=None, expected=None, n=len(x),
                 dtypes={"X": np.dtype(np.float32)})
    want = _mean_y(model, x)
    means, biases = {}, {}
    for way in ("off", "mean", "per_batch"):
        with monkeypatch.context() as m:
            if way == "per_batch":  # no shift sums: the consumer's mean change is measured batch by batch
                m.setattr(cal, "DeltaSum", lambda: None)
            plan = make_plan(model, sites, fold="off", to="relu")
            # a small reservoir fits on a subsample, so the surrogate leaves a real mean shift behind
            result = cal.calibrate(model, sites, plan, ds, reservoir=16, batch_size=48, bias_correction=way != "off")
        assert result.sites[0].bias_corrected == ([] if way == "off" else [ct])
        node = GraphIndex.of(result.model).nodes_by_name[ct]
        biases[way] = numpy_helper.to_array(GraphIndex.of(result.model).initializers[node.input[2]])
        means[way] = _mean_y(rewrite(result.model, sites, result.plan).model, x)
    assert np.max(np.abs(means["off"] - want)) > 1e-2  # the shift was there
    # source: Nagel et al. 2019 (module docstring): E[candidate output] = E[original output] per channel
    np.testing.assert_allclose(means["mean"], want, rtol=0, atol=1e-4)
    np.testing.assert_allclose(means["per_batch"], want, rtol=0, atol=1e-4)
    np.testing.assert_allclose(biases["mean"], biases["per_batch"], rtol=0, atol=1e-5)
