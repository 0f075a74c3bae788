"""Static leak view: attention weight that lands where it must not, read from a capture.

Two kinds of misplaced weight:

* **mask leak**: weight on keys the mask the call applied forbids (the head table's ``leak_mass``). A correct
  softmax never puts weight there; weight there means the mask was handed to the call but not used, or the
  weights were computed apart from the mask (a hand-written path that taps the wrong tensor).
* **future mass**: for calls *declared* causal, weight on keys after the query, ``j > i + query_offset``
  (the offset places query ``i`` of a key/value-cache step at its absolute position). This catches the mask
  that was never built or is off by one, which the recorded mask cannot show, since it is wrong itself.

Weights only show leaks through attention; leaks through convolutions, norms or pooling along the sequence
need the behavioural probe (:mod:`attnscope.analyses.causality`).

>>> import torch, attnscope
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> x = torch.randn(1, 4, 8)
>>> with attnscope.capture(mha) as cap:
...     _ = mha(x, x, x)                        # no causal mask: every query sees the future
>>> bool(leak_summary(cap, causal=True).loc[0, "leaks"])
True
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import pandas as pd

from attnscope.capture import record_sums
from attnscope.errors import OptionError
from attnscope.names import select_by_name
from attnscope.records import AttentionRecord

__all__ = ["Causal", "declared_causal", "leak_summary", "leak_table"]

#: What the user declares causal: True (every self-attention call), None (calls recorded as causal),
#: module-name patterns (self-attention calls of matching modules) or a predicate on the record.
Causal = bool | str | Sequence[str] | Callable[[AttentionRecord], bool] | None

#: Weight below this counts as numerical noise, not a leak.
DEFAULT_TOLERANCE = 1e-6


def _records(cap: Any) -> list[AttentionRecord]:
    return list(cap.attention if hasattr(cap, "attention") else cap)


def declared_causal(records: Sequence[AttentionRecord], causal: Causal = None) -> list[bool]:
    """For each record, whether it is to be held to a causal mask.

    ``None``: the records capture saw a causal mask applied in. ``True``/``False``: every self-attention
    record / none. Patterns (``"decoder.*"`` or a list of them, see :mod:`attnscope.names`): the *self*-attention
    records of matching modules; cross-attention is left out, since its keys are another sequence and a
    decoder's cross-attention may see the whole source. A callable gets each record and decides for itself.
    """
    if causal is None:
        return [bool(r.causal) for r in records]
    if isinstance(causal, bool):
        return [causal and r.kind == "self" for r in records]
    if callable(causal):
        return [bool(causal(r)) for r in records]
    patterns = [causal] if isinstance(causal, str) else list(causal)
    if not all(isinstance(p, str) for p in patterns):
        raise OptionError(f"causal= takes True, module-name patterns or a predicate; received {causal!r}")
    chosen = {id(r) for r in select_by_name(records, patterns, option="causal=")}
    return [r.kind == "self" and id(r) in chosen for r in records]


def _future(rec: AttentionRecord) -> np.ndarray:
    """``(Tq, Tk)`` bool: keys after each query's absolute position."""
    q = np.arange(rec.queries)[:, None] + rec.query_offset
    k = np.arange(rec.keys)[None, :]
    return k > q


def _counted(rec: AttentionRecord, w: np.ndarray) -> np.ndarray:
    """``(B, H, Tq)`` rows the head table counts: finite weights and at least one allowed key."""
    allowed = rec.allowed_full()
    return np.isfinite(w).all(axis=-1) & allowed.any(axis=-1)


def _worst(cells: np.ndarray, rec: AttentionRecord) -> tuple[float, int, int, int, int]:
    """Largest misplaced weight and its (item, head, query position, key position)."""
    flat = int(np.argmax(cells))
    b, h, q, k = np.unravel_index(flat, cells.shape)
    return float(cells.reshape(-1)[flat]), int(b), int(rec.heads[h]), int(q) + rec.query_offset, int(k)


