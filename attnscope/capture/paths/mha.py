"""``F.multi_head_attention_forward``: run with per-head weights requested; the caller gets what it asked for.

With ``need_weights=True, average_attn_weights=False`` torch takes its math path and returns the very
per-head weights it multiplied V by. With attention dropout in training the call runs as it was, and a
dropout-free twin call gives the (pre-dropout) weights.

With ``keep="stats"`` a call that asks for no weights, with masks that only allow or forbid keys, goes down
torch's fused path, and capture takes the inner ``scaled_dot_product_attention`` call (seen through
:class:`~attnscope.capture.notes.CallNotes`, as a torch function mode cannot see it):

* no gradient needed: capture computes that call itself, the statistics and the output from the same pieces of
  scores (:func:`attnscope.stats.score_sums` with values): attention is computed once and no map is formed.
  The output equals torch's fused kernel to float rounding (as the math path's, which ``keep="maps"`` runs,
  does; measured in the tests). Rows with no allowed key give 0, as the fused kernel does.
* a gradient needed: the call runs as the caller made it (bit-identical, its graph intact) and the statistics
  are reduced beside it from its queries and keys.

The math path's two ``(B·H, Tq, Tk)`` temporaries per layer are what made statistics cost more than maps: freed
at once, glibc may give their pages back to the system and the next layer faults them in again. Other calls (a
score bias, ``bias_k``, zero attention, another torch function mode below capture's, weights asked for) take the
math path and hand capture the scores its softmax took, so the entropy needs no logarithm per weight
(:func:`attnscope.stats.head_sums`).
"""

from __future__ import annotations

import functools
import inspect

import torch
import torch.nn.functional as F

from attnscope.capture import masks
from attnscope.capture.notes import CallNotes
from attnscope.capture.paths.sdpa import fused_sums
from attnscope.capture.recorder import Frame, Recorder, needs_grad, take
from attnscope.records import HeadSums
from attnscope.stats import score_sums

SOURCE = "mha"
FUNCS = (F.multi_head_attention_forward,)
_SIGNATURE = inspect.signature(F.multi_head_attention_forward)
_NAMES = tuple(_SIGNATURE.parameters)  # every one positional-or-keyword
_DEFAULTS = {n: p.default for n, p in _SIGNATURE.parameters.items() if p.default is not p.empty}


def _arguments(args: tuple, kwargs: dict) -> dict:
    """Every argument of one ``F.multi_head_attention_forward`` call by name, defaults filled in: what
    ``inspect.Signature.bind`` + ``apply_defaults`` give, without their cost per call (a call that does not
    fit, e.g. a missing argument, goes to them and raises as the call itself would)."""
    if len(args) <= len(_NAMES) and not any(n in kwargs for n in _NAMES[:len(args)]):
        a = {**_DEFAULTS, **dict(zip(_NAMES, args)), **kwargs}
        if len(a) == len(_NAMES):
            return a
    bound = _SIGNATURE.bind(*args, **kwargs)
    bound.apply_defaults()
    return dict(bound.arguments)


def on_call(rec: Recorder, func, args, kwargs):
    frame = rec.frame()
    if frame is None or not frame.selected:
        return func(*args, **kwargs)
    a = _arguments(args, kwargs)
    want_weights, average = a["need_weights"], a["average_attn_weights"]
    if a["training"] and a["dropout_p"] > 0:
        # Attention dropout draws random numbers differently on the fused and the math path: run the call
        # as it was, then get the (pre-dropout) weights from a second, dropout-free math-path call.
        result = func(**a)
        a["need_weights"], a["average_attn_weights"], a["dropout_p"] = True, False, 0.0
        with torch.no_grad():
            w = func(**a)[1].detach()
        _record(rec, frame, a, w, shared=False)
        return result
    # another torch function mode below (an outer capture, a head intervention) would see the call and may
    # change it (an outer capture asks for weights): then the math path, whose weights are what every mode sees
    if rec.keep == "stats" and not want_weights and _fused_fits(a) and torch._C._len_torch_function_stack() == 0:
        held: dict = {}
        if not needs_grad(a["query"], a["key"], a["value"]):
            # no gradient needed: capture computes the inner call itself, statistics and output from the same
            # pieces of scores (attention computed once; the output equals the kernel's to float rounding)
            with CallNotes("scaled_dot_product_attention", replace=functools.partial(_once, rec, held, a)) as seen:
                result = func(**a)
        else:  # the call runs as the caller made it (its graph intact); statistics beside it
            with CallNotes("scaled_dot_product_attention") as seen:
                result = func(**a)
        if len(seen.calls) == 1 and _record_fused(rec, frame, a, seen.calls[0], held.get("sums"),
                                                  held.get("allowed")):
            return result
        # torch did not take the fused path as expected: the math path below (the call runs again)
    a["need_weights"], a["average_attn_weights"] = True, False
    if rec.keep == "stats":
        with CallNotes("softmax") as seen:
            out, weights = func(**a)
        scores = _scores_of(seen, weights)
    else:
        out, weights = func(**a)
        scores = None
    # the caller gets this very tensor back only when it asked for per-head weights: copy it then
    _record(rec, frame, a, weights.detach(), shared=want_weights and not average, scores=scores)
    if not want_weights:
        return out, None
    return out, (weights.mean(dim=-3) if average else weights)


