"""The sweep and the automatic plan on a graph whose right answer is known by construction (testkit.two_elu_model).

Site A reads ``x·x + 0.5 > 0``, where ELU equals Relu exactly (ONNX Elu: z for z > 0): swapping it costs
nothing. Site B reads a Gemm output of both signs, where Relu cannot follow ELU: swapping it costs
accuracy. The gate decides by SQNR of the output (--metric sqnr), whose cost adds as error power.
"""
from __future__ import annotations

import copy
import json

import pytest
from testkit import in_memory, two_elu_data, two_elu_model

from swapper.autoplan import auto_swap
from swapper.check.gate import GateRule
from swapper.options import SwapOptions
from swapper.scan.sites import find_sites
from swapper.sweep import schema
from swapper.sweep.run import SweepSettings, sweep

NO_TARGET = SwapOptions(target=None, batch_size=32)


@pytest.fixture(scope="module")
def graph():
    model = two_elu_model()
    sites = {s.input: s.id for s in find_sites(model)}
    return {"model": model, "a": sites["za"], "b": sites["zb"], "calib": in_memory({"x": two_elu_data(96, 1)}),
            "val": in_memory({"x": two_elu_data(96, 2)})}


def _sweep(graph, rule, **settings):
    kw = {"surrogates": ("relu",), "batch_size": 32} | settings
    return sweep(graph["model"], find_sites(graph["model"]), graph["calib"], graph["val"], calib_data=graph["calib"],
                 val_data=graph["val"], profile=None, rule=rule, settings=SweepSettings(**kw))


SQNR = GateRule(metric="sqnr", min_sqnr_db=60.0)


@pytest.fixture(scope="module")
def payload(graph):
    return _sweep(graph, SQNR)


def _costs(payload, site_id):
    return [c["metric"]["cost"] for s in payload["sites"] if s["site_id"] == site_id for c in s["candidates"]]


def test_the_sweep_measures_what_the_graph_was_built_to_show(graph, payload):
    # relu equals ELU on positive inputs (ONNX Elu definition): every A candidate is exact to float32 rounding
    assert max(_costs(payload, graph["a"])) < 1e-9
    # on both signs it is not: every B candidate leaves error power well above float32 rounding
    assert min(_costs(payload, graph["b"])) > 1e-4
    assert {c["status"] for s in payload["sites"] for c in s["candidates"]} == {"ok"}


def test_the_json_follows_the_documented_schema(payload, tmp_path):
    path = schema.write_sweep(payload, tmp_path / "sweep.json")
    again = schema.read_sweep(path)
    assert again["schema"] == "swapper.sweep/1" and again == json.loads(json.dumps(payload))
    for s in again["sites"]:  # module docstring: 2 placements x refit off/on per surrogate
        assert {(c["fold"], c["refit"]) for c in s["candidates"]} == {("exact", False), ("exact", True),
                                                                     ("exact+nodes", False), ("exact+nodes", True)}
    for breaking in (lambda p: p.pop("pareto"), lambda p: p["sites"][0]["candidates"][0].update(status="fine"),
                     lambda p: p["sites"][0]["candidates"][0].update(status="failed", reason=None),
                     lambda p: p["sites"][0]["candidates"][0]["saving"].pop("value"),
                     lambda p: p["pareto"].append("s99/none")):
        broken = copy.deepcopy(payload)
        breaking(broken)
        with pytest.raises(ValueError):
            schema.validate_sweep(broken)


def test_a_sweep_file_with_the_older_words_reads_with_todays(payload, tmp_path):
    # swapper/sweep/schema.py docstring: files written before the rename say fold "nodes" and "held" placements
    text = json.dumps(payload).replace('"exact+nodes"', '"nodes"').replace('"fixed"', '"held"')
    assert '"nodes"' in text
    (tmp_path / "old.json").write_text(text)
    again = schema.read_sweep(tmp_path / "old.json")
    assert again["sites"] == json.loads(json.dumps(payload))["sites"]


def test_a_failing_candidate_is_recorded_and_the_sweep_goes_on(graph, monkeypatch):
    import swapper.sweep.worker as worker

    real = worker.calibrate_recorded

    def flaky(model, sites, plan, *args, **kwargs):
        if plan.swaps[0].site_id == graph["b"]:
            raise RuntimeError("calibration blew up\nsecond line")
        return real(model, sites, plan, *args, **kwargs)

    monkeypatch.setattr(worker, "calibrate_recorded", flaky)  # jobs=1 runs in this process
    payload = _sweep(graph, SQNR)
    schema.validate_sweep(payload)
    by_site = {s["site_id"]: s["candidates"] for s in payload["sites"]}
    assert all(c["status"] == "failed" and c["reason"] == "RuntimeError: calibration blew up"
               for c in by_site[graph["b"]])
    assert all(c["status"] == "ok" for c in by_site[graph["a"]])
    assert payload["run"]["failed"] == len(by_site[graph["b"]])


def test_the_search_keeps_the_site_that_costs_and_swaps_the_one_that_does_not(graph, payload):
    # allowance 1e-6 of the output power (60 dB): A's cost fits, B's does not
    result = auto_swap(graph["model"], calib=graph["calib"], val=graph["val"], rule=SQNR, options=NO_TARGET,
                       sweep_payload=payload)
    chosen = {s["site_id"]: s["chosen"] for s in result.sites}
    assert chosen[graph["a"]] is not None and chosen[graph["b"]] is None
    assert [s.site_id for s in result.swap.plan.swaps] == [graph["a"]]
    assert result.check.verdict.approved


def test_a_loose_budget_swaps_both(graph):
    loose = GateRule(metric="sqnr", min_sqnr_db=3.0)
    result = auto_swap(graph["model"], calib=graph["calib"], val=graph["val"], rule=loose, options=NO_TARGET,
                       settings=SweepSettings(surrogates=("relu",), refit=(False,)))
    assert sorted(s.site_id for s in result.swap.plan.swaps) == sorted([graph["a"], graph["b"]])


def test_the_dask_backend_gives_the_sequential_results(graph, payload):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        on_dask = _sweep(graph, SQNR, scheduler=cluster.scheduler_address)
    assert on_dask["run"]["backend"] == "dask" and on_dask["run"]["failed"] == 0
    # the same candidates, calibrated the same way (seeded), give the same costs through either backend
    for site in payload["sites"]:
        assert _costs(on_dask, site["site_id"]) == _costs(payload, site["site_id"])
