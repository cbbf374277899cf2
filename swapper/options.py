"""What a swap is asked to do: one typed, validated set of settings.

The CLI, the Python API (``swapper.swap(model, calib=..., options=SwapOptions(...))``)
and the benchmark's rungs build a :class:`SwapOptions`; the pipeline reads it.
The words of the fold policies and calibration modes live here, with the one
check each, so a wrong word is refused the same way wherever it comes in.
"""
from __future__ import annotations

import logging
import math
import os
from dataclasses import dataclass, fields, replace

from swapper.errors import UsageError

logger = logging.getLogger(__name__)

# Where a surrogate's parameters may go (see swapper/plan/placement.py): "exact" folds what folds exactly and fixes
# the rest at neutral values (no node added); "exact+nodes" folds the same and writes the rest as Mul/Add nodes.
FOLD_POLICIES = ("exact", "exact+nodes", "approximate", "off")
OLD_FOLD_WORDS = {"nodes": "exact+nodes"}  # still accepted, with a one-line note (removed in a later release)
# Which inputs calibration fits on (see swapper/calibrate/loop.py).
MODES = ("sequential", "local")
# The target planned for unless told otherwise (swapper/targets/builtin/ort-cpu.json): never slower there.
DEFAULT_TARGET = "ort-cpu"

# Sensible ranges of the running settings (common practice, no source). More intra-op threads than a few per
# core only adds contention (and 100000 makes onnxruntime's pool stall); seeds are numpy Generator seeds kept
# to 32 bits so every tool that records them can; a batch beyond 4096 samples buys no speed on a CPU and can
# exhaust memory; the cache budget is a number of MiB RAM can hold.
MAX_THREADS = 4 * (os.cpu_count() or 1)
MAX_SEED = 2**32 - 1
MAX_BATCH_SIZE = 4096
MAX_CACHE_MB = 1 << 20  # 1 TiB


def check_threads(threads: int) -> None:
    """Raise UsageError unless 1 <= threads <= MAX_THREADS."""
    if isinstance(threads, bool) or not isinstance(threads, int) or not 1 <= threads <= MAX_THREADS:
        raise UsageError(f"threads must be a whole number in 1..{MAX_THREADS} (4 per core), got {threads!r}")


def check_batch_size(batch_size: int) -> None:
    """Raise UsageError unless 1 <= batch_size <= MAX_BATCH_SIZE."""
    if isinstance(batch_size, bool) or not isinstance(batch_size, int) or not 1 <= batch_size <= MAX_BATCH_SIZE:
        raise UsageError(f"batch_size must be a whole number in 1..{MAX_BATCH_SIZE}, got {batch_size!r}")


def check_seed(seed: int) -> None:
    """Raise UsageError unless 0 <= seed <= MAX_SEED."""
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed <= MAX_SEED:
        raise UsageError(f"seed must be a whole number in 0..{MAX_SEED}, got {seed!r}")


def check_cache_mb(cache_mb: float | None) -> None:
    """Raise UsageError unless ``cache_mb`` is None or a finite number in 0..MAX_CACHE_MB."""
    if cache_mb is None:
        return
    if isinstance(cache_mb, bool) or not isinstance(cache_mb, (int, float)) or not math.isfinite(cache_mb) \
            or not 0 <= cache_mb <= MAX_CACHE_MB:
        raise UsageError(f"cache_mb must be a finite number of MiB in 0..{MAX_CACHE_MB}, got {cache_mb!r}")


def fold_word(fold: str) -> str:
    """The fold policy ``fold`` names, older spellings (``nodes``) read as today's; UsageError if none."""
    fold = OLD_FOLD_WORDS.get(fold, fold)
    check_fold(fold)
    return fold


def fold_note(fold: str) -> str | None:
    """The one-line deprecation note for an older fold spelling, or None."""
    new = OLD_FOLD_WORDS.get(fold)
    return None if new is None else (f"--fold {fold} is now spelled --fold {new} (exact folds, explicit nodes for "
                                     "the rest); the old word goes in a later release")


def check_fold(fold: str) -> None:
    """Raise UsageError unless ``fold`` is a fold policy (today's spelling, or an older one)."""
    if fold not in FOLD_POLICIES and fold not in OLD_FOLD_WORDS:
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
    calibration set; False: never), ``seed``, ``mask_input``
    ("auto": find the attention-mask input by its name, dtype and shape; "none":
    no masking; else the input's name; its zero positions stay out of the
    statistics of [batch, tokens, channels] sites, see swapper/data/token_mask.py). Running:
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
    mask_input: str = "auto"
    batch_size: int = 64
    threads: int = 1
    cache_mb: float | None = None
    target: str | None = DEFAULT_TARGET
    opset: int | None = None
    choices: tuple[tuple[str, str], ...] | None = None

    def __post_init__(self) -> None:
        if self.site_ids is not None:  # a list from a caller: stored as a tuple, so the options stay hashable
            object.__setattr__(self, "site_ids", tuple(self.site_ids))
        if isinstance(self.choices, dict):  # likewise a dict: sorted (site id, choice) pairs
            object.__setattr__(self, "choices", tuple(sorted((str(k), str(v)) for k, v in self.choices.items())))
        if self.target is not None:
            object.__setattr__(self, "target", str(self.target))  # a Path from a caller: its text
        if self.opset is not None and (isinstance(self.opset, bool) or not isinstance(self.opset, int)
                                       or self.opset < 1):
            raise UsageError(f"opset must be a positive integer, got {self.opset!r}")
        if fold_note(self.fold):
            logger.warning(fold_note(self.fold))
        object.__setattr__(self, "fold", fold_word(self.fold))
        check_mode(self.mode)
        check_batch_size(self.batch_size)
        check_threads(self.threads)
        check_seed(self.seed)
        check_cache_mb(self.cache_mb)
        if not self.mask_input:
            raise UsageError("mask_input must be 'auto', 'none' or an input name, got an empty string")

    def replace(self, **changes) -> SwapOptions:
        """A copy with ``changes`` (field names as keywords), validated again."""
        known = {f.name for f in fields(self)}
        unknown = sorted(set(changes) - known)
        if unknown:
            raise TypeError(f"unknown swap option(s): {', '.join(unknown)}; known: {', '.join(sorted(known))}")
        return replace(self, **changes)

    def plan_settings(self) -> dict:
        """The keywords of ``swapper.plan.plan.make_plan`` (its ``target`` is the loaded profile, not a name)."""
        return {"to": self.to, "site_ids": list(self.site_ids) if self.site_ids is not None else None,
                "only": self.only, "include_gates": self.include_gates, "include_outputs": self.include_outputs,
                "fold": self.fold, "choices": dict(self.choices) if self.choices else None}

    def cache_bytes(self) -> int | None:
        """``cache_mb`` in bytes, or None for the cache's default budget."""
        return None if self.cache_mb is None else int(self.cache_mb * (1 << 20))
