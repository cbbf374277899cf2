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


def signed(x, places: int = 2) -> str:
    """``x`` with an explicit sign and ``places`` decimals; a value that rounds to zero is written without a
    sign ("0.00", never "-0.00" or "+0.00"); a dash when absent."""
    if x is None:
        return "–"
    r = round(float(x), places) + 0.0  # + 0.0 turns -0.0 into 0.0
    return f"{r:.{places}f}" if r == 0 else f"{r:+.{places}f}"

