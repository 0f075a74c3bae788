"""The capture session: one object that owns every hook, mode and setting it changes, and undoes them all.

>>> import torch, attnscope
>>> layer = torch.nn.TransformerEncoderLayer(d_model=16, nhead=2, dim_feedforward=32, batch_first=True)
>>> with attnscope.capture(layer) as cap:
...     _ = layer(torch.randn(2, 5, 16))
>>> cap.attention[0]
AttentionRecord(name='self_attn', kind='self', weights=(2, 2, 5, 5), causal=False, source='mha')
"""

from __future__ import annotations

import contextlib
import functools
import threading
import warnings
import weakref
from collections.abc import Iterable, Iterator, Mapping, Sequence
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.overrides import TorchFunctionMode

from attnscope.capture.discovery import ModelMap, map_model, walk
from attnscope.capture.paths import PATHS
from attnscope.capture.paths import flex as flex_path
from attnscope.capture.paths import tap as tap_path
from attnscope.capture.paths.softmax import FUNCS as _SOFTMAX_FUNCS
from attnscope.capture.recorder import Recorder, is_leaf
from attnscope.capture.rules import CONTAINERS, module_label
from attnscope.errors import (
    AttnscopeWarning,
    CaptureStateError,
    NoAttentionError,
    OptionError,
    ShapeError,
    UnsupportedModelError,
    suggest,
)
from attnscope.names import name_matches
from attnscope.records import STAT_COLUMNS, AttentionRecord, HeadSums, ResidualRecord
from attnscope.stats import head_sums

__all__ = ["Capture", "RoutingMode", "attention_routes", "capture", "head_table",
           "hold_fastpath_off", "muted", "record_sums", "release_fastpath", "remove_mode", "tap"]

KEEP_MODES = ("maps", "stats")
SDPA_MODES = ("beside", "weights")
DEFAULT_MAX_BYTES = 2 * 1024**3  # 2 GiB of kept maps
SOFTMAX_FUNCS = set(_SOFTMAX_FUNCS)

_active_lock = threading.Lock()
_active: list[Capture] = []  # open captures, for tap()
_fastpath_state = {"holders": 0, "saved": True}  # the MHA fast path stays off while any capture is open


def hold_fastpath_off() -> None:
    """Turn the MHA fast path off until every holder has released it (the first holder saves the setting)."""
    with _active_lock:
        if _fastpath_state["holders"] == 0:
            _fastpath_state["saved"] = torch.backends.mha.get_fastpath_enabled()
            torch.backends.mha.set_fastpath_enabled(False)
        _fastpath_state["holders"] += 1


def release_fastpath() -> None:
    """Release :func:`hold_fastpath_off`; the last holder puts the saved setting back."""
    with _active_lock:
        _fastpath_state["holders"] -= 1
        if _fastpath_state["holders"] == 0:
            torch.backends.mha.set_fastpath_enabled(_fastpath_state["saved"])


@contextlib.contextmanager
def muted() -> Iterator[None]:
    """Captures open on this thread record nothing while the block runs; captures opened inside it do.

    attnscope computations that run the model themselves (probes, head output norms, ablation sweeps,
    aggregation) run under it, so a user's own capture of the same model gets no records of their runs.
    """
    with _active_lock:
        mine = [c for c in _active if c._rec.thread == threading.get_ident()]
        for c in mine:
            c._rec.muted += 1
    try:
        yield
    finally:
        with _active_lock:
            for c in mine:
                c._rec.muted -= 1


class RoutingMode(TorchFunctionMode):
    """A torch function mode that hands chosen torch functions to handlers and runs every other call unchanged.

    ``routes`` maps a torch function to ``handler(func, args, kwargs)``. Capture and the head interventions of
    :mod:`attnscope.analyses.ablation` both see attention calls this way.
    """

    def __init__(self, routes: Mapping[Any, Any]) -> None:
        super().__init__()
        self.routes = dict(routes)

    def __torch_function__(self, func, types, args=(), kwargs=None):
        handler = self.routes.get(func)
        if handler is None:
            return func(*args, **(kwargs or {}))
        return handler(func, args, kwargs or {})


