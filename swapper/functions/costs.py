"""Relative CPU cost of each activation function (Relu = 1.0).

The numbers come from ``swapper/functions/op_costs.json``, written by
``benchmarks/measure_op_costs.py`` (onnxruntime, one thread, a
[64, 32, 32, 32] float32 tensor; the file records how and where). A function
can be measured in several *forms* (the single op, the com.microsoft op, the
subgraph exporters write); ``relative_cost`` returns the canonical form's cost
unless a measured form is asked for.
"""
from __future__ import annotations

import json
import logging
from functools import lru_cache
from pathlib import Path

from swapper.core.graph import DEFAULT_DOMAINS
from swapper.errors import UsageError

logger = logging.getLogger(__name__)

COSTS_PATH = Path(__file__).resolve().parent / "op_costs.json"


@lru_cache(maxsize=1)
def load_costs() -> dict:
    """The parsed op_costs.json (cached; treat as read-only)."""
    with open(COSTS_PATH, encoding="utf-8") as fh:
        table = json.load(fh)
    logger.debug("op costs measured %s", table.get("measured", {}))
    return table


def form_key(form: str, domain: str = "") -> str:
    """The key a site's (form, domain) has in the table's ``forms``: "op", "op:com.microsoft" or the pattern name."""
    if form == "op" and domain not in DEFAULT_DOMAINS:
        return f"op:{domain}"
    return form


def relative_cost(function_name: str, form: str | None = None, domain: str = "") -> float:
    """Cost per element of ``function_name`` relative to Relu.

    With ``form`` (a Site.form, plus its domain) the cost of that measured form
    is returned when the table has it; otherwise the canonical form's.
    Raises UsageError for a function the table does not know.
    """
    table = load_costs()
    costs = table["costs"]
    if function_name not in costs:
        raise UsageError(f"no measured cost for function {function_name!r}; known: {', '.join(sorted(costs))}")
    if form is not None:
        by_form = table.get("forms", {}).get(function_name, {})
        key = form_key(form, domain)
        if key in by_form:
            return float(by_form[key])
    return float(costs[function_name])


def known_functions() -> list[str]:
    """Function names with a measured cost, sorted."""
    return sorted(load_costs()["costs"])
