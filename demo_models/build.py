"""Build the demo models and data sets for the meter-reader scenario.

Transformation: the UCI hand-written digits bundled with scikit-learn
(``load_digits``: 1797 crops, 8x8, values 0..16) -> scaled to [0, 1] and split
(stratified, seeded) into disjoint train / calibration / validation sets ->
five small PyTorch classifiers trained deterministically on the train split ->
exported with the TorchScript-based ``torch.onnx.export`` at default-domain
opsets 13..18 (so GELU, SiLU and Mish appear as the decomposed subgraphs real
exporters write) -> ``calib.npz``, ``val.npz``, ``*.onnx`` and
``manifest.json`` (file hashes, opsets, activation patterns and fp32
validation accuracy measured with onnxruntime). The meter's status messages
(status_messages.py) go the same way into a token encoder (status_encoder.py)
with its own ``status_*.npz`` files.

Needs torch (the ``demo`` extra); the ``swapper`` package itself never does.

    python demo_models/build.py                # (re)build into demo_models/
    python demo_models/build.py --check        # rebuild in a temp dir, compare bytes
    python demo_models/build.py --only a.onnx  # retrain a.onnx only, keep the other models as they are
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
import time
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

# siblings in demo_models/ (running the script puts its folder on sys.path)
import status_encoder
from digit_models import GeluMLP, MeterCNN, MeterResNet, MishGeluTanhMLP, TanhSigmoidMLP
from graph_facts import activation_patterns, default_opset
from status_messages import CLASS_NAMES, MAX_LEN, MIN_COUNT, StatusSplits, make_status_splits

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
RESNET_EPOCHS, RESNET_LR = 30, 3e-3
STATUS_EPOCHS, STATUS_LR = 20, 3e-3
STATUS_SEED_OFFSET = 2  # the status messages draw from seed + 2 (seed and seed + 1 split the digits)
TORCH_GAP = 1e-4  # largest onnxruntime - torch embedding difference the build accepts (float32 noise)


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
    kind: str = "digits"  # "digits": pixels -> logits; "status": word ids -> embedding
    calib: str = "calib.npz"
    val: str = "val.npz"


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
    Spec("meter_resnet_silu.onnx", MeterResNet, 13, RESNET_EPOCHS, RESNET_LR,
         "stem Conv3x3+BN+SiLU 1->16, 6 residual blocks [Conv3x3+BN+SiLU, Conv3x3+BN, Add skip, SiLU] "
         "(3 at 16 ch 8x8; 16->32 stride 2 with Conv1x1+BN skip; 2 at 32 ch 4x4), GAP, Gemm 32->10",
         {"silu_decomposed": 13}),
    Spec("status_encoder_gelu.onnx", status_encoder.StatusEncoder, 17, STATUS_EPOCHS, STATUS_LR,
         "word embedding + learned position embedding (16 x 32), 2 pre-norm encoder layers "
         "[LayerNorm, 2-head self-attention with key padding mask, LayerNorm, MLP 32->128->GELU(exact)->32], "
         "LayerNorm, masked mean pooling, Linear 32->32, L2 normalisation",
         {"gelu_erf": 2, "softmax": 2, "layernorm": 5},
         kind="status", calib="status_calib.npz", val="status_val.npz"),
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
    return finish(buf.getvalue(), spec, "meter reader, UCI digits 8x8")


def finish(raw: bytes, spec: Spec, scenario: str) -> bytes:
    """Name the graph, describe it, and run the full ONNX check on the exporter's bytes."""
    proto = onnx.load_from_string(raw)
    proto.graph.name = Path(spec.file).stem
    proto.doc_string = f"swapper demo ({scenario}): {spec.summary}"
    onnx.checker.check_model(proto, full_check=True)
    return proto.SerializeToString()


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


