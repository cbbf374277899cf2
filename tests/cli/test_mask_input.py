"""The attention mask end to end: the demo status encoder swapped with and without it, and --mask-input on the
command line.

References: scipy.spatial.distance.cosine gives the per-sample cosine similarity of the embeddings (onnxruntime
runs both models, ONNX operator spec); demo_models/README.md says the encoder reads input_ids and attention_mask
and that padding never reaches its output.
"""
from __future__ import annotations

import numpy as np
import onnxruntime as ort
import pytest
from scipy.spatial.distance import cosine
from testkit import DEMO, one_line_error

from swapper import api
from swapper.core.model_io import load_model

MODEL, CALIB, VAL = DEMO / "status_encoder_gelu.onnx", DEMO / "status_calib.npz", DEMO / "status_val.npz"


def _embed(model, feeds):
    return ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"]).run(None, feeds)[0]


@pytest.mark.parametrize("to", ["relu", "hard_swish"])
def test_the_masked_status_encoder_stays_at_least_as_close_to_the_original(to):
    loaded = load_model(MODEL)
    calib, val = api.load_data(CALIB, loaded), api.load_data(VAL, loaded)
    feeds = {k: np.asarray(v) for k, v in val.arrays.items()}
    reference = _embed(loaded.model, feeds)
    figures = {}
    for mask in ("none", "auto"):
        result = api.swap(loaded, calib=calib, to=to, mask_input=mask)
        assert result.rewrite.nodes_after <= result.rewrite.nodes_before  # the default folding adds no node
        out = _embed(result.candidate, feeds)
        cos = np.array([1.0 - cosine(r, c) for r, c in zip(reference, out)])  # scipy: 1 − cosine distance
        figures[mask] = (cos.mean(), cos.min())
    assert "attention_mask" in result.calibration.tokens
    assert figures["auto"][0] >= figures["none"][0]
    assert figures["auto"][1] >= figures["none"][1]
    assert figures["auto"][0] >= 0.995  # the gate's default floor for embeddings (README, rule of thumb)


def test_the_command_line_says_which_mask_it_used(cli, tmp_path):
    result = cli("swap", MODEL, "-o", tmp_path / "out.onnx", "--calib", CALIB, "--to", "relu")
    assert result.exit_code == 0, result.output
    assert "token positions: attention mask: input 'attention_mask'" in result.stdout


def test_a_mask_input_the_model_lacks_is_one_line(cli, tmp_path):
    result = cli("swap", MODEL, "-o", tmp_path / "out.onnx", "--calib", CALIB, "--mask-input", "padding")
    one_line_error(result, "--mask-input 'padding'", "no such input")
    assert not (tmp_path / "out.onnx").exists()
