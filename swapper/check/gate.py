"""The gate: which figure decides, the budget it must meet, and the verdict.

Transformation: (:class:`~swapper.check.compare.Comparison`, :class:`GateRule`) ->
:class:`Verdict` (approve / reject, the metric that decided, the rule in plain
words with its numbers, the figures). Before any expensive work,
:func:`preflight` reads the original's outputs on one batch and raises
:class:`~swapper.errors.CannotJudge` (exit 3) when the data cannot judge the model.

Metrics (``--metric``; without it see ``kinds.default_metric``):

- ``top1``: labels and class scores; approve when the top-1 drop (original −
  candidate, percentage points) is at most ``--budget``; ``--strict`` judges the
  upper end of the 95% interval for the drop instead (non-inferiority).
- ``agreement``: class scores, no labels needed; approve when the share of samples
  whose top-1 class is unchanged is at least ``--min-agreement``, else
  ``1 − budget/100``. ``--min-agreement`` also applies on top of ``top1``.
- ``cosine``: per-sample cosine similarity to the original's output (each sample's
  output flattened): approve when the mean is at least ``--min-cosine`` (default
  0.995) and the 5th percentile (the worst 5% of samples) at least
  ``--min-cosine-p5`` (default ``1 − 2·(1 − min_cosine)``, 0.99 for 0.995).
- ``sqnr``: approve when ``10·log10(Σx²/Σ(x − x̂)²)`` over the set is at least
  ``--min-sqnr`` dB (default 20 dB).
- ``rmse``: with ``expected`` values (regression): approve when the candidate's RMSE is at most the
  original's plus ``budget`` percent.

Where the defaults come from: 0.995 is a rule of thumb for "the same embedding"
(common practice, no source); for unit vectors ``|x − x̂|² = 2(1 − cos)``, so it
allows a 10% relative error. The worst-5% floor lets those samples lose twice
the mean's allowance of ``1 − cos`` (our choice, no source). 20 dB is the SQNR
with the same 10% relative error: with an error orthogonal to the output,
``cos = 1/√(1 + 10^(−SQNR/10))``, and 20 dB gives 0.99504.

Which outputs are judged: ``top1``/``agreement`` the first class-score output
(with ``--metric`` an embedding may stand in); ``rmse`` the output matching
``expected``; ``cosine`` every float output with at least two values per sample;
``sqnr`` every float output. With ``top1``/``agreement``/``rmse`` every other float
output must also keep its values (the cosine floors, or the SQNR floor for one value
per sample): a swap may not move an output the deciding metric does not read.
Every judged output must pass; all outputs are reported.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from swapper.check.compare import Comparison, probe
from swapper.check.kinds import OutputKind, check_expected_fit, class_output, default_metric, regression_output
from swapper.data.dataset import Dataset
from swapper.errors import BadDataError, CannotJudge, UsageError

logger = logging.getLogger(__name__)

METRICS = ("top1", "agreement", "cosine", "sqnr", "rmse")
DEFAULT_MIN_COSINE = 0.995  # rule of thumb, common practice, no source (see the module docstring)
P5_SLACK = 2.0  # the worst 5% may lose this many times the mean's allowance of 1 - cos (our choice, no source)
DEFAULT_MIN_SQNR_DB = 20.0  # same 10% relative error as cosine 0.995 (derived in the module docstring)
# Travels with every verdict: the terminal line after it, the model's swapper.verdict entry, report.json/html.
CAUTION = (
    "Caution: a verdict is evidence on the given validation data, not a certification. Where a swapped model "
    "could hurt someone (medical, vehicles, safety), re-validate it on field data and defer to local regulations "
    "and licensed practice."
)


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
class GateRule:
    """Everything the gate needs from the user: the accuracy budget, the metric, the similarity floors.

    ``None`` means "not given": the metric then follows from the floors given (``min_sqnr_db`` ->
    sqnr, ``min_cosine``/``min_cosine_p5`` -> cosine) or from the outputs, and floors take their defaults.
    """

    budget: Budget = field(default_factory=Budget)
    metric: str | None = None
    min_cosine: float | None = None
    min_cosine_p5: float | None = None
    min_sqnr_db: float | None = None

    def __post_init__(self) -> None:
        if self.metric is not None and self.metric not in METRICS:
            raise UsageError(f"unknown metric {self.metric!r} (choose from {', '.join(METRICS)})")
        for name, value in (("--min-cosine", self.min_cosine), ("--min-cosine-p5", self.min_cosine_p5)):
            if value is not None and not -1.0 <= value <= 1.0:
                raise UsageError(f"{name} must be a cosine in [-1, 1], got {value}")
        if self.min_sqnr_db is not None and not np.isfinite(self.min_sqnr_db):
            raise UsageError(f"--min-sqnr must be a finite number of dB, got {self.min_sqnr_db}")
        cosine_given = self.min_cosine is not None or self.min_cosine_p5 is not None
        if cosine_given and self.min_sqnr_db is not None and self.metric is None:
            raise UsageError("--min-cosine and --min-sqnr belong to different metrics: add --metric cosine or sqnr")
        for given, owner, flag in ((cosine_given, "cosine", "--min-cosine"), (self.min_sqnr_db is not None, "sqnr",
                                                                             "--min-sqnr")):
            if given and self.metric not in (None, owner):
                raise UsageError(f"{flag} applies to --metric {owner}, not --metric {self.metric}")

    @property
    def requested(self) -> str | None:
        """The metric the user asked for, directly or through a floor; None to follow the outputs."""
        if self.metric is not None:
            return self.metric
        if self.min_sqnr_db is not None:
            return "sqnr"
        if self.min_cosine is not None or self.min_cosine_p5 is not None:
            return "cosine"
        if self.budget.min_agreement is not None:
            return "class"  # top1 with labels, agreement without
        return None

    @property
    def cosine_floor(self) -> float:
        return DEFAULT_MIN_COSINE if self.min_cosine is None else float(self.min_cosine)

    @property
    def cosine_p5_floor(self) -> float:
        if self.min_cosine_p5 is not None:
            return float(self.min_cosine_p5)
        return max(-1.0, 1.0 - P5_SLACK * (1.0 - self.cosine_floor))

    @property
    def sqnr_floor(self) -> float:
        return DEFAULT_MIN_SQNR_DB if self.min_sqnr_db is None else float(self.min_sqnr_db)


def as_rule(rule: GateRule | Budget | None) -> GateRule:
    """A :class:`GateRule` from a rule, a bare :class:`Budget` (the rule before metrics existed) or None."""
    if rule is None:
        return GateRule()
    return rule if isinstance(rule, GateRule) else GateRule(budget=rule)


@dataclass
class Verdict:
    approved: bool
    reason: str  # the figure that decided
    rule: str  # the rule applied, in plain words with its numbers
    metric: str | None = None  # top1 | agreement | cosine | sqnr | rmse; None when the candidate was malformed
    outputs: list[str] = field(default_factory=list)  # the outputs the rule judged
    thresholds: dict = field(default_factory=dict)  # the floors / budget applied, by name

    def to_dict(self) -> dict:
        """The verdict as report.json and the model's ``swapper.verdict`` metadata hold it, with the caution."""
        return {"approved": bool(self.approved), "reason": self.reason, "rule": self.rule, "metric": self.metric,
                "outputs": list(self.outputs), "thresholds": dict(self.thresholds), "caution": CAUTION}


