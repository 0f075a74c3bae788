"""Head statistics over a whole dataset, in constant memory, mergeable across batches and processes.

Each batch runs under ``capture(model, keep="stats")``, which reduces every attention call to per-head
sums at once (no map is kept); the sums of each module are added up (:meth:`HeadSums.merge
<attnscope.records.HeadSums.merge>`). Memory is one :class:`~attnscope.records.HeadSums` per module,
whatever the number of batches. Sums add, so totals of parts merge into the totals of the whole:
:meth:`HeadTotals.merge` for totals made in one process, :meth:`HeadTotals.all_reduce` across the ranks of
``torch.distributed`` (gloo on CPU works), giving on every rank what one process over all data would give.

>>> import torch
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> batches = [torch.randn(2, 5, 8) for _ in range(3)]
>>> totals = aggregate_heads(mha, batches, run=lambda m, x: m(x, x, x), progress=False)
>>> totals.table()["rows"].tolist()                  # 3 batches x 2 items x 5 queries per head
[30, 30]
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
import pandas as pd
import torch
from torch import nn

from attnscope.capture import capture, record_sums
from attnscope.capture.session import muted
from attnscope.errors import OptionError, ShapeError
from attnscope.records import STAT_COLUMNS, HeadSums

__all__ = ["HeadTotals", "aggregate_heads"]

_FIELDS = tuple(f.name for f in fields(HeadSums))


@dataclass(frozen=True, repr=False)
class HeadTotals:
    """Per-head sums of every attention module over many batches.

    Fields:
        names: attention module names in the order first seen.
        heads: module name -> indices of its kept heads.
        sums: module name -> :class:`~attnscope.records.HeadSums` over all its calls.
        calls: module name -> number of attention calls added up.
        batches: number of batches added up.
    """

    names: tuple[str, ...]
    heads: Mapping[str, tuple[int, ...]]
    sums: Mapping[str, HeadSums]
    calls: Mapping[str, int]
    batches: int

    @classmethod
    def empty(cls) -> HeadTotals:
        return cls((), {}, {}, {}, 0)

    @classmethod
    def from_records(cls, records: Sequence[Any]) -> HeadTotals:
        """Totals of the attention records of one batch (a capture's ``.attention``), counted as one batch."""
        return _batch_totals(records)

    def merge(self, other: HeadTotals) -> HeadTotals:
        """Totals of both parts (modules seen in either; the same module must keep the same heads)."""
        names = list(self.names) + [n for n in other.names if n not in self.heads]
        heads, sums, calls = dict(self.heads), dict(self.sums), dict(self.calls)
        for n in other.names:
            if n in heads:
                if heads[n] != other.heads[n]:
                    raise ShapeError(f"cannot merge totals of '{n}': heads {heads[n]} and {other.heads[n]}")
                sums[n] = sums[n].merge(other.sums[n])
                calls[n] += other.calls[n]
            else:
                heads[n], sums[n], calls[n] = other.heads[n], other.sums[n], other.calls[n]
        return HeadTotals(tuple(names), heads, sums, calls, self.batches + other.batches)

    def table(self) -> pd.DataFrame:
        """One row per (module, head): ``name``, ``head``, ``calls``, ``rows``, the head-table statistics and
        ``nonfinite_rows`` (means over every counted row of every batch)."""
        rows = []
        for n in self.names:
            means = self.sums[n].means()
            for i, h in enumerate(self.heads[n]):
                row = {"name": n, "head": h, "calls": self.calls[n], "rows": int(self.sums[n].rows[i])}
                row.update({c: float(means[c][i]) for c in STAT_COLUMNS})
                row["nonfinite_rows"] = int(self.sums[n].nonfinite[i])
                rows.append(row)
        return pd.DataFrame(rows, columns=["name", "head", "calls", "rows", *STAT_COLUMNS, "nonfinite_rows"])

    def all_reduce(self, group: Any = None) -> HeadTotals:
        """Sum the totals of every rank of the default (or given) ``torch.distributed`` process group.

        Every rank must call it (a collective). Ranks may have seen different modules; the result holds the
        union, in the order of the lowest rank that saw each. The sums travel as one float64 tensor through
        ``all_reduce(SUM)``, so the result equals one process over all data up to float64 rounding.
        """
        import torch.distributed as dist

        if not (dist.is_available() and dist.is_initialized()):
            raise OptionError("all_reduce() needs an initialised torch.distributed process group "
                              "(torch.distributed.init_process_group('gloo', ...))")
        world = dist.get_world_size(group)
        mine = [(n, tuple(self.heads[n])) for n in self.names]
        everyone: list[Any] = [None] * world
        dist.all_gather_object(everyone, mine, group=group)
        heads: dict[str, tuple[int, ...]] = {}
        for rank, listing in enumerate(everyone):
            for n, hs in listing:
                if heads.setdefault(n, hs) != hs:
                    raise ShapeError(f"rank {rank} kept heads {hs} of '{n}', another rank {heads[n]}")
        names = list(heads)
        parts = []
        for n in names:
            h = len(heads[n])
            if n in self.sums:
                arrays = self.sums[n].as_arrays()
                parts.append(np.concatenate([arrays[f] for f in _FIELDS] + [[self.calls[n]]]))
            else:
                parts.append(np.zeros(len(_FIELDS) * h + 1))
        flat = torch.from_numpy(np.concatenate(parts + [np.array([float(self.batches)])]))  # float64
        dist.all_reduce(flat, op=dist.ReduceOp.SUM, group=group)
        values = flat.numpy()
        sums, calls, at = {}, {}, 0
        for n in names:
            h = len(heads[n])
            sums[n] = HeadSums(**{f: values[at + i * h: at + (i + 1) * h].copy() for i, f in enumerate(_FIELDS)})
            at += len(_FIELDS) * h
            calls[n] = int(round(values[at]))
            at += 1
        return HeadTotals(tuple(names), heads, sums, calls, int(round(values[at])))

    def __repr__(self) -> str:
        return f"HeadTotals(modules={len(self.names)}, batches={self.batches})"


def _default_run(model: nn.Module, batch: Any) -> Any:
    if isinstance(batch, torch.Tensor):
        return model(batch)
    if isinstance(batch, Mapping):
        return model(**batch)
    if isinstance(batch, (tuple, list)) and batch and isinstance(batch[0], torch.Tensor):
        return model(batch[0])  # (inputs, targets, ...) as a DataLoader yields them
    raise OptionError(f"cannot feed a batch of type {type(batch).__name__} to the model; "
                      "pass run=lambda model, batch: model(...)")


def aggregate_heads(model: nn.Module, batches: Iterable[Any], *,
                    run: Callable[[nn.Module, Any], Any] | None = None,
                    layers: Sequence[str | int] | None = None, heads: Iterable[int] | None = None,
                    kinds: Mapping[str, str] | None = None, progress: bool = True,
                    total: int | None = None) -> HeadTotals:
    """Per-head attention statistics over every batch of *batches* (a list, generator or DataLoader).

    >>> import torch
    >>> layer = torch.nn.TransformerEncoderLayer(8, 2, 16, batch_first=True)
    >>> loader = torch.utils.data.DataLoader(torch.randn(6, 4, 8), batch_size=2)
    >>> aggregate_heads(layer, loader, progress=False).table()[["name", "head", "calls"]].values.tolist()
    [['self_attn', 0, 3], ['self_attn', 1, 3]]

    Args:
        model: the model. It runs in eval mode without gradients (its mode is restored).
        batches: any iterable of batches.
        run: ``run(model, batch)`` runs one batch; default ``model(batch)`` for a tensor, ``model(**batch)`` for
            a mapping, ``model(batch[0])`` for a tuple or list (inputs first, as DataLoaders yield them).
        layers, heads, kinds: as for :func:`attnscope.capture`.
        progress: show a ``tqdm.auto`` progress bar (a widget in Jupyter, text elsewhere).
        total: number of batches for the bar when ``len(batches)`` is not known.

    Returns:
        :class:`HeadTotals`; ``.table()`` gives the per-head means, ``.merge`` / ``.all_reduce`` combine parts.
    """
    from tqdm.auto import tqdm

    run = run or _default_run
    if total is None and hasattr(batches, "__len__"):
        total = len(batches)  # type: ignore[arg-type]
    totals = HeadTotals.empty()
    training = model.training
    try:
        model.eval()
        with muted(), torch.no_grad():  # a capture the user has open records none of these runs
            for batch in tqdm(batches, total=total, desc="attention statistics", disable=not progress, leave=False):
                with capture(model, keep="stats", layers=layers, heads=heads, kinds=kinds, residual=False) as cap:
                    run(model, batch)
                totals = totals.merge(_batch_totals(cap.attention))
    finally:
        model.train(training)
    return totals


def _batch_totals(records: Sequence[Any]) -> HeadTotals:
    names: list[str] = []
    heads: dict[str, tuple[int, ...]] = {}
    sums: dict[str, HeadSums] = {}
    calls: dict[str, int] = {}
    for rec in records:
        if rec.name not in heads:
            names.append(rec.name)
            heads[rec.name], sums[rec.name], calls[rec.name] = rec.heads, HeadSums.zeros(len(rec.heads)), 0
        elif heads[rec.name] != rec.heads:
            raise ShapeError(f"calls of '{rec.name}' kept different heads: {heads[rec.name]} and {rec.heads}")
        sums[rec.name] = sums[rec.name].merge(record_sums(rec))
        calls[rec.name] += 1
    return HeadTotals(tuple(names), heads, sums, calls, 1)
