"""Static leak view: attention weight that lands where it must not, read from a capture.

Two kinds of misplaced weight:

* **mask leak**: weight on keys the mask the call applied forbids (the head table's ``leak_mass``). A correct
  softmax never puts weight there; weight there means the mask was handed to the call but not used, or the
  weights were computed apart from the mask (a hand-written path that taps the wrong tensor).
* **future mass**: for calls *declared* causal, weight on keys after the query, ``j > i + query_offset``
  (the offset places query ``i`` of a key/value-cache step at its absolute position). This catches the mask
  that was never built or is off by one, which the recorded mask cannot show, since it is wrong itself.
* **outside mass** (:func:`pattern_table`): the same for any declared pattern, a sliding window, packed
  documents, a prefix: weight on keys the pattern forbids, given as a bool ``(T, T)`` / ``(B, T, T)`` array or a
  FlexAttention-style ``mask_mod(b, h, q_idx, kv_idx)``. Causal is the special case ``kv_idx <= q_idx``.

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

__all__ = ["Causal", "Pattern", "declared_causal", "declared_cells", "leak_summary", "leak_table", "pattern_table"]

#: What the user declares causal: True (every self-attention call), None (calls recorded as causal),
#: module-name patterns (self-attention calls of matching modules) or a predicate on the record.
Causal = bool | str | Sequence[str] | Callable[[AttentionRecord], bool] | None

#: A declared attention pattern: bool ``(T, T)`` or ``(B, T, T)`` (True: query i may see key j, absolute
#: positions), or a predicate ``mask_mod(b, h, q_idx, kv_idx) -> bool`` in torch FlexAttention's convention.
Pattern = Any

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


def declared_cells(rec: AttentionRecord, allowed: Pattern) -> np.ndarray:
    """``(B, Tq, Tk)`` bool: the cells of *rec* a declared pattern lets through, at absolute query positions.

    >>> import numpy as np, torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 4, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> declared_cells(cap.attention[0], lambda b, h, q, kv: (q - kv >= 0) & (q - kv < 2))[0].astype(int).tolist()
    [[1, 0, 0, 0], [1, 1, 0, 0], [0, 1, 1, 0], [0, 0, 1, 1]]

    An array is indexed at ``[query_offset : query_offset + Tq, :Tk]`` (a cache step's queries sit at their
    absolute positions). A predicate is called once on broadcast index tensors ``b (B,1,1)``, ``h`` (0),
    ``q_idx (1,Tq,1)``, ``kv_idx (1,1,Tk)``; if it cannot take tensors of that shape it is evaluated cell by
    cell through ``torch.vmap``, as FlexAttention does.
    """
    B, Tq, Tk, off = rec.batch, rec.queries, rec.keys, rec.query_offset
    if callable(allowed):
        return _evaluate_mask_mod(allowed, B, Tq, Tk, off)
    cells = np.asarray(allowed.detach().cpu() if hasattr(allowed, "detach") else allowed)
    if cells.dtype != bool or cells.ndim not in (2, 3):
        raise OptionError(f"expected the pattern as a bool (T, T) or (B, T, T) array or a mask_mod predicate; "
                          f"received {cells.dtype} of shape {cells.shape}")
    if cells.ndim == 3 and cells.shape[0] not in (1, B):
        raise OptionError(f"expected a (B, T, T) pattern with B={B} for {rec.name!r}; received shape {cells.shape}")
    if cells.shape[-2] < off + Tq or cells.shape[-1] < Tk:
        raise OptionError(f"the pattern of shape {cells.shape} is smaller than {rec.name!r}'s attention "
                          f"(queries {off}..{off + Tq - 1}, {Tk} keys)")
    cells = cells[..., off:off + Tq, :Tk]
    return np.broadcast_to(cells if cells.ndim == 3 else cells[None], (B, Tq, Tk))


def _evaluate_mask_mod(mask_mod: Callable[..., Any], B: int, Tq: int, Tk: int, off: int) -> np.ndarray:
    import torch

    b = torch.arange(B).view(B, 1, 1)
    h = torch.zeros((), dtype=torch.long)
    q = torch.arange(off, off + Tq).view(1, Tq, 1)
    kv = torch.arange(Tk).view(1, 1, Tk)
    try:
        out = torch.as_tensor(mask_mod(b, h, q, kv))
        return np.ascontiguousarray(torch.broadcast_to(out.bool(), (B, Tq, Tk)).numpy())
    except Exception:  # a predicate written for scalars: evaluate it cell by cell, as FlexAttention does
        pass
    fn = torch.vmap(lambda bi, qi, ki: mask_mod(bi, h, qi, ki), in_dims=(None, None, 0))
    fn = torch.vmap(fn, in_dims=(None, 0, None))
    fn = torch.vmap(fn, in_dims=(0, None, None))
    out = fn(torch.arange(B), torch.arange(off, off + Tq), torch.arange(Tk))
    return np.ascontiguousarray(torch.as_tensor(out).bool().numpy())


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


def pattern_table(cap: Any, allowed: Pattern, *, where: Causal = True) -> pd.DataFrame:
    """Per (record, head): attention weight that lands outside a declared pattern.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 6, 8)
    >>> window = lambda b, h, q, kv: (q >= kv) & (q - kv < 3)       # query + the 2 keys before it
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x, attn_mask=torch.ones(6, 6, dtype=torch.bool).triu(1))   # causal, no window
    >>> t = pattern_table(cap, window)
    >>> bool((t["outside_mass"] > 0.05).all()), bool(t.loc[0, "worst_key"] < t.loc[0, "worst_query"] - 2)
    (True, True)

    Args:
        cap: a capture or a list of records.
        allowed: the pattern each record is held to (see :data:`Pattern` and :func:`declared_cells`).
        where: which records to hold to it, as ``causal=`` of :func:`declared_causal` (default: every
            self-attention record; cross-attention sees another sequence).

    Returns:
        DataFrame, one row per (held record, kept head): ``name``, ``call``, ``kind``, ``head``,
        ``outside_mass`` (mean weight per counted row on keys the pattern forbids), ``max_outside`` (the
        largest single such weight), and the worst cell's ``worst_item``, ``worst_query`` (absolute) and
        ``worst_key`` (-1 when nothing lands outside). NaN and -1 for records kept as statistics only.
    """
    records = _records(cap)
    rows = []
    for rec, held in zip(records, declared_causal(records, where)):
        if not held:
            continue
        outside = mass = None
        if rec.weights is not None:
            w = np.nan_to_num(rec.weights.astype(np.float64))  # (B, H, Tq, Tk)
            counted = _counted(rec, rec.weights)  # (B, H, Tq)
            outside = np.where(~declared_cells(rec, allowed)[:, None], w, 0.0) * counted[..., None]  # (B, H, Tq, Tk)
            with np.errstate(invalid="ignore"):
                mass = outside.sum(axis=-1).sum(axis=(0, 2)) / counted.sum(axis=(0, 2))  # (H,)
        for i, head in enumerate(rec.heads):
            row = {"name": rec.name, "call": rec.call, "kind": rec.kind, "head": head, "outside_mass": np.nan,
                   "max_outside": np.nan, "worst_item": -1, "worst_query": -1, "worst_key": -1}
            if outside is not None:
                cells = outside[:, i]  # (B, Tq, Tk)
                b, q, k = np.unravel_index(int(np.argmax(cells)), cells.shape)
                top = float(cells[b, q, k])
                row.update(outside_mass=float(mass[i]), max_outside=top)
                if top > DEFAULT_TOLERANCE:
                    row.update(worst_item=int(b), worst_query=int(q) + rec.query_offset, worst_key=int(k))
            rows.append(row)
    return pd.DataFrame(rows, columns=["name", "call", "kind", "head", "outside_mass", "max_outside", "worst_item",
                                       "worst_query", "worst_key"])
