"""Build the demo models and data sets for the meter-reader scenario.

Transformation: the UCI hand-written digits bundled with scikit-learn
(``load_digits``: 1797 crops, 8x8, values 0..16) -> scaled to [0, 1] and split
(stratified, seeded) into disjoint train / calibration / validation sets ->
four small PyTorch classifiers trained deterministically on the train split ->
exported with the TorchScript-based ``torch.onnx.export`` at default-domain
opsets 13..18 (so GELU, SiLU and Mish appear as the decomposed subgraphs real
exporters write) -> ``calib.npz``, ``val.npz``, ``*.onnx`` and
``manifest.json`` (file hashes, opsets, activation patterns and fp32
validation accuracy measured with onnxruntime).

Needs torch (the ``demo`` extra); the ``swapper`` package itself never does.

    python demo_models/build.py                # (re)build into demo_models/
    python demo_models/build.py --check        # rebuild in a temp dir, compare bytes
"""
from __future__ import annotations

import argparse
import hashlib
import io
import json
import logging
import os
import random
import sys
import tempfile
import warnings
import zipfile
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import torch
from sklearn.datasets import load_digits
from sklearn.metrics import accuracy_score
from sklearn.model_selection import train_test_split
from torch import nn

logger = logging.getLogger(__name__)

HERE = Path(__file__).resolve().parent
SEED = 20240817
N_CALIB = 256
N_VAL = 450
BATCH = 32
INPUT_NAME = "pixels"
OUTPUT_NAME = "logits"
# npz members get a fixed timestamp so the files are byte-identical run to run.
ZIP_EPOCH = (1980, 1, 1, 0, 0, 0)


@dataclass
class Splits:
    """Disjoint stratified splits; pixels are float32 [N,1,8,8] in [0,1]."""

    train_x: np.ndarray
    train_y: np.ndarray
    train_idx: np.ndarray
    calib_x: np.ndarray
    calib_idx: np.ndarray
    val_x: np.ndarray
    val_y: np.ndarray
    val_idx: np.ndarray


@dataclass
class Spec:
    """One demo model: how to make it, train it and export it."""

    file: str
    make: type
    opset: int
    epochs: int
    lr: float
    summary: str
    expected: dict  # activation pattern -> count the exported graph must show


def seed_everything(seed: int) -> None:
    """Pin every RNG and force deterministic single-threaded kernels."""
    random.seed(seed)
    np.random.seed(seed)
    torch.manual_seed(seed)
    torch.use_deterministic_algorithms(True)
    torch.set_num_threads(1)


def make_splits(seed: int = SEED) -> Splits:
    """Split load_digits into train / calibration / validation, stratified by label."""
    digits = load_digits()
    x = (digits.data / 16.0).astype(np.float32).reshape(-1, 1, 8, 8)  # k/16 is exact in float32
    y = digits.target.astype(np.int64)
    idx = np.arange(len(y))
    rest, val_idx = train_test_split(idx, test_size=N_VAL, stratify=y, random_state=seed)
    train_idx, calib_idx = train_test_split(rest, test_size=N_CALIB, stratify=y[rest], random_state=seed + 1)
    train_idx, calib_idx, val_idx = np.sort(train_idx), np.sort(calib_idx), np.sort(val_idx)
    return Splits(x[train_idx], y[train_idx], train_idx.astype(np.int64), x[calib_idx],
                  calib_idx.astype(np.int64), x[val_idx], y[val_idx], val_idx.astype(np.int64))


