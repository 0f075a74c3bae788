"""Diff two captures of the same model and inputs: before and after a fix, or two checkpoints.

Records are paired by module name and occurrence (the k-th call of a module in one capture with its k-th
call in the other). For each head: the change in mean entropy, and the Jensen–Shannon distance between
its two maps (base 2, in [0, 1]; averaged over the (batch item, query) rows, the distance of
:func:`~attnscope.analyses.similarity.head_distances`).

>>> import torch, attnscope
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> x = torch.randn(1, 4, 8)
>>> with attnscope.capture(mha) as before:
...     _ = mha(x, x, x)
>>> with torch.no_grad():
...     mha.in_proj_weight[:4] = 0.0                 # head 0's queries zeroed: its map turns uniform
>>> with attnscope.capture(mha) as after:
...     _ = mha(x, x, x)
>>> diff = compare_captures(before, after)
>>> bool(diff.loc[0, "js_distance"] > 0), float(diff.loc[1, "js_distance"])
(True, 0.0)
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from attnscope.analyses.similarity import head_distances
from attnscope.capture import record_sums
from attnscope.errors import ShapeError
from attnscope.records import AttentionRecord

__all__ = ["compare_captures"]

COLUMNS = ["name", "call_before", "call_after", "kind", "head", "entropy_before", "entropy_after",
           "entropy_change", "js_distance"]


def _keyed(cap: Any) -> dict[tuple[str, int], AttentionRecord]:
    out: dict[tuple[str, int], AttentionRecord] = {}
    seen: dict[str, int] = {}
    for rec in sorted(cap.attention if hasattr(cap, "attention") else cap, key=lambda r: r.call):
        k = seen.get(rec.name, 0)
        seen[rec.name] = k + 1
        out[(rec.name, k)] = rec
    return out


def compare_captures(before: Any, after: Any, *, item: int | None = None) -> pd.DataFrame:
    """Per-head change between two captures of the same model and inputs.

    Args:
        before, after: captures (or lists of records) of the same model on the same inputs.
        item: compare maps of one batch item only (default all).

    Returns:
        DataFrame, one row per (paired call, kept head), in the order of *before*: ``name``, ``call_before``,
        ``call_after``, ``kind``, ``head``, ``entropy_before``, ``entropy_after`` (mean row entropy in nats),
        ``entropy_change`` (after minus before) and ``js_distance`` (NaN when either capture kept statistics
        only). Raises :class:`~attnscope.errors.ShapeError` when the captures hold different calls, heads or
        map shapes.
    """
    a, b = _keyed(before), _keyed(after)
    if set(a) != set(b):
        only_a = sorted(set(a) - set(b))
        only_b = sorted(set(b) - set(a))
        what = (f"calls only in the first: {', '.join(f'{n!r} #{k}' for n, k in only_a[:3])}" if only_a else
                f"calls only in the second: {', '.join(f'{n!r} #{k}' for n, k in only_b[:3])}")
        raise ShapeError(f"the captures hold different attention calls ({len(a)} and {len(b)}); {what}. "
                         "Compare captures of the same model on the same inputs")
    rows = []
    for key, ra in a.items():
        rb = b[key]
        if ra.heads != rb.heads or ra.shape != rb.shape:
            raise ShapeError(f"'{ra.name}' (call {ra.call} and {rb.call}) differs between the captures: shape "
                             f"{ra.shape} heads {ra.heads} against shape {rb.shape} heads {rb.heads}")
        ea, eb = record_sums(ra).means()["entropy"], record_sums(rb).means()["entropy"]
        h = len(ra.heads)
        js = np.full(h, np.nan)
        if ra.weights is not None and rb.weights is not None:
            both = head_distances([ra, rb], item=item, exact=True).to_numpy()  # (2H, 2H): before's heads, then after's
            js = np.diag(both[:h, h:]).copy()
        for i, head in enumerate(ra.heads):
            rows.append({"name": ra.name, "call_before": ra.call, "call_after": rb.call, "kind": ra.kind,
                         "head": head, "entropy_before": float(ea[i]), "entropy_after": float(eb[i]),
                         "entropy_change": float(eb[i] - ea[i]), "js_distance": float(js[i])})
    return pd.DataFrame(rows, columns=COLUMNS)
