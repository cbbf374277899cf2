"""The surrogate's parameters y = a·g(b·x + c) + d: their names and neutral values.

A leaf: it imports nothing, so fitters, planners and rewriters can all share it.
A parameter at its neutral value changes nothing (a = b = 1, c = d = 0).
"""
PARAMS = ("a", "b", "c", "d")
NEUTRAL = {"a": 1.0, "b": 1.0, "c": 0.0, "d": 0.0}
