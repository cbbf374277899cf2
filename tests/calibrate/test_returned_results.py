"""Calibration and consumer refit return their results and leave their inputs alone.

``calibrate`` gives the fitted swaps back as a new Plan; ``refit_consumers``
gives back its own model, plan, notes and timings, which
``RefitResult.apply_to`` lays over a calibration result without changing it.
Inputs are compared field by field (deep copies taken before the call) and
models byte by byte; the candidates are checked with onnxruntime against
the original on the calibration samples (common practice, no source: a fit
on the data should not end further from the original than the start).
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
from testkit import DEMO

from swapper import api
from swapper.calibrate.loop import calibrate
from swapper.calibrate.refit import refit_consumers
from swapper.core.model_io import load_model
from swapper.core.session import open_session
from swapper.data.dataset import batches, subset
from swapper.functions.params import PARAMS
from swapper.plan.plan import Plan, make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites


def _assert_same_plan(a: Plan, b: Plan) -> None:
    """Every field of every swap, the arrays compared exactly."""
    assert a.fold == b.fold and a.skipped == b.skipped and len(a.swaps) == len(b.swaps)
    for x, y in zip(a.swaps, b.swaps):
        for name, value in vars(x).items():
            other = getattr(y, name)
            if isinstance(value, np.ndarray):
                np.testing.assert_array_equal(value, other, err_msg=f"{x.site_id}.{name}")
                assert value.dtype == other.dtype
            else:
                assert value == other, (x.site_id, name)


def _outputs(model, ds) -> np.ndarray:
    session = open_session(model)
    return np.concatenate([session.run(None, b.feeds)[0] for b in batches(ds, 64)]).astype(np.float64)


@pytest.fixture(scope="module")
def cnn():
    loaded = load_model(DEMO / "meter_cnn_silu.onnx")
    calib = subset(api.load_data(DEMO / "calib.npz", loaded), 96)
    return loaded, find_sites(loaded.model), calib


def test_calibrate_leaves_the_plan_alone_and_returns_a_fitted_one(cnn):
    loaded, sites, calib = cnn
    plan = make_plan(loaded.model, sites, to="relu")
    before = copy.deepcopy(plan)
    model_bytes = loaded.model.SerializeToString()
    result = calibrate(loaded.model, sites, plan, calib, batch_size=32)
    _assert_same_plan(plan, before)
    assert loaded.model.SerializeToString() == model_bytes
    assert result.plan is not plan and all(s is not t for s, t in zip(result.plan.swaps, plan.swaps))
    moved = [s.site_id for s, t in zip(result.plan.swaps, plan.swaps)
             if any(not np.array_equal(getattr(s, p), getattr(t, p)) for p in PARAMS)]
    assert moved == [s.site_id for s in plan.swaps]  # every swap got fitted parameters
    # the fitted plan is the one that belongs to the corrected model: closer to the original than the start
    ref = _outputs(loaded.model, calib)
    start = np.mean((_outputs(rewrite(loaded.model, sites, plan).model, calib) - ref) ** 2)
    fitted = np.mean((_outputs(rewrite(result.model, sites, result.plan).model, calib) - ref) ** 2)
    assert fitted < start


def test_refit_leaves_plan_models_and_calibration_alone(cnn):
    loaded, sites, calib = cnn
    calibration = calibrate(loaded.model, sites, make_plan(loaded.model, sites, to="relu"), calib, batch_size=32)
    plan_before = copy.deepcopy(calibration.plan)
    sites_before = copy.deepcopy(calibration.sites)
    timings_before = dict(calibration.timings)
    base_bytes = calibration.model.SerializeToString()
    refit = refit_consumers(loaded.model, calibration.model, sites, calibration.plan, calib, batch_size=32)
    _assert_same_plan(calibration.plan, plan_before)
    assert calibration.model.SerializeToString() == base_bytes
    assert calibration.sites == sites_before and calibration.timings == timings_before
    assert refit.plan is not calibration.plan and set(refit.timings) == {"refit_s"}
    assert refit.notes and {sid for sid, _ in refit.notes} <= {s.site_id for s in calibration.sites}
    # s2, s3 sit downstream of refitted layers: their a, b, c, d were re-fitted in refit's own plan
    refitted = [sid for sid, text in refit.notes if "re-fitted on the refitted upstream layers" in text]
    assert refitted
    for sid in refitted:
        new, old = refit.plan.by_site()[sid], calibration.plan.by_site()[sid]
        assert any(not np.array_equal(getattr(new, p), getattr(old, p)) for p in PARAMS)

    merged = refit.apply_to(calibration)
    assert merged.model is refit.model and merged.plan is refit.plan
    assert merged.timings == {**timings_before, **refit.timings}
    for entry, old in zip(merged.sites, sites_before):
        assert entry.notes == old.notes + [text for sid, text in refit.notes if sid == entry.site_id]
    assert calibration.sites == sites_before  # apply_to built new entries


def test_swap_returns_the_fitted_plan_it_rewrote(cnn):
    loaded, sites, calib = cnn
    result = api.swap(loaded, calib=calib, to="relu", refit_consumers=True, batch_size=32)
    assert result.plan is result.calibration.plan is result.refit.plan
    again = rewrite(result.calibration.model, sites, result.plan).model
    assert again.SerializeToString() == result.candidate.SerializeToString()
    notes = [n for s in result.calibration.sites for n in s.notes]
    assert all(text in notes for _, text in result.refit.notes)
