"""Tests of swapper.options.SwapOptions: one typed, validated set of swap settings for CLI, API and bench.

References: the error messages are the ones ``swapper swap`` printed before
the options were gathered in one object (README "Exit codes": bad usage is
exit 2 with one line); the rung table is the one in swapper/bench/measure.py's
module docstring; swapped models are compared byte for byte.
"""
from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from typer.testing import CliRunner

from swapper import api
from swapper.bench.rungs import RUNG_OPTIONS, RUNGS, family_options, rung_options
from swapper.cli.app import app
from swapper.core.model_io import load_model
from swapper.data.dataset import subset
from swapper.errors import UsageError
from swapper.options import FOLD_POLICIES, MAX_BATCH_SIZE, MAX_CACHE_MB, MAX_THREADS, MODES, SwapOptions
from swapper.plan.plan import make_plan
from swapper.scan.sites import find_sites

DEMO = Path(__file__).resolve().parents[1] / "demo_models"
needs_demo = pytest.mark.skipif(not (DEMO / "calib.npz").exists(), reason="demo models not built")


@pytest.mark.parametrize("changes, message", [
    ({"fold": "tight"}, "unknown fold policy 'tight'; valid: exact, exact+nodes, approximate, off"),
    ({"mode": "global"}, "unknown mode 'global'; valid: sequential, local"),
    ({"threads": 0}, f"threads must be a whole number in 1..{MAX_THREADS} (4 per core), got 0"),
    ({"threads": MAX_THREADS + 1}, f"threads must be a whole number in 1..{MAX_THREADS} (4 per core), "
                                   f"got {MAX_THREADS + 1}"),
    ({"batch_size": 0}, f"batch_size must be a whole number in 1..{MAX_BATCH_SIZE}, got 0"),
    ({"batch_size": MAX_BATCH_SIZE + 1}, f"batch_size must be a whole number in 1..{MAX_BATCH_SIZE}, "
                                         f"got {MAX_BATCH_SIZE + 1}"),
    ({"seed": -1}, f"seed must be a whole number in 0..{2**32 - 1}, got -1"),
    ({"seed": 2**32}, f"seed must be a whole number in 0..{2**32 - 1}, got {2**32}"),
    ({"cache_mb": -1.0}, f"cache_mb must be a finite number of MiB in 0..{MAX_CACHE_MB}, got -1.0"),
    ({"cache_mb": float("inf")}, f"cache_mb must be a finite number of MiB in 0..{MAX_CACHE_MB}, got inf"),
    ({"cache_mb": float("nan")}, f"cache_mb must be a finite number of MiB in 0..{MAX_CACHE_MB}, got nan"),
])
def test_bad_settings_are_usage_errors(changes, message):
    with pytest.raises(UsageError) as err:
        SwapOptions(**changes)
    assert str(err.value) == message
    with pytest.raises(UsageError) as err:  # the same check when a field is changed later
        SwapOptions().replace(**changes)
    assert str(err.value) == message


def test_words_and_defaults():
    assert FOLD_POLICIES == ("exact", "exact+nodes", "approximate", "off") and MODES == ("sequential", "local")
    # the CLI's defaults (swapper swap --help) are the object's defaults
    o = SwapOptions()
    assert (o.fold, o.mode, o.bias_correction, o.refit_consumers, o.batch_size, o.threads, o.seed) == \
        ("exact", "sequential", True, None, 64, 1, 0)  # refit: None = with a calibration set, judged per site
    assert (o.target, o.opset, o.choices) == ("ort-cpu", None, None)  # README "Targets": ort-cpu by default
    assert o.cache_bytes() is None and SwapOptions(cache_mb=1.5).cache_bytes() == 3 << 19


def test_frozen_hashable_and_replace_checks_names():
    o = SwapOptions(site_ids=["s1", "s2"])
    assert o.site_ids == ("s1", "s2") and hash(o) == hash(SwapOptions(site_ids=("s1", "s2")))
    with pytest.raises(dataclasses.FrozenInstanceError):
        o.mode = "local"
    with pytest.raises(TypeError, match="unknown swap option"):
        o.replace(moed="local")
    assert o.replace(mode="local").mode == "local" and o.mode == "sequential"
    # per-site choices come as a dict and are kept as sorted pairs, so the options stay hashable
    pinned = SwapOptions(choices={"s2": "relu", "s1": "hard_swish:Mul-Clip"})
    assert pinned.choices == (("s1", "hard_swish:Mul-Clip"), ("s2", "relu")) and hash(pinned)
    assert pinned.plan_settings()["choices"] == {"s1": "hard_swish:Mul-Clip", "s2": "relu"}
    assert SwapOptions(target=Path("board.json")).target == "board.json"
    with pytest.raises(UsageError, match="opset must be a positive integer"):
        SwapOptions(opset=0)


