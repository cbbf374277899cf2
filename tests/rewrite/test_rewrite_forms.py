"""Every emission form of a surrogate gives the same rewritten model output as its default form.

For each demo model, surrogate and fold policy, one plan with random
per-channel parameters is rewritten in the registry's default form and again
with every site in another form (where the form's re-parametrisation may move
what it needs); onnxruntime runs both on the first 64 validation rows and they
must agree to float32 rounding: the forms are exact rewrites (ONNX operator
spec of each op; Howard et al. 2019 for h-swish = x·ReLU6(x + 3)/6).
"""
from __future__ import annotations

import copy

import numpy as np
import onnx
import pytest
from testkit import DEMO, manifest

from swapper.core.model_io import load_model
from swapper.core.session import open_session
from swapper.errors import UsageError
from swapper.functions.forms import default_form, forms_of
from swapper.functions.params import PARAMS
from swapper.plan.plan import make_plan
from swapper.rewrite.apply import rewrite
from swapper.scan.sites import find_sites

MODELS = sorted(p.name for p in DEMO.glob("*.onnx"))
VALS = {name: entry["val"] for name, entry in manifest()["models"].items()}
SURROGATES = ["relu", "relu6", "hard_swish", "hard_sigmoid", "hard_tanh"]


def _run(model: onnx.ModelProto, name: str) -> np.ndarray:
    session = open_session(model)
    with np.load(DEMO / VALS[name]) as val:
        return session.run(None, {i.name: val[i.name][:64] for i in session.get_inputs()})[0]


def _randomise(plan, seed: int) -> None:
    rng = np.random.default_rng(seed)
    for swap in plan.swaps:
        n = swap.channels
        values = {"a": rng.uniform(0.5, 1.5, n), "b": rng.uniform(0.5, 1.5, n),
                  "c": rng.normal(0, 0.3, n), "d": rng.normal(0, 0.3, n)}
        swap.set_params(**{p: values[p] for p in PARAMS if swap.placement[p] != "fixed"})


@pytest.mark.parametrize("fold", ["exact", "exact+nodes"])
@pytest.mark.parametrize("surrogate", SURROGATES)
@pytest.mark.parametrize("name", MODELS)
def test_each_form_agrees_with_the_default_form(name, surrogate, fold):
    loaded = load_model(DEMO / name)
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites, to=surrogate, fold=fold)
    _randomise(plan, seed=len(name) + len(surrogate))
    default = default_form(surrogate, loaded.opset)
    assert {s.form for s in plan.swaps} == {default.name}
    reference = _run(rewrite(loaded.model, sites, plan).model, name)
    tried = 0
    for form in forms_of(surrogate):
        if form is default or form.min_opset > loaded.opset:
            continue
        other = copy.deepcopy(plan)
        for swap in other.swaps:
            if all(swap.placement[p] != "fixed" for p in form.moves):
                swap.form = form.name
        if all(s.form == default.name for s in other.swaps):
            continue  # every site holds a parameter this form would move
        result = rewrite(loaded.model, sites, other)
        # source: ONNX checker (full_check runs strict shape inference against the opset's schemas)
        onnx.checker.check_model(result.model, full_check=True)
        assert [r.form for r in result.records] == [s.form for s in other.swaps]
        ops = {n.op_type for n in result.model.graph.node if n.name.startswith("swapper/")}
        assert set(form.op_types()) <= ops, (form.key, ops)
        np.testing.assert_allclose(_run(result.model, name), reference, rtol=1e-5, atol=2e-5, err_msg=form.key)
        tried += 1
    # every surrogate here has a second form usable at opset 13+ under --fold exact+nodes
    assert tried or fold == "exact"


def test_a_form_that_would_move_a_held_parameter_is_refused():
    # meter_resnet_silu: the SiLU that feeds a residual Add has nowhere to fold a (demo_models/README.md)
    loaded = load_model(DEMO / "meter_resnet_silu.onnx")
    sites = find_sites(loaded.model)
    plan = make_plan(loaded.model, sites, to="hard_swish")
    held = [s for s in plan.swaps if s.placement["a"] == "fixed"]
    assert held
    held[0].form = "Mul-Clip"  # z·Clip(z + 3, 0, 6) needs a/6: a hand edit the placement does not allow
    with pytest.raises(UsageError, match=f"site {held[0].site_id}: form Mul-Clip of hard_swish moves a"):
        rewrite(loaded.model, sites, plan)
    held[0].form = "HardSwish"  # the model is opset 13 (ONNX operator spec: HardSwish since 14)
    with pytest.raises(UsageError, match="needs opset 14; the model is opset 13"):
        rewrite(loaded.model, sites, plan)
