"""Folding is exact on the torch-exported demo models.

For every demo model and two surrogate families, the same random per-channel
parameters are applied twice: folded into neighbouring layers (policy
``exact``) and emitted as explicit Mul/Add nodes (every folded placement
turned into ``nodes``). Both graphs run in onnxruntime on the first 64 rows of
their validation file and must agree (rtol 1e-5): folding is algebra, not approximation.
"""
from __future__ import annotations

import copy

import numpy as np
import onnx
import pytest
from testkit import DEMO, manifest

from swapper.core.model_io import load_model
from swapper.core.session import open_session
from swapper.functions.params import PARAMS
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

MODELS = sorted(p.name for p in DEMO.glob("*.onnx"))
# each model's validation file, as demo_models/manifest.json names it
VALS = {name: entry["val"] for name, entry in manifest()["models"].items()}


def _randomise(plan, seed: int) -> None:
    rng = np.random.default_rng(seed)
    for swap in plan.swaps:
        n = swap.channels
        values = {"a": rng.uniform(0.5, 1.5, n), "b": rng.uniform(0.5, 1.5, n),
                  "c": rng.normal(0, 0.2, n), "d": rng.normal(0, 0.2, n)}
        swap.set_params(**{p: values[p] for p in PARAMS if swap.placement[p] != "fixed"})


def _as_nodes(plan):
    explicit = copy.deepcopy(plan)
    for swap in explicit.swaps:
        if swap.placement["a"] == "in-surrogate":  # a·g(z) = g(a·z) for homogeneous g, a > 0 (the reason it may move inside)
            swap.set_params(b=swap.a * swap.b, c=swap.a * swap.c, a=np.ones(swap.channels))
        swap.placement = {p: ("fixed" if v == "fixed" else "nodes") for p, v in swap.placement.items()}
        if swap.placement["a"] == "fixed" and not np.all(swap.a == 1.0):
            swap.placement["a"] = "nodes"
    return explicit


def _run(model: onnx.ModelProto, name: str) -> np.ndarray:
    session = open_session(model)
    with np.load(DEMO / VALS[name]) as val:
        return session.run(None, {i.name: val[i.name][:64] for i in session.get_inputs()})[0]


@pytest.mark.parametrize("target", ["relu", "hard_swish"])
@pytest.mark.parametrize("name", MODELS)
def test_folded_equals_explicit_nodes_on_demo_models(name, target):
    loaded = load_model(DEMO / name)
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites, to=target)
    assert plan.swaps, f"{name}: nothing planned"
    _randomise(plan, seed=len(name))
    folded = rewrite(loaded.model, sites, plan)
    explicit = rewrite(loaded.model, sites, _as_nodes(plan))
    # source: ONNX checker (full_check runs strict shape inference)
    onnx.checker.check_model(folded.model, full_check=True)
    onnx.checker.check_model(explicit.model, full_check=True)
    np.testing.assert_allclose(_run(folded.model, name), _run(explicit.model, name), rtol=1e-5, atol=1e-5)
    # folding never adds nodes under the default policy; explicit nodes add some whenever a parameter is not neutral
    assert folded.nodes_after <= explicit.nodes_after


@pytest.mark.parametrize("name", MODELS)
def test_folded_relu_swap_has_no_more_nodes_than_the_original(name):
    loaded = load_model(DEMO / name)
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites, to="relu")
    _randomise(plan, seed=7)
    result = rewrite(loaded.model, sites, plan)
    assert result.nodes_after <= result.nodes_before == len(loaded.model.graph.node)
