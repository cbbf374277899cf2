"""The observer without moments (what calibration uses): count, x range and reservoir only.

References: numpy's min/max over the channel's values; the moments-keeping
observer fed the same stream (its reservoir draws do not depend on the moments).
"""
from __future__ import annotations

import numpy as np
import pytest

from swapper.errors import BadDataError
from swapper.fit.observe import ChannelObserver


def stream(seed: int):
    rng = np.random.default_rng(seed)
    return [(rng.normal(size=(k, 5, 3)).astype(np.float32), rng.normal(size=(k, 5, 3)).astype(np.float32))
            for k in (7, 40, 1, 300)]


def test_range_count_and_reservoir_match_the_full_observer():
    light = ChannelObserver(5, 1, reservoir=64, seed=3, moments=False)
    full = ChannelObserver(5, 1, reservoir=64, seed=3)
    batches = stream(0)
    for x, y in batches:
        light.update(x, y)
        full.update(x, y)
    seen = light.compute()
    xs = np.concatenate([x for x, _ in batches])
    np.testing.assert_array_equal(seen.min_x, xs.min(axis=(0, 2)))  # reference: numpy over the whole stream
    np.testing.assert_array_equal(seen.max_x, xs.max(axis=(0, 2)))
    assert (seen.count == xs.shape[0] * 3).all() and light.n == full.n
    assert np.isnan(seen.mean_x).all() and np.isnan(seen.var_y).all() and np.isnan(seen.cov_xy).all()
    assert np.isfinite(full.compute().var_x).all()  # the full observer does keep them
    for k in range(2):
        np.testing.assert_array_equal(light.all_samples()[k], full.all_samples()[k])
    x, y = light.all_samples(dtype=None)
    assert x.dtype == np.float32 and not x.flags.writeable  # stored arrays, read-only


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("where", ["x", "y"])
def test_non_finite_data_is_refused_and_leaves_the_observer_as_it_was(bad, where):
    obs = ChannelObserver(5, 1, reservoir=16, seed=0, moments=False)
    x, y = stream(1)[1]
    obs.update(x, y)
    before = (obs.n, obs.compute().min_x.copy(), obs.all_samples()[0].copy())
    x2, y2 = x.copy(), y.copy()
    (x2 if where == "x" else y2)[3, 2, 1] = bad
    with pytest.raises(BadDataError):
        obs.update(x2, y2)
    assert obs.n == before[0]
    np.testing.assert_array_equal(obs.compute().min_x, before[1])
    np.testing.assert_array_equal(obs.all_samples()[0], before[2])


def test_observers_with_different_settings_do_not_merge():
    a = ChannelObserver(5, 1, moments=False)
    b = ChannelObserver(5, 1)
    with pytest.raises(ValueError):
        a.merge(b)


def test_values_beyond_the_kept_precision_are_bad_data_not_a_crash():
    # Found by benchmarks/fuzz.py (seed 7, m01821): float64 site values beyond float32's largest finite
    # value (numpy.finfo(float32).max ≈ 3.4e38) become inf in a float32 reservoir; the fit must say so
    # in one line (BadDataError), not fail inside the solver.
    from swapper.fit.site import fit_channels

    obs = ChannelObserver(2, 1, reservoir=64, seed=0, moments=False, dtype=np.float32)
    x = np.ones((8, 2), dtype=np.float64)
    x[3, 1] = 1e39  # finite in float64, inf once kept as float32
    with pytest.raises(BadDataError, match="not finite"):
        obs.update(x, np.tanh(x))  # refused where it is kept, before any fit reads it
        fit_channels(obs, np.tanh, free="abcd")
    assert obs.n == 0  # the bad batch left the observer as it was
