"""What the readers of a site see of its error: the Gram M, bias correction through residual Adds, the fit rules.

References: onnxruntime runs the ONNX operator spec (Conv, Gemm, Add); an error placed at one interior
position of a Conv's input reaches its output as ‖Σ_taps W_tap·e‖², summed over outputs (no padding is
read there), which is eᵀ·M·e for M = Σ_taps W_tapᵀ·W_tap; means are numpy's.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import onnx.parser
from onnx import numpy_helper
from testkit import as_loaded, in_memory, run

from swapper import api
from swapper.calibrate.consumer_metric import consumer_metric
from swapper.calibrate.site_fit import FitRules
from swapper.core.graph import GraphIndex
from swapper.scan.sites import find_sites

C = 3

# SiLU read by a zero-padded 3x3 Conv and a residual Add; the Add's output goes to a 1x1 Conv (no site
# reads it, so only bias correction through the Add can give it its mean back)
RESIDUAL = """
<ir_version: 8, opset_import: ["" : 17]>
res (float[N, 3, 6, 6] X) => (float[N, 2, 6, 6] Y) {
    h = Conv <kernel_shape = [1, 1]> (X, W0, B0)
    s = Sigmoid(h)
    y = Mul(h, s)
    u = Conv <kernel_shape = [3, 3], pads = [1, 1, 1, 1]> (y, W1, B1)
    z = Add(u, y)
    Y = Conv <kernel_shape = [1, 1]> (z, W2, B2)
}
"""

# the same SiLU read by a Gemm after flattening a [N, 3] tensor, and by a Tanh (a reader M cannot weigh)
GEMM = """
<ir_version: 8, opset_import: ["" : 17]>
dense (float[N, 4] X) => (float[N, 5] Y, float[N, 3] T) {
    h = Gemm <transB = 1> (X, V0, C0)
    s = Sigmoid(h)
    y = Mul(h, s)
    Y = Gemm <alpha = 0.5> (y, V1, C1)
    T = Tanh(y)
}
"""


def _model(text: str, seed: int = 0) -> onnx.ModelProto:
    rng = np.random.default_rng(seed)
    w = {"W0": rng.normal(size=(C, 3, 1, 1)), "B0": rng.normal(size=C) * 0.3,
         "W1": rng.normal(size=(C, C, 3, 3)) * 0.4, "B1": rng.normal(size=C) * 0.3,
         "W2": rng.normal(size=(2, C, 1, 1)), "B2": rng.normal(size=2) * 0.1,
         "V0": rng.normal(size=(C, 4)), "C0": rng.normal(size=C) * 0.3,
         "V1": rng.normal(size=(C, 5)), "C1": rng.normal(size=5) * 0.1}
    model = onnx.parser.parse_model(text)
    used = {i for n in model.graph.node for i in n.input}
    model.graph.initializer.extend(numpy_helper.from_array(v.astype(np.float32), k) for k, v in w.items() if k in used)
    return as_loaded(model)


def _conv_model(w: np.ndarray) -> onnx.ModelProto:
    text = """
    <ir_version: 8, opset_import: ["" : 17]>
    one (float[1, 3, 6, 6] E) => (float[1, 3, 6, 6] O) {
        O = Conv <kernel_shape = [3, 3], pads = [1, 1, 1, 1]> (E, W1)
    }
    """
    model = onnx.parser.parse_model(text)
    model.graph.initializer.append(numpy_helper.from_array(w.astype(np.float32), "W1"))
    return model


def test_metric_is_what_the_conv_and_the_add_behind_it_do_to_an_error():
    model = _model(RESIDUAL)
    (site,) = find_sites(model)
    metric, why = consumer_metric(GraphIndex.of(model), site)
    assert metric is not None, why
    w = numpy_helper.to_array(next(t for t in model.graph.initializer if t.name == "W1"))
    rng = np.random.default_rng(5)
    for _ in range(3):
        e = rng.normal(size=C)
        field = np.zeros((1, C, 6, 6), dtype=np.float32)
        field[0, :, 3, 2] = e  # one interior position: every tap reads the input, none the padding
        # source: onnxruntime's Conv of the error, added back to the error as the model's Add does (z = u + y)
        seen = float(np.sum((run(_conv_model(w), {"E": field})[0].astype(np.float64) + field) ** 2))
        np.testing.assert_allclose(e @ metric @ e, seen, rtol=1e-5)


def test_metric_of_a_gemm_and_none_with_a_reader_it_cannot_weigh():
    model = _model(GEMM)
    (site,) = [s for s in find_sites(model) if s.function == "silu"]
    metric, why = consumer_metric(GraphIndex.of(model), site)
    assert metric is None and "Tanh" in why  # the Tanh's sensitivity is unknown: no partial weighing
    no_tanh = _model(GEMM.replace(", float[N, 3] T", "").replace("    T = Tanh(y)\n", ""))
    (site,) = find_sites(no_tanh)
    metric, _ = consumer_metric(GraphIndex.of(no_tanh), site)
    v1 = numpy_helper.to_array(next(t for t in no_tanh.graph.initializer if t.name == "V1")).astype(np.float64)
    e = np.random.default_rng(6).normal(size=(1, C)).astype(np.float32)
    graph = onnx.parser.parse_model("""
    <ir_version: 8, opset_import: ["" : 17]>
    g (float[1, 3] E) => (float[1, 5] O) { O = Gemm <alpha = 0.5> (E, V1) }
    """)
    graph.graph.initializer.append(numpy_helper.from_array(v1.astype(np.float32), "V1"))
    # source: onnxruntime's Gemm (alpha = 0.5) of the error
    seen = float(np.sum(run(graph, {"E": e})[0].astype(np.float64) ** 2))
    np.testing.assert_allclose(e[0] @ metric @ e[0], seen, rtol=1e-5)


# a Gemm reader whose output is added straight back to the SiLU output (z = y·V1 + y): the cross term counts
DENSE_RESIDUAL = """
<ir_version: 8, opset_import: ["" : 17]>
dres (float[N, 4] X) => (float[N, 3] Z) {
    h = Gemm <transB = 1> (X, V0, C0)
    s = Sigmoid(h)
    y = Mul(h, s)
    u = Gemm <alpha = 0.5> (y, Q1, C1)
    Z = Add(u, y)
}
"""


def test_metric_of_a_gemm_added_back_holds_the_cross_term():
    rng = np.random.default_rng(4)
    q1 = rng.normal(size=(C, C)).astype(np.float32)
    model = onnx.parser.parse_model(DENSE_RESIDUAL)
    model.graph.initializer.extend(numpy_helper.from_array(v.astype(np.float32), k) for k, v in
                                   {"V0": rng.normal(size=(C, 4)), "C0": rng.normal(size=C), "Q1": q1,
                                    "C1": rng.normal(size=C)}.items())
    model = as_loaded(model)
    (site,) = find_sites(model)
    metric, why = consumer_metric(GraphIndex.of(model), site)
    assert metric is not None, why
    graph = onnx.parser.parse_model("""
    <ir_version: 8, opset_import: ["" : 17]>
    g (float[1, 3] E) => (float[1, 3] O) { u = Gemm <alpha = 0.5> (E, Q1)  O = Add(u, E) }
    """)
    graph.graph.initializer.append(numpy_helper.from_array(q1, "Q1"))
    rng = np.random.default_rng(8)
    for _ in range(3):
        e = rng.normal(size=(1, C)).astype(np.float32)
        # source: onnxruntime's Gemm (alpha = 0.5) of the error plus the error, as the model's Add does
        seen = float(np.sum(run(graph, {"E": e})[0].astype(np.float64) ** 2))
        np.testing.assert_allclose(e[0] @ metric @ e[0], seen, rtol=1e-5)
    # without the cross term the Gram alone would be ‖L(e)‖² + ‖e‖²; the two differ for this L
    bt = 0.5 * q1.astype(np.float64)
    assert np.abs(metric - (bt @ bt.T + np.eye(C))).max() > 1e-3


def test_bias_correction_gives_the_residual_sum_its_mean_back(tmp_path: Path):
    model = _model(RESIDUAL)
    onnx.save(model, tmp_path / "res.onnx")
    x = np.random.default_rng(9).normal(size=(128, 3, 6, 6)).astype(np.float32)
    data = in_memory({"X": x})
    means = {}
    for corrected in (False, True):
        result = api.swap(tmp_path / "res.onnx", calib=data, to="relu", bias_correction=corrected,
                          refit_consumers=False)
        cand = run(result.candidate, {"X": x}, ["z"])[0].astype(np.float64)
        means[corrected] = cand.mean(axis=(0, 2, 3))
        if corrected:
            site = result.calibration.sites[0]
            u = next(n.name for n in model.graph.node if n.output[0] == "u")
            assert u in site.bias_corrected  # the Add's other producer took the site's mean change
    # source: numpy means of onnxruntime's outputs on the calibration samples
    want = run(model, {"X": x}, ["z"])[0].astype(np.float64).mean(axis=(0, 2, 3))
    assert np.abs(means[True] - want).max() < 1e-3 * max(1.0, np.abs(want).max())
    assert np.abs(means[False] - want).max() > 10 * np.abs(means[True] - want).max()


def test_a_held_d_is_fitted_for_the_readers(tmp_path: Path):
    """d cannot fold (zero padding): it is fitted by the error the readers keep after bias correction. Here the
    padded Conv's output is added straight back (z = Conv(y) + y), so z is what the readers hand on: its error
    is smaller than with the plain fit (d fixed in the fit, slopes channel by channel)."""
    import swapper.calibrate.loop as loop  # its fit rules are swapped for plain ones to compare

    model = _model(RESIDUAL)
    onnx.save(model, tmp_path / "res.onnx")
    calib = np.random.default_rng(10).normal(size=(128, 3, 6, 6)).astype(np.float32)
    result = api.swap(tmp_path / "res.onnx", calib=in_memory({"X": calib}), to="relu", refit_consumers=False)
    (swap,) = [s for s in result.plan.swaps if s.function == "silu"]
    assert swap.placement["d"] == "fixed" and np.all(swap.d == 0)
    notes = " ".join(result.calibration.sites[0].notes)
    assert "d fixed: fitted" in notes and "the readers keep after bias correction" in notes
    kept = loop.fit_rules
    try:
        loop.fit_rules = lambda *args: FitRules()
        plain = api.swap(tmp_path / "res.onnx", calib=in_memory({"X": calib}), to="relu", refit_consumers=False)
    finally:
        loop.fit_rules = kept
    # source: onnxruntime's z of both candidates against the original's, on the calibration samples
    want = run(model, {"X": calib}, ["z"])[0].astype(np.float64)
    ours = float(np.mean((run(result.candidate, {"X": calib}, ["z"])[0] - want) ** 2))
    theirs = float(np.mean((run(plain.candidate, {"X": calib}, ["z"])[0] - want) ** 2))
    assert ours < theirs, (ours, theirs)
