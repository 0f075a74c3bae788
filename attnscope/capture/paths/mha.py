"""``F.multi_head_attention_forward``: run with per-head weights requested; the caller gets what it asked for.

With ``need_weights=True, average_attn_weights=False`` torch takes its math path and returns the very
per-head weights it multiplied V by. With attention dropout in training the call runs as it was, and a
dropout-free twin call gives the (pre-dropout) weights.

With ``keep="stats"`` a call that asks for no weights stays on torch's fused path, as the caller made it, when
its masks only allow or forbid keys: the statistics come from the queries and keys its
``scaled_dot_product_attention`` took (noted by :class:`~attnscope.capture.notes.CallNotes`), with no map formed
(:func:`attnscope.stats.score_sums`). The math path's two ``(B·H, Tq, Tk)`` temporaries per layer are what
made statistics cost more than maps: freed at once, glibc gives their pages back to the system and the next
layer faults them in again. Other calls (a score bias, ``bias_k``, zero attention, another torch function mode
below capture's) take the math path and hand capture the scores its softmax took, so the entropy needs no
logarithm per weight (:func:`attnscope.stats.head_sums`).
"""

from __future__ import annotations

import inspect

import torch
import torch.nn.functional as F

from attnscope.capture import masks
from attnscope.capture.notes import CallNotes
from attnscope.capture.paths.sdpa import fused_sums
from attnscope.capture.recorder import Frame, Recorder, take

SOURCE = "mha"
FUNCS = (F.multi_head_attention_forward,)
_SIGNATURE = inspect.signature(F.multi_head_attention_forward)


def on_call(rec: Recorder, func, args, kwargs):
    frame = rec.frame()
    if frame is None or not frame.selected:
        return func(*args, **kwargs)
    bound = _SIGNATURE.bind(*args, **kwargs)
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
        _record(rec, frame, a, w, shared=False)
        return result
    # another torch function mode below (an outer capture, a head intervention) would see the call and may
    # change it (an outer capture asks for weights): then the math path, whose weights are what every mode sees
    if rec.keep == "stats" and not want_weights and _fused_fits(a) and torch._C._len_torch_function_stack() == 0:
        with CallNotes("scaled_dot_product_attention") as seen:
            result = func(*bound.args, **bound.kwargs)
        if len(seen.calls) == 1 and _record_fused(rec, frame, a, seen.calls[0]):
            return result
        # torch did not take the fused path as expected: the math path below (the call runs again, no grad kept)
    a["need_weights"], a["average_attn_weights"] = True, False
    if rec.keep == "stats":
        with CallNotes("softmax") as seen:
            out, weights = func(*bound.args, **bound.kwargs)
        scores = _scores_of(seen, weights)
    else:
        out, weights = func(*bound.args, **bound.kwargs)
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


def _record_fused(rec: Recorder, frame: Frame, a: dict, call) -> bool:
    """Record the statistics of the ``scaled_dot_product_attention`` call torch's fused path made (*call*:
    ``(args, kwargs, output)``) from its queries and keys; False when the call is not the expected one."""
    args, kwargs, _ = call
    q4, k4 = (args[0] if args else kwargs.get("query")), (args[1] if len(args) > 1 else kwargs.get("key"))
    if not (isinstance(q4, torch.Tensor) and isinstance(k4, torch.Tensor) and q4.dim() == 4 and k4.dim() == 4
            and q4.shape[:2] == k4.shape[:2]):
        return False
    q4, k4 = q4.detach(), k4.detach()
    b, h, tq, tk = q4.shape[0], q4.shape[1], q4.shape[2], k4.shape[2]
    allowed = _allowed(a, b, h, tq, tk)
    kind, heads = _kind(frame, a), rec.kept_heads(h, frame.target().name)
    causal = bool(a["is_causal"]) or (kind == "self" and masks.is_causal_mask(allowed, tq, tk, 0))

    def compute(sl: slice, hs: list[int]):  # maps, should a caller ask for them: softmax(Q Kᵀ/√E + mask)
        m = None if allowed is None else allowed[sl] if allowed.shape[0] == b else allowed
        m = m if m is None or m.shape[1] == 1 else m[:, hs]
        return masks.sdpa_weights(q4[sl][:, hs], k4[sl][:, hs], m, False)

    rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, 0, compute, builds=True,
               sums=lambda hs: fused_sums(q4, k4, allowed, hs, 1, None, 0))
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


def _allowed(a: dict, b: int, h: int, tq: int, tk: int) -> torch.Tensor | None:
    mask, kpm = a["attn_mask"], a["key_padding_mask"]
    if a["is_causal"] and mask is None:
        mask = ~masks.causal_allowed(tq, tk)
    return masks.compact(masks.mha_allowed(mask, kpm, b, h, tq, tk), (b, h, tq, tk))


def _record(rec: Recorder, frame: Frame, a: dict, w: torch.Tensor, shared: bool,
            scores: torch.Tensor | None = None) -> None:
    w4 = w.unsqueeze(0) if w.dim() == 3 else w  # (B, H, Tq, Tk)
    b, h, tq, tk = w4.shape
    kind, allowed = _kind(frame, a), _allowed(a, b, h, tq, tk)
    heads = rec.kept_heads(h, frame.target().name)
    causal = bool(a["is_causal"]) or (kind == "self" and masks.is_causal_mask(allowed, tq, tk, 0))
    rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, 0,
               lambda sl, hs: take(w4, sl, hs, shared), scores=scores)
