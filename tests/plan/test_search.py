"""The per-site search (swapper.plan.search): the selection against brute force, and the back-off guards."""
from __future__ import annotations

import itertools

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from swapper.plan.search import Option, Verification, search, select


def _brute_force(options: list[Option], allowance: float) -> float:
    # source: the definition of the multiple-choice knapsack: every way of taking at most one option per
    # group (site), the largest total value whose summed weight stays within the capacity
    sites = sorted({o.site_id for o in options})
    groups = [[None] + [o for o in options if o.site_id == s and o.saving > 0] for s in sites]
    best = 0.0
    for pick in itertools.product(*groups):
        taken = [o for o in pick if o is not None]
        if sum(o.charged for o in taken) <= allowance + 1e-12:
            best = max(best, sum(o.saving for o in taken))
    return best


option_lists = st.lists(st.tuples(st.sampled_from("abcd"), st.integers(-3, 10), st.integers(-2, 9)),
                        min_size=1, max_size=9)


@settings(max_examples=60, deadline=None)
@given(option_lists, st.integers(0, 12))
def test_select_matches_brute_force(raw, allowance_steps):
    # costs on a grid of allowance/10 and grid=10, so rounding up to whole steps is exact
    unit = 0.25
    options = [Option(site, f"{site}{i}", float(saving), unit * cost) for i, (site, saving, cost) in enumerate(raw)]
    allowance = unit * allowance_steps
    chosen = select(options, allowance, grid=max(1, allowance_steps))
    assert chosen.cost <= allowance + 1e-9
    assert len({o.site_id for o in chosen.chosen.values()}) == len(chosen.chosen)  # one option per site
    assert chosen.saving == pytest.approx(_brute_force(options, allowance))


def test_gains_count_as_zero_and_savings_below_zero_never_go_in():
    options = [Option("a", "a/gain", 1.0, -0.5), Option("b", "b/costly", 2.0, 0.4), Option("c", "c/slower", -1.0, 0.0)]
    sel = select(options, 0.4)
    assert set(sel.chosen) == {"a", "b"} and sel.cost == pytest.approx(0.4)  # the gain does not pay for b


def test_never_returns_a_plan_that_is_not_faster():
    options = [Option("a", "a1", 1.0, 0.0), Option("b", "b1", 2.0, 0.0)]
    seen = []

    def verify(chosen):  # a stand-in for the latency measurer: every combined plan is slower than the original
        seen.append(sorted(chosen))
        return Verification(passed=True, faster=False, detail="1.05x")

    result = search(options, 1.0, verify)
    assert result.chosen == {} and "faster" in result.reason
    assert seen == [["a", "b"], ["b"]]  # the site saving least goes first
    assert all(a.verification.faster is False for a in result.attempts)


def test_backs_off_the_worst_accuracy_per_saving_until_the_gate_passes():
    options = [Option("a", "a1", 1.0, 0.1), Option("b", "b1", 1.0, 0.4), Option("c", "c1", 4.0, 0.4)]

    def verify(chosen):  # the gate fails while both b and c are in
        return Verification(passed=not {"b", "c"} <= set(chosen), faster=True, detail="")

    result = search(options, 1.0, verify)
    assert set(result.chosen) == {"a", "c"}  # b: 0.4 per 1.0 saved is worse than c's 0.4 per 4.0
    assert result.attempts[0].dropped == "b"


def test_nothing_saves_nothing_is_verified():
    def verify(chosen):  # pragma: no cover - must not be called
        raise AssertionError("verified a plan with no saving")

    result = search([Option("a", "a1", -0.1, 0.0)], 1.0, verify)
    assert result.chosen == {} and result.attempts == []


def test_zero_allowance_takes_only_free_options():
    sel = select([Option("a", "a1", 1.0, 0.0), Option("b", "b1", 3.0, 1e-9)], 0.0)
    assert set(sel.chosen) == {"a"}
