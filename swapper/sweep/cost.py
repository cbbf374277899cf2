"""What a candidate costs in accuracy, in the units of the metric the gate decides by.

Transformation: (:class:`~swapper.check.compare.Comparison` of a candidate
against the original, the gate's :class:`~swapper.check.gate.MetricChoice`) ->
:class:`MetricCost`: the metric's value for both models, the change, and one
*cost* number, larger = worse, that adds up across sites as a first estimate
(:mod:`swapper.plan.search`), with an interval where the metric has one. The
allowance in the same units comes from the gate rule (:func:`allowance`).

| metric | cost | interval | allowance |
|---|---|---|---|
| top1 | top-1 drop in points (original − candidate) | the paired 95% interval of the comparison, negated | ``--budget`` |
| agreement | samples whose top-1 changed, in points | Wilson 95% on the changed share | ``(1 − min_agreement)·100`` or ``--budget`` |
| cosine | 1 − worst judged output's mean per-sample cosine | none | ``1 − min_cosine`` |
| sqnr | 10^(−SQNR/10), the error-to-output power ratio, worst output | none | ``10^(−min_sqnr/10)`` |
| rmse | candidate RMSE over the original's, minus 1, in percent | none | ``--budget`` |

Why these add: the top-1 drops and changed samples of separate sites add when
they hit different samples (their overlap makes the sum pessimistic); for unit
vectors ``1 − cos = |e|²/2`` and the SQNR's error power are powers of the
error, and independent errors' powers add.
"""
from __future__ import annotations

import logging
from dataclasses import asdict, dataclass

from swapper.check.compare import Comparison
from swapper.check.gate import GateRule, MetricChoice
from swapper.check.stats import wilson_interval

logger = logging.getLogger(__name__)

UNITS = {"top1": "top-1 points lost", "agreement": "points of samples whose top-1 changed",
         "cosine": "1 - mean per-sample cosine", "sqnr": "error/output power", "rmse": "% RMSE increase"}


@dataclass
class MetricCost:
    name: str  # top1 | agreement | cosine | sqnr | rmse
    original: float | None  # the metric on the original (top1 in %, agreement 100, cosine 1...)
    candidate: float | None
    delta: float | None  # candidate − original, in the metric's units
    cost: float | None  # larger = worse (module docstring); None when it could not be measured
    interval: list[float] | None = None  # [lo, hi] of the cost, 95%

    def to_dict(self) -> dict:
        return asdict(self)


def _worst(c: Comparison, outputs: list[str], key: str) -> float | None:
    values = [(c.output_errors.get(n) or {}).get(key) for n in outputs]
    values = [float(v) for v in values if v is not None]
    return min(values) if values else None


def metric_cost(c: Comparison, choice: MetricChoice) -> MetricCost:
    """The cost of the candidate ``c`` compared in the units of ``choice.metric`` (module docstring)."""
    m = choice.metric
    if m == "top1":
        if c.delta_pp is None:
            return MetricCost(m, None, None, None, None)
        iv = [-c.interval.hi, -c.interval.lo] if c.interval is not None else None
        return MetricCost(m, 100 * c.top1_original, 100 * c.top1_candidate, c.delta_pp, -c.delta_pp, iv)
    if m == "agreement":
        if c.agreement is None:
            return MetricCost(m, None, None, None, None)
        changed = round((1.0 - c.agreement) * c.n)
        lo, hi = wilson_interval(changed, c.n)
        return MetricCost(m, 100.0, 100 * c.agreement, 100 * c.agreement - 100.0, 100 * (1.0 - c.agreement),
                          [100 * lo, 100 * hi])
    if m == "cosine":
        cos = _worst(c, choice.outputs, "cosine_mean")
        return MetricCost(m, 1.0, cos, None if cos is None else cos - 1.0, None if cos is None else 1.0 - cos)
    if m == "sqnr":
        db = _worst(c, choice.outputs, "sqnr_db")
        return MetricCost(m, None, db, None, None if db is None else 10.0 ** (-db / 10.0))
    if c.regression is None:
        return MetricCost(m, None, None, None, None)
    r_o, r_c = c.regression["original"]["rmse"], c.regression["candidate"]["rmse"]
    cost = 100.0 * (r_c / r_o - 1.0) if r_o > 0 else None
    return MetricCost(m, r_o, r_c, r_c - r_o, cost)


def allowance(rule: GateRule, metric: str) -> float:
    """The gate's budget in the cost units of ``metric`` (module docstring)."""
    b = rule.budget
    if metric == "agreement" and b.min_agreement is not None:
        return 100.0 * (1.0 - b.min_agreement)
    if metric == "cosine":
        return max(0.0, 1.0 - rule.cosine_floor)
    if metric == "sqnr":
        return 10.0 ** (-rule.sqnr_floor / 10.0)
    return float(b.max_drop_pp)
