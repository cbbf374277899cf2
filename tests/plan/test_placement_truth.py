"""The placement a plan records is what the rewritten graph holds, after calibration too.

Where a, b, c, d live is decided once, before calibration (swapper/plan/placement.py); the fitter
keeps to what the placement asks of a, and the rewriter carries the placement out or refuses. These
tests build small graphs where the fitted values would once have moved a parameter after the fact
(a behind a max pool that the data want negative; a = 0 with d != 0 while d is a node and a sits in
the consumers), run plan -> calibrate -> rewrite, and check every place the placement is written
(model metadata ``swapper.plan``, the rewrite record, report.json, report.html) against the graph.
The numeric reference is the same plan emitted as explicit Mul/Add nodes, run by onnxruntime
(ONNX operator spec as onnxruntime executes it).
"""
from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import onnx
import onnx.parser
import onnxruntime as ort
import pytest
from onnx import numpy_helper
from scipy.optimize import minimize_scalar

from swapper import api, functions
from swapper.calibrate.loop import calibrate
from swapper.core.model_io import load_model
from swapper.data.dataset import Dataset
from swapper.errors import UsageError
from swapper.fit.channel import outer_fit
from swapper.fit.observe import ChannelObserver
from swapper.fit.site import fit_channels
from swapper.functions.forms import get_form
from swapper.functions.params import NEUTRAL, PARAMS
from swapper.plan.plan import Plan, make_plan
from swapper.report.build import write_report
from swapper.rewrite.apply import PLAN_KEY, rewrite

# x·Sigmoid(x) (SiLU) read by a max pool, then a 1x1 Conv (no padding: a and d fold exactly).
MAXPOOL = """
<ir_version: 8, opset_import: ["" : 17]>
maxpool_silu (float[N, 3, 4, 4] X) => (float[N, 2, 2, 2] Y) {
    S = Sigmoid(X)
    T = Mul(X, S)
    P = MaxPool <kernel_shape = [2, 2], strides = [2, 2]> (T)
    Y = Conv <kernel_shape = [1, 1]> (P, W2, B2)
}
"""

# Conv -> Tanh -> zero-padded 3x3 Conv: d cannot fold exactly (the borders read the padding's 0).
PADDED = """
<ir_version: 8, opset_import: ["" : 17]>
padded_tanh (float[N, 2, 4, 4] X) => (float[N, 2, 4, 4] Y) {
    H = Conv <kernel_shape = [1, 1]> (X, W1, B1)
    T = Tanh(H)
    Y = Conv <kernel_shape = [3, 3], pads = [1, 1, 1, 1]> (T, W2, B2)
}
"""


def _model(text: str, weights: dict[str, np.ndarray], tmp_path: Path):
    """The inline graph with its weights, saved and loaded as the CLI loads it (named nodes, shapes)."""
    model = onnx.parser.parse_model(text)
    model.graph.initializer.extend(numpy_helper.from_array(v.astype(np.float32), k) for k, v in weights.items())
    path = tmp_path / "model.onnx"
    onnx.save(model, path)
    return load_model(path)


def _dataset(x: np.ndarray) -> Dataset:
    return Dataset(path=Path("<inline>"), arrays={"X": x}, labels=None, expected=None, n=len(x),
                   dtypes={"X": np.dtype(np.float32)})


def _run(model: onnx.ModelProto, feeds: dict, outputs=None) -> list[np.ndarray]:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(outputs, feeds)


def _explicit(plan: Plan) -> Plan:
    """The same values with every moved parameter as an explicit node: y = a·g(b·x + c) + d, literally."""
    swaps = [dataclasses.replace(s, placement={p: "fixed" if w == "fixed" else "nodes" for p, w in s.placement.items()})
             for s in plan.swaps]
    return Plan("off", swaps)


def _consts(model: onnx.ModelProto) -> dict[str, list]:
    """Per node name, the values of its constant inputs (weights, biases) in input order."""
    inits = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    return {n.name: [inits[i] for i in n.input if i in inits] for n in model.graph.node}


