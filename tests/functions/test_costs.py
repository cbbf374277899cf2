"""Tests of swapper.functions.costs: the measured relative-cost table covers every function and form scanned.

The table is measured by the package (functions/costs.json); what is checked
here is its shape and coverage: every function a site can name and every
decomposed pattern form has an entry, relu is the baseline (1.0), and every
cost is positive.
"""
from __future__ import annotations

import pytest

from swapper.errors import UsageError
from swapper.functions.costs import known_functions, load_costs, relative_cost
from swapper.scan.decomposed import PATTERNS

SITE_FUNCTIONS = ["sigmoid", "tanh", "relu", "leaky_relu", "prelu", "elu", "selu", "celu", "softplus", "softsign",
                  "hard_sigmoid", "hard_swish", "gelu", "gelu_tanh", "mish", "silu", "swish", "quick_gelu"]


def test_cost_table_covers_every_site_function_and_pattern_form():
    table = load_costs()
    assert table["costs"]["relu"] == 1.0  # the baseline by construction
    assert set(SITE_FUNCTIONS) <= set(known_functions())
    for p in PATTERNS:
        assert p.name in table["forms"][p.function], p.name
    meta = table["measured"]
    assert meta["shape"] == [64, 32, 32, 32] and meta["threads"] == 1 and meta["repeats"] >= 10
    assert all(v > 0 for v in table["costs"].values())
    with pytest.raises(UsageError):
        relative_cost("no_such_function")