def _fused_fits(a: dict) -> bool:
    """The call's masks only allow or forbid keys and no key is added beside the inputs' (``bias_k``, zero
    attention, static keys), so statistics can come from the fused call's queries and keys."""
    return (masks.only_forbids(a["attn_mask"]) and masks.only_forbids(a["key_padding_mask"])
            and a["bias_k"] is None and not a["add_zero_attn"] and a["static_k"] is None)


def _fits_sdpa(q4, k4, v4=None) -> bool:
    """``(B, H, T, E)`` queries, keys (and values) of the same heads, as torch's fused MHA path passes them."""
    four = [t for t in (q4, k4, v4) if t is not None]
    return (all(isinstance(t, torch.Tensor) and t.dim() == 4 for t in four)
            and all(t.shape[:2] == q4.shape[:2] for t in four))


def _once(rec: Recorder, held: dict, a: dict, query, key, value, attn_mask=None, dropout_p=0.0, is_causal=False,
          scale=None, **kw):
    """The inner ``scaled_dot_product_attention`` of the MHA call with arguments *a*, computed by capture:
    statistics and output from the same pieces (:func:`~attnscope.stats.score_sums` with values) into *held*;
    the original otherwise. The allowed keys come from the call's own small masks (what torch merged into
    *attn_mask*, ``(B·H, Tq, Tk)`` with padding, forbids exactly those keys), not from a pass over the merged one."""
    if held or dropout_p or kw.get("enable_gqa") or not _fits_sdpa(query, key, value):
        return torch._C._nn.scaled_dot_product_attention(query, key, value, attn_mask, dropout_p, is_causal,
                                                         scale=scale, **kw)
    b, h, tq, tk = query.shape[0], query.shape[1], query.shape[2], key.shape[2]
    held["allowed"] = allowed = _allowed(rec, a, b, h, tq, tk)
    plan = rec.score_plan(allowed, (b, h, tq, tk))
    held["sums"], out = score_sums(query, key, allowed, scale, 0, v=value, plan=plan)
    return out.to(query.dtype)


def _record_fused(rec: Recorder, frame: Frame, a: dict, call, sums: HeadSums | None,
                  allowed: torch.Tensor | None = None) -> bool:
    """Record the statistics of the ``scaled_dot_product_attention`` call torch's fused path made (*call*:
    ``(args, kwargs, output)``): *sums* when capture computed the call itself (:func:`_once`), else from the
    call's queries and keys; False when the call is not the expected one."""
    args, kwargs, _ = call
    q4, k4 = (args[0] if args else kwargs.get("query")), (args[1] if len(args) > 1 else kwargs.get("key"))
    if not _fits_sdpa(q4, k4):
        return False
    q4, k4 = q4.detach(), k4.detach()
    b, h, tq, tk = q4.shape[0], q4.shape[1], q4.shape[2], k4.shape[2]
    allowed = _allowed(rec, a, b, h, tq, tk) if sums is None else allowed
    kind, heads = _kind(frame, a), rec.kept_heads(h, frame.target().name)
    causal = bool(a["is_causal"]) or (kind == "self" and rec.is_causal(allowed, tq, tk, 0))
    # keep="stats" only (the fused path is taken for nothing else): statistics, never maps
    rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, 0, None,
               sums=(lambda hs: fused_sums(rec, q4, k4, allowed, hs, 1, None, 0)) if sums is None else sums.take)
    return True


def _scores_of(seen: CallNotes, weights: torch.Tensor) -> torch.Tensor | None:
    """The ``(B, H, Tq, Tk)`` scores whose softmax *weights* are (the very tensor) among *seen* calls, else None."""
    for args, kwargs, out in seen.calls:
        x = args[0] if args else kwargs.get("input")
        if (isinstance(x, torch.Tensor) and isinstance(out, torch.Tensor) and x.dtype == out.dtype == torch.float32
                and out.numel() == weights.numel() == x.numel() and out.data_ptr() == weights.data_ptr()):
            return x.detach().reshape(weights.shape if weights.dim() == 4 else (1, *weights.shape))
    return None


def _kind(frame: Frame, a: dict) -> str:
    query, key = a["query"], a["key"]
    same = key is query or (key.shape == query.shape and key.data_ptr() == query.data_ptr())
    return frame.known_kind() or ("self" if same else "cross")


def _allowed(rec: Recorder, a: dict, b: int, h: int, tq: int, tk: int) -> torch.Tensor | None:
    return rec.mha_allowed(a["attn_mask"], a["key_padding_mask"], bool(a["is_causal"]), (b, h, tq, tk))


def _record(rec: Recorder, frame: Frame, a: dict, w: torch.Tensor, shared: bool,
            scores: torch.Tensor | None = None) -> None:
    w4 = w.unsqueeze(0) if w.dim() == 3 else w  # (B, H, Tq, Tk)
    b, h, tq, tk = w4.shape
    kind, allowed = _kind(frame, a), _allowed(rec, a, b, h, tq, tk)
    heads = rec.kept_heads(h, frame.target().name)
    causal = bool(a["is_causal"]) or (kind == "self" and rec.is_causal(allowed, tq, tk, 0))
    rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, 0,
               lambda sl, hs: take(w4, sl, hs, shared), scores=scores)