@dataclass
class MetricChoice:
    """The metric that will decide, the outputs it reads, and notes on what the data leaves unused."""

    metric: str
    outputs: list[str]
    notes: list[str] = field(default_factory=list)


def _listing(kinds: list[OutputKind]) -> str:
    return "; ".join(k.describe() for k in kinds) or "no outputs"


def choose_metric(kinds: list[OutputKind], rule: GateRule, *, has_labels: bool, has_expected: bool,
                  source: str = "the validation set") -> MetricChoice:
    """Pick the metric and the outputs it judges; raise CannotJudge (one line) when the data cannot supply it."""
    floats = [k for k in kinds if k.is_float]
    if not floats:
        raise CannotJudge(f"no float output to compare ({_listing(kinds)}); the gate measures float outputs")
    metric, notes = default_metric(kinds, has_labels=has_labels, has_expected=has_expected)
    asked = rule.requested
    if asked == "class":
        metric = "top1" if has_labels and class_output(kinds, any_view=True) is not None else "agreement"
    elif asked is not None:
        metric = asked
        notes = [n for n in notes if not (metric == "top1" and n.startswith("labels"))
                 and not (metric == "rmse" and n.startswith("'expected'"))]
    if metric in ("top1", "agreement"):
        if metric == "top1" and not has_labels:
            raise CannotJudge(f"--metric top1 needs class ids: {source} has no 'labels' array (integer class ids, "
                              "one per sample, that fit the class-score output); add one, or use --metric agreement, "
                              "cosine or sqnr")
        cls = class_output(kinds, any_view=asked is not None)
        if cls is None:
            raise CannotJudge(f"{metric} needs an output of class scores [batch, classes], but "
                              f"{_listing(kinds)}; use --metric cosine or sqnr")
        if cls.kind != "scores":
            notes.append(f"{cls.name!r} read as class scores because {metric} was asked for; it looks like "
                         f"{cls.describe().split(' is ', 1)[1]}")
        return MetricChoice(metric, [cls.name], notes)
    if metric == "rmse":
        if not has_expected:
            raise CannotJudge(f"--metric rmse needs an 'expected' array (the true values, one row per sample) in {source}")
        reg = regression_output(kinds)
        if reg is None:
            raise CannotJudge(f"--metric rmse needs an output with as many values per sample as 'expected', but "
                              f"{_listing(kinds)}")
        return MetricChoice("rmse", [reg.name], notes)
    if metric == "cosine":
        judged = [k for k in floats if k.values_per_sample >= 2]
        if not judged:
            raise CannotJudge(f"cosine similarity needs an output with at least 2 values per sample, but "
                              f"{_listing(kinds)}; use --metric sqnr (or give an 'expected' array for rmse)")
        skipped = [k.name for k in floats if k.values_per_sample < 2]
        if skipped:
            notes.append(f"not judged by cosine (one value per sample): {', '.join(skipped)}")
        return MetricChoice("cosine", [k.name for k in judged], notes)
    return MetricChoice("sqnr", [k.name for k in floats], notes)


