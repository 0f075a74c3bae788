"""Attention during incremental decoding with a key/value cache, stitched into one map per module.

A decoder that generates with a cache runs the prompt once (``Tq = P`` queries over ``P`` keys), then one
query per step over all keys so far (``Tq = 1``, ``Tk = P + t``). Capture records each call, with
``query_offset = Tk - Tq`` placing the step's query at its absolute position. :func:`stitch_steps` stacks the
rows of all calls of a module into one ``(B, H, Tq, Tk)`` map over the final key axis, the keys a row could
not see yet (they did not exist) filled with zeros: the same map a single forward over the whole generated
sequence gives, row for row.

>>> import numpy as np
>>> from attnscope.records import AttentionRecord, HeadSums
>>> prompt = AttentionRecord("attn", "self", np.array([[[[1.0, 0.0], [0.5, 0.5]]]], np.float32), None, True,
...                          HeadSums.zeros(1), (1, 1, 2, 2), (0,), call=0)
>>> step = AttentionRecord("attn", "self", np.array([[[[0.2, 0.3, 0.5]]]], np.float32), None, False,
...                        HeadSums.zeros(1), (1, 1, 1, 3), (0,), call=1, query_offset=2)
>>> stitch_steps([prompt, step])["attn"].weights[0, 0].astype(float).round(2).tolist()
[[1.0, 0.0, 0.0], [0.5, 0.5, 0.0], [0.2, 0.3, 0.5]]
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from attnscope.errors import ShapeError
from attnscope.names import select_by_name
from attnscope.records import AttentionRecord

__all__ = ["StitchedMap", "stitch_steps"]


@dataclass(frozen=True, repr=False)
class StitchedMap:
    """All calls of one attention module during a decoding run, as one map.

    Fields:
        name: the module's dotted name.
        kind: ``"self"`` or ``"cross"``.
        weights: float32 ``(B, H, Tq, Tk)``: row ``i`` is the query at ``positions[i]``; ``Tk`` is the final
            key length, keys after the ones a call saw are 0.
        allowed: bool ``(B, H, Tq, Tk)``: what each call's mask allowed; False for keys the call did not see.
        positions: int ``(Tq,)``: absolute position of each row's query (self-attention) or its row number
            (cross-attention, whose queries carry no key-axis position).
        prompt: number of rows from the first call (the prompt); rows after it are generated one per step.
        heads: indices of the kept heads.
        calls: capture call indices stitched, in order.
    """

    name: str
    kind: str
    weights: np.ndarray
    allowed: np.ndarray
    positions: np.ndarray
    prompt: int
    heads: tuple[int, ...]
    calls: tuple[int, ...]

    @property
    def generated(self) -> np.ndarray:
        """``(B, H, generated, Tk)``: the rows of the generation steps after the prompt."""
        return self.weights[:, :, self.prompt:]

    def __repr__(self) -> str:
        return f"StitchedMap(name={self.name!r}, weights={tuple(self.weights.shape)}, steps={len(self.calls)})"


def stitch_steps(cap: Any, *, layers: str | Sequence[str] | None = None) -> dict[str, StitchedMap]:
    """Stitch the calls of each attention module during one decoding run into one map.

    >>> import torch, attnscope                                    # doctest: +SKIP
    >>> with attnscope.capture(model) as cap:                      # doctest: +SKIP
    ...     model.generate(ids, max_new_tokens=8, use_cache=True)
    >>> stitch_steps(cap)["transformer.h.0.attn"].generated.shape  # doctest: +SKIP
    (1, 4, 8, 12)

    Args:
        cap: a capture (or list of records) of one decoding run, with maps kept.
        layers: module-name patterns (see :mod:`attnscope.names`) to stitch; default every recorded module.

    Returns:
        ``{module name: StitchedMap}`` in the order modules were first called. Self-attention rows must continue
        one another (each call's first query right after the previous call's last); a capture that holds two
        runs, or steps without a cache (each step re-running the whole sequence), raises
        :class:`~attnscope.errors.ShapeError` naming the call.
    """
    records = list(cap.attention if hasattr(cap, "attention") else cap)
    records = select_by_name(records, layers)
    groups: dict[str, list[AttentionRecord]] = {}
    for rec in sorted(records, key=lambda r: r.call):
        groups.setdefault(rec.name, []).append(rec)
    return {name: _stitch(name, recs) for name, recs in groups.items()}


def _stitch(name: str, recs: list[AttentionRecord]) -> StitchedMap:
    first = recs[0]
    for r in recs:
        if r.weights is None:
            raise ShapeError(f"stitching needs attention maps; '{name}' (call {r.call}) kept statistics only "
                             "(capture with keep='maps')")
        if r.batch != first.batch or r.heads != first.heads or r.kind != first.kind:
            raise ShapeError(f"calls of '{name}' differ: call {first.call} has batch {first.batch}, heads "
                             f"{first.heads}, kind {first.kind!r}; call {r.call} has {r.batch}, {r.heads}, {r.kind!r}")
    positions = []
    if first.kind == "cross":
        if any(r.keys != first.keys for r in recs):
            raise ShapeError(f"cross-attention calls of '{name}' see sources of different lengths "
                             f"({sorted({r.keys for r in recs})}); one decoding run has one source")
        at = 0
        for r in recs:
            positions.append(np.arange(at, at + r.queries))
            at += r.queries
    else:
        expected = None
        for r in recs:
            start = r.query_offset
            if expected is not None and start != expected:
                raise ShapeError(f"'{name}' call {r.call} starts at position {start}, but the previous call ended "
                                 f"before position {expected}: the capture holds more than one decoding run, or "
                                 "steps without a key/value cache; capture one cached run per block")
            positions.append(np.arange(start, start + r.queries))
            expected = start + r.queries
    width = max(r.keys for r in recs)
    weights = np.concatenate([_pad(r.weights, width, 0.0) for r in recs], axis=2)  # (B, H, Tq, Tk)
    allowed = np.concatenate([_pad(r.allowed_full(), width, False) for r in recs], axis=2)  # (B, H, Tq, Tk)
    return StitchedMap(name=name, kind=first.kind, weights=weights, allowed=allowed,
                       positions=np.concatenate(positions), prompt=first.queries, heads=first.heads,
                       calls=tuple(r.call for r in recs))


def _pad(a: np.ndarray, width: int, value: Any) -> np.ndarray:
    extra = width - a.shape[-1]
    if extra == 0:
        return np.ascontiguousarray(a)
    return np.pad(a, ((0, 0), (0, 0), (0, 0), (0, extra)), constant_values=value)
