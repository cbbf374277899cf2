"""positive_b: the fitter keeps b > 0 where the placement asks it (b passing through a residual Add).

Reference: the data come from the written-out Relu (testkit.relu, ONNX operator spec: max(z, 0)); the check is
that the rule holds on every channel and that a channel forced off its best b is still never worse than the
start (the fitter's own promise, swapper/fit/channel.py), while a channel whose best b is positive is fitted
exactly as without the rule.
"""
from __future__ import annotations

import numpy as np
from testkit import drelu, relu, wmse

from swapper.fit.observe import ChannelObserver
from swapper.fit.site import fit_channels


def _observer(x: np.ndarray, y: np.ndarray) -> ChannelObserver:
    obs = ChannelObserver(x.shape[1], 1, reservoir=4096, seed=0)
    obs.update(x, y)
    return obs


def test_positive_b_holds_b_where_the_best_b_is_negative():
    rng = np.random.default_rng(0)
    x = rng.normal(size=(2000, 2))
    # channel 0 is relu(-x) (best b < 0), channel 1 is relu(2x - 0.5) (best b > 0)
    y = np.stack([relu(-x[:, 0]), relu(2 * x[:, 1] - 0.5)], axis=1)
    init = {"a": np.ones(2), "b": np.ones(2), "c": np.zeros(2), "d": np.zeros(2)}
    free_fit = fit_channels(_observer(x, y), relu, init=init, dg=drelu)
    assert free_fit.b[0] < 0  # without the rule the fit takes the reversed ramp
    ruled = fit_channels(_observer(x, y), relu, init=init, dg=drelu, positive_b=True)
    assert np.all(ruled.b > 0)
    assert ruled.b[0] == 1.0 and "b fixed at its start" in ruled.notes[0]
    start_mse = wmse(y[:, 0], relu(x[:, 0]))
    fitted_mse = wmse(y[:, 0], ruled.a[0] * relu(ruled.b[0] * x[:, 0] + ruled.c[0]) + ruled.d[0])
    assert fitted_mse <= start_mse
    np.testing.assert_allclose([ruled.a[1], ruled.b[1], ruled.c[1], ruled.d[1]],
                               [free_fit.a[1], free_fit.b[1], free_fit.c[1], free_fit.d[1]])