def preflight(original, dataset: Dataset, rule: GateRule | Budget | None = None, *, batch_size: int = 64,
              threads: int = 1) -> MetricChoice:
    """Decide, from the original's outputs on one batch, what will judge the candidate on ``dataset``.

    ``original`` is a model, an onnxruntime session or a ``Reference``. Raises CannotJudge (exit 3)
    when the data cannot judge the model, BadDataError when the labels do not fit the class scores.
    Cheap: run it before calibrating, so a run that cannot end in a verdict stops in seconds.
    """
    rule = as_rule(rule)
    kinds = probe(original, dataset, batch_size=batch_size, threads=threads)
    check_expected_fit(kinds, dataset.expected, dataset.path)
    choice = choose_metric(kinds, rule, has_labels=dataset.labels is not None,
                           has_expected=dataset.expected is not None, source=str(dataset.path))
    cls = next((k for k in kinds if k.name == choice.outputs[0]), None)
    if choice.metric == "top1" and cls is not None and cls.kind == "scores":
        classes = cls.values_per_sample
        top = int(np.max(dataset.labels))
        if top >= classes:
            raise BadDataError(f"'labels' go up to {top} but output {cls.name!r} has {classes} classes "
                               f"(need integers in [0, {classes}))", dataset.path)
    logger.info("gate: %s on %s", choice.metric, ", ".join(choice.outputs))
    return choice


# ------------------------------------------------------------------------------------------- the rules


def _pct(x: float) -> str:
    return f"{100.0 * x:.2f}%"


def _pp(x: float) -> str:
    """Points with two decimals; what rounds to zero is "0.00", never "-0.00"."""
    return f"{round(float(x), 2) + 0.0:.2f}"


