"""Numbers for people: percentages and other rounded figures for tables and pages."""
from __future__ import annotations

import logging

logger = logging.getLogger(__name__)


def pct(x) -> str:
    """A fraction as a percentage with two decimals; a dash when absent."""
    return "–" if x is None else f"{100 * x:.2f}%"


def num(x, spec: str = ".4g") -> str:
    """``x`` formatted by the format ``spec`` (as in ``format(x, spec)``); a dash when absent."""
    return "–" if x is None else format(x, spec)
