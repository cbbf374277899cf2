"""Whether refitting a site's consumers helps, decided on calibration samples the refit never saw.

Transformation: the calibration samples are split once (seeded) into a
held-out part (``HOLDOUT`` of them) and K folds. Per consumer, the ridge
penalty is chosen by K-fold cross-validation on the folds alone and the
weights are solved on them (:func:`swapper.calibrate.ridge.choose_ridge`);
a consumer whose cross-validated error does not beat its current weights
keeps them. Per *site*, the refit is then judged on the held-out part:

    refit  iff  Σ_consumers ‖X_h·θ_refit − Y_h‖²  <  Σ_consumers ‖X_h·θ_current − Y_h‖²

(X_h, Y_h: the held-out rows, candidate inputs against the original
consumer outputs). Only then are the site's consumers written, solved once
more on all samples with the chosen penalty factor (the held-out part served
its purpose: choosing). The decision and both held-out figures go to the
report per site (:class:`RefitDecision`).
"""
from __future__ import annotations

import logging
import math
from dataclasses import asdict, dataclass, field

import numpy as np

from swapper.calibrate.ridge import FoldedGram, RidgeChoice, choose_ridge, solve_on_all, sse
from swapper.core.graph import GraphIndex
from swapper.plan.layers import Consumer, theta_of, write_theta

logger = logging.getLogger(__name__)

HOLDOUT = 0.25  # share of the calibration samples held out to judge each site's refit (common practice, no source)


@dataclass
class RefitDecision:
    """One site's refit: taken or not, and the held-out error at its consumers' outputs either way."""

    site_id: str
    refitted: bool
    held_out_samples: int
    mse_current: float | None  # held-out mean squared error with the current weights (None: no held-out part)
    mse_refit: float | None  # the same with the weights solved on the other samples
    consumers: list[str] = field(default_factory=list)  # the layers written

    def to_dict(self) -> dict:
        return asdict(self)


def split_samples(n: int, folds: int, holdout: float, seed: int) -> tuple[np.ndarray, int | None, int]:
    """(part of each sample, index of the held-out part or None, held-out sample count).

    Parts 0..folds-1 are the cross-validation folds; part ``folds`` is held out, when ``holdout`` leaves at
    least one sample there and ``folds`` in the rest.
    """
    order = np.random.default_rng(seed).permutation(n)
    held = round(holdout * n)
    if held < 1 or n - held < folds:
        return order % folds, None, 0
    part = np.empty(n, dtype=np.int64)
    part[order[:held]] = folds
    part[order[held:]] = np.arange(n - held) % folds
    return part, folds, held


@dataclass
class Weighing:
    """The ridge choices of one site's consumers and what they do on the held-out part."""

    choices: list[RidgeChoice]  # per consumer, chosen and solved on the folds alone
    take: bool  # refit: some consumer's CV accepts it, and (with a held-out part) it lowers the held-out error
    mse_current: float | None  # held-out MSE over the consumers' outputs, current weights
    mse_refit: float | None  # the same with the choices' weights (current ones where a choice was refused)


def weigh(grams: list[FoldedGram], priors: list[np.ndarray], currents: list[np.ndarray], held: int | None,
          factors) -> Weighing:
    """Choose each consumer's ridge on the folds (every part but ``held``) and judge the lot on ``held``."""
    choices, current_sse, refit_sse, count = [], 0.0, 0.0, 0
    for gram, prior, current in zip(grams, priors, currents):
        choice = choose_ridge(gram.without(held) if held is not None else gram, prior, current, factors)
        choices.append(choice)
        if held is not None:
            part = gram.parts[held]
            current_sse += sse(part, current)
            refit_sse += sse(part, choice.theta)  # the current weights where the choice was refused
            count += part.n * current.shape[1]
    accepted = any(c.accepted for c in choices)
    if held is None:
        return Weighing(choices, accepted, None, None)
    return Weighing(choices, accepted and refit_sse < current_sse, current_sse / max(count, 1),
                    refit_sse / max(count, 1))


def decide_site(work, index: GraphIndex, taken: set[str], orig_index: GraphIndex, site_id: str,
                consumers: list[Consumer], grams: dict[str, FoldedGram], held: int | None, held_samples: int,
                factors) -> tuple[RefitDecision, list[str]]:
    """Refit ``site_id``'s ``consumers`` in ``work`` if that wins on the held-out part (module docstring).

    ``index`` is of ``work`` from before this level's writes (what write_theta asks for). Returns the
    decision and notes, one per consumer and one for the site.
    """
    priors = [theta_of(orig_index, c) for c in consumers]
    weighing = weigh([grams[c.node] for c in consumers], priors, [theta_of(index, c) for c in consumers], held,
                     factors)
    notes = []
    for c, choice in zip(consumers, weighing.choices):
        op = index.nodes_by_name[c.node].op_type
        if choice.accepted:
            notes.append(f"refit candidate {op} {c.node!r}: lambda = {choice.factor:g} x mean diag(XtX) "
                         f"(CV over the other samples: MSE {choice.cv_mse:.4g} vs current {choice.current_mse:.4g})")
        elif math.isnan(choice.cv_mse):
            notes.append(f"no refit of {op} {c.node!r}: too few samples for cross-validation")
        else:
            notes.append(f"kept current weights of {op} {c.node!r}: best cross-validated MSE {choice.cv_mse:.4g} "
                         f"is not below current {choice.current_mse:.4g}")
    decision = RefitDecision(site_id, weighing.take, held_samples if held is not None else 0, weighing.mse_current,
                             weighing.mse_refit)
    if held is not None:
        notes.append(f"consumer refit {'taken' if weighing.take else 'not taken'}: held-out MSE at its consumers "
                     f"{weighing.mse_current:.4g} current vs {weighing.mse_refit:.4g} refitted "
                     f"({held_samples} held-out samples)")
    if weighing.take:
        for c, choice, prior in zip(consumers, weighing.choices, priors):
            if choice.accepted:
                theta = solve_on_all(grams[c.node], choice.factor, prior) if held is not None else choice.theta
                write_theta(work, c, theta, index=index, taken=taken)
                decision.consumers.append(c.node)
    logger.info("site %s: consumer refit %s", site_id, "taken" if weighing.take else "not taken")
    return decision, notes
