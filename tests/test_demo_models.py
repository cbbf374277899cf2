"""Checks on the committed demo models and data (demo_models/), without torch.

Each committed model must be a valid ONNX file that onnxruntime runs on the
validation file manifest.json names for it, with exactly the figure the manifest
records (top-1 accuracy for the digit classifiers, nearest-class-centroid
accuracy for the status encoder); the activation subgraphs the manifest claims
must be present and must compute the published functions; calib.npz and val.npz
must be disjoint rows of scikit-learn's copy of the UCI digits; the status files
must be the documented tokenization of disjoint message sets.
"""
from __future__ import annotations

import functools
import hashlib
from collections import Counter

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx.reference import ReferenceEvaluator
from scipy import special
from sklearn.datasets import load_digits
from sklearn.metrics import accuracy_score
from sklearn.neighbors import NearestCentroid
from sklearn.preprocessing import normalize
from testkit import DEMO, manifest

MANIFEST = manifest()
MODELS = sorted(MANIFEST["models"])
CLASSIFIERS = [m for m in MODELS if MANIFEST["models"][m]["task"] == "classification"]
ENCODERS = [m for m in MODELS if MANIFEST["models"][m]["task"] == "embedding"]


@functools.lru_cache(maxsize=None)
def _model(name: str) -> onnx.ModelProto:
    return onnx.load(str(DEMO / name))


@functools.lru_cache(maxsize=None)
def _session(name: str) -> ort.InferenceSession:
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    return ort.InferenceSession(str(DEMO / name), opts, providers=["CPUExecutionProvider"])


