"""Statistics of token-shaped sites read only the real tokens.

References: numpy's mean / var / min / max on the kept rows (the statistics computed directly on the tokens the
mask keeps); scikit-learn's Ridge for the consumer refit's closed form (a prior-centred ridge is plain ridge on
Y − X·W0 with W0 added back); scipy.special.erf for exact GELU (0.5·x·(1 + erf(x/√2))) and the hard-swish and
ReLU formulas (testkit, from their definitions); onnxruntime runs the inline models (ONNX operator spec).
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
from onnx import helper
from scipy.special import erf
from sklearn.linear_model import Ridge
from testkit import hard_swish, in_memory, relu, token_batch, token_model

from swapper.calibrate.bias_correction import DeltaSum
from swapper.calibrate.loop import calibrate
from swapper.calibrate.refit import accumulate
from swapper.calibrate.ridge import FoldedGram, choose_ridge, ridge_toward_prior
from swapper.calibrate.tokens import observe
from swapper.core.graph import GraphIndex
from swapper.fit.observe import ChannelObserver
from swapper.plan.layers import Consumer
from swapper.plan.plan import make_plan
from swapper.scan.sites import find_sites


def _batches(rng, n_batches=3, b=5, t=7, c=4):
    out = []
    for _ in range(n_batches):
        x = rng.normal(size=(b, t, c)).astype(np.float32)
        y = (x * 0.5 + rng.normal(size=x.shape)).astype(np.float32)
        keep = rng.random((b, t)) < 0.6
        keep[:, 0] = True
        out.append((x, y, keep))
    return out


def test_masked_observer_moments_are_those_of_the_kept_tokens():
    rng = np.random.default_rng(0)
    data = _batches(rng)
    obs = ChannelObserver(4, -1, reservoir=10_000)
    for x, y, keep in data:
        observe(obs, x, y, keep)
    # numpy on the kept rows only
    xs = np.concatenate([x[k] for x, _, k in data]).astype(np.float64)
    ys = np.concatenate([y[k] for _, y, k in data]).astype(np.float64)
    stats = obs.compute()
    assert obs.n == xs.shape[0]
    np.testing.assert_allclose(stats.mean_x, xs.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(stats.var_x, xs.var(axis=0), rtol=1e-12)
    np.testing.assert_allclose(stats.mean_y, ys.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(stats.cov_xy, ((xs - xs.mean(0)) * (ys - ys.mean(0))).mean(axis=0), rtol=1e-10)
    np.testing.assert_array_equal(stats.min_x, xs.min(axis=0))
    np.testing.assert_array_equal(stats.max_x, xs.max(axis=0))
    # the reservoir holds every kept pair (it is larger than the stream) and nothing else
    rx, ry = obs.all_samples()
    np.testing.assert_array_equal(rx, xs.T)
    np.testing.assert_array_equal(ry, ys.T)


def test_an_all_ones_mask_changes_nothing():
    rng = np.random.default_rng(1)
    data = _batches(rng)
    masked, plain = ChannelObserver(4, -1, reservoir=16), ChannelObserver(4, 2, reservoir=16)
    delta_masked, delta_plain = DeltaSum(), DeltaSum()
    for x, y, keep in data:
        ones = np.ones_like(keep)
        observe(masked, x, y, ones)
        plain.update(x, y)
        delta_masked.add(x, y, ones)
        delta_plain.add(x, y)
    for field in ("mean_x", "var_x", "mean_y", "var_y", "cov_xy", "min_x", "max_x"):
        np.testing.assert_array_equal(getattr(masked.compute(), field), getattr(plain.compute(), field))
    for a, b in zip(masked.all_samples(), plain.all_samples()):
        np.testing.assert_array_equal(a, b)
    # the token mean with every position kept is the mean over samples and positions
    np.testing.assert_allclose(delta_masked.token_mean().reshape(-1),
                               delta_plain.mean().reshape(-1, 4).mean(axis=0), rtol=1e-12)


def test_token_mean_difference_is_numpys_on_kept_tokens():
    rng = np.random.default_rng(2)
    data = _batches(rng)
    delta = DeltaSum()
    for x, y, keep in data:
        delta.add(x, y, keep)
    diff = np.concatenate([(x.astype(np.float64) - y)[k] for x, y, k in data])
    np.testing.assert_allclose(delta.token_mean().reshape(-1), diff.mean(axis=0), rtol=1e-12)
    assert delta.token_mean().shape == (1, 1, 4)


# ------------------------------------------------------------------ calibration end to end
def _calibrate(model, batch, to, mask_input):
    sites = find_sites(model)
    plan = make_plan(model, sites, to=to)
    return calibrate(model, sites, plan, in_memory(batch), batch_size=8, mask_input=mask_input), sites


@pytest.mark.parametrize("to", ["relu", "hard_swish"])
def test_padding_positions_do_not_move_the_masked_fit(to):
    # the encoder computes each position on its own: with the mask, what padding holds cannot matter
    model, batch = token_model(), token_batch(24, 6, seed=4)
    other = dict(batch, input_ids=np.where(batch["attention_mask"] == 0, 9, batch["input_ids"]))
    fits = {}
    for mask in ("auto", "none"):
        fits[mask] = [_calibrate(model, b, to, mask)[0].plan.swaps[0] for b in (batch, other)]
    a, b = fits["auto"]
    for p in "abcd":
        np.testing.assert_array_equal(getattr(a, p), getattr(b, p))
    a, b = fits["none"]  # without the mask the padding tokens are fitted too, so the fit moves
    assert any(not np.array_equal(getattr(a, p), getattr(b, p)) for p in "abcd")


def test_an_all_ones_mask_calibrates_as_no_mask():
    model, batch = token_model(), token_batch(16, 5, seed=5)
    batch["attention_mask"][:] = 1
    (with_mask, _), (without, _) = (_calibrate(model, batch, "relu", m) for m in ("auto", "none"))
    assert "attention_mask" in with_mask.tokens
    for p in "abcd":
        np.testing.assert_array_equal(getattr(with_mask.plan.swaps[0], p), getattr(without.plan.swaps[0], p))
    assert with_mask.model.SerializeToString() == without.model.SerializeToString()


def _as_constant_nodes(model):
    """The same model with every initializer held by a Constant node instead (as some exporters write it)."""
    out = copy.deepcopy(model)
    nodes = [helper.make_node("Constant", [], [t.name], value=t, name=f"const_{t.name}") for t in out.graph.initializer]
    del out.graph.initializer[:]
    rest = list(out.graph.node)
    del out.graph.node[:]
    out.graph.node.extend(nodes + rest)
    return out


@pytest.mark.parametrize("constants", [False, True], ids=["initializers", "constant-nodes"])
@pytest.mark.parametrize("to, g", [("relu", relu), ("hard_swish", hard_swish)])
def test_bias_correction_cancels_the_mean_shift_over_real_tokens(to, g, constants):
    model, batch = token_model(), token_batch(20, 6, seed=6)
    if constants:
        model = _as_constant_nodes(model)
    result, sites = _calibrate(model, batch, to, "auto")
    assert result.sites[0].bias_corrected
    assert not [n for n in result.sites[0].notes if "bias correction" in n]  # the fit's own notes may remain
    # nothing is left behind: every Constant node's output is read
    read = {t for n in result.model.graph.node for t in n.input}
    assert all(n.output[0] in read for n in result.model.graph.node if n.op_type == "Constant")
    swap = result.plan.swaps[0]
    ix, fixed = GraphIndex.of(model), GraphIndex.of(result.model)
    table, w1, b1, w2 = (ix.const(n).astype(np.float64) for n in ("table", "w1", "b1", "w2"))
    x = (table[batch["input_ids"]] @ w1 + b1)[batch["attention_mask"] == 1]  # site input at real tokens
    teacher = 0.5 * x * (1 + erf(x / np.sqrt(2)))
    student = swap.a * g(swap.b * x + swap.c) + swap.d
    shift = (student - teacher).mean(axis=0) @ w2
    add = next(n for n in fixed.graph.node if n.op_type == "Add" and "z0" in n.input)
    new_bias = fixed.const(next(t for t in add.input if t != "z0"))
    np.testing.assert_allclose(new_bias, ix.const("b2") - shift, rtol=1e-4, atol=1e-5)


# ------------------------------------------------------------------ consumer refit, closed form
def test_masked_matmul_refit_equals_sklearn_ridge_on_the_kept_rows():
    rng = np.random.default_rng(7)
    c_in, c_out, k = 5, 3, 3
    w0 = np.vstack([rng.normal(size=(c_in, c_out)), rng.normal(size=(1, c_out))])  # [W; bias], the prior
    consumer = Consumer("s1", "matmul", "mm", "add", 1, "g", "z")
    gram = FoldedGram(k, c_in)
    batches, fold_of = [], rng.permutation(30) % k
    for start in range(0, 30, 10):
        x = rng.normal(size=(10, 8, c_in)).astype(np.float32)
        y = (x @ (w0[:-1] * 1.3) + w0[-1] + rng.normal(scale=0.1, size=(10, 8, c_out))).astype(np.float32)
        keep = rng.random((10, 8)) < 0.5
        accumulate(gram, consumer, None, (), x, y, fold_of[start:start + 10], keep)
        batches.append((x[keep], y[keep], np.nonzero(keep)[0] + start))
    X = np.concatenate([b[0] for b in batches]).astype(np.float64)
    Y = np.concatenate([b[1] for b in batches]).astype(np.float64)
    fold = fold_of[np.concatenate([b[2] for b in batches])]
    Xa = np.column_stack([X, np.ones(len(X))])
    assert gram.total().n == len(X)
    for lam in (1e-3, 0.5, 20.0):
        # scikit-learn Ridge on the kept rows: alpha = lam, no intercept (the ones column is in Xa), prior shift
        ref = Ridge(alpha=lam, fit_intercept=False, solver="svd").fit(Xa, Y - Xa @ w0).coef_.T + w0
        np.testing.assert_allclose(ridge_toward_prior(gram.total(), lam, w0), ref, rtol=1e-9, atol=1e-11)
    # the K-fold choice: held-out error of each factor from sklearn fits on the other folds
    factors = (1e-6, 1e-2, 1.0, 100.0)
    errors = []
    for f in factors:
        err = 0.0
        for j in range(k):
            train, test = fold != j, fold == j
            lam = f * np.trace(Xa[train].T @ Xa[train]) / Xa.shape[1]
            fit = Ridge(alpha=lam, fit_intercept=False, solver="svd").fit(Xa[train], Y[train] - Xa[train] @ w0)
            err += np.sum((Xa[test] @ (fit.coef_.T + w0) - Y[test]) ** 2)
        errors.append(err / Y.size)
    choice = choose_ridge(gram, w0, w0, factors)
    assert choice.factor == factors[int(np.argmin(errors))]
    np.testing.assert_allclose(choice.cv_mse, min(errors), rtol=1e-8)


def test_refit_of_constant_node_weights_leaves_no_unread_constant(tmp_path):
    """Refit writes a weight a Constant node holds as a fresh initializer; the old Constant goes."""
    import onnx
    from testkit import run

    from swapper import api

    model, batch = _as_constant_nodes(token_model()), token_batch(40, 6, seed=7)
    onnx.save(model, tmp_path / "m.onnx")
    result = api.swap(tmp_path / "m.onnx", calib=in_memory(batch), to="relu", refit_consumers=True)
    assert result.refit is not None and any(d.consumers for d in result.refit.decisions.values()), \
        result.refit.notes
    # structure per the ONNX IR: every Constant node's output is read by some node or is a graph output
    read = {t for n in result.candidate.graph.node for t in n.input} | {o.name for o in result.candidate.graph.output}
    assert all(n.output[0] in read for n in result.candidate.graph.node if n.op_type == "Constant")
    onnx.checker.check_model(result.candidate, full_check=True)
    # onnxruntime runs it and gives finite outputs of the original's shape
    want, got = run(model, batch), run(result.candidate, batch)
    assert [w.shape for w in want] == [g.shape for g in got] and all(np.isfinite(g).all() for g in got)