def write_status_data(out: Path, data: StatusSplits) -> None:
    """status_calib / status_val hold only what swapper feeds (val adds ``classes``); the rest is provenance."""
    write_npz(out / "status_calib.npz", {"input_ids": data.input_ids["calib"],
                                         "attention_mask": data.attention_mask["calib"]})
    write_npz(out / "status_val.npz", {"input_ids": data.input_ids["val"],
                                       "attention_mask": data.attention_mask["val"], "classes": data.classes["val"]})
    # strings as fixed-width UTF-8 bytes: they load without pickle at a quarter of numpy's unicode size;
    # the training ids are not stored, the documented tokenizer makes them from train_text and vocab
    def utf8(strings: list[str]) -> np.ndarray:
        return np.array([t.encode("utf-8") for t in strings])

    provenance = {"vocab": utf8(data.vocab), "class_names": utf8(CLASS_NAMES)}
    for part in ("train", "calib", "val"):
        provenance[f"{part}_text"] = utf8(data.texts[part])
        provenance[f"{part}_classes"] = data.classes[part]
    write_npz(out / "status_splits.npz", provenance)


def train_and_export(spec: Spec, splits: Splits, status: StatusSplits, seed: int) -> bytes:
    """Seed, train and export one model; the digits models go exactly as they always did."""
    seed_everything(seed)
    if spec.kind == "digits":
        return export_onnx(train(spec.make(), splits, spec, seed), spec)
    encoder = status_encoder.train(status, spec.epochs, spec.lr, BATCH, seed)
    data = finish(status_encoder.export(encoder, spec.opset), spec, "meter reader, status messages")
    gap = status_encoder.torch_gap(encoder, data, status)
    logger.info("%s: onnxruntime vs torch, max |diff| of the val embeddings %.3g", spec.file, gap)
    if not gap <= TORCH_GAP:
        raise RuntimeError(f"{spec.file}: onnxruntime and torch differ by {gap} (> {TORCH_GAP})")
    return data


def describe(spec: Spec, data: bytes, splits: Splits, status: StatusSplits) -> dict:
    """Manifest entry of a model, computed from its bytes alone (so a kept model is described like a fresh one)."""
    proto = onnx.load_from_string(data)
    patterns = activation_patterns(proto)
    for name, count in spec.expected.items():
        if patterns.get(name) != count:
            raise RuntimeError(f"{spec.file}: expected {count} x {name}, graph shows {patterns}")
    if len(data) >= 1_000_000:
        raise RuntimeError(f"{spec.file}: {len(data)} bytes, the demo budget is < 1 MB")
    entry = {
        "sha256": sha256(data),
        "bytes": len(data),
        "opset": default_opset(proto),
        "architecture": spec.summary,
        "activations": patterns,
        "op_types": dict(sorted(Counter(n.op_type for n in proto.graph.node).items())),
        "train": {"optimizer": "Adam", "lr": spec.lr, "epochs": spec.epochs, "batch": BATCH},
        "calib": spec.calib,
        "val": spec.val,
    }
    if spec.kind == "digits":
        entry["task"] = "classification"
        entry["inputs"] = {INPUT_NAME: "float32 [batch,1,8,8]"}
        entry["outputs"] = {OUTPUT_NAME: "float32 [batch,10]"}
        entry["val_accuracy"] = ort_accuracy(data, splits.val_x, splits.val_y)
    else:
        status_encoder.check_graph(proto)
        entry["task"] = "embedding"
        entry["inputs"] = {name: f"int64 [batch,{MAX_LEN}]" for name in status_encoder.INPUTS}
        entry["outputs"] = {status_encoder.OUTPUT: f"float32 [batch,{status_encoder.D_OUT}]"}
        entry["train"]["loss"] = "cross-entropy through a linear class head on the embedding (head not exported)"
        entry["val_nearest_centroid_accuracy"] = status_encoder.centroid_accuracy(data, status)
    return entry


