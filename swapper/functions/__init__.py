"""The function registry: every activation swapper knows, and the surrogate parametrisation.

    registry.py   Function, REGISTRY, DEFAULT_SURROGATE, ALTERNATIVES, get(), candidates(), surrogate_params()
    formulas.py   float64 numpy references and derivatives
    emitters.py   ONNX emitters (standard ops at the model's opset)
    pwl.py        the piecewise-linear surrogate
    forms.py      emission forms: the equivalent ONNX forms of each surrogate, their re-parametrisation
    costs.py      measured relative cost per function (op_costs.json)
    params.py     PARAMS and NEUTRAL of y = a·g(b·x + c) + d (a leaf: no imports)

``from swapper import functions; functions.get("silu")`` is the usual way in.
"""
from swapper.functions import costs
from swapper.functions.registry import (
    ALTERNATIVES,
    DEFAULT_SURROGATE,
    REGISTRY,
    Function,
    candidates,
    get,
    sources,
    surrogate_params,
    surrogates,
)

__all__ = ["ALTERNATIVES", "DEFAULT_SURROGATE", "REGISTRY", "Function", "candidates", "costs", "get", "sources",
           "surrogates", "surrogate_params"]