def _assert_truthful(loaded, result: api.SwapResult, feeds: dict, tmp_path: Path) -> None:
    """Metadata, rewrite record, report.json and report.html say what the graph holds, and it computes
    what the explicit-node form of the same plan computes."""
    (swap,), (record,) = result.plan.swaps, result.rewrite.records
    placement = dict(swap.placement)
    candidate = result.candidate
    meta = {p.key: p.value for p in candidate.metadata_props}
    assert Plan.from_json(meta[PLAN_KEY]).swaps[0].placement == placement
    assert record.placement == placement
    folder = tmp_path / "report"
    json_path, html_path = write_report(folder, original=loaded, swap=result)
    payload = json.loads(json_path.read_text())
    assert payload["sites"][0]["placement"] == placement and payload["plan"]["swaps"][0]["placement"] == placement
    assert " ".join(f"{p}:{placement[p]}" for p in PARAMS) in html_path.read_text()

    # parameter nodes: one Mul (a, b) or Add (c, d) per non-neutral parameter placed as "nodes", none else,
    # next to the ops of the plan's emission form
    assert Plan.from_json(meta[PLAN_KEY]).swaps[0].form == swap.form == record.form
    prefix = f"swapper/{swap.site_id}/"
    added = [n for n in candidate.graph.node if n.name.startswith(prefix)]
    assert record.nodes_added == len(added)
    form_ops = get_form(swap.surrogate, swap.form).op_types(swap.surrogate_params)
    for op, params in (("Mul", "ab"), ("Add", "cd")):
        want = sum(placement[p] == "nodes" and not np.all(getattr(swap, p) == NEUTRAL[p]) for p in params)
        assert sum(n.op_type == op for n in added) == want + form_ops.count(op), (op, placement, form_ops)

    # a layer's weights or bias changed exactly when the record says something folded into it
    base = result.calibration.model
    before, after = _consts(base), _consts(candidate)
    changed = {name for name in before.keys() & after.keys()
               if len(before[name]) != len(after[name])
               or any(not np.array_equal(u, v) for u, v in zip(before[name], after[name]))}
    assert changed == set(record.folded_into)

    # source: ONNX operator spec as executed by onnxruntime, on the explicit-node form of the same plan
    explicit = rewrite(base, result.sites, _explicit(result.plan)).model
    onnx.checker.check_model(candidate, full_check=True)
    np.testing.assert_allclose(_run(candidate, feeds)[0], _run(explicit, feeds)[0], rtol=1e-4, atol=1e-4)


# ------------------------------------------------------------------ max pool
def _maxpool_case(tmp_path):
    rng = np.random.default_rng(0)
    loaded = _model(MAXPOOL, {"W2": rng.normal(size=(2, 3, 1, 1)), "B2": rng.normal(size=2)}, tmp_path)
    x = rng.normal(scale=2.0, size=(64, 3, 4, 4))
    # channel 0 lives where SiLU falls (x < -1.28) while hard_sigmoid rises: the best a there is negative
    x[:, 0] = rng.uniform(-5.0, -1.5, size=(64, 4, 4))
    sites = api.scan(loaded).sites
    return loaded, x.astype(np.float32), sites, make_plan(loaded.model, sites, to="hard_sigmoid")


def test_max_pool_keeps_a_positive_and_folded(tmp_path):
    loaded, x, _, _ = _maxpool_case(tmp_path)
    result = api.swap(loaded, calib=_dataset(x), to="hard_sigmoid", fold="exact")
    swap = result.plan.swaps[0]
    assert swap.placement == {"a": "consumers-via-max", "b": "fixed", "c": "fixed", "d": "consumers"}
    # the data ask for a negative a on channel 0: least squares of y on [g(x), 1] (numpy lstsq), b and c held
    g, _ = functions.get(swap.surrogate).bind(swap.surrogate_params)
    x0 = x[:, 0].astype(np.float64).ravel()
    silu = x0 / (1.0 + np.exp(-x0))  # source: SiLU(x) = x·sigmoid(x)
    slope = np.linalg.lstsq(np.stack([g(x0), np.ones_like(x0)], axis=1), silu, rcond=None)[0][0]
    assert slope < 0
    # the placement asks a > 0 (a max pool commutes with a >= 0 only): the fitter keeps to it
    assert np.all(swap.a > 0)
    _assert_truthful(loaded, result, {"X": x}, tmp_path)


def test_a_start_that_breaks_the_max_pool_placement_is_refused(tmp_path):
    loaded, x, sites, plan = _maxpool_case(tmp_path)
    plan.swaps[0].a[0] = -1.0  # a hand edit: the fit must not start there, the rewriter must not move a
    with pytest.raises(UsageError, match="max pool needs a > 0; channel 0 ") as err:
        calibrate(loaded.model, sites, plan, _dataset(x))
    assert "\n" not in str(err.value)
    with pytest.raises(UsageError, match="max pool needs a > 0; channel 0 "):
        rewrite(loaded.model, sites, plan)