def attention_routes(owner: Any) -> dict[Any, Any]:
    """Routes of every registered attention path's functions to ``owner._on_<source>`` (paths it lacks are left out).

    Head interventions (:mod:`attnscope.analyses.ablation`) see attention calls through this.
    """
    routes = {}
    for path in PATHS:
        handler = getattr(owner, f"_on_{path.SOURCE}", None)
        if handler is not None:
            routes.update({f: handler for f in path.FUNCS})
    return routes


class Capture:
    """Records per-head attention weights and residual-stream norms of *model* while the block runs.

    Use :func:`capture` to make one. The object is its own context manager and holds the results after the
    block: :attr:`attention`, :attr:`residual`, :meth:`head_table`. It is used once.
    """

    def __init__(self, model: nn.Module, *, keep: str = "maps", layers: Sequence[str | int] | None = None,
                 heads: Iterable[int] | None = None, blocks: Sequence[str] | None = None,
                 kinds: Mapping[str, str] | None = None, max_bytes: int = DEFAULT_MAX_BYTES,
                 residual: bool = True, sdpa: str = "beside") -> None:
        if not isinstance(model, nn.Module):
            raise OptionError(f"capture() expects a torch.nn.Module; received {type(model).__name__}")
        if isinstance(model, torch.jit.ScriptModule):
            raise UnsupportedModelError(
                "capture() cannot see inside a TorchScript module: its forward runs in the TorchScript "
                "interpreter, where no hook or torch function mode is called. Capture the eager module "
                "before torch.jit.script/trace.")
        if type(model).__name__ == "OptimizedModule" and hasattr(model, "_orig_mod"):
            raise UnsupportedModelError(
                "capture() cannot see inside a torch.compile'd module: the compiled graph runs without the Python "
                "hooks and torch function mode capture relies on. Capture the original module instead: "
                "attnscope.capture(model._orig_mod) and call model._orig_mod(...) inside the block.")
        if keep not in KEEP_MODES:
            raise OptionError(f"keep must be 'maps' or 'stats'; received {keep!r}.{suggest(str(keep), KEEP_MODES)}")
        if sdpa not in SDPA_MODES:
            raise OptionError(f"sdpa must be 'beside' or 'weights'; received {sdpa!r}.{suggest(str(sdpa), SDPA_MODES)}")
        if not isinstance(max_bytes, int) or max_bytes <= 0:
            raise OptionError(f"max_bytes must be a positive int; received {max_bytes!r}")
        self.keep = keep
        self.max_bytes = max_bytes
        self._model = model
        self._named, layout = walk(model)  # (name, module) of every module; the model's layout
        self._map: ModelMap = map_model(model, layout)
        all_names = [n for n in self._map.names.values()]
        self._selected = self._select(layers, all_names)
        if not self._map.attention and layers is None:
            raise NoAttentionError(
                f"{type(model).__name__} has no attention module capture can find: searched "
                f"{len(all_names)} modules for nn.MultiheadAttention, classes named *Attention*/*Attn*, and "
                "forward methods calling scaled_dot_product_attention, attnscope.tap, or softmax beside a matrix "
                "product. If attention "
                "happens in a module of another name, name it with layers=['path.to.module'].")
        self._heads = self._check_heads(heads)
        self._blocks = self._check_blocks(blocks, all_names) if residual else ()
        if residual and blocks is None and not self._blocks and self._blocks_expected():
            warnings.warn(
                f"capture found no transformer blocks in {type(model).__name__} (it has {len(self._map.leaves)} "
                "attention modules), so no residual-stream norms will be recorded. Name the blocks whose outputs "
                "are the residual stream with blocks=['layers.*'], or pass residual=False.",
                AttnscopeWarning, stacklevel=3)
        self._kinds = self._check_kinds(kinds, all_names)
        self._rec = Recorder(self._map, keep=keep, max_bytes=max_bytes, selected=self._selected,
                             heads=self._heads, kinds=self._kinds, sdpa=sdpa)
        self.attention: list[AttentionRecord] = self._rec.attention
        self.residual = self._rec.residual
        self._state = "new"
        self._handles: list[Any] = []
        self._flex_held: list[Any] = []  # where the FlexAttention wrapper stands in (see capture.paths.flex)
        self._mode: RoutingMode | None = None
        self._fastpath = False  # whether this capture holds the fast-path switch off
        self._table: Any = None

    # ---------------------------------------------------------------- options, checked at the door
    def _select(self, layers: Sequence[str | int] | None, all_names: list[str]) -> set[str] | None:
        if layers is None:
            return None
        if isinstance(layers, (str, int)):
            layers = [layers]
        chosen: set[str] = set()
        for item in layers:
            if isinstance(item, bool) or not isinstance(item, (str, int)):
                raise OptionError(f"layers= takes module names, patterns or indices; received {item!r}")
            if isinstance(item, int):
                leaves = self._map.leaves
                if not -len(leaves) <= item < len(leaves):
                    raise OptionError(f"layers= index {item} is out of range: the model has {len(leaves)} "
                                      f"attention modules ({', '.join(map(self._label, leaves[:6]))}{', ...' if len(leaves) > 6 else ''})")
                chosen.add(leaves[item])
                continue
            hits = [n for n in all_names if name_matches(n, item)]
            if not hits:
                raise OptionError(f"layers= names {item!r}, which matches no module of {type(self._model).__name__}."
                                  f"{suggest(item, self._map.attention or all_names)}")
            chosen.update(hits)
        return chosen

    def _check_heads(self, heads: Iterable[int] | None) -> tuple[int, ...] | None:
        if heads is None:
            return None
        if isinstance(heads, int):
            heads = [heads]
        out = tuple(heads)
        if not out or any(isinstance(h, bool) or not isinstance(h, (int, np.integer)) or h < 0 for h in out):
            raise OptionError(f"heads= takes a non-empty list of head indices >= 0; received {out!r}")
        if len(set(out)) != len(out):
            raise OptionError(f"heads= lists a head twice: {out!r}")
        known = [m.num_heads for m in self._model.modules() if isinstance(m, nn.MultiheadAttention)]
        if known and max(out) >= min(known):
            raise OptionError(f"heads= asks for head {max(out)}, but the model's attention has {min(known)} heads")
        return tuple(int(h) for h in out)

    def _check_blocks(self, blocks: Sequence[str] | None, all_names: list[str]) -> tuple[str, ...]:
        if blocks is None:
            return self._map.blocks
        names = []
        for b in [blocks] if isinstance(blocks, str) else blocks:
            hits = [n for n in all_names if name_matches(n, b)] if isinstance(b, str) else []
            if not hits:
                raise OptionError(f"blocks= names {b!r}, which matches no module of {type(self._model).__name__}."
                                  f"{suggest(str(b), self._map.blocks or all_names)}")
            names.extend(h for h in hits if h not in names)
        return tuple(names)

    def _check_kinds(self, kinds: Mapping[str, str] | None, all_names: list[str]) -> list[tuple[str, str]]:
        out = []
        for pattern, kind in (kinds or {}).items():
            if kind not in ("self", "cross"):
                raise OptionError(f"kinds= maps {pattern!r} to {kind!r}; expected 'self' or 'cross'")
            if not any(name_matches(n, pattern) for n in all_names):
                raise OptionError(f"kinds= names {pattern!r}, which matches no module.{suggest(pattern, all_names)}")
            out.append((pattern, kind))
        return out

    # ---------------------------------------------------------------- entering and leaving
    def __enter__(self) -> Capture:
        if self._state != "new":
            raise CaptureStateError("this capture was already used; make a new one with attnscope.capture(model)")
        if any(t is not None and t.is_meta for _, m in self._named
               for t in (*m._parameters.values(), *m._buffers.values())):
            raise UnsupportedModelError("the model's parameters are on the meta device: there is nothing to "
                                        "compute attention from. Load real weights (model.to_empty + load_state_dict) first.")
        self._state = "open"
        self._rec.thread = threading.get_ident()
        self._rec.open = True
        try:
            # The fused fast paths of nn.MultiheadAttention / nn.TransformerEncoder(Layer) run in C++ and would
            # hide the attention (and consume padding masks via nested tensors); the Python path computes the same.
            hold_fastpath_off()
            self._fastpath = True
            blocks = set(self._blocks)
            leaf = self._rec.leaf_hook()
            for name, module in self._named:
                if name not in blocks and is_leaf(module):  # torch's own leaf: no frame, no post-hook
                    self._handles.append(module.register_forward_pre_hook(leaf))
                    continue
                self._handles.append(module.register_forward_pre_hook(self._rec.pre_hook(name), with_kwargs=True))
                self._handles.append(module.register_forward_hook(self._rec.post_hook(name, name in blocks),
                                                                  always_call=True))
            self._mode = RoutingMode({f: functools.partial(path.on_call, self._rec)
                                      for path in PATHS for f in path.FUNCS})
            self._mode.__enter__()
            self._flex_held = flex_path.hold(self._rec, (m for _, m in self._named))
            with _active_lock:
                _active.append(self)
        except BaseException:
            self._restore()
            raise
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        self._restore()
        if exc_type is None:
            self._finish()
        return False

    def _restore(self) -> None:
        """Undo everything __enter__ did, in reverse order; safe to call twice."""
        try:
            with _active_lock:
                if self in _active:
                    _active.remove(self)
            if self._mode is not None:
                mode, self._mode = self._mode, None
                remove_mode(mode)
        finally:
            flex_path.release(self._rec, self._flex_held)
            for h in self._handles:
                h.remove()
            self._handles.clear()
            if self._fastpath:
                self._fastpath = False
                release_fastpath()
            self._state = "closed"
            self._rec.open = False
            self._rec.release()

    def _finish(self) -> None:
        c = self._rec.counters
        changed = self._rec.check_borrowed()
        if changed:
            warnings.warn(f"attention modules {', '.join(changed[:5])} changed their attention weights in place after "
                          "capture took them (capture keeps the model's own weights without copying them); the "
                          "records hold the changed values. Capture with heads= (which copies) or make the "
                          "in-place operation out of place", AttnscopeWarning, stacklevel=3)
        if c.foreign:
            warnings.warn(f"{c.foreign} module calls of the model ran on another thread than the one that "
                          "opened the capture and were not recorded; run the forward on the capturing thread, or "
                          "open a capture in each thread", AttnscopeWarning, stacklevel=3)
        if not self.attention:
            ran = [self._label(n) for n in sorted(c.ran)]
            if ran:
                detail = (f": attention modules {', '.join(ran[:5])} ran but produced nothing capture can see. "
                          "If they compute their own softmax, call attnscope.tap(weights) on it inside forward.")
            elif self._selected is not None and not self._selects_attention():
                chosen = [self._label(n) for n in sorted(self._selected)]
                detail = (f": layers= selects {', '.join(chosen[:5])}{', ...' if len(chosen) > 5 else ''}, none of "
                          "which is or holds an attention module, and no attention call ran inside them. Select "
                          f"attention modules (the model has {', '.join(map(self._label, self._map.leaves[:5])) or 'none capture recognises'})"
                          ", or call attnscope.tap(weights) where the weights are computed.")
            else:
                detail = "; call the model inside the `with` block."
            raise NoAttentionError("the capture block ran no attention call of the model" + detail)
        missed = [n for n in sorted(c.ran) if n in self._map.leaves
                  and not any(r == n or r.startswith(n + ".") or n.startswith(r + ".") for r in c.recorded_in)]
        if missed:
            warnings.warn(f"attention modules {', '.join(map(self._label, missed))} ran but no attention weights "
                          "were seen in them; if they compute attention by hand, call attnscope.tap(weights) there",
                          AttnscopeWarning, stacklevel=3)

    def _blocks_expected(self) -> bool:
        """Whether the model looks built of blocks capture did not find: two or more attention modules, and one
        held by a module below the root that is neither a container nor an attention module (a layer class)."""
        if len(self._map.leaves) < 2:
            return False
        modules = dict(self._model.named_modules())
        holders = {a.rsplit(".", i)[0] for a in self._map.attention for i in range(1, a.count(".") + 1)}
        return any(h in modules and not isinstance(modules[h], CONTAINERS) and h not in self._map.attention
                   for h in holders)

    def _label(self, name: str) -> str:
        return module_label(name, self._model)

    def _selects_attention(self) -> bool:
        """Whether layers= names an attention module, one inside it, or a module that holds one."""
        chosen = self._selected or set()
        return any(a == n or a.startswith(n + ".") or n == "" or n.startswith(a + ".") or a == ""
                   for n in chosen for a in self._map.attention)

    def _on_tap(self, weights: torch.Tensor, allowed: torch.Tensor | None, causal: bool | None,
                kind: str | None) -> None:
        tap_path.on_tap(self._rec, weights, allowed, causal, kind)

    # ---------------------------------------------------------------- results
    def _closed(self, what: str) -> None:
        if self._state == "new":
            raise CaptureStateError(f"{what} is available after the capture block; use `with attnscope.capture(model) as cap:`")
        if self._state == "open":
            raise CaptureStateError(f"{what} is available after the capture block has ended")

    def head_table(self):
        """One row per (record, kept head): name, kind, call, head, rows and the :data:`STAT_COLUMNS`.

        >>> cap.head_table()[["name", "head", "entropy_ratio"]]   # doctest: +SKIP
        """
        self._closed("head_table()")
        if self._table is None:
            self._table = head_table(self.attention)
        return self._table.copy()

    def __repr__(self) -> str:
        return (f"Capture(model={type(self._model).__name__}, keep={self.keep!r}, state={self._state!r}, "
                f"attention={len(self.attention)}, residual={len(self.residual)})")

    @classmethod
    def _from_records(cls, attention: list[AttentionRecord], residual: list[ResidualRecord], keep: str) -> Capture:
        """A closed capture holding saved records (what :func:`attnscope.load` returns)."""
        self = cls.__new__(cls)
        self.keep, self.attention, self.residual = keep, attention, residual
        self._state, self._table, self._model = "closed", None, None
        return self


