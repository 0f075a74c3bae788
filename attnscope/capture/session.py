"""The capture session: one object that owns every hook, mode and setting it changes, and undoes them all.

>>> import torch, attnscope
>>> layer = torch.nn.TransformerEncoderLayer(d_model=16, nhead=2, dim_feedforward=32, batch_first=True)
>>> with attnscope.capture(layer) as cap:
...     _ = layer(torch.randn(2, 5, 16))
>>> cap.attention[0]
AttentionRecord(name='self_attn', kind='self', weights=(2, 2, 5, 5), causal=False, source='mha')
"""

from __future__ import annotations

import inspect
import threading
import warnings
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.overrides import TorchFunctionMode

from attnscope.capture import masks
from attnscope.capture.discovery import ModelMap, map_model
from attnscope.errors import (
    AttnscopeWarning,
    CaptureStateError,
    MemoryBudgetError,
    NoAttentionError,
    OptionError,
    ShapeError,
    UnsupportedModelError,
    suggest,
)
from attnscope.names import name_matches, within
from attnscope.records import STAT_COLUMNS, AttentionRecord, HeadSums, ResidualRecord
from attnscope.stats import head_sums

__all__ = ["Capture", "capture", "tap"]

KEEP_MODES = ("maps", "stats")
DEFAULT_MAX_BYTES = 2 * 1024**3  # 2 GiB of kept maps
_STATS_CHUNK_BYTES = 4 * 1024**2  # keep="stats" never builds more than this much of a map at once

SOFTMAX_FUNCS = {F.softmax, torch.softmax, torch.Tensor.softmax, torch.special.softmax}
_MHA_SIGNATURE = inspect.signature(F.multi_head_attention_forward)
_SDPA_PARAMS = ("query", "key", "value", "attn_mask", "dropout_p", "is_causal", "scale", "enable_gqa")
# forward keywords that carry the other sequence of a cross-attention call
_CROSS_KWARGS = ("key_value_states", "encoder_hidden_states", "memory", "context", "encoder_out",
                 "encoder_output", "cross_states", "kv")
_CROSS_NAME = ("cross", "encoder_attn", "encdec", "enc_dec", "multihead_attn")



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


@dataclass
class _Frame:
    """One module call on a capture's call stack."""

    name: str
    module: nn.Module
    kind_hint: str | None
    selected: bool
    last_softmax: Any = None  # (output tensor, record index) of the latest softmax seen in this frame


@dataclass
class _Counters:
    calls: int = 0
    blocks: int = 0
    kept_bytes: int = 0
    foreign: int = 0
    ran: set[str] = field(default_factory=set)
    recorded_in: set[str] = field(default_factory=set)


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
    """Routes of the attention entry points to ``owner._on_sdpa``, ``owner._on_mha`` and ``owner._on_softmax``."""
    routes = {F.scaled_dot_product_attention: owner._on_sdpa, F.multi_head_attention_forward: owner._on_mha}
    routes.update({f: owner._on_softmax for f in SOFTMAX_FUNCS})
    return routes


