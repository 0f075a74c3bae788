"""``torch.nn.attention.flex_attention.flex_attention``: run unchanged; its weights recomputed beside it.

The kernel returns the output (and at most the log-sum-exp), never the weights, so the call's query, key,
``score_mod``, block mask and scale are used again to form them::

    weights = softmax(score_mod(Q Kᵀ · scale, b, h, q_idx, kv_idx) where allowed, else -inf)

``allowed`` is the block mask's ``mask_mod`` at every (b, h, q_idx, kv_idx), limited to the blocks the block
mask lists (exact for masks made by ``create_block_mask``, whose full blocks hold the ``mask_mod``
everywhere). A query with no allowed key gets all-zero weights, as the kernel gives it a zero output. GQA
(``enable_gqa=True``): each key head serves ``Hq // Hk`` consecutive query heads, as in the kernel.

FlexAttention is not dispatched through torch function modes (eagerly it runs through ``torch.compile``), so
this path is not routed by the capture's mode: :func:`hold` puts a recording wrapper in place of the function
where attention modules look it up (the ``flex_attention`` module attribute, and each attention module's
forward globals bound to it) for as long as any capture is open, and :func:`release` puts the original back.
``score_mod`` and ``mask_mod`` are called on broadcast index tensors first and, if they cannot take those,
cell by cell through ``torch.vmap``, as FlexAttention itself does.
"""

from __future__ import annotations

import functools
import inspect
import math
import threading
from collections.abc import Callable, Iterable
from typing import Any

import torch

from attnscope.capture import masks
from attnscope.capture.recorder import Frame, Recorder, as_4d

SOURCE = "flex"
FUNCS = ()  # not routed through the torch function mode; see hold()

_lock = threading.Lock()
_recorders: list[Recorder] = []  # open captures, most recent last
_held: dict[tuple[int, str], list[Any]] = {}  # (id(namespace), name) -> [namespace, original, holders]


def _original() -> Callable[..., Any] | None:
    try:
        from torch.nn.attention import flex_attention as module
    except ImportError:  # a torch without FlexAttention
        return None
    fn = getattr(module, "flex_attention", None)
    return getattr(fn, "__wrapped_flex__", fn)


def _broadcast_or_vmap(fn: Callable[..., Any], value: torch.Tensor | None, B: int, H: int, Tq: int,
                       Tk: int, b0: int = 0) -> torch.Tensor:
    """``fn(b, h, q_idx, kv_idx)`` (or ``fn(score, b, h, q_idx, kv_idx)``) at every cell, as ``(B, H, Tq, Tk)``.

    Batch indices run from *b0* (a slice of the batch keeps the indices the call gave its items).
    """
    idx = (torch.arange(b0, b0 + B).view(B, 1, 1, 1), torch.arange(H).view(1, H, 1, 1),
           torch.arange(Tq).view(1, 1, Tq, 1), torch.arange(Tk).view(1, 1, 1, Tk))
    try:
        out = fn(value, *idx) if value is not None else fn(*idx)
        return torch.broadcast_to(torch.as_tensor(out), (B, H, Tq, Tk))
    except Exception:  # written for scalars: one cell at a time, as FlexAttention evaluates it
        pass
    if value is None:
        f = fn
        for dims in ((None, None, None, 0), (None, None, 0, None), (None, 0, None, None), (0, None, None, None)):
            f = torch.vmap(f, in_dims=dims)
        return f(torch.arange(b0, b0 + B), *(torch.arange(n) for n in (H, Tq, Tk)))
    f = fn
    for dims in ((0, None, None, None, 0), (0, None, None, 0, None), (0, None, 0, None, None),
                 (0, 0, None, None, None)):
        f = torch.vmap(f, in_dims=dims)
    return f(value, torch.arange(b0, b0 + B), *(torch.arange(n) for n in (H, Tq, Tk)))


def flex_allowed(block_mask: Any, B: int, H: int, Tq: int, Tk: int) -> torch.Tensor | None:
    """``(B, H, Tq, Tk)`` bool cells a FlexAttention block mask lets through, or None without a block mask."""
    if block_mask is None:
        return None
    mask_mod = getattr(block_mask, "mask_mod", None)
    allowed = torch.ones(B, H, Tq, Tk, dtype=torch.bool)
    if mask_mod is not None:
        allowed = _broadcast_or_vmap(mask_mod, None, B, H, Tq, Tk).bool().clone()
    blocks = block_mask.to_dense().bool()  # (B or 1, H or 1, nq, nk): blocks listed (partial or full)
    bq, bk = block_mask.BLOCK_SIZE
    cells = blocks.repeat_interleave(bq, dim=-2).repeat_interleave(bk, dim=-1)[..., :Tq, :Tk]
    return allowed & cells