def write_npz(path: Path, arrays: dict[str, np.ndarray]) -> None:
    """np.savez-compatible archive with fixed member timestamps (np.savez stamps 'now')."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_STORED) as zf:
        for name in sorted(arrays):
            member = io.BytesIO()
            np.lib.format.write_array(member, np.ascontiguousarray(arrays[name]), allow_pickle=False)
            zf.writestr(zipfile.ZipInfo(name + ".npy", date_time=ZIP_EPOCH), member.getvalue())
    write_bytes(path, buf.getvalue())


def write_bytes(path: Path, data: bytes) -> None:
    """Write atomically so a failed build never leaves half a file behind."""
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=path.name + ".")
    with os.fdopen(fd, "wb") as fh:
        fh.write(data)
    os.chmod(tmp, 0o644)  # mkstemp creates 0600; these files are meant to be shared
    os.replace(tmp, path)


# ---------------------------------------------------------------- models


def conv_block(c_in: int, c_out: int) -> nn.Sequential:
    """Conv 3x3 (same padding) + BatchNorm + SiLU; the exporter fuses BN into the Conv in eval mode."""
    return nn.Sequential(nn.Conv2d(c_in, c_out, 3, padding=1, bias=False), nn.BatchNorm2d(c_out), nn.SiLU())


class SqueezeExcite(nn.Module):
    """Channel gate: x * Sigmoid(Conv1x1(ReLU(Conv1x1(GAP(x)))))."""

    def __init__(self, channels: int, hidden: int):
        super().__init__()
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.reduce = nn.Conv2d(channels, hidden, 1)
        self.act = nn.ReLU()
        self.expand = nn.Conv2d(hidden, channels, 1)
        self.gate = nn.Sigmoid()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x * self.gate(self.expand(self.act(self.reduce(self.pool(x)))))


class MeterCNN(nn.Module):
    """1->16->32->32 channels, a 2x2 max-pool, one squeeze-excite gate, GAP + Linear head."""

    def __init__(self):
        super().__init__()
        self.features = nn.Sequential(conv_block(1, 16), conv_block(16, 32), nn.MaxPool2d(2),
                                      conv_block(32, 32), SqueezeExcite(32, 8))
        self.head = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.features(x))


class GeluMLP(nn.Module):
    """Flatten -> Linear 64 -> GELU(exact) -> Linear 32 -> GELU(exact) -> Linear 10."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, 64), nn.GELU(), nn.Linear(64, 32),
                                 nn.GELU(), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.net(x)


class TanhSigmoidMLP(nn.Module):
    """Flatten -> Linear 48 -> Tanh -> Linear 32 -> Sigmoid -> Linear 10."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, 48), nn.Tanh(), nn.Linear(48, 32),
                                 nn.Sigmoid(), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.net(x)


class MishGeluTanhMLP(nn.Module):
    """Flatten -> Linear 48 -> BatchNorm1d -> Mish -> Linear 32 -> GELU(tanh) -> Linear 10."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, 48), nn.BatchNorm1d(48), nn.Mish(),
                                 nn.Linear(48, 32), nn.GELU(approximate="tanh"), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.net(x)


SPECS = [
    Spec("meter_cnn_silu.onnx", MeterCNN, 17, 30, 3e-3,
         "3x [Conv3x3+BN+SiLU] (1->16->32, maxpool 2x2, ->32), squeeze-excite (ReLU, Sigmoid gate), GAP, Gemm",
         {"silu_decomposed": 3, "sigmoid_gate": 1, "relu": 1}),
    Spec("meter_gelu_mlp.onnx", GeluMLP, 18, 40, 3e-3,
         "Flatten, Gemm 64->64, GELU(exact), Gemm 64->32, GELU(exact), Gemm 32->10",
         {"gelu_erf": 2}),
    Spec("meter_mlp_tanh_sigmoid.onnx", TanhSigmoidMLP, 13, 40, 3e-3,
         "Flatten, Gemm 64->48, Tanh, Gemm 48->32, Sigmoid, Gemm 32->10",
         {"tanh": 1, "sigmoid": 1}),
    Spec("meter_mlp_mish_gelutanh.onnx", MishGeluTanhMLP, 15, 40, 3e-3,
         "Flatten, Gemm 64->48, BatchNormalization, Mish, Gemm 48->32, GELU(tanh approx.), Gemm 32->10",
         {"mish_decomposed": 1, "gelu_tanh": 1, "batchnorm": 1}),
]


def train(model: nn.Module, splits: Splits, spec: Spec, seed: int) -> nn.Module:
    """Adam on cross-entropy, seeded minibatch shuffling, fixed epoch count; returns the model in eval mode."""
    x = torch.from_numpy(splits.train_x)
    y = torch.from_numpy(splits.train_y)
    gen = torch.Generator().manual_seed(seed)
    opt = torch.optim.Adam(model.parameters(), lr=spec.lr)
    loss_fn = nn.CrossEntropyLoss()
    model.train()
    for epoch in range(spec.epochs):
        order = torch.randperm(len(y), generator=gen)
        total = 0.0
        for start in range(0, len(y), BATCH):
            batch = order[start:start + BATCH]
            opt.zero_grad()
            loss = loss_fn(model(x[batch]), y[batch])
            loss.backward()
            opt.step()
            total += float(loss.detach()) * len(batch)
        logger.debug("%s epoch %d loss %.4f", spec.file, epoch, total / len(y))
    return model.eval()