def leak_table(cap: Any, *, causal: Causal = None) -> pd.DataFrame:
    """Per (record, head): mask leak and future mass.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 4, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x, attn_mask=torch.ones(4, 4, dtype=torch.bool).triu(1))
    >>> leak_table(cap, causal=True)["future_mass"].tolist()
    [0.0, 0.0]

    Args:
        cap: a capture or a list of records.
        causal: which records are held to a causal mask (see :func:`declared_causal`).

    Returns:
        DataFrame, one row per (record, kept head): ``name``, ``call``, ``kind``, ``head``, ``declared_causal``,
        ``leak_mass`` (mean weight per row on keys the applied mask forbids, as in the head table) and
        ``future_mass`` (mean weight per row on keys after the query; NaN when not declared causal, or when
        the capture kept statistics only). Means are over the rows the head table counts.
    """
    records = _records(cap)
    flags = declared_causal(records, causal)
    rows = []
    for rec, declared in zip(records, flags):
        leak = record_sums(rec).means()["leak_mass"]
        future = np.full(len(rec.heads), np.nan)
        if declared and rec.weights is not None:
            w = rec.weights.astype(np.float64)  # (B, H, Tq, Tk)
            counted = _counted(rec, w)  # (B, H, Tq)
            mass = np.where(_future(rec), np.nan_to_num(w), 0.0).sum(axis=-1)  # (B, H, Tq)
            with np.errstate(invalid="ignore"):
                future = (mass * counted).sum(axis=(0, 2)) / counted.sum(axis=(0, 2))  # (H,)
        for i, head in enumerate(rec.heads):
            rows.append({"name": rec.name, "call": rec.call, "kind": rec.kind, "head": head,
                         "declared_causal": declared, "leak_mass": float(leak[i]), "future_mass": float(future[i])})
    return pd.DataFrame(rows, columns=["name", "call", "kind", "head", "declared_causal", "leak_mass", "future_mass"])


def leak_summary(cap: Any, *, causal: Causal = None, tolerance: float = DEFAULT_TOLERANCE) -> pd.DataFrame:
    """One row per recorded attention call: how much weight is misplaced, and where the worst of it is.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 4, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> s = leak_summary(cap, causal=True)
    >>> (s.loc[0, "worst_query"], s.loc[0, "worst_key"]) in {(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)}
    True

    Args:
        cap: a capture or a list of records.
        causal: which records are held to a causal mask (see :func:`declared_causal`; default: those capture
            saw a causal mask in).
        tolerance: a weight at most this counts as numerical noise when deciding ``leaks``.

    Returns:
        DataFrame, one row per record: ``name``, ``call``, ``kind``, ``source``, ``recorded_causal`` (capture
        saw a causal mask), ``declared_causal``, ``leak_mass`` and ``future_mass`` (means over heads and
        counted rows), ``max_leak`` and ``max_future`` (the largest single misplaced weight), ``leaks``
        (either maximum above *tolerance*; from ``leak_mass`` alone when only statistics were kept), and the
        worst cell's ``worst_item``, ``worst_head``, ``worst_query``, ``worst_key`` (absolute positions; -1 when
        nothing is misplaced or maps were not kept).
    """
    if not isinstance(tolerance, (int, float)) or tolerance < 0:
        raise OptionError(f"tolerance must be a number >= 0; received {tolerance!r}")
    records = _records(cap)
    flags = declared_causal(records, causal)
    per_head = leak_table(records, causal=causal)
    rows = []
    for index, (rec, declared) in enumerate(zip(records, flags)):
        heads = per_head.iloc[sum(len(r.heads) for r in records[:index]):][:len(rec.heads)]
        row = {"name": rec.name, "call": rec.call, "kind": rec.kind, "source": rec.source,
               "recorded_causal": bool(rec.causal), "declared_causal": declared,
               "leak_mass": float(heads["leak_mass"].mean()), "future_mass": float(heads["future_mass"].mean()),
               "max_leak": np.nan, "max_future": np.nan, "leaks": False,
               "worst_item": -1, "worst_head": -1, "worst_query": -1, "worst_key": -1}
        if rec.weights is None:
            row["leaks"] = bool(row["leak_mass"] > tolerance)
        else:
            w = np.nan_to_num(rec.weights.astype(np.float64))  # (B, H, Tq, Tk)
            rows_ok = _counted(rec, rec.weights)[..., None]  # (B, H, Tq, 1)
            forbidden = np.where(~rec.allowed_full() & rows_ok, w, 0.0)  # (B, H, Tq, Tk)
            future = np.where(_future(rec) & rows_ok, w, 0.0) if declared else np.zeros_like(w)
            row["max_leak"] = float(forbidden.max(initial=0.0))
            if declared:
                row["max_future"] = float(future.max(initial=0.0))
            cells = np.maximum(forbidden, future)
            top, b, h, q, k = _worst(cells, rec) if cells.size else (0.0, -1, -1, -1, -1)
            if top > tolerance:
                row.update(leaks=True, worst_item=b, worst_head=h, worst_query=q, worst_key=k)
        rows.append(row)
    return pd.DataFrame(rows, columns=["name", "call", "kind", "source", "recorded_causal", "declared_causal",
                                       "leak_mass", "future_mass", "max_leak", "max_future", "leaks",
                                       "worst_item", "worst_head", "worst_query", "worst_key"])
