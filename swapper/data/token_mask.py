"""Which model input marks the real tokens, and which token positions calibration statistics read.

Transformation: the model's inputs (and ``--mask-input``) -> the name of the
attention-mask input or None (:func:`find_mask_input`); then, batch by batch,
that input's values -> a boolean ``keep`` array [batch, tokens] saying which
positions of a token-shaped site tensor [batch, tokens, channels] enter the
statistics (:class:`TokenSelection`).

Why: a padded token batch computes every layer on the padding positions too,
but the model's output never reads them (the attention weights and the pooling
skip them). Their activations are not what the swapped model must reproduce,
and with short sentences padded to the longest one they can be most of the
positions, so observers, bias-correction means and refit Grams read only the
kept positions.

Detection rule (``mask="auto"``): an input is the attention mask when its name
contains "mask" (any case), its dtype is an integer or bool, it has rank 2
([batch, tokens]) and another integer input of rank 2 (the token ids) has the
same shape (equal sizes, or the same symbolic names, dim by dim; unknown dims
match anything). Exactly one such input is used; none or several mean no
mask (several: with a log line asking for ``--mask-input``). ``mask="none"``
switches masking off; any other value names the input, which must exist and be
an integer or bool input of rank 2 (a UsageError says what is wrong).

A position is kept when its mask value is non-zero. When more than
``cap`` positions are kept over the whole data set, a uniform sample of
exactly ``cap`` of them (without replacement, from ``numpy.random.default_rng(seed)``)
is kept instead, the same positions for every site: statistics then cost the
same whatever the data set's size.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from swapper.data.dataset import Dataset, InputSpec
from swapper.errors import BadDataError, UsageError

logger = logging.getLogger(__name__)

AUTO, NONE = "auto", "none"
TOKEN_CAP = 1 << 18  # kept positions per site (262 144): beyond this, a uniform seeded sample of this many
_ROWS = 1 << 16  # samples of the mask array read at a time when counting


def _is_index(spec: InputSpec) -> bool:
    return spec.dtype.kind in "iub" and spec.shape is not None and len(spec.shape) == 2


def _same_shape(a: tuple, b: tuple) -> bool:
    return len(a) == len(b) and all(x is None or y is None or x == y for x, y in zip(a, b))


def find_mask_input(specs: list[InputSpec], mask: str = AUTO) -> tuple[str | None, str]:
    """The attention-mask input's name (or None) and one line saying how it was chosen (module docstring)."""
    if mask == NONE:
        return None, "token masking switched off (--mask-input none)"
    by_name = {s.name: s for s in specs}
    if mask != AUTO:
        spec = by_name.get(mask)
        if spec is None:
            raise UsageError(f"--mask-input {mask!r}: the model has no such input (inputs: {', '.join(by_name)})")
        if not _is_index(spec):
            raise UsageError(f"--mask-input {mask!r}: expected an integer or bool input of rank 2 [batch, tokens], "
                             f"got {spec.dtype} with shape {spec.shape}")
        return mask, f"attention mask: input {mask!r} (given with --mask-input)"
    found = [s for s in specs if "mask" in s.name.lower() and _is_index(s)
             and any(o is not s and o.dtype.kind in "iu" and _is_index(o) and _same_shape(o.shape, s.shape)
                     for o in specs)]
    if len(found) > 1:
        names = ", ".join(repr(s.name) for s in found)
        logger.info("several inputs look like attention masks (%s); none used, name one with --mask-input", names)
        return None, f"no attention mask: several candidates ({names}); name one with --mask-input"
    if not found:
        return None, "no attention mask among the model inputs"
    return found[0].name, (f"attention mask: input {found[0].name!r} (an integer input named *mask* shaped "
                           f"like the token ids)")


@dataclass
class TokenSelection:
    """The token positions statistics read, per batch of the data set (module docstring).

    ``name``: the mask input; ``kept``: non-zero mask positions in the whole
    set; ``used``: positions selected (``min(kept, cap)``); ``chosen``: sorted
    ordinals (among the kept positions, in sample-major order) of the sampled
    ones, or None when every kept position is used.
    """

    name: str
    mask: np.ndarray
    kept: int
    used: int
    chosen: np.ndarray | None
    offsets: np.ndarray  # offsets[i]: kept positions in samples before i (length n + 1)

    @classmethod
    def of(cls, dataset: Dataset, name: str, *, cap: int = TOKEN_CAP, seed: int = 0) -> TokenSelection:
        """Count the kept positions of ``dataset``'s input ``name`` and draw the sample if there are more than ``cap``."""
        mask = dataset.arrays[name]
        counts = np.zeros(dataset.n, dtype=np.int64)
        for start in range(0, dataset.n, _ROWS):
            part = np.asarray(mask[start:start + _ROWS])
            counts[start:start + len(part)] = np.count_nonzero(part.reshape(len(part), -1), axis=1)
        offsets = np.concatenate([[0], np.cumsum(counts)])
        kept = int(offsets[-1])
        if kept == 0:
            raise BadDataError(f"input {name!r} masks every token position: nothing to calibrate on", dataset.path)
        chosen = None
        if kept > cap:
            chosen = np.sort(np.random.default_rng(seed).choice(kept, size=cap, replace=False))
        used = kept if chosen is None else cap
        logger.info("token mask %r: %d of %d positions kept%s", name, kept, int(np.prod(mask.shape)),
                    "" if chosen is None else f", a uniform sample of {cap} used")
        return cls(name, mask, kept, used, chosen, offsets)

    def describe(self) -> str:
        total = int(np.prod(self.mask.shape))
        text = f"{self.kept} of {total} token positions are real"
        if self.chosen is not None:
            text += f"; statistics read a seeded uniform sample of {self.used} of them"
        return text

    def keep(self, start: int, stop: int) -> np.ndarray:
        """Boolean [stop − start, tokens]: the positions of samples ``start:stop`` the statistics read."""
        keep = np.asarray(self.mask[start:stop]) != 0
        if self.chosen is None:
            return keep
        lo, hi = self.offsets[start], self.offsets[stop]
        first, last = np.searchsorted(self.chosen, [lo, hi])
        picked = np.zeros(int(hi - lo), dtype=bool)
        picked[self.chosen[first:last] - lo] = True
        out = np.zeros_like(keep)
        out[keep] = picked  # boolean indexing walks the kept positions in sample-major order, as the ordinals do
        return out


def token_rows(t: np.ndarray, keep: np.ndarray, what: str) -> np.ndarray:
    """The rows [kept, channels] of a [batch, tokens, channels] tensor ``t`` at the kept positions.

    Raises BadDataError when ``t``'s first two axes are not the mask's [batch, tokens].
    """
    t = np.asarray(t)
    if t.ndim != 3 or t.shape[:2] != keep.shape:
        raise BadDataError(f"{what} has shape {tuple(t.shape)}, which does not line up with the attention mask's "
                           f"[batch, tokens] = {list(keep.shape)}; pass --mask-input none to calibrate on every "
                           "position")
    return t[keep]
