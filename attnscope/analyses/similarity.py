"""Pairwise distance between the attention maps of heads: how alike two heads look at the same input.

The distance of two heads is the Jensen–Shannon distance (base 2, so it lies in [0, 1]) between their
weight rows for the same (batch item, query), averaged over the rows both heads count. The Jensen–Shannon
divergence is from J. Lin, "Divergence measures based on the Shannon entropy", IEEE Trans. Inf. Theory
37(1), 1991; its square root is a metric (D. M. Endres and J. E. Schindelin, IEEE Trans. Inf. Theory 49(7), 2003).

>>> import numpy as np
>>> from attnscope.records import AttentionRecord, HeadSums
>>> w = np.array([[[[1.0, 0.0], [0.5, 0.5]], [[0.0, 1.0], [0.5, 0.5]]]], dtype=np.float32)  # (B, H, Tq, Tk)
>>> rec = AttentionRecord("blk", "self", w, None, False, HeadSums.zeros(2), (1, 2, 2, 2), (0, 1))
>>> d = head_distances([rec])
>>> round(float(d.iloc[0, 1]), 3)    # rows: disjoint (distance 1) and equal (distance 0), mean 0.5
0.5
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from attnscope.records import AttentionRecord

__all__ = ["head_distances"]


def _records(cap: Any) -> Sequence[AttentionRecord]:
    return cap.attention if hasattr(cap, "attention") else list(cap)


def _entropy_bits(p: np.ndarray) -> np.ndarray:
    """Row entropies in bits of ``(..., Tk)`` distributions, 0·log 0 = 0."""
    terms = np.zeros_like(p)
    np.log2(p, out=terms, where=p > 0)
    terms *= p
    return -terms.sum(axis=-1)


def head_distances(cap: Any, item: int | None = None) -> pd.DataFrame:
    """Jensen–Shannon distance between every pair of kept heads whose maps have the same shape.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 4, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> head_distances(cap).shape
    (2, 2)

    Args:
        cap: a capture (``.attention``) or a list of :class:`~attnscope.records.AttentionRecord`.
        item: use one batch item only; ``None`` averages over all of them.

    Returns:
        A square DataFrame, index and columns a MultiIndex ``(call, name, head)`` in capture order. NaN for
        heads of records without maps (``keep="stats"``), for pairs of different shapes and pairs with no row
        counted by both (rows with a NaN/inf weight or summing to 0 are left out).
    """
    recs = _records(cap)
    labels = [(r.call, r.name, h) for r in recs for h in r.heads]
    out = np.full((len(labels), len(labels)), np.nan)
    groups: dict[tuple[int, ...], list[tuple[int, np.ndarray]]] = {}
    at = 0
    for r in recs:
        if r.weights is not None:
            w = r.weights if item is None else r.weights[item:item + 1]  # (B, H, Tq, Tk)
            for j in range(w.shape[1]):
                groups.setdefault(tuple(w[:, j].shape), []).append((at + j, w[:, j].reshape(-1, w.shape[-1])))
        at += len(r.heads)
    for members in groups.values():
        maps = np.stack([m for _, m in members]).astype(np.float64)  # (n, R, Tk), R = B * Tq rows
        good = np.isfinite(maps).all(axis=-1) & (maps.sum(axis=-1) > 0)  # (n, R)
        maps = np.where(good[..., None], maps, 0.0)
        own = _entropy_bits(maps)  # (n, R)
        index = [i for i, _ in members]
        for a in range(len(members)):
            mid = 0.5 * (maps[a][None] + maps[a:])  # (n - a, R, Tk)
            js = _entropy_bits(mid) - 0.5 * (own[a][None] + own[a:])  # (n - a, R) divergence in bits
            both = good[a][None] & good[a:]
            dist = np.sqrt(np.clip(js, 0.0, 1.0))
            with np.errstate(invalid="ignore"):
                mean = (dist * both).sum(axis=-1) / both.sum(axis=-1)  # (n - a,)
            for k, b in enumerate(range(a, len(members))):
                out[index[a], index[b]] = out[index[b], index[a]] = mean[k]
    idx = pd.MultiIndex.from_tuples(labels, names=["call", "name", "head"])
    return pd.DataFrame(out, index=idx, columns=idx)