def _top1(c: Comparison, b: Budget, outputs: list[str]) -> Verdict:
    if c.top1_original is None:
        raise CannotJudge("no top-1 accuracy was measured: the labels did not fit the class-score output "
                          f"({'; '.join(c.notes) or 'no labels'})")
    drop, _, upper = c.drop()  # original − candidate: a gain is a negative drop
    limits = {"max_drop_pp": b.max_drop_pp}
    if b.strict:
        level = f"{100 * c.interval.level:g}%"
        rule = (f"approve when the upper end of the {level} {c.interval.method} interval for the "
                f"top-1 drop is at most {b.max_drop_pp:.2f} pp (non-inferiority)")
        ok = upper <= b.max_drop_pp
        reason = (f"drop upper bound {_pp(upper)} pp {'<=' if ok else '>'} {_pp(b.max_drop_pp)} pp "
                  f"(measured drop {_pp(drop)} pp)")
    else:
        rule = f"approve when the measured top-1 drop (original - candidate) is at most {b.max_drop_pp:.2f} pp"
        ok = drop <= b.max_drop_pp
        reason = f"top-1 drop {_pp(drop)} pp {'<=' if ok else '>'} {_pp(b.max_drop_pp)} pp budget"
    if b.min_agreement is not None and c.agreement is not None:
        limits["min_agreement"] = b.min_agreement
        rule += f", and top-1 agreement with the original is at least {_pct(b.min_agreement)}"
        if ok and c.agreement < b.min_agreement:
            ok = False
            reason = f"top-1 agreement {_pct(c.agreement)} < {_pct(b.min_agreement)}"
    return Verdict(ok, reason, rule, "top1", outputs, limits)


def _agreement(c: Comparison, b: Budget, outputs: list[str]) -> Verdict:
    if c.agreement is None:
        raise CannotJudge("no top-1 agreement was measured: the class scores changed shape in the candidate")
    if b.min_agreement is not None:
        need = b.min_agreement
        rule = f"approve when top-1 agreement with the original is at least {_pct(need)}"
    else:
        need = 1.0 - b.max_drop_pp / 100.0
        rule = (f"approve when top-1 agreement with the original is at least {_pct(need)} "
                f"(100% minus the {b.max_drop_pp:.2f} pp budget)")
    if not c.has_labels:
        rule = "no labels: " + rule
    ok = c.agreement >= need
    return Verdict(ok, f"top-1 agreement {_pct(c.agreement)} {'>=' if ok else '<'} {_pct(need)}", rule,
                   "agreement", outputs, {"min_agreement": need})


def _rmse(c: Comparison, b: Budget, outputs: list[str]) -> Verdict:
    # budget read as an allowed relative RMSE increase in percent (common practice, no source)
    r_o, r_c = c.regression["original"]["rmse"], c.regression["candidate"]["rmse"]
    limit = r_o * (1.0 + b.max_drop_pp / 100.0)
    rule = (f"expected values: approve when the candidate's RMSE is at most the original's "
            f"plus {b.max_drop_pp:.2f}%")
    ok = r_c <= limit
    return Verdict(ok, f"candidate RMSE {r_c:.6g} {'<=' if ok else '>'} {limit:.6g} (original {r_o:.6g})", rule,
                   "rmse", outputs, {"max_rmse": limit})


def _figure(c: Comparison, name: str, key: str) -> float:
    value = (c.output_errors.get(name) or {}).get(key)
    if value is None:
        raise CannotJudge(f"no {key} was measured for output {name!r} (its shape changed in the candidate)")
    return float(value)


def _cosine(c: Comparison, r: GateRule, outputs: list[str]) -> Verdict:
    mean_floor, p5_floor = r.cosine_floor, r.cosine_p5_floor
    lines, failed = [], []
    for name in outputs:
        mean, p5 = _figure(c, name, "cosine_mean"), _figure(c, name, "cosine_p5")
        ok = mean >= mean_floor and p5 >= p5_floor  # NaN fails both
        lines.append(f"{name}: per-sample cosine mean {mean:.5f} {'>=' if mean >= mean_floor else '<'} "
                     f"{mean_floor:.4g}, worst 5% {p5:.5f} {'>=' if p5 >= p5_floor else '<'} {p5_floor:.4g}")
        if not ok:
            failed.append(lines[-1])
    rule = (f"approve when each judged output ({', '.join(outputs)}) keeps a per-sample cosine similarity to the "
            f"original's of at least {mean_floor:.4g} on average and at least {p5_floor:.4g} in its worst 5% of "
            "samples (5th percentile)")
    return Verdict(not failed, "; ".join(failed or lines), rule, "cosine", outputs,
                   {"min_cosine": mean_floor, "min_cosine_p5": p5_floor})