#: Sums reduced from stored maps, by ``id`` of the record, dropped when the record is freed. The head table,
#: dead_heads, leak_summary and the views all read them; a map is reduced once.
_REDUCED: dict[int, HeadSums] = {}


def record_sums(record: AttentionRecord) -> HeadSums:
    """Per-head sums of *record*: kept during capture (``keep="stats"``) or reduced from its maps (once)."""
    if record.stats is not None:
        return record.stats
    if record.weights is None:
        raise ShapeError(f"record '{record.name}' holds neither weights nor statistics")
    key = id(record)
    sums = _REDUCED.get(key)
    if sums is None:
        allowed = None if record.allowed is None else torch.from_numpy(record.allowed)
        sums = head_sums(torch.from_numpy(record.weights), allowed, record.query_offset)
        _REDUCED[key] = sums
        weakref.finalize(record, _REDUCED.pop, key, None)
    return sums


def head_table(records: Sequence[AttentionRecord]):
    """The head table of *records* (see :meth:`Capture.head_table`)."""
    import pandas as pd

    rows = []
    for rec in records:
        sums = record_sums(rec)
        means = sums.means()
        for i, head in enumerate(rec.heads):
            row = {"name": rec.name, "kind": rec.kind, "call": rec.call, "head": head, "rows": int(sums.rows[i])}
            row.update({c: float(means[c][i]) for c in STAT_COLUMNS})
            row["nonfinite_rows"] = int(sums.nonfinite[i])
            rows.append(row)
    columns = ["name", "kind", "call", "head", "rows", *STAT_COLUMNS, "nonfinite_rows"]
    return pd.DataFrame(rows, columns=columns)