class Capture:
    """Records per-head attention weights and residual-stream norms of *model* while the block runs.

    Use :func:`capture` to make one. The object is its own context manager and holds the results after the
    block: :attr:`attention`, :attr:`residual`, :meth:`head_table`. It is used once.
    """

    def __init__(self, model: nn.Module, *, keep: str = "maps", layers: Sequence[str | int] | None = None,
                 heads: Iterable[int] | None = None, blocks: Sequence[str] | None = None,
                 kinds: Mapping[str, str] | None = None, max_bytes: int = DEFAULT_MAX_BYTES,
                 residual: bool = True) -> None:
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
        if not isinstance(max_bytes, int) or max_bytes <= 0:
            raise OptionError(f"max_bytes must be a positive int; received {max_bytes!r}")
        self.keep = keep
        self.max_bytes = max_bytes
        self._model = model
        self._map: ModelMap = map_model(model)
        all_names = [n for n in self._map.names.values()]
        self._selected = self._select(layers, all_names)
        if not self._map.attention and layers is None:
            raise NoAttentionError(
                f"{type(model).__name__} has no attention module capture can find: searched "
                f"{len(all_names)} modules for nn.MultiheadAttention, classes named *Attention*/*Attn*, and "
                "forward methods calling scaled_dot_product_attention, softmax or attnscope.tap. If attention "
                "happens in a module of another name, name it with layers=['path.to.module'].")
        self._heads = self._check_heads(heads)
        self._blocks = self._check_blocks(blocks, all_names) if residual else ()
        self._kinds = self._check_kinds(kinds, all_names)
        self.attention: list[AttentionRecord] = []
        self.residual: list[ResidualRecord] = []
        self._state = "new"
        self._tls = threading.local()
        self._c = _Counters()
        self._handles: list[Any] = []
        self._mode: RoutingMode | None = None
        self._fastpath = False  # whether this capture holds the fast-path switch off
        self._thread: int | None = None
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
                                      f"attention modules ({', '.join(leaves[:6])}{', ...' if len(leaves) > 6 else ''})")
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
        if any(t.is_meta for t in [*self._model.parameters(), *self._model.buffers()]):
            raise UnsupportedModelError("the model's parameters are on the meta device: there is nothing to "
                                        "compute attention from. Load real weights (model.to_empty + load_state_dict) first.")
        self._state = "open"
        self._thread = threading.get_ident()
        try:
            # The fused fast paths of nn.MultiheadAttention / nn.TransformerEncoder(Layer) run in C++ and would
            # hide the attention (and consume padding masks via nested tensors); the Python path computes the same.
            hold_fastpath_off()
            self._fastpath = True
            blocks = set(self._blocks)
            for name, module in self._model.named_modules():
                self._handles.append(module.register_forward_pre_hook(self._pre_hook(name), with_kwargs=True))
                self._handles.append(module.register_forward_hook(self._post_hook(name, name in blocks),
                                                                  always_call=True))
            self._mode = RoutingMode(attention_routes(self))
            self._mode.__enter__()
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
            for h in self._handles:
                h.remove()
            self._handles.clear()
            if self._fastpath:
                self._fastpath = False
                release_fastpath()
            self._state = "closed"

    def _finish(self) -> None:
        if self._c.foreign:
            warnings.warn(f"{self._c.foreign} module calls of the model ran on another thread than the one that "
                          "opened the capture and were not recorded; run the forward on the capturing thread, or "
                          "open a capture in each thread", AttnscopeWarning, stacklevel=3)
        if not self.attention:
            ran = sorted(self._c.ran)
            raise NoAttentionError(
                "the capture block ran no attention call of the model"
                + (f": attention modules {', '.join(ran[:5])} ran but produced nothing capture can see. "
                   "If they compute their own softmax, call attnscope.tap(weights) on it inside forward."
                   if ran else "; call the model inside the `with` block."))
        missed = [n for n in sorted(self._c.ran) if n in self._map.leaves
                  and not any(r == n or r.startswith(n + ".") or n.startswith(r + ".") for r in self._c.recorded_in)]
        if missed:
            warnings.warn(f"attention modules {', '.join(missed)} ran but no attention weights were seen in them; "
                          "if they compute attention by hand, call attnscope.tap(weights) there",
                          AttnscopeWarning, stacklevel=3)

    # ---------------------------------------------------------------- hooks: who is calling
    def _stack(self) -> list[_Frame]:
        stack = getattr(self._tls, "stack", None)
        if stack is None:
            stack = self._tls.stack = []
        return stack

    def _pre_hook(self, name: str):
        def hook(module: nn.Module, args: tuple, kwargs: dict):
            if threading.get_ident() != self._thread:
                self._c.foreign += 1  # the torch function mode is per thread: this call cannot be seen
                return None
            stack = self._stack()
            # a module is selected when named, or when it runs inside a selected one
            selected = self._selected is None or name in self._selected or bool(stack and stack[-1].selected)
            stack.append(_Frame(name, module, self._kind_hint(name, module, args, kwargs), selected))
            if selected and name in self._map.attention:
                self._c.ran.add(name)
            return None
        return hook

    def _post_hook(self, name: str, is_block: bool):
        def hook(module: nn.Module, args: tuple, output: Any):
            if threading.get_ident() != self._thread:
                return None
            stack = self._stack()
            while stack:  # always_call=True: also runs when forward raised, so the stack stays balanced
                frame = stack.pop()
                if frame.module is module:
                    break
            if is_block and self._state == "open":
                self._record_residual(name, output)
            return None
        return hook

    def _kind_hint(self, name: str, module: nn.Module, args: tuple, kwargs: dict) -> str | None:
        for pattern, kind in self._kinds:
            if within(name, pattern):
                return kind
        if getattr(module, "is_cross_attention", False):
            return "cross"
        if any(kwargs.get(k) is not None for k in _CROSS_KWARGS):
            return "cross"
        tensors = [a for a in args if isinstance(a, torch.Tensor) and a.is_floating_point()]
        if len(tensors) >= 2 and not isinstance(module, nn.MultiheadAttention):
            first = tensors[0]
            for other in tensors[1:]:
                if (other is not first and other.dim() == first.dim() and other.dim() >= 3
                        and other.shape[-1] == first.shape[-1] and other.data_ptr() != first.data_ptr()):
                    return "cross"
        last = name.rsplit(".", 1)[-1].lower()
        if any(key in last for key in _CROSS_NAME) or "EncDec" in type(module).__name__:
            return "cross"
        return None

    def _frame(self) -> _Frame | None:
        stack = getattr(self._tls, "stack", None)
        return stack[-1] if stack else None

    # ---------------------------------------------------------------- attention calls
    def _on_sdpa(self, func, args, kwargs):
        out = func(*args, **kwargs)
        frame = self._frame()
        if frame is None or not frame.selected:
            return out
        p = dict(zip(_SDPA_PARAMS, args))
        p.update(kwargs)
        q, k = p["query"], p["key"]
        attn_mask, is_causal = p.get("attn_mask"), bool(p.get("is_causal", False))
        q4, k4, mask4 = _as_4d(q), _as_4d(k), attn_mask
        if mask4 is not None and q.dim() > 4:
            mask4 = mask4.reshape(-1, *mask4.shape[-3:]) if mask4.dim() > 4 else mask4
        b, hq, tq, _ = q4.shape
        tk = k4.shape[-2]
        kind = frame.kind_hint or "self"
        offset = 0 if (is_causal or kind == "cross") else max(tk - tq, 0)
        allowed = masks.compact(masks.sdpa_allowed(mask4, is_causal, tq, tk), (b, hq, tq, tk))
        heads = self._kept_heads(hq, frame.name)

        rep = hq // k4.shape[1] if p.get("enable_gqa", False) else 1

        def compute(sl: slice, hs: list[int]) -> torch.Tensor:
            m = mask4
            if m is not None and m.dim() == 4:
                m = m[sl] if m.shape[0] == b else m
                m = m[:, hs] if m.shape[1] == hq else m
            kh = [h // rep for h in hs] if k4.shape[1] > 1 else [0]
            return masks.sdpa_weights(q4[sl][:, hs], k4[sl][:, kh], m, is_causal, p.get("scale"))

        causal = is_causal or (kind == "self" and masks.is_causal_mask(allowed, tq, tk, offset))
        self._record(frame, kind, (b, hq, tq, tk), heads, allowed, causal, "sdpa", offset, compute)
        return out

    def _on_mha(self, func, args, kwargs):
        frame = self._frame()
        if frame is None or not frame.selected:
            return func(*args, **kwargs)
        bound = _MHA_SIGNATURE.bind(*args, **kwargs)
        bound.apply_defaults()
        a = bound.arguments
        want_weights, average = a["need_weights"], a["average_attn_weights"]
        if a["training"] and a["dropout_p"] > 0:
            # Attention dropout draws random numbers differently on the fused and the math path: run the call
            # as it was, then get the (pre-dropout) weights from a second, dropout-free math-path call.
            result = func(*bound.args, **bound.kwargs)
            a["need_weights"], a["average_attn_weights"], a["dropout_p"] = True, False, 0.0
            with torch.no_grad():
                w = func(*bound.args, **bound.kwargs)[1].detach()
            self._record_mha(frame, a, w, shared=False)
            return result
        a["need_weights"], a["average_attn_weights"] = True, False
        # With need_weights=True torch takes its math path and returns the per-head weights it multiplied V by.
        out, weights = func(*bound.args, **bound.kwargs)
        # the caller gets this very tensor back only when it asked for per-head weights: copy it then
        self._record_mha(frame, a, weights.detach(), shared=want_weights and not average)
        if not want_weights:
            return out, None
        return out, (weights.mean(dim=-3) if average else weights)

    def _record_mha(self, frame: _Frame, a: dict, w: torch.Tensor, shared: bool) -> None:
        w4 = w.unsqueeze(0) if w.dim() == 3 else w  # (B, H, Tq, Tk)
        b, h, tq, tk = w4.shape
        query, key = a["query"], a["key"]
        same = key is query or (key.shape == query.shape and key.data_ptr() == query.data_ptr())
        kind = frame.kind_hint or ("self" if same else "cross")
        mask, kpm = a["attn_mask"], a["key_padding_mask"]
        if a["is_causal"] and mask is None:
            mask = ~masks.causal_allowed(tq, tk)
        allowed = masks.compact(masks.mha_allowed(mask, kpm, b, h, tq, tk), (b, h, tq, tk))
        heads = self._kept_heads(h, frame.name)
        causal = bool(a["is_causal"]) or (kind == "self" and masks.is_causal_mask(allowed, tq, tk, 0))
        self._record(frame, kind, (b, h, tq, tk), heads, allowed, causal, "mha", 0,
                     lambda sl, hs: _take(w4, sl, hs, shared))

    def _on_softmax(self, func, args, kwargs):
        out = func(*args, **kwargs)
        frame = self._frame()
        if frame is None or not frame.selected or frame.name not in self._map.attention:
            return out
        x = args[0] if args else kwargs.get("input")
        dim = args[1] if len(args) > 1 else kwargs.get("dim")
        if not isinstance(out, torch.Tensor) or out.dim() != 4 or dim not in (-1, 3):
            return out
        scores = x.detach()
        b, h, tq, tk = out.shape
        allowed = masks.compact(~(scores <= masks.FORBID_AT), (b, h, tq, tk))
        kind = frame.kind_hint or "self"
        offset = 0 if kind == "cross" else max(tk - tq, 0)
        heads = self._kept_heads(h, frame.name)
        causal = kind == "self" and masks.is_causal_mask(allowed, tq, tk, offset)
        w = out.detach()
        index = self._record(frame, kind, (b, h, tq, tk), heads, allowed, causal, "softmax", offset,
                             lambda sl, hs: _take(w, sl, hs, shared=True))  # the model keeps using it
        frame.last_softmax = (out, index)
        return out

    def _on_tap(self, weights: torch.Tensor, allowed: torch.Tensor | None, causal: bool | None,
                kind: str | None) -> None:
        frame = self._frame()
        if frame is None or not frame.selected:
            return
        w = weights.detach()
        if w.dim() < 2 or w.dim() > 4:
            raise ShapeError(f"tap() expects weights [batch, heads, queries, keys]; '{frame.name}' passed a "
                             f"{w.dim()}-dim tensor of shape {tuple(w.shape)}")
        while w.dim() < 4:
            w = w.unsqueeze(0)
        b, h, tq, tk = w.shape
        if allowed is not None:
            allowed = allowed.detach().to(torch.bool)
            try:
                torch.broadcast_shapes(allowed.shape, w.shape)
            except RuntimeError:
                raise ShapeError(f"tap() in '{frame.name}': allowed of shape {tuple(allowed.shape)} does not "
                                 f"broadcast to the weights' {tuple(w.shape)}") from None
        kind = kind or frame.kind_hint or "self"
        offset = 0 if kind == "cross" else max(tk - tq, 0)
        allowed4 = masks.compact(allowed, (b, h, tq, tk))
        if causal is None:
            causal = kind == "self" and masks.is_causal_mask(allowed4, tq, tk, offset)
        heads = self._kept_heads(h, frame.name)
        replace_at = None
        if frame.last_softmax is not None and frame.last_softmax[0] is weights:
            replace_at = frame.last_softmax[1]  # the same tensor the softmax produced: tap refines that record
        self._record(frame, kind, (b, h, tq, tk), heads, allowed4, bool(causal), "tap", offset,
                     lambda sl, hs: _take(w, sl, hs, shared=True), replace_at=replace_at)

    # ---------------------------------------------------------------- making records
    def _kept_heads(self, h: int, name: str) -> tuple[int, ...]:
        if self._heads is None:
            return tuple(range(h))
        if max(self._heads) >= h:
            raise OptionError(f"heads= asks for head {max(self._heads)}, but '{name}' has {h} heads")
        return self._heads

    def _record(self, frame: _Frame, kind: str, shape: tuple[int, int, int, int], heads: tuple[int, ...],
                allowed: torch.Tensor | None, causal: bool, source: str, offset: int, compute,
                replace_at: int | None = None) -> int:
        b, _, tq, tk = shape
        if allowed is not None and allowed.shape[1] > 1:
            allowed = allowed[:, list(heads)]
        per_item = len(heads) * tq * tk * 4  # float32 bytes of one batch item's kept map
        if self.keep == "maps":
            size = b * per_item
            if replace_at is None and self._c.kept_bytes + size > self.max_bytes:
                raise MemoryBudgetError(
                    f"keeping the maps of '{frame.name}' ({b}x{len(heads)}x{tq}x{tk} float32 = {_mb(size)}) would "
                    f"bring the capture to {_mb(self._c.kept_bytes + size)}, over its budget of {_mb(self.max_bytes)}. "
                    "Use keep='stats' (per-head statistics only), select fewer layers=/heads=, a smaller batch, "
                    "or raise max_bytes=.")
            weights = compute(slice(None), list(heads))
            stats = None
            kept = weights.numpy()
            if replace_at is None:
                self._c.kept_bytes += size
        else:
            stats = self._reduce(compute, b, heads, allowed, offset, tq * tk * 4)
            kept = None
        # keep="stats" keeps O(heads) numbers per call, so no (Tq, Tk) mask either: the statistics already hold
        # what the mask meant (leak_mass, rows), and ``causal`` says whether it was causal.
        allowed_np = None if allowed is None or self.keep == "stats" else allowed.numpy().copy()
        index = self._c.calls if replace_at is None else self.attention[replace_at].call
        record = AttentionRecord(name=frame.name, kind=kind, weights=kept, allowed=allowed_np, causal=causal,
                                 stats=stats, shape=shape, heads=heads, call=index, source=source,
                                 query_offset=offset)
        if replace_at is None:
            self.attention.append(record)
            self._c.calls += 1
            self._c.recorded_in.add(frame.name)
            return len(self.attention) - 1
        self.attention[replace_at] = record
        return replace_at

    @staticmethod
    def _reduce(compute, b: int, heads: tuple[int, ...], allowed: torch.Tensor | None, offset: int,
                map_bytes: int) -> HeadSums:
        """keep="stats": reduce a call to per-head sums, building at most ``_STATS_CHUNK_BYTES`` of map at once."""
        per_item = len(heads) * map_bytes
        b_step = max(1, _STATS_CHUNK_BYTES // max(per_item, 1))
        h_step = len(heads) if b_step > 1 else max(1, min(len(heads), _STATS_CHUNK_BYTES // max(map_bytes, 1)))
        groups = []
        for h0 in range(0, len(heads), h_step):
            positions = list(range(h0, min(len(heads), h0 + h_step)))
            hs = [heads[i] for i in positions]
            sums = HeadSums.zeros(len(hs))
            for start in range(0, b, b_step):
                sl = slice(start, min(b, start + b_step))
                a = allowed
                if a is not None:
                    a = a if a.shape[0] == 1 else a[sl]
                    a = a[:, positions] if a.shape[1] > 1 else a
                sums = sums.merge(head_sums(compute(sl, hs), a, offset))
            groups.append(sums)
        return groups[0] if len(groups) == 1 else HeadSums.concat(groups)

    def _record_residual(self, name: str, output: Any) -> None:
        out = _first_tensor(output)
        if out is None or out.dim() < 2 or not out.is_floating_point():
            return
        x = out.detach()
        if x.is_nested:
            return
        if name in self._map.seq_first and x.dim() == 3:
            x = x.transpose(0, 1)  # (T, B, D) -> (B, T, D)
        if x.dim() == 2:
            x = x.unsqueeze(0)
        norms = torch.linalg.vector_norm(x.float(), dim=-1).numpy().copy()  # (B, T)
        self.residual.append(ResidualRecord(name=name, norms=norms, call=self._c.blocks))
        self._c.blocks += 1

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


def record_sums(record: AttentionRecord) -> HeadSums:
    """Per-head sums of *record*: kept during capture (``keep="stats"``) or reduced from its maps."""
    if record.stats is not None:
        return record.stats
    if record.weights is None:
        raise ShapeError(f"record '{record.name}' holds neither weights nor statistics")
    allowed = None if record.allowed is None else torch.from_numpy(record.allowed)
    return head_sums(torch.from_numpy(record.weights), allowed, record.query_offset)


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


def _take(w: torch.Tensor, sl: slice, hs: list[int], shared: bool) -> torch.Tensor:
    """Batch slice *sl*, heads *hs* of ``(B, H, Tq, Tk)`` weights as float32 memory that no one else holds.

    Picking heads by a list copies; all heads of a tensor no one else holds are taken as they are (no copy).
    """
    if not shared and hs == list(range(w.shape[1])):
        part = w[sl]
    else:
        part = w[sl][:, hs]  # advanced indexing: a copy
    return part.float().contiguous()


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


def _as_4d(t: torch.Tensor) -> torch.Tensor:
    if t.dim() == 4:
        return t
    if t.dim() > 4:
        return t.reshape(-1, *t.shape[-3:])
    while t.dim() < 4:
        t = t.unsqueeze(0)
    return t


def _first_tensor(output: Any) -> torch.Tensor | None:
    """The hidden state in a block's output: the tensor itself, or the first one in nested tuples, lists, dicts."""
    if isinstance(output, torch.Tensor):
        return output
    if isinstance(output, Mapping):
        preferred = [output[k] for k in ("last_hidden_state", "hidden_states") if k in output]
        items = preferred + list(output.values())
    elif isinstance(output, (tuple, list)):
        items = list(output)
    else:
        return None
    for item in items:
        found = _first_tensor(item)
        if found is not None:
            return found
    return None


def _mb(n: int) -> str:
    return f"{n / 1024**2:.1f} MiB" if n >= 1024**2 else f"{n / 1024:.1f} KiB" if n >= 1024 else f"{n} bytes"


def capture(model: nn.Module, *, keep: str = "maps", layers: Sequence[str | int] | None = None,
            heads: Iterable[int] | None = None, blocks: Sequence[str] | None = None,
            kinds: Mapping[str, str] | None = None, max_bytes: int = DEFAULT_MAX_BYTES,
            residual: bool = True) -> Capture:
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

    Returns:
        A :class:`Capture`: enter it with ``with``; after the block read ``.attention``, ``.residual`` and
        ``.head_table()``.
    """
    return Capture(model, keep=keep, layers=layers, heads=heads, blocks=blocks, kinds=kinds,
                   max_bytes=max_bytes, residual=residual)


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
