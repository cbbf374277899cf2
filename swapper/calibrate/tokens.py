"""Token-shaped sites: which of their positions calibration statistics read.

Transformation: (model, sites, data set, ``--mask-input``) -> a
:class:`~swapper.data.token_mask.TokenSelection` (or None) and one line saying
which mask was used; per batch, a site's [batch, tokens, channels] tensors ->
the rows [kept tokens, channels] observers, bias-correction means and refit
Grams read. Sites of any other shape read every position.
"""
from __future__ import annotations

import logging

import numpy as np
import onnx

from swapper.data.dataset import Dataset, input_specs
from swapper.data.token_mask import TOKEN_CAP, TokenSelection, find_mask_input, token_rows
from swapper.fit.observe import ChannelObserver
from swapper.scan.sites import Site

logger = logging.getLogger(__name__)


def is_token_site(site: Site) -> bool:
    """A [batch, tokens, channels] site: rank 3, channels last (the positions an attention mask marks)."""
    return site.shape is not None and len(site.shape) == 3 and site.channel_axis in (2, -1)


def token_selection(model: onnx.ModelProto, sites: list[Site], dataset: Dataset, mask_input: str, seed: int,
                    cap: int = TOKEN_CAP) -> tuple[TokenSelection | None, str]:
    """The token positions statistics of token-shaped sites read (None: every position), and a line saying so.

    The mask input comes from :func:`swapper.data.token_mask.find_mask_input`;
    nothing is masked when no swapped site is token-shaped.
    """
    name, why = find_mask_input(input_specs(model), mask_input)
    if name is None or not any(is_token_site(s) for s in sites):
        return None, why if name is None else f"{why}; no token-shaped site to mask"
    if name not in dataset.arrays or dataset.batch_axes.get(name):
        # a constant feed, or samples along another axis: its positions are not the sites' [batch, tokens]
        return None, f"{why}; not used: it is not fed as a [samples, tokens] array of the data set"
    selection = TokenSelection.of(dataset, name, cap=cap, seed=seed)
    return selection, f"{why}: {selection.describe()}"


def observe(observer: ChannelObserver, x: np.ndarray, y: np.ndarray, keep: np.ndarray | None) -> None:
    """Feed ``observer`` one batch, only the kept token positions when ``keep`` is given."""
    if keep is None:
        observer.update(x, y)
    else:
        observer.update(token_rows(x, keep, "site input"), token_rows(y, keep, "site output"))