@functools.lru_cache(maxsize=None)
def _npz(name: str) -> dict[str, np.ndarray]:
    with np.load(DEMO / name, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def _opset(model: onnx.ModelProto) -> int:
    return next(e.version for e in model.opset_import if e.domain in ("", "ai.onnx"))


def _logits(name: str, pixels: np.ndarray) -> np.ndarray:
    return _session(name).run(["logits"], {"pixels": pixels})[0]


def _val_feeds(name: str) -> dict[str, np.ndarray]:
    """The model's inputs, read from the validation file manifest.json names for it."""
    val = _npz(MANIFEST["models"][name]["val"])
    return {i.name: val[i.name] for i in _model(name).graph.input}


def _run(name: str, feeds: dict[str, np.ndarray]) -> np.ndarray:
    return _session(name).run(None, feeds)[0]


def _embed(name: str, ids: np.ndarray, mask: np.ndarray) -> np.ndarray:
    return _session(name).run(["embedding"], {"input_ids": ids, "attention_mask": mask})[0]


# ---------------------------------------------------------------- files and manifest


def test_manifest_lists_every_committed_model():
    assert sorted(p.name for p in DEMO.glob("*.onnx")) == MODELS
    assert len(MODELS) >= 3
    assert sorted(CLASSIFIERS + ENCODERS) == MODELS  # every model has a known task


@pytest.mark.parametrize("name", MODELS)
def test_model_names_its_own_hashed_data_files(name):
    entry = MANIFEST["models"][name]
    for key in ("calib", "val"):
        assert entry[key] in MANIFEST["data"] and (DEMO / entry[key]).is_file()
    # calibration data is unlabelled: its arrays are exactly the model's inputs
    inputs = sorted(i.name for i in _model(name).graph.input)
    assert sorted(_npz(entry["calib"])) == inputs == sorted(entry["inputs"])


@pytest.mark.parametrize("name", MODELS)
def test_model_file_matches_manifest_hash_and_size(name):
    data = (DEMO / name).read_bytes()
    assert hashlib.sha256(data).hexdigest() == MANIFEST["models"][name]["sha256"]
    assert len(data) < 1_000_000  # demo size budget (README "Models": well under 1 MB); common practice, no source


@pytest.mark.parametrize("name", MODELS)
def test_model_passes_full_onnx_check(name):
    # source: onnx.checker with full_check=True also runs strict shape inference
    onnx.checker.check_model(_model(name), full_check=True)


@pytest.mark.parametrize("name", MODELS)
def test_model_opset_domain_and_op_counts(name):
    model = _model(name)
    opset = _opset(model)
    # Gelu became a default-domain op in opset 20 (source: ONNX operator spec, Gelu
    # "since version 20"); 13..18 keeps GELU/Mish decomposed as exporters write them.
    assert 13 <= opset <= 18
    assert opset == MANIFEST["models"][name]["opset"]
    assert {e.domain for e in model.opset_import} <= {"", "ai.onnx"}
    counts = Counter(n.op_type for n in model.graph.node)
    assert dict(sorted(counts.items())) == MANIFEST["models"][name]["op_types"]


@pytest.mark.parametrize("name", CLASSIFIERS)
def test_classifier_interface(name):
    model = _model(name)
    (inp,), (out,) = model.graph.input, model.graph.output
    assert inp.name == "pixels" and out.name == "logits"
    assert inp.type.tensor_type.elem_type == onnx.TensorProto.FLOAT
    in_dims = inp.type.tensor_type.shape.dim
    out_dims = out.type.tensor_type.shape.dim
    assert in_dims[0].dim_param and not in_dims[0].HasField("dim_value")  # dynamic batch
    assert [d.dim_value for d in in_dims[1:]] == [1, 8, 8]
    assert out_dims[0].dim_param and [d.dim_value for d in out_dims[1:]] == [10]


@pytest.mark.parametrize("name", ENCODERS)
def test_encoder_interface(name):
    # source: demo_models/README.md "The status encoder" (interface) and manifest.json inputs/outputs
    model = _model(name)
    assert [i.name for i in model.graph.input] == ["input_ids", "attention_mask"]
    for inp in model.graph.input:
        dims = inp.type.tensor_type.shape.dim
        assert inp.type.tensor_type.elem_type == onnx.TensorProto.INT64
        assert dims[0].dim_param and not dims[0].HasField("dim_value")  # dynamic batch
        assert [d.dim_value for d in dims[1:]] == [16]
    (out,) = model.graph.output
    dims = out.type.tensor_type.shape.dim
    assert out.name == "embedding" and out.type.tensor_type.elem_type == onnx.TensorProto.FLOAT
    assert dims[0].dim_param and [d.dim_value for d in dims[1:]] == [32]


# ---------------------------------------------------------------- accuracy


@pytest.mark.parametrize("name", CLASSIFIERS)
def test_val_accuracy_equals_manifest(name):
    val = _npz(MANIFEST["models"][name]["val"])
    pred = _logits(name, val["pixels"]).argmax(axis=1)
    # source: sklearn.metrics.accuracy_score as the reference accuracy
    acc = accuracy_score(val["labels"], pred)
    assert abs(acc - MANIFEST["models"][name]["val_accuracy"]) <= 1e-9
    assert acc > 0.93  # expected level for 8x8 digits; common practice, no source


@pytest.mark.parametrize("name", MODELS)
def test_onnxruntime_agrees_with_reference_evaluator(name):
    feeds = {k: v[:24] for k, v in _val_feeds(name).items()}
    # source: onnx.reference.ReferenceEvaluator, the ONNX spec's Python implementation
    ref = ReferenceEvaluator(_model(name)).run(None, feeds)[0]
    np.testing.assert_allclose(_run(name, feeds), ref, rtol=1e-4, atol=1e-4)


@settings(max_examples=12, deadline=None)
@given(name=st.sampled_from(MODELS), start=st.integers(0, 350), size=st.integers(1, 49))
def test_dynamic_batch_gives_rowwise_identical_outputs(name, start, size):
    feeds = _val_feeds(name)
    full = _run(name, feeds)
    part = _run(name, {k: v[start:start + size] for k, v in feeds.items()})
    # per-row models: a row's output cannot depend on its batch-mates (float32 tolerance)
    np.testing.assert_allclose(part, full[start:start + size], rtol=1e-5, atol=1e-5)


# ---------------------------------------------------------------- the status encoder


@pytest.mark.parametrize("name", ENCODERS)
def test_embedding_has_unit_length(name):
    emb = _run(name, _val_feeds(name))
    # source: sklearn.preprocessing.normalize (L2 rows) as the reference normalisation
    np.testing.assert_allclose(emb, normalize(emb.astype(np.float64)), rtol=0, atol=1e-6)
    np.testing.assert_allclose(np.linalg.norm(emb, axis=1), 1.0, atol=1e-5)


@pytest.mark.parametrize("name", ENCODERS)
def test_padding_positions_do_not_change_the_embedding(name):
    # Our own architecture (README "The status encoder"): padding keys get -1e9 before Softmax
    # and the mean pooling skips them, so ids where attention_mask is 0 cannot matter.
    feeds = _val_feeds(name)
    ids, mask = feeds["input_ids"], feeds["attention_mask"]
    assert (mask == 0).any(axis=1).all()  # every row has padding, so the check covers every row
    rng = np.random.default_rng(11)
    vocab = MANIFEST["status_messages"]["vocab_size"]
    noisy = np.where(mask == 0, rng.integers(0, vocab, size=ids.shape), ids)
    assert (noisy != ids).any()
    np.testing.assert_allclose(_embed(name, noisy, mask), _embed(name, ids, mask), rtol=0, atol=1e-5)
    # and the mask is read at all: counting the padding as words moves the embedding
    assert np.abs(_embed(name, ids, np.ones_like(mask)) - _embed(name, ids, mask)).max() > 1e-3


@pytest.mark.parametrize("name", ENCODERS)
def test_nearest_centroid_accuracy_equals_manifest(name):
    splits, val = _npz("status_splits.npz"), _npz(MANIFEST["models"][name]["val"])
    train = _embed(name, *_tokenize(splits["train_text"], splits["vocab"]))
    # source: sklearn.neighbors.NearestCentroid (class means of the training embeddings) and accuracy_score
    pred = NearestCentroid().fit(train, splits["train_classes"]).predict(_run(name, _val_feeds(name)))
    acc = accuracy_score(val["classes"], pred)
    assert abs(acc - MANIFEST["models"][name]["val_nearest_centroid_accuracy"]) <= 1e-9
    assert acc > 0.9  # template messages are easy to tell apart; common practice, no source


# ---------------------------------------------------------------- activation subgraphs


def _const(model: onnx.ModelProto, name: str) -> float | None:
    for init in model.graph.initializer:
        if init.name == name and np.prod(init.dims) == 1:
            return float(onnx.numpy_helper.to_array(init).reshape(()))
    for node in model.graph.node:
        if node.op_type == "Constant" and node.output[0] == name:
            arr = onnx.numpy_helper.to_array(node.attribute[0].t)
            return float(arr.reshape(())) if arr.size == 1 else None
    return None


def _sites(model: onnx.ModelProto) -> list[tuple[str, str, str]]:
    """(kind, input tensor, output tensor) of each activation subgraph, found from its anchor op."""
    nodes = model.graph.node
    producer = {o: n for n in nodes for o in n.output}
    consumers: dict[str, list] = {}
    for n in nodes:
        for i in n.input:
            consumers.setdefault(i, []).append(n)

    def only(tensor: str, op: str):
        (nxt,) = consumers[tensor]
        assert nxt.op_type == op, f"{tensor} feeds {nxt.op_type}, expected {op}"
        return nxt

    def other(node, tensor: str) -> str:
        (rest,) = [i for i in node.input if i != tensor]
        return rest

    sites = []
    for n in nodes:
        if n.op_type == "Sigmoid":
            (mul,) = consumers[n.output[0]]
            if mul.op_type == "Mul" and n.input[0] in mul.input:
                sites.append(("silu_decomposed", n.input[0], mul.output[0]))
            elif mul.op_type == "Mul":
                sites.append(("sigmoid_gate", n.input[0], n.output[0]))
            else:
                sites.append(("sigmoid", n.input[0], n.output[0]))
        elif n.op_type == "Erf":
            div = producer[n.input[0]]
            assert div.op_type == "Div"
            # source: GELU(x) = 0.5 x (1 + erf(x / sqrt 2)), Hendrycks & Gimpel 2016
            assert _const(model, div.input[1]) == pytest.approx(np.sqrt(2.0), rel=1e-6)
            x = div.input[0]
            add = only(n.output[0], "Add")
            assert _const(model, other(add, n.output[0])) == 1.0
            mul_x = only(add.output[0], "Mul")
            assert other(mul_x, add.output[0]) == x
            half = only(mul_x.output[0], "Mul")
            assert _const(model, other(half, mul_x.output[0])) == 0.5
            sites.append(("gelu_erf", x, half.output[0]))
        elif n.op_type == "Tanh":
            src = producer.get(n.input[0])
            if src is not None and src.op_type == "Softplus":
                # source: Mish(x) = x tanh(softplus(x)), Misra 2019
                mul = only(n.output[0], "Mul")
                assert other(mul, n.output[0]) == src.input[0]
                sites.append(("mish_decomposed", src.input[0], mul.output[0]))
            elif src is not None and src.op_type == "Mul" and any(
                    _const(model, i) == pytest.approx(np.sqrt(2 / np.pi), rel=1e-6) for i in src.input):
                add = only(n.output[0], "Add")
                mul_x = only(add.output[0], "Mul")
                x = other(mul_x, add.output[0])
                half = only(mul_x.output[0], "Mul")
                sites.append(("gelu_tanh", x, half.output[0]))
            else:
                sites.append(("tanh", n.input[0], n.output[0]))
    return sites


# Published definitions, float64, via scipy.special where it has the function.
REFERENCE = {
    "silu_decomposed": lambda x: x * special.expit(x),  # source: SiLU = x sigmoid(x), Elfwing et al. 2018
    "sigmoid_gate": special.expit,  # source: scipy.special.expit = 1 / (1 + exp(-x))
    "sigmoid": special.expit,
    "tanh": np.tanh,
    # source: Hendrycks & Gimpel 2016, exact GELU via the normal CDF (scipy.special.ndtr)
    "gelu_erf": lambda x: x * special.ndtr(x),
    # source: Hendrycks & Gimpel 2016, tanh approximation with 0.044715
    "gelu_tanh": lambda x: 0.5 * x * (1 + np.tanh(np.sqrt(2 / np.pi) * (x + 0.044715 * x ** 3))),
    # source: Misra 2019; softplus(x) = log(1 + e^x) = logaddexp(0, x)
    "mish_decomposed": lambda x: x * np.tanh(np.logaddexp(0.0, x)),
}


@pytest.mark.parametrize("name", MODELS)
def test_claimed_activation_patterns_are_in_the_graph(name):
    model = _model(name)
    found = Counter(kind for kind, _, _ in _sites(model))
    ops = Counter(n.op_type for n in model.graph.node)
    claimed = MANIFEST["models"][name]["activations"]
    assert dict(found) == {k: v for k, v in claimed.items() if k in REFERENCE}
    single = {"relu": "Relu", "batchnorm": "BatchNormalization", "layernorm": "LayerNormalization",
              "softmax": "Softmax"}  # manifest names of single ops (README "manifest.json")
    assert set(claimed) <= set(REFERENCE) | set(single)
    for key, op in single.items():
        assert claimed.get(key, 0) == ops[op]
    assert sum(found.values()) >= 1


@pytest.mark.parametrize("name", MODELS)
def test_activation_subgraphs_compute_the_published_functions(name):
    model = onnx.shape_inference.infer_shapes(_model(name))
    shapes = {vi.name: [d.dim_value or 3 for d in vi.type.tensor_type.shape.dim]
              for vi in model.graph.value_info}
    rng = np.random.default_rng(0)
    for kind, x, y in _sites(model):
        sub = onnx.utils.Extractor(model).extract_model([x], [y])
        sess = ort.InferenceSession(sub.SerializeToString(), providers=["CPUExecutionProvider"])
        xs = rng.uniform(-6.0, 6.0, size=shapes[x]).astype(np.float32)
        got = sess.run(None, {x: xs})[0]
        want = REFERENCE[kind](xs.astype(np.float64))
        # float32 evaluation against float64 reference; tolerance common practice, no source
        np.testing.assert_allclose(got, want, rtol=1e-5, atol=5e-6, err_msg=f"{name}: {kind} at {x}")


# ---------------------------------------------------------------- data


@functools.lru_cache(maxsize=None)
def _digits() -> tuple[dict[bytes, int], np.ndarray, np.ndarray]:
    # source: scikit-learn's bundled copy of the UCI ML hand-written digits (load_digits)
    d = load_digits()
    pix = (d.data / 16.0).astype(np.float32)
    return {row.tobytes(): i for i, row in enumerate(pix)}, pix, d.target


def test_data_files_match_manifest_hashes():
    for name, digest in MANIFEST["data"].items():
        assert hashlib.sha256((DEMO / name).read_bytes()).hexdigest() == digest


def test_calib_and_val_layout():
    calib, val = _npz("calib.npz"), _npz("val.npz")
    assert calib["pixels"].shape == (MANIFEST["splits"]["calib"], 1, 8, 8)
    assert val["pixels"].shape == (MANIFEST["splits"]["val"], 1, 8, 8)
    assert val["labels"].shape == (len(val["pixels"]),) and val["labels"].dtype == np.int64
    assert sorted(calib) == ["pixels"] and sorted(val) == ["labels", "pixels"]  # nothing else to feed
    for arr in (calib["pixels"], val["pixels"]):
        assert arr.dtype == np.float32 and arr.min() >= 0.0 and arr.max() <= 1.0
    total = sum(MANIFEST["splits"].values())
    assert total == len(load_digits().target)  # 1797 in scikit-learn's copy


def test_calib_and_val_are_disjoint_rows_of_load_digits_with_true_labels():
    lookup, pix, target = _digits()
    calib, val = _npz("calib.npz"), _npz("val.npz")
    calib_rows = [lookup[r.tobytes()] for r in calib["pixels"].reshape(len(calib["pixels"]), 64)]
    val_rows = [lookup[r.tobytes()] for r in val["pixels"].reshape(len(val["pixels"]), 64)]
    assert len(set(calib_rows)) == len(calib_rows) and len(set(val_rows)) == len(val_rows)
    assert not set(calib_rows) & set(val_rows)
    # no identical pixel rows across the two files, independent of row identity
    assert not {r.tobytes() for r in calib["pixels"]} & {r.tobytes() for r in val["pixels"]}
    np.testing.assert_array_equal(val["labels"], target[val_rows])
    splits = _npz("splits.npz")
    np.testing.assert_array_equal(splits["calib_index"], calib_rows)
    np.testing.assert_array_equal(splits["val_index"], val_rows)
    # the training rows are the rest of load_digits: no calibration or validation leak
    train = set(splits["train_index"].tolist())
    assert not train & (set(calib_rows) | set(val_rows))
    assert len(train) + len(calib_rows) + len(val_rows) == len(target)
    # stratified: every digit appears in both sets
    assert set(target[calib_rows]) == set(range(10)) == set(val["labels"])


# ---------------------------------------------------------------- status messages


def _words(text: bytes) -> list[str]:
    return text.decode("utf-8").lower().split()  # source: demo_models/README.md, tokenizer rule


def _tokenize(texts: np.ndarray, vocab: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The README's tokenizer, written again here: ids and mask, int64 [N, 16]."""
    index = {w.decode("utf-8"): i for i, w in enumerate(vocab)}
    ids = np.zeros((len(texts), 16), dtype=np.int64)
    for row, text in enumerate(texts):
        toks = [index.get(w, 1) for w in _words(text)]  # unknown word -> [UNK] = 1
        ids[row, :len(toks)] = toks  # words first, then [PAD] = 0 on the right
    lengths = np.array([len(_words(t)) for t in texts])
    return ids, (np.arange(16) < lengths[:, None]).astype(np.int64)


def test_status_vocabulary_follows_the_documented_rule():
    splits = _npz("status_splits.npz")
    counts = Counter(w for t in splits["train_text"] for w in _words(t))
    # source: README "Status messages": [PAD], [UNK], then training words seen >= 2 times,
    # most frequent first, ties alphabetical
    kept = sorted((w for w, c in counts.items() if c >= 2), key=lambda w: (-counts[w], w))
    assert splits["vocab"].astype(str).tolist() == ["[PAD]", "[UNK]", *kept]
    assert len(splits["vocab"]) == MANIFEST["status_messages"]["vocab_size"]
    assert splits["class_names"].astype(str).tolist() == MANIFEST["status_messages"]["classes"]


@pytest.mark.parametrize("part", ["calib", "val"])
def test_status_ids_are_the_documented_tokenization_of_the_texts(part):
    splits, stored = _npz("status_splits.npz"), _npz(f"status_{part}.npz")
    ids, mask = _tokenize(splits[f"{part}_text"], splits["vocab"])
    np.testing.assert_array_equal(stored["input_ids"], ids)
    np.testing.assert_array_equal(stored["attention_mask"], mask)
    assert stored["input_ids"].dtype == stored["attention_mask"].dtype == np.int64
    lengths = mask.sum(axis=1)
    assert lengths.max() < 16 and len(set(lengths.tolist())) >= 5  # padding everywhere, varied lengths
    assert (stored["input_ids"] == 1).any()  # some words are unknown to the vocabulary ([UNK] is used)


def test_status_files_layout_and_disjoint_sets():
    splits = _npz("status_splits.npz")
    calib, val = _npz("status_calib.npz"), _npz("status_val.npz")
    assert sorted(calib) == ["attention_mask", "input_ids"]  # unlabelled: only what the model reads
    assert sorted(val) == ["attention_mask", "classes", "input_ids"]
    sizes = MANIFEST["status_messages"]["splits"]
    texts = {part: splits[f"{part}_text"].tolist() for part in ("train", "calib", "val")}
    assert {part: len(t) for part, t in texts.items()} == sizes
    all_texts = [t for part in texts.values() for t in part]
    assert len(set(all_texts)) == len(all_texts)  # no message in two sets (or twice in one)
    np.testing.assert_array_equal(val["classes"], splits["val_classes"])
    n_classes = len(MANIFEST["status_messages"]["classes"])
    for part in ("train", "calib", "val"):
        counts = np.bincount(splits[f"{part}_classes"], minlength=n_classes)
        assert len(counts) == n_classes and counts.max() - counts.min() <= 1  # stratified, balanced classes