def export_onnx(model: nn.Module, spec: Spec) -> bytes:
    """TorchScript-based exporter (no onnxscript needed), dynamic batch axis, fixed names."""
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the legacy path announces its deprecation on every call
        torch.onnx.export(model, (torch.zeros(2, 1, 8, 8),), buf, dynamo=False, opset_version=spec.opset,
                          input_names=[INPUT_NAME], output_names=[OUTPUT_NAME], do_constant_folding=True,
                          dynamic_axes={INPUT_NAME: {0: "batch"}, OUTPUT_NAME: {0: "batch"}})
    proto = onnx.load_from_string(buf.getvalue())
    proto.graph.name = Path(spec.file).stem
    proto.doc_string = f"swapper demo (meter reader, UCI digits 8x8): {spec.summary}"
    onnx.checker.check_model(proto, full_check=True)
    return proto.SerializeToString()


# ---------------------------------------------------------------- graph facts


def _const_value(graph: onnx.GraphProto, name: str) -> np.ndarray | None:
    for init in graph.initializer:
        if init.name == name:
            return onnx.numpy_helper.to_array(init)
    for node in graph.node:
        if node.op_type == "Constant" and node.output[0] == name:
            return onnx.numpy_helper.to_array(node.attribute[0].t)
    return None


def _is_scalar(graph: onnx.GraphProto, name: str, value: float) -> bool:
    c = _const_value(graph, name)
    return c is not None and c.size == 1 and abs(float(c.reshape(())) - value) < 1e-6


def activation_patterns(proto: onnx.ModelProto) -> dict[str, int]:
    """Count the activation forms in an exported graph (the claims README and manifest make)."""
    graph = proto.graph
    producer = {out: n for n in graph.node for out in n.output}
    consumers: dict[str, list] = {}
    for n in graph.node:
        for inp in n.input:
            consumers.setdefault(inp, []).append(n)
    counts: Counter = Counter()
    for n in graph.node:
        if n.op_type == "Sigmoid":
            muls = [m for m in consumers.get(n.output[0], []) if m.op_type == "Mul"]
            if muls and all(n.input[0] in m.input for m in muls):
                counts["silu_decomposed"] += 1
            elif muls:
                counts["sigmoid_gate"] += 1
            else:
                counts["sigmoid"] += 1
        elif n.op_type == "Erf":
            div = producer.get(n.input[0])
            ok = div is not None and div.op_type == "Div"
            ok = ok and _is_scalar(graph, div.input[1], np.sqrt(2.0))  # erf(x / sqrt(2))
            counts["gelu_erf" if ok else "erf"] += 1
        elif n.op_type == "Tanh":
            src = producer.get(n.input[0])
            if src is not None and src.op_type == "Softplus":
                counts["mish_decomposed"] += 1
            elif src is not None and src.op_type == "Mul" and any(
                    _is_scalar(graph, i, np.sqrt(2.0 / np.pi)) for i in src.input):
                counts["gelu_tanh"] += 1  # tanh(sqrt(2/pi) * (x + 0.044715 x^3))
            else:
                counts["tanh"] += 1
        elif n.op_type == "Relu":
            counts["relu"] += 1
        elif n.op_type == "BatchNormalization":
            counts["batchnorm"] += 1
        elif n.op_type in ("Gelu", "Mish", "Elu", "Selu", "HardSwish", "HardSigmoid"):
            counts[n.op_type.lower() + "_op"] += 1  # single-op forms (none expected at these opsets)
    return dict(sorted(counts.items()))


def default_opset(proto: onnx.ModelProto) -> int:
    """Version of the default ('' / ai.onnx) domain."""
    return next(e.version for e in proto.opset_import if e.domain in ("", "ai.onnx"))


