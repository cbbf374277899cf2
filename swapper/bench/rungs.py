"""The benchmark's quality ladder as swap options: one SwapOptions per rung.

Transformation: (rung name, a family's settings) -> the SwapOptions that
``api.swap`` runs for that rung. A family fixes the surrogate, seed, batch
size and thread count; a rung fixes how calibration runs. Kept apart from the
measurements so a memory-measuring child process imports only this.
"""
from __future__ import annotations

import logging

from swapper.options import DEFAULT_TARGET, SwapOptions

logger = logging.getLogger(__name__)

THREADS = 1  # every benchmark session and swap runs on one onnxruntime thread
RUNGS = ("naive", "local", "sequential", "sequential_bias", "refit")
# The calibration settings that make each rung (see rung_options); the naive swap runs without a calibration set.
RUNG_OPTIONS = {
    "naive": SwapOptions(refit_consumers=False),
    "local": SwapOptions(mode="local", bias_correction=False, refit_consumers=False),
    "sequential": SwapOptions(mode="sequential", bias_correction=False, refit_consumers=False),
    "sequential_bias": SwapOptions(mode="sequential", bias_correction=True, refit_consumers=False),
    "refit": SwapOptions(mode="sequential", bias_correction=True, refit_consumers=True),
}


def family_options(to: str | None, *, batch_size: int, seed: int = 0,
                   target: str | None = DEFAULT_TARGET) -> SwapOptions:
    """The settings every rung of a family shares: its surrogate ``to``, target, seed, batch size, one thread."""
    return SwapOptions(to=to, seed=seed, batch_size=batch_size, threads=THREADS, target=target)


def rung_options(rung: str, family: SwapOptions) -> SwapOptions:
    """``family`` with the calibration settings of ``rung`` (mode, bias correction, consumer refit)."""
    r = RUNG_OPTIONS[rung]
    return family.replace(mode=r.mode, bias_correction=r.bias_correction, refit_consumers=r.refit_consumers)