# ----------------------------------------------- a = 0 with d as a node
def _padded_case(tmp_path):
    rng = np.random.default_rng(1)
    w1, b1 = rng.normal(size=(3, 2, 1, 1)), rng.normal(size=3)
    w1[0], b1[0] = 0.3, 25.0  # channel 0: pre-activation about 25, where float32 Tanh is exactly 1
    weights = {"W1": w1, "B1": b1, "W2": rng.normal(size=(2, 3, 3, 3)), "B2": rng.normal(size=2)}
    loaded = _model(PADDED, weights, tmp_path)
    # 64 samples x 4x4 positions = 1024 pairs per channel: a power of two, so the mean of a constant is exact
    x = rng.normal(size=(64, 2, 4, 4)).astype(np.float32)
    sites = api.scan(loaded).sites
    return loaded, x, sites, make_plan(loaded.model, sites, to="hard_swish", fold="exact+nodes")


def test_zero_a_is_kept_out_when_d_is_a_node(tmp_path):
    loaded, x, sites, plan = _padded_case(tmp_path)
    swap = plan.swaps[0]
    assert swap.placement == {"a": "consumers", "b": "producer", "c": "producer", "d": "nodes"}
    assert swap.a_bounds() == {"positive_a": False, "nonzero_a": True}
    assert any("a kept away from 0" in n for n in swap.notes)

    # what an unconstrained fit does with this data: a saturated channel (y = 1 exactly, onnxruntime Tanh)
    # gets a = 0 and d = 1, which the consumers could not carry (the d node would have to add d/a)
    probe = onnx.ModelProto()
    probe.CopyFrom(loaded.model)
    probe.graph.output.extend([onnx.helper.make_tensor_value_info(t, onnx.TensorProto.FLOAT, None)
                               for t in (sites[0].input, sites[0].output)])
    h, t = _run(probe, {"X": x}, [sites[0].input, sites[0].output])
    assert np.all(t[:, 0] == 1.0)
    observer = ChannelObserver(3, 1)
    observer.update(h, t)
    g, dg = swap.bound_surrogate()
    free = fit_channels(observer, g, init=swap.params(), dg=dg)
    assert free.a[0] == 0.0 and free.d[0] != 0.0
    kept = fit_channels(observer, g, init=swap.params(), dg=dg, nonzero_a=True)
    assert np.all(kept.a != 0.0)

    result = api.swap(loaded, calib=_dataset(x), to="hard_swish", fold="exact+nodes")
    fitted = result.plan.swaps[0]
    assert fitted.placement == swap.placement and np.all(fitted.a != 0.0) and fitted.d[0] != 0.0
    # a stayed in the consumers: their weights changed, and the only parameter node is d's Add
    assert set(result.rewrite.records[0].folded_into) >= {n.name for n in loaded.model.graph.node
                                                          if n.op_type == "Conv"}
    _assert_truthful(loaded, result, {"X": x}, tmp_path)


def test_zero_a_value_is_refused_when_d_is_a_node(tmp_path):
    loaded, _, sites, plan = _padded_case(tmp_path)
    plan.swaps[0].a[0], plan.swaps[0].d[0] = 0.0, 1.0  # a hand edit the placement does not allow
    with pytest.raises(UsageError, match="a != 0; channel 0 "):
        rewrite(loaded.model, sites, plan)


@pytest.mark.parametrize("eps", [0.1, -0.1])
def test_nonzero_a_gives_the_best_a_away_from_zero(eps):
    # y = 1e6·(z² − 1/3) + eps·z on a symmetric z: a large part uncorrelated with z makes the floor on |a|
    # (1e-6 of sqrt(var y / var z), about 0.5) larger than the true slope eps, so the bound is active
    z = np.linspace(-1.0, 1.0, 101)
    y = 1e6 * (z * z - 1.0 / 3.0) + eps * z
    free_a, _ = outer_fit(z, y)
    a, d = outer_fit(z, y, nonzero_a=True)
    assert abs(free_a - eps) < 1e-6 and abs(a) > abs(eps) and np.sign(a) == np.sign(eps)

    def mse(s: float) -> float:  # d eliminated: the best offset for slope s (uniform least squares)
        return float(np.mean((y - s * z - np.mean(y - s * z)) ** 2))

    # source: scipy.optimize.minimize_scalar, bounded, on each side of the excluded interval (-|a|, |a|)
    sides = [minimize_scalar(mse, bounds=b, method="bounded", options={"xatol": 1e-9})
             for b in ((abs(a), 10.0), (-10.0, -abs(a)))]
    assert mse(a) <= min(s.fun for s in sides) * (1 + 1e-14)
    np.testing.assert_allclose(d, np.mean(y - a * z), rtol=1e-12)
