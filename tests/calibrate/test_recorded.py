"""Calibration from a shared recording against calibrate() itself: the same parameters and the same model."""
from __future__ import annotations

import numpy as np
import pytest
from testkit import DEMO, in_memory, two_elu_data, two_elu_model

from swapper.calibrate.loop import calibrate
from swapper.calibrate.recorded import Recording, calibrate_recorded, record_sites
from swapper.core.model_io import load_model
from swapper.plan.plan import make_plan
from swapper.scan.sites import find_sites


def _same(a, b):
    assert [s.site_id for s in a.plan.swaps] == [s.site_id for s in b.plan.swaps]
    for x, y in zip(a.plan.swaps, b.plan.swaps):
        for p in "abcd":
            assert np.array_equal(getattr(x, p), getattr(y, p)), (x.site_id, p)
    assert a.model.SerializeToString() == b.model.SerializeToString()  # the same bias corrections


@pytest.fixture(scope="module")
def cnn(tmp_path_factory):
    loaded = load_model(DEMO / "meter_cnn_silu.onnx")
    data = np.load(DEMO / "calib.npz")
    calib = in_memory({loaded.model.graph.input[0].name: data[data.files[0]][:128]})
    sites = find_sites(loaded.model)
    return loaded.model, sites, calib, record_sites(loaded.model, sites, calib, tmp_path_factory.mktemp("rec"))


@pytest.mark.parametrize("fold", ["exact", "exact+nodes"])
def test_one_site_equals_calibrating_it_alone(cnn, fold):
    # the oracle is swapper's own calibrate(): a lone site sits at level 1 in sequential mode too
    model, sites, calib, rec = cnn
    plan = make_plan(model, sites, site_ids=[sites[1].id], fold=fold, choices={sites[1].id: "relu"})
    _same(calibrate(model, sites, plan, calib), calibrate_recorded(model, sites, plan, rec))


def test_every_site_equals_local_calibration(cnn):
    model, sites, calib, rec = cnn
    plan = make_plan(model, sites, to="relu")
    assert len(plan.swaps) > 1
    _same(calibrate(model, sites, plan, calib, mode="local"), calibrate_recorded(model, sites, plan, rec))


def test_the_recording_holds_the_original_tensors(tmp_path):
    model = two_elu_model()
    sites = find_sites(model)
    x = two_elu_data(40, 0)
    rec = Recording.open(record_sites(model, sites, in_memory({"x": x}), tmp_path, batch_size=16).folder)
    za = rec.array(sites[0].id, "x")
    # source: the graph's definition, za = x*x + 0.5, and ONNX Elu(z) = z for z > 0
    np.testing.assert_allclose(za, x * x + 0.5, rtol=1e-6)
    np.testing.assert_allclose(rec.array(sites[0].id, "y"), za, rtol=1e-6)