def remove_mode(mode: TorchFunctionMode) -> None:
    """Take *mode* off this thread's torch function mode stack, wherever it is, keeping the others in order.

    Captures are usually closed in the reverse order of opening, but a generator closed late or a block
    exited out of order must not pop somebody else's mode.
    """
    above = []
    try:
        while torch._C._len_torch_function_stack() > 0:
            top = torch._C._pop_torch_function_stack()
            if top is mode:
                break
            above.append(top)
    finally:
        for other in reversed(above):
            torch._C._push_on_torch_function_stack(other)


def capture(model: nn.Module, *, keep: str = "maps", layers: Sequence[str | int] | None = None,
            heads: Iterable[int] | None = None, blocks: Sequence[str] | None = None,
            kinds: Mapping[str, str] | None = None, max_bytes: int = DEFAULT_MAX_BYTES,
            residual: bool = True, sdpa: str = "beside") -> Capture:
    """Capture per-head attention weights and residual-stream norms of *model* inside a ``with`` block.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 3, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x, need_weights=False)
    >>> cap.attention[0].weights.shape
    (1, 2, 3, 3)

    Args:
        model: the module to watch. Every forward call of it (or of its submodules) inside the block is seen.
        keep: ``"maps"`` keeps full weights ``(B, H, Tq, Tk)`` per call; ``"stats"`` reduces each call to
            per-head statistics at once and keeps no map.
        layers: module names, patterns (``"decoder.layers.*"``: ``*`` within one dotted part, ``**`` across) or indices into the model's innermost attention
            modules; only calls inside them are recorded. Needed for attention in a module capture cannot recognise.
        heads: head indices to keep (the same for every attention module).
        blocks: names or patterns of the blocks whose outputs are the residual stream (found automatically for
            torch and HF transformer layers and ``nn.ModuleList`` stacks of attention blocks).
        kinds: ``{"pattern": "self" | "cross"}`` to override how calls are labelled.
        max_bytes: budget for kept maps; going over raises :class:`~attnscope.errors.MemoryBudgetError`
            before the map is built.
        residual: record residual-stream norms of blocks.
        sdpa: how calls of ``F.scaled_dot_product_attention`` are seen. ``"beside"`` (default): the fused kernel
            runs untouched, so outputs stay bit-identical, and capture recomputes softmax(QKᵀ·scale + mask) beside
            it (the model computes attention twice). ``"weights"``: the call's output is computed from the weights
            capture builds anyway, ``weights @ V`` (attention computed once: no slower than an eager model's
            ``output_attentions``). Outputs then differ from the fused kernel's by float rounding (the kernel
            sums in another order; at most 4e-7 of the largest output of each attention module in float32 on
            every transformers family with an sdpa path, measured in ``tests/capture/test_hf.py`` and
            ``tests/capture/test_capture_cost.py``). It applies to calls without attention dropout where no
            input needs a gradient; other calls run as under ``"beside"``.

    Returns:
        A :class:`Capture`: enter it with ``with``; after the block read ``.attention``, ``.residual`` and
        ``.head_table()``.
    """
    return Capture(model, keep=keep, layers=layers, heads=heads, blocks=blocks, kinds=kinds,
                   max_bytes=max_bytes, residual=residual, sdpa=sdpa)


