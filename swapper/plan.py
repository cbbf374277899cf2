"""The swap plan: which sites get which surrogate, with which parameters.

A plan is plain data (JSON round-trips) so it can be written into the model's
metadata and the report, edited by hand, and re-applied.

Per swapped site, the surrogate computes, per channel c,

    y = a_c · g(b_c · x + c_c) + d_c

and ``placement`` says where each of a, b, c, d lives in the rewritten graph:

- ``"producer"``  folded into the Conv/Gemm/MatMul(+Add)/BatchNormalization that feeds x;
- ``"consumers"`` folded into the linear layers that read y;
- ``"inner"``     (a only) moved inside g, allowed when g is positively homogeneous and a > 0;
- ``"nodes"``     emitted as per-channel Mul/Add nodes (adds nodes, always exact);
- ``"held"``      kept at its neutral value (1 for a, b; 0 for c, d); the fitter may not move it;
- ``"approx"``    (d only) pushed into a zero-padded Conv's bias (no nodes, inexact at borders).
"""
from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field

import numpy as np

PARAMS = ("a", "b", "c", "d")
NEUTRAL = {"a": 1.0, "b": 1.0, "c": 0.0, "d": 0.0}
FOLD_POLICIES = ("exact", "nodes", "approximate", "off")


@dataclass
class SiteSwap:
    site_id: str
    source: str
    source_params: dict
    target: str
    target_params: dict
    channel_axis: int | None
    channels: int  # 1 when the channel axis is unknown (one scalar set)
    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    d: np.ndarray
    placement: dict  # param -> "producer" | "consumers" | "inner" | "nodes" | "held" | "approx"
    notes: list[str] = field(default_factory=list)

    def free(self) -> tuple[str, ...]:
        """The parameters a fitter may move."""
        return tuple(p for p in PARAMS if self.placement.get(p) != "held")

    def params(self) -> dict[str, np.ndarray]:
        return {p: getattr(self, p) for p in PARAMS}

    def set_params(self, **values: np.ndarray) -> None:
        for p, v in values.items():
            setattr(self, p, np.asarray(v, dtype=np.float64).reshape(self.channels))

    def to_dict(self) -> dict:
        d = asdict(self)
        for p in PARAMS:
            d[p] = [float(v) for v in np.asarray(getattr(self, p), dtype=np.float64).ravel()]
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "SiteSwap":
        d = dict(d)
        for p in PARAMS:
            d[p] = np.asarray(d[p], dtype=np.float64)
        return cls(**d)


@dataclass
class Skipped:
    site_id: str
    function: str
    reason: str


@dataclass
class Plan:
    fold: str  # one of FOLD_POLICIES
    swaps: list[SiteSwap]
    skipped: list[Skipped] = field(default_factory=list)

    def by_site(self) -> dict[str, SiteSwap]:
        return {s.site_id: s for s in self.swaps}

    def to_dict(self) -> dict:
        return {
            "fold": self.fold,
            "swaps": [s.to_dict() for s in self.swaps],
            "skipped": [asdict(s) for s in self.skipped],
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"))

    @classmethod
    def from_dict(cls, d: dict) -> "Plan":
        return cls(
            fold=d["fold"],
            swaps=[SiteSwap.from_dict(s) for s in d["swaps"]],
            skipped=[Skipped(**s) for s in d.get("skipped", [])],
        )

    @classmethod
    def from_json(cls, text: str) -> "Plan":
        return cls.from_dict(json.loads(text))
