"""The gate: the budget a candidate must meet and the verdict."""
from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from swapper.check.compare import Comparison
from swapper.errors import UsageError

logger = logging.getLogger(__name__)


@dataclass
class Budget:
    """How much accuracy the candidate may lose.

    ``max_drop_pp``: allowed top-1 drop in percentage points. ``strict``: judge
    the upper end of the interval for the drop instead of the measured drop.
    ``min_agreement``: minimum top-1 agreement with the original (fraction).
    """

    max_drop_pp: float = 1.0
    strict: bool = False
    min_agreement: float | None = None

    def __post_init__(self) -> None:
        if not np.isfinite(self.max_drop_pp) or self.max_drop_pp < 0:
            raise UsageError(f"the accuracy budget must be a number >= 0 (points), got {self.max_drop_pp}")
        if self.min_agreement is not None and not 0.0 <= self.min_agreement <= 1.0:
            raise UsageError(f"minimum agreement must be a fraction in [0, 1], got {self.min_agreement}")


@dataclass
class Verdict:
    approved: bool
    reason: str  # the figure that decided
    rule: str  # the rule applied, in plain words with its numbers

    def to_dict(self) -> dict:
        return {"approved": bool(self.approved), "reason": self.reason, "rule": self.rule}


def _pct(x: float) -> str:
    return f"{100.0 * x:.2f}%"


def decide(comparison: Comparison, budget: Budget) -> Verdict:
    """Approve or reject ``comparison`` against ``budget``; see the module docstring for the rules."""
    c, b = comparison, budget
    if c.has_nonfinite:
        return Verdict(False, "the candidate produced NaN or Inf outputs",
                       "always reject a candidate whose outputs contain NaN or Inf")
    if c.signature_changed:
        return Verdict(False, f"output signature changed: {c.signature_reason}",
                       "always reject a candidate whose output names, dtypes or static shapes differ")

    if c.task == "classification" and c.top1_original is not None:
        drop = -float(c.delta_pp)
        if b.strict:
            upper = -float(c.interval.lo)
            level = f"{100 * c.interval.level:g}%"
            rule = (f"approve when the upper end of the {level} {c.interval.method} interval for the "
                    f"top-1 drop is at most {b.max_drop_pp:.2f} pp (non-inferiority)")
            ok = upper <= b.max_drop_pp
            reason = (f"drop upper bound {upper:.2f} pp {'<=' if ok else '>'} {b.max_drop_pp:.2f} pp "
                      f"(measured drop {drop:.2f} pp)")
        else:
            rule = f"approve when the measured top-1 drop (original - candidate) is at most {b.max_drop_pp:.2f} pp"
            ok = drop <= b.max_drop_pp
            reason = f"top-1 drop {drop:.2f} pp {'<=' if ok else '>'} {b.max_drop_pp:.2f} pp budget"
        if b.min_agreement is not None and c.agreement is not None:
            rule += f", and top-1 agreement with the original is at least {_pct(b.min_agreement)}"
            if ok and c.agreement < b.min_agreement:
                ok = False
                reason = f"top-1 agreement {_pct(c.agreement)} < {_pct(b.min_agreement)}"
        return Verdict(ok, reason, rule)

    if c.agreement is not None:
        if b.min_agreement is not None:
            need = b.min_agreement
            rule = f"no labels: approve when top-1 agreement with the original is at least {_pct(need)}"
        else:
            need = 1.0 - b.max_drop_pp / 100.0
            rule = (f"no labels: approve when top-1 agreement with the original is at least {_pct(need)} "
                    f"(100% minus the {b.max_drop_pp:.2f} pp budget)")
        ok = c.agreement >= need
        return Verdict(ok, f"top-1 agreement {_pct(c.agreement)} {'>=' if ok else '<'} {_pct(need)}", rule)

    if c.regression is not None:
        # budget read as an allowed relative RMSE increase in percent (common practice, no source)
        r_o, r_c = c.regression["original"]["rmse"], c.regression["candidate"]["rmse"]
        limit = r_o * (1.0 + b.max_drop_pp / 100.0)
        rule = (f"targets, no labels: approve when the candidate's RMSE is at most the original's "
                f"plus {b.max_drop_pp:.2f}%")
        ok = r_c <= limit
        return Verdict(ok, f"candidate RMSE {r_c:.6g} {'<=' if ok else '>'} {limit:.6g} "
                           f"(original {r_o:.6g})", rule)

    return Verdict(False, "nothing to judge: no labels or targets, and the first output is not class scores",
                   "reject when no accuracy, agreement or regression figure can be measured")