def tap(weights: torch.Tensor, *, allowed: torch.Tensor | None = None, causal: bool | None = None,
        kind: str | None = None) -> torch.Tensor:
    """Record attention weights computed by hand, from inside a module's ``forward``; returns *weights*.

    Outside a capture it does nothing, so it can stay in the model's code::

        att = (q @ k.transpose(-2, -1) * scale).masked_fill(~mask, float("-inf")).softmax(-1)
        att = attnscope.tap(att, allowed=mask)          # (B, H, Tq, Tk)

    Args:
        weights: ``(B, H, Tq, Tk)`` (or ``(H, Tq, Tk)``, ``(Tq, Tk)``) attention weights.
        allowed: bool mask broadcastable to *weights*, True where a query may see a key.
        causal: declare the call causal (default: derived from *allowed*).
        kind: ``"self"`` or ``"cross"`` (default: what capture infers for the module).
    """
    if kind is not None and kind not in ("self", "cross"):
        raise OptionError(f"tap(kind=...) takes 'self' or 'cross'; received {kind!r}")
    if not isinstance(weights, torch.Tensor):
        raise OptionError(f"tap() expects a torch.Tensor of weights; received {type(weights).__name__}")
    with _active_lock:
        active = list(_active)
    for cap in active:
        cap._on_tap(weights, allowed, causal, kind)
    return weights