def ort_accuracy(model_bytes: bytes, pixels: np.ndarray, labels: np.ndarray) -> float:
    """fp32 top-1 accuracy with onnxruntime on CPU, one thread for reproducibility."""
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    sess = ort.InferenceSession(model_bytes, opts, providers=["CPUExecutionProvider"])
    logits = sess.run([OUTPUT_NAME], {INPUT_NAME: pixels})[0]
    return float(accuracy_score(labels, logits.argmax(axis=1)))


def sha256(data: bytes) -> str:
    """Hex digest used in the manifest."""
    return hashlib.sha256(data).hexdigest()


# ---------------------------------------------------------------- driver


def build(out: Path, seed: int = SEED) -> dict:
    """Write calib.npz, val.npz, the models and manifest.json into ``out``; return the manifest."""
    out.mkdir(parents=True, exist_ok=True)
    splits = make_splits(seed)
    # calib/val hold only what swapper feeds (extra arrays would be read as model inputs);
    # the load_digits row numbers of every split go to splits.npz for provenance.
    write_npz(out / "calib.npz", {"pixels": splits.calib_x})
    write_npz(out / "val.npz", {"pixels": splits.val_x, "labels": splits.val_y})
    write_npz(out / "splits.npz", {"train_index": splits.train_idx, "calib_index": splits.calib_idx,
                                   "val_index": splits.val_idx})
    manifest = {
        "seed": seed,
        "source": "sklearn.datasets.load_digits (UCI ML hand-written digits), pixels = data / 16",
        "splits": {"train": int(len(splits.train_y)), "calib": int(len(splits.calib_idx)),
                   "val": int(len(splits.val_y))},
        "data": {name: sha256((out / name).read_bytes()) for name in ("calib.npz", "val.npz", "splits.npz")},
        "exporter": f"torch {torch.__version__} torch.onnx.export(dynamo=False)",
        "models": {},
    }
    for k, spec in enumerate(SPECS):
        seed_everything(seed + 100 * (k + 1))
        model = train(spec.make(), splits, spec, seed + 100 * (k + 1))
        data = export_onnx(model, spec)
        proto = onnx.load_from_string(data)
        patterns = activation_patterns(proto)
        for name, count in spec.expected.items():
            if patterns.get(name) != count:
                raise RuntimeError(f"{spec.file}: expected {count} x {name}, graph shows {patterns}")
        if len(data) >= 1_000_000:
            raise RuntimeError(f"{spec.file}: {len(data)} bytes, the demo budget is < 1 MB")
        acc = ort_accuracy(data, splits.val_x, splits.val_y)
        write_bytes(out / spec.file, data)
        manifest["models"][spec.file] = {
            "sha256": sha256(data),
            "bytes": len(data),
            "opset": default_opset(proto),
            "architecture": spec.summary,
            "activations": patterns,
            "op_types": dict(sorted(Counter(n.op_type for n in proto.graph.node).items())),
            "val_accuracy": acc,
            "train": {"optimizer": "Adam", "lr": spec.lr, "epochs": spec.epochs, "batch": BATCH},
        }
        logger.info("%s: opset %d, %d bytes, val accuracy %.4f, %s",
                    spec.file, default_opset(proto), len(data), acc, patterns)
    write_bytes(out / "manifest.json", (json.dumps(manifest, indent=2, sort_keys=True) + "\n").encode())
    return manifest


def check_reproducible(committed: Path) -> bool:
    """Rebuild in a temporary folder and compare every file byte for byte with ``committed``."""
    with tempfile.TemporaryDirectory() as tmp:
        fresh = build(Path(tmp))
        names = ["calib.npz", "val.npz", "splits.npz", "manifest.json", *fresh["models"]]
        same = True
        for name in names:
            a, b = (committed / name), (Path(tmp) / name)
            equal = a.exists() and a.read_bytes() == b.read_bytes()
            logger.info("%s: %s", name, "identical" if equal else "DIFFERS")
            same &= equal
    return same


def main(argv: list[str] | None = None) -> int:
    """Command-line entry: build (default) or --check against the committed files."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="folder to write into (default: demo_models/)")
    parser.add_argument("--check", action="store_true", help="rebuild in a temp dir and compare with --out")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    if args.check:
        return 0 if check_reproducible(args.out) else 1
    build(args.out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
