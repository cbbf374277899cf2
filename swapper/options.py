"""What a swap is asked to do: one typed, validated set of settings.

The CLI, the Python API (``swapper.swap(model, calib=..., options=SwapOptions(...))``)
and the benchmark's rungs build a :class:`SwapOptions`; the pipeline reads it.
The words of the fold policies and calibration modes live here, with the one
check each, so a wrong word is refused the same way wherever it comes in.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, fields, replace

from swapper.errors import UsageError

logger = logging.getLogger(__name__)

# Where a surrogate's parameters may go (see swapper/plan/placement.py).
FOLD_POLICIES = ("exact", "nodes", "approximate", "off")
# Which inputs calibration fits on (see swapper/calibrate/loop.py).
MODES = ("sequential", "local")


def check_fold(fold: str) -> None:
    """Raise UsageError unless ``fold`` is a fold policy."""
    if fold not in FOLD_POLICIES:
        raise UsageError(f"unknown fold policy {fold!r}; valid: {', '.join(FOLD_POLICIES)}")


def check_mode(mode: str) -> None:
    """Raise UsageError unless ``mode`` is a calibration mode."""
    if mode not in MODES:
        raise UsageError(f"unknown mode {mode!r}; valid: {', '.join(MODES)}")


@dataclass(frozen=True)
class SwapOptions:
    """Settings of one swap: which sites get which surrogate, how it is folded and calibrated.

    Surrogate choice: ``to`` (one surrogate for every chosen site; None = the
    function's default), ``site_ids`` (only these sites), ``only`` (only sites
    computing this function), ``include_gates``, ``include_outputs``.
    Placement: ``fold`` (one of FOLD_POLICIES). Calibration: ``mode`` (one of
    MODES), ``bias_correction``, ``refit_consumers`` (None, the default: refit
    whenever there is a calibration set, each site's refit kept only where it
    wins on held-out samples; True: also ask for it, an error without a
    calibration set; False: never), ``seed``. Running:
    ``batch_size`` (samples per onnxruntime call), ``threads`` (intra-op
    threads), ``cache_mb`` (recorded tensors kept in RAM up to this many MiB,
    on disk beyond; None = the cache's default).

    Names of functions and site ids are checked against the registry and the
    model when the plan is made; everything else is checked here.
    """

    to: str | None = None
    site_ids: tuple[str, ...] | None = None
    only: str | None = None
    include_gates: bool = False
    include_outputs: bool = False
    fold: str = "exact"
    mode: str = "sequential"
    bias_correction: bool = True
    refit_consumers: bool | None = None
    seed: int = 0
    batch_size: int = 64
    threads: int = 1
    cache_mb: float | None = None

    def __post_init__(self) -> None:
        if self.site_ids is not None:  # a list from a caller: stored as a tuple, so the options stay hashable
            object.__setattr__(self, "site_ids", tuple(self.site_ids))
        check_fold(self.fold)
        check_mode(self.mode)
        if self.batch_size < 1:
            raise UsageError(f"batch_size must be >= 1, got {self.batch_size}")
        if self.threads < 1:
            raise UsageError(f"threads must be >= 1, got {self.threads}")
        if self.cache_mb is not None and self.cache_mb < 0:
            raise UsageError(f"cache_mb must be >= 0, got {self.cache_mb}")

    def replace(self, **changes) -> SwapOptions:
        """A copy with ``changes`` (field names as keywords), validated again."""
        known = {f.name for f in fields(self)}
        unknown = sorted(set(changes) - known)
        if unknown:
            raise TypeError(f"unknown swap option(s): {', '.join(unknown)}; known: {', '.join(sorted(known))}")
        return replace(self, **changes)

    def plan_settings(self) -> dict:
        """The keywords of ``swapper.plan.plan.make_plan``."""
        return {"to": self.to, "site_ids": list(self.site_ids) if self.site_ids is not None else None,
                "only": self.only, "include_gates": self.include_gates, "include_outputs": self.include_outputs,
                "fold": self.fold}

    def cache_bytes(self) -> int | None:
        """``cache_mb`` in bytes, or None for the cache's default budget."""
        return None if self.cache_mb is None else int(self.cache_mb * (1 << 20))