@needs_demo
def test_make_plan_refuses_the_same_fold_word_the_same_way():
    loaded = load_model(DEMO / "meter_gelu_mlp.onnx")
    with pytest.raises(UsageError) as err:
        make_plan(loaded.model, find_sites(loaded.model), fold="tight")
    assert str(err.value) == "unknown fold policy 'tight'; valid: exact, exact+nodes, approximate, off"


@needs_demo
def test_api_keywords_build_the_same_options():
    loaded = load_model(DEMO / "meter_gelu_mlp.onnx")
    calib = subset(api.load_data(DEMO / "calib.npz", loaded), 64)
    typed = api.swap(loaded, calib=calib, options=SwapOptions(to="relu", mode="local", batch_size=16))
    loose = api.swap(loaded, calib=calib, to="relu", mode="local", batch_size=16)
    mixed = api.swap(loaded, calib=calib, options=SwapOptions(to="relu", batch_size=16), mode="local")
    assert typed.options == loose.options == mixed.options
    one = typed.candidate.SerializeToString()
    assert one == loose.candidate.SerializeToString() == mixed.candidate.SerializeToString()
    with pytest.raises(TypeError):
        api.swap(loaded, calib=calib, too="relu")
    with pytest.raises(UsageError, match="unknown mode"):
        api.swap(loaded, mode="global")  # refused although there is nothing to calibrate


@needs_demo
@pytest.mark.parametrize("flag, value, word", [("--fold", "tight", "fold policy"), ("--mode", "global", "mode")])
def test_cli_refuses_a_bad_word_in_one_line(tmp_path, flag, value, word):
    out = tmp_path / "o.onnx"
    result = CliRunner().invoke(app, ["swap", str(DEMO / "meter_gelu_mlp.onnx"), "-o", str(out), "--calib",
                                      str(DEMO / "calib.npz"), flag, value])
    assert result.exit_code == 2 and "Traceback" not in result.output
    text = result.stderr.strip()
    assert "\n" not in text and f"unknown {word} '{value}'" in text
    assert not out.exists()


def test_bench_rungs_are_swap_options():
    # the ladder of swapper/bench/measure.py's docstring: naive (starting parameters), local (local mode,
    # no bias correction), sequential (no bias correction), sequential + bias correction, + consumer refit
    table = {"naive": ("sequential", True, False), "local": ("local", False, False),
             "sequential": ("sequential", False, False), "sequential_bias": ("sequential", True, False),
             "refit": ("sequential", True, True)}
    assert tuple(RUNG_OPTIONS) == RUNGS
    for rung, (mode, bias, refit) in table.items():
        o = rung_options(rung, family_options("relu", batch_size=32, seed=3))
        assert isinstance(o, SwapOptions)
        assert (o.mode, o.bias_correction, o.refit_consumers) == (mode, bias, refit)
        assert (o.to, o.batch_size, o.seed, o.threads) == ("relu", 32, 3, 1)


@needs_demo
def test_the_older_fold_spelling_still_works_with_a_one_line_note(tmp_path):
    # README "Folding": `--fold nodes` is now `--fold exact+nodes`; the older word keeps working for a release
    # and says so in one line on stderr. Same settings, same seed: the same model bytes (README "Calibration").
    runner = CliRunner()
    model = str(DEMO / "meter_gelu_mlp.onnx")
    common = ["--calib", str(DEMO / "calib.npz"), "--target", "none", "--plan", "all"]
    old = runner.invoke(app, ["swap", model, "-o", str(tmp_path / "old.onnx"), "--fold", "nodes", *common])
    new = runner.invoke(app, ["swap", model, "-o", str(tmp_path / "new.onnx"), "--fold", "exact+nodes", *common])
    assert old.exit_code == new.exit_code == 0, old.output + new.output
    notes = [line for line in old.stderr.splitlines() if line.strip()]
    assert len(notes) == 1 and "--fold nodes is now spelled --fold exact+nodes" in notes[0]
    assert "nodes" not in new.stderr
    assert (tmp_path / "old.onnx").read_bytes() == (tmp_path / "new.onnx").read_bytes()
    # the API reads the older word too, recording today's
    assert SwapOptions(fold="nodes").fold == "exact+nodes"
