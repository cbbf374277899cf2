"""Deployment target profiles: which ops a target runs, how, and at what relative cost.

    from swapper.targets import load_target
    mcu = load_target("mcu-int8")
    mcu.allows(["Erf"])                       # (False, ["Erf"])
    mcu.cost_of(["Relu"], after="Conv")      # folded into the Conv's output clamp: 0.0

The file format is documented in :mod:`swapper.targets.profile`.
"""
from swapper.targets.profile import (
    ChainPart,
    Fusion,
    Measurement,
    OpSupport,
    Quantization,
    Source,
    TargetProfile,
    builtin_targets,
    load_target,
    profile_from_dict,
)
from swapper.targets.schema import SCHEMA, BadTargetError, read_profile

__all__ = [
    "SCHEMA",
    "BadTargetError",
    "ChainPart",
    "Fusion",
    "Measurement",
    "OpSupport",
    "Quantization",
    "Source",
    "TargetProfile",
    "builtin_targets",
    "load_target",
    "profile_from_dict",
    "read_profile",
]
