"""Attention rollout: how much each input position feeds each output position through a stack of layers.

S. Abnar and W. Zuidema, "Quantifying Attention Flow in Transformers", ACL 2020. Each layer's map, heads
averaged, is mixed with the identity for the residual connection and its rows renormalised,
``Ã = (1 - r)·A + r·I`` with ``r = 0.5``; the layers are multiplied from the first up,
``R = Ã_L ··· Ã_2 · Ã_1``. Row ``i`` of ``R`` is how output position ``i`` draws on the input positions.

>>> import numpy as np
>>> from attnscope.records import AttentionRecord, HeadSums
>>> a = np.array([[[[1.0, 0.0], [0.5, 0.5]]]], dtype=np.float32)            # (B, H, Tq, Tk)
>>> rec = AttentionRecord("layer", "self", a, None, True, HeadSums.zeros(1), (1, 1, 2, 2), (0,))
>>> attention_rollout([rec, rec], item=0).tolist()                          # 0.5·A + 0.5·I, twice
[[1.0, 0.0], [0.4375, 0.5625]]
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from attnscope.errors import OptionError, ShapeError
from attnscope.names import select_by_name
from attnscope.records import AttentionRecord

__all__ = ["attention_rollout", "rollout_records"]


def rollout_records(cap: Any, layers: str | Sequence[str] | None = None) -> list[AttentionRecord]:
    """The records rollout multiplies: self-attention with maps over the full sequence, in call order.

    *layers* are module-name patterns (see :mod:`attnscope.names`); default every such record. For an encoder–decoder model
    pick one stack (``layers="encoder.*"``): rollout follows one sequence through its own layers.
    """
    records = list(cap.attention if hasattr(cap, "attention") else cap)
    records = select_by_name(records, layers)
    chosen = [r for r in records if r.kind == "self" and r.queries == r.keys and r.query_offset == 0]
    if not chosen:
        raise ShapeError("rollout needs self-attention records over the whole sequence (queries = keys); "
                         f"found none among {len(records)} records")
    missing = [r.name for r in chosen if r.weights is None]
    if missing:
        raise ShapeError(f"rollout needs attention maps; '{missing[0]}' kept statistics only "
                         "(capture with keep='maps')")
    first = chosen[0]
    for r in chosen[1:]:
        if r.weights.shape[0] != first.weights.shape[0] or r.queries != first.queries:
            raise ShapeError(f"rollout multiplies maps of one sequence: '{first.name}' has batch {first.batch} and "
                             f"{first.queries} positions, '{r.name}' (call {r.call}) has batch {r.batch} and "
                             f"{r.queries}; select one stack or one forward with layers=")
    return chosen


def attention_rollout(cap: Any, *, layers: str | Sequence[str] | None = None, residual: float = 0.5,
                      item: int | None = None, cumulative: bool = False) -> np.ndarray:
    """Attention rollout over the recorded self-attention layers (Abnar & Zuidema 2020).

    >>> import torch, attnscope
    >>> enc = torch.nn.TransformerEncoder(torch.nn.TransformerEncoderLayer(8, 2, 16, batch_first=True), 2,
    ...                                   enable_nested_tensor=False)
    >>> with attnscope.capture(enc) as cap:
    ...     _ = enc(torch.randn(1, 5, 8))
    >>> r = attention_rollout(cap, item=0)
    >>> r.shape, bool(np.allclose(r.sum(axis=-1), 1.0))
    ((5, 5), True)

    Args:
        cap: a capture (or list of records) that kept maps.
        layers: module-name patterns choosing the records (see :func:`rollout_records`).
        residual: weight ``r`` of the identity, ``Ã = (1 - r)·A + r·I``; 0.5 in the paper, 0 multiplies raw maps.
        item: one batch item (returns ``(T, T)``); default all (``(B, T, T)``).
        cumulative: return the rollout after every layer, stacked on a new first axis ``(L, ...)``.

    Returns:
        float64 rollout, rows summing to 1: ``[..., i, j]`` is the share of input position ``j`` in output ``i``.
    """
    if not isinstance(residual, (int, float)) or not 0 <= residual <= 1:
        raise OptionError(f"residual must be a number in [0, 1]; received {residual!r}")
    chosen = rollout_records(cap, layers)
    batch, t = chosen[0].weights.shape[0], chosen[0].queries
    if item is not None and (not isinstance(item, int) or not 0 <= item < batch):
        raise OptionError(f"item must be a batch index in 0..{batch - 1}; received {item!r}")
    eye = np.eye(t)
    result = np.broadcast_to(eye, (batch, t, t)).copy()  # (B, T, T)
    steps = []
    for rec in chosen:
        a = np.nan_to_num(rec.weights.astype(np.float64)).mean(axis=1)  # (B, T, T): heads averaged
        mixed = (1.0 - residual) * a + residual * eye  # (B, T, T)
        sums = mixed.sum(axis=-1, keepdims=True)
        mixed = np.divide(mixed, sums, out=np.broadcast_to(eye, mixed.shape).copy(), where=sums > 0)
        result = mixed @ result  # (B, T, T): this layer after the ones below
        steps.append(result)
    out = np.stack(steps) if cumulative else result
    if item is not None:
        out = out[:, item] if cumulative else out[item]
    return out