def build(out: Path, seed: int = SEED, only: set[str] | None = None) -> dict:
    """Write the data files, the models and manifest.json into ``out``; return the manifest.

    ``only``: retrain just these models; every other model is read from ``out`` as it is
    (it must be there) and described afresh from its bytes.
    """
    out.mkdir(parents=True, exist_ok=True)
    splits = make_splits(seed)
    # calib/val hold only what swapper feeds (extra arrays would be read as model inputs);
    # the load_digits row numbers of every split go to splits.npz for provenance.
    write_npz(out / "calib.npz", {"pixels": splits.calib_x})
    write_npz(out / "val.npz", {"pixels": splits.val_x, "labels": splits.val_y})
    write_npz(out / "splits.npz", {"train_index": splits.train_idx, "calib_index": splits.calib_idx,
                                   "val_index": splits.val_idx})
    status = make_status_splits(seed + STATUS_SEED_OFFSET)
    write_status_data(out, status)
    data_files = ("calib.npz", "val.npz", "splits.npz", "status_calib.npz", "status_val.npz", "status_splits.npz")
    manifest = {
        "seed": seed,
        "source": "sklearn.datasets.load_digits (UCI ML hand-written digits), pixels = data / 16",
        "splits": {"train": int(len(splits.train_y)), "calib": int(len(splits.calib_idx)),
                   "val": int(len(splits.val_y))},
        "status_messages": {
            "source": "invented status messages of the meter reader (demo_models/status_messages.py), "
                      f"seed {seed + STATUS_SEED_OFFSET}",
            "classes": list(CLASS_NAMES),
            "splits": {part: len(texts) for part, texts in status.texts.items()},
            "tokenizer": f"lower case, split on white space; vocabulary = training words seen >= {MIN_COUNT} "
                         f"times; [PAD]=0, [UNK]=1; {MAX_LEN} ids, padded on the right",
            "vocab_size": len(status.vocab),
        },
        "data": {name: sha256((out / name).read_bytes()) for name in data_files},
        "exporter": f"torch {torch.__version__} torch.onnx.export(dynamo=False)",
        "models": {},
    }
    for k, spec in enumerate(SPECS):
        if only is None or spec.file in only:
            start = time.process_time()  # CPU seconds: a busy machine does not inflate them
            data = train_and_export(spec, splits, status, seed + 100 * (k + 1))
            write_bytes(out / spec.file, data)
            logger.info("%s: trained and exported in %.1f s of CPU", spec.file, time.process_time() - start)
        else:
            data = (out / spec.file).read_bytes()
            logger.info("%s: kept as it is", spec.file)
        entry = describe(spec, data, splits, status)
        manifest["models"][spec.file] = entry
        figure = {key: value for key, value in entry.items() if key.startswith("val_")}
        logger.info("%s: opset %d, %d bytes, %s, %s", spec.file, entry["opset"], len(data), figure,
                    entry["activations"])
    write_bytes(out / "manifest.json", (json.dumps(manifest, indent=2, sort_keys=True) + "\n").encode())
    return manifest


def check_reproducible(committed: Path, only: set[str] | None = None) -> bool:
    """Rebuild in a temporary folder and compare every file byte for byte with ``committed``.

    With ``only``, the other models are copied from ``committed`` first (and reported as kept).
    """
    with tempfile.TemporaryDirectory() as tmp:
        kept = set()
        if only is not None:
            kept = {spec.file for spec in SPECS if spec.file not in only}
            for name in kept:
                (Path(tmp) / name).write_bytes((committed / name).read_bytes())
        fresh = build(Path(tmp), only=only)
        names = [*fresh["data"], "manifest.json", *fresh["models"]]
        same = True
        for name in names:
            a, b = (committed / name), (Path(tmp) / name)
            equal = a.exists() and a.read_bytes() == b.read_bytes()
            note = " (kept, not rebuilt)" if name in kept else ""
            logger.info("%s: %s%s", name, "identical" if equal else "DIFFERS", note)
            same &= equal
    return same


def main(argv: list[str] | None = None) -> int:
    """Command-line entry: build (default) or --check against the committed files."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="folder to write into (default: demo_models/)")
    parser.add_argument("--check", action="store_true", help="rebuild in a temp dir and compare with --out")
    parser.add_argument("--only", nargs="+", metavar="FILE", choices=[spec.file for spec in SPECS],
                        help="retrain only these models; the others are kept as they are in --out")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    only = set(args.only) if args.only else None
    if args.check:
        return 0 if check_reproducible(args.out, only) else 1
    build(args.out, only=only)
    return 0


if __name__ == "__main__":
    sys.exit(main())