def flex_weights(q: torch.Tensor, k: torch.Tensor, score_mod: Callable[..., Any] | None,
                 allowed: torch.Tensor | None, scale: float | None, enable_gqa: bool, b0: int = 0) -> torch.Tensor:
    """Float32 ``(B, Hq, Tq, Tk)`` weights of one FlexAttention call (``allowed`` as :func:`flex_allowed`).

    *q* and *k* may be a slice of the call's batch starting at item *b0*.
    """
    q, k = q.detach().float(), k.detach().float()
    if enable_gqa and k.size(1) != q.size(1):
        k = k.repeat_interleave(q.size(1) // k.size(1), dim=1)
    B, H, Tq, Tk = q.size(0), q.size(1), q.size(2), k.size(2)
    scale = 1.0 / math.sqrt(q.size(-1)) if scale is None else scale
    scores = torch.matmul(q, k.transpose(-2, -1)) * scale  # (B, H, Tq, Tk)
    if score_mod is not None:
        scores = _broadcast_or_vmap(score_mod, scores, B, H, Tq, Tk, b0).float()
    if allowed is not None:
        scores = scores.masked_fill(~allowed, float("-inf"))
    weights = torch.softmax(scores, dim=-1)
    return torch.nan_to_num(weights, nan=0.0)  # rows with no allowed key: the kernel gives a zero output


def _record(rec: Recorder, frame: Frame, params: dict[str, Any]) -> None:
    q4, k4 = as_4d(params["query"]), as_4d(params["key"])
    b, hq, tq, _ = q4.shape  # (B, Hq, Tq, E)
    tk = k4.shape[-2]
    kind = frame.kind_hint or "self"
    offset = 0 if kind == "cross" else max(tk - tq, 0)
    full_allowed = flex_allowed(params.get("block_mask"), b, hq, tq, tk)  # (B, Hq, Tq, Tk) or None
    allowed = masks.compact(full_allowed, (b, hq, tq, tk))
    heads = rec.kept_heads(hq, frame.name)
    score_mod, scale, gqa = params.get("score_mod"), params.get("scale"), bool(params.get("enable_gqa", False))

    def compute(sl: slice, hs: list[int]) -> torch.Tensor:
        w = flex_weights(q4[sl], k4[sl], score_mod, None if full_allowed is None else full_allowed[sl], scale, gqa,
                         b0=range(b)[sl].start if b else 0)
        return w[:, hs].contiguous()  # (b, len(hs), Tq, Tk); score_mod sees every head's index

    causal = kind == "self" and rec.is_causal(allowed, tq, tk, offset)
    rec.record(frame, kind, (b, hq, tq, tk), heads, allowed, causal, SOURCE, offset, compute)


def _wrapper(original: Callable[..., Any]) -> Callable[..., Any]:
    signature = inspect.signature(original)

    @functools.wraps(original)
    def flex_attention(*args: Any, **kwargs: Any) -> Any:
        with _lock:
            recorders = [r for r in _recorders if r.open and r.thread == threading.get_ident()]
        # A muted frame over the caller's while the kernel and the recomputation run: both call softmax under
        # the capture's function mode, and the softmax path must not record those as attention of their own.
        callers = []
        for rec in recorders:
            frame = rec.frame()
            if frame is not None:
                quiet = Frame(frame.name, frame.module, frame.kind_hint, selected=False)
                rec._stack().append(quiet)
                callers.append((rec, frame, quiet))
        try:
            out = original(*args, **kwargs)
            if callers:
                params = signature.bind(*args, **kwargs).arguments
                for rec, frame, _ in callers:
                    if frame.selected:
                        _record(rec, frame, params)
        finally:
            for rec, _, quiet in callers:
                stack = rec._stack()
                for i in range(len(stack) - 1, -1, -1):
                    if stack[i] is quiet:
                        del stack[i]
                        break
        return out

    flex_attention.__wrapped_flex__ = original  # type: ignore[attr-defined]
    return flex_attention


def _namespaces(modules: Iterable[torch.nn.Module]) -> list[dict[str, Any]]:
    """The flex_attention module's namespace and the globals of every given module's forward."""
    from torch.nn.attention import flex_attention as flex_module

    spaces = {id(vars(flex_module)): vars(flex_module)}
    for cls in {type(m) for m in modules}:
        fn = getattr(cls.forward, "__globals__", None)
        if fn is not None:
            spaces[id(fn)] = fn
    return list(spaces.values())


def hold(rec: Recorder, modules: Iterable[torch.nn.Module]) -> list[tuple[int, str]]:
    """Put the recording wrapper where *modules* look FlexAttention up and register *rec*; returns what it holds."""
    original = _original()
    if original is None:
        return []
    keys = []
    with _lock:
        _recorders.append(rec)
        wrapper = None
        ours = {key[0] for key in _held}  # namespaces where the wrapper already stands in
        for space in _namespaces(modules):
            # most namespaces never name FlexAttention: one C-level pass over their values' ids rules them out
            if id(space) not in ours and id(original) not in set(map(id, space.values())):
                continue
            for name, value in list(space.items()):
                if value is not original and getattr(value, "__wrapped_flex__", None) is not original:
                    continue
                key = (id(space), name)
                if key not in _held:
                    wrapper = wrapper or _wrapper(original)
                    _held[key] = [space, original, 0]
                    space[name] = wrapper
                _held[key][2] += 1
                keys.append(key)
    return keys


def release(rec: Recorder, keys: list[tuple[int, str]]) -> None:
    """Undo :func:`hold` for *rec*: the original comes back where no open capture still holds it. Safe twice."""
    with _lock:
        if rec in _recorders:
            _recorders.remove(rec)
        for key in keys:
            entry = _held.get(key)
            if entry is None:
                continue
            entry[2] -= 1
            if entry[2] <= 0:
                space, original, _ = _held.pop(key)
                space[key[1]] = original
        keys.clear()