def _sqnr(c: Comparison, r: GateRule, outputs: list[str]) -> Verdict:
    floor = r.sqnr_floor
    lines, failed = [], []
    for name in outputs:
        db = _figure(c, name, "sqnr_db")
        ok = db >= floor
        lines.append(f"{name}: SQNR {db:.1f} dB {'>=' if ok else '<'} {floor:.1f} dB")
        if not ok:
            failed.append(lines[-1])
    rule = (f"approve when each judged output ({', '.join(outputs)}) has an SQNR against the original's of at "
            f"least {floor:.1f} dB (10*log10 of output power over error power)")
    return Verdict(not failed, "; ".join(failed or lines), rule, "sqnr", outputs, {"min_sqnr_db": floor})


def _legacy_choice(c: Comparison, rule: GateRule) -> MetricChoice:
    """For a Comparison built without output kinds (by hand): the metric its figures support."""
    asked = rule.requested
    if asked in (None, "class", "top1") and c.task == "classification" and c.top1_original is not None:
        return MetricChoice("top1", [])
    if asked in (None, "class", "agreement") and c.agreement is not None:
        return MetricChoice("agreement", [])
    if asked in (None, "rmse") and c.regression is not None:
        return MetricChoice("rmse", [])
    raise CannotJudge("nothing to judge: no labels or expected values, and no output's kind is known")


def decide(comparison: Comparison, rule: GateRule | Budget | None = None) -> Verdict:
    """Approve or reject ``comparison`` under ``rule`` (see the module docstring); CannotJudge when it cannot."""
    c, r = comparison, as_rule(rule)
    if c.has_nonfinite:
        return Verdict(False, "the candidate produced NaN or Inf outputs",
                       "always reject a candidate whose outputs contain NaN or Inf")
    if c.signature_changed:
        return Verdict(False, f"output signature changed: {c.signature_reason}",
                       "always reject a candidate whose output names, dtypes or static shapes differ")
    if c.output_kinds:
        choice = choose_metric(c.output_kinds, r, has_labels=c.has_labels, has_expected=c.has_expected)
    else:
        choice = _legacy_choice(c, r)
    for note in choice.notes:
        if note not in c.notes:
            c.notes.append(note)
    judge = {"top1": _top1, "agreement": _agreement, "rmse": _rmse}.get(choice.metric)
    if judge is not None:
        return _others_hold(c, r, judge(c, r.budget, choice.outputs))
    return (_cosine if choice.metric == "cosine" else _sqnr)(c, r, choice.outputs)


def _others_hold(c: Comparison, r: GateRule, verdict: Verdict) -> Verdict:
    """A class or regression verdict reads one output; every other float output must keep its values too
    (cosine floors where a sample has several values, the SQNR floor where it has one), or a swap that
    moves, say, a detector's boxes would pass on its class scores alone."""
    others = [k for k in c.output_kinds if k.is_float and k.name not in verdict.outputs]
    if not verdict.approved or not others:
        return verdict
    vectors = [k.name for k in others if k.values_per_sample > 1]
    scalars = [k.name for k in others if k.values_per_sample <= 1]
    checks = ([_cosine(c, r, vectors)] if vectors else []) + ([_sqnr(c, r, scalars)] if scalars else [])
    failed = [v.reason for v in checks if not v.approved]
    rule = verdict.rule + "; and every other float output keeps its values: " + "; ".join(
        v.rule.removeprefix("approve when each judged output ") for v in checks)
    thresholds = {**verdict.thresholds, **{k: v for ch in checks for k, v in ch.thresholds.items()}}
    reason = verdict.reason if not failed else f"{verdict.reason}, but another output moved: {'; '.join(failed)}"
    return Verdict(not failed, reason, rule, verdict.metric, verdict.outputs + [k.name for k in others], thresholds)

