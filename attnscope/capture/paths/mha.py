"""``F.multi_head_attention_forward``: run with per-head weights requested; the caller gets what it asked for.

With ``need_weights=True, average_attn_weights=False`` torch takes its math path and returns the very
per-head weights it multiplied V by. With attention dropout in training the call runs as it was, and a
dropout-free twin call gives the (pre-dropout) weights.

With ``keep="stats"`` the call also hands capture the scores its softmax took (noted by a thin wrapper of
``F.softmax`` for the call's duration, :class:`~attnscope.capture.paths.softmax.SoftmaxNotes`), so the entropy
needs no logarithm per weight (:func:`attnscope.stats.head_sums`).
"""

from __future__ import annotations

import inspect

import torch
import torch.nn.functional as F

from attnscope.capture import masks
from attnscope.capture.paths.softmax import SoftmaxNotes
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
    a["need_weights"], a["average_attn_weights"] = True, False
    if rec.keep == "stats":
        with SoftmaxNotes() as seen:
            out, weights = func(*bound.args, **bound.kwargs)
        scores = seen.scores_of(weights)
    else:
        out, weights = func(*bound.args, **bound.kwargs)
        scores = None
    # the caller gets this very tensor back only when it asked for per-head weights: copy it then
    _record(rec, frame, a, weights.detach(), shared=want_weights and not average, scores=scores)
    if not want_weights:
        return out, None
    return out, (weights.mean(dim=-3) if average else weights)


def _record(rec: Recorder, frame: Frame, a: dict, w: torch.Tensor, shared: bool,
            scores: torch.Tensor | None = None) -> None:
    w4 = w.unsqueeze(0) if w.dim() == 3 else w  # (B, H, Tq, Tk)
    b, h, tq, tk = w4.shape
    query, key = a["query"], a["key"]
    same = key is query or (key.shape == query.shape and key.data_ptr() == query.data_ptr())
    kind = frame.known_kind() or ("self" if same else "cross")
    mask, kpm = a["attn_mask"], a["key_padding_mask"]
    if a["is_causal"] and mask is None:
        mask = ~masks.causal_allowed(tq, tk)
    allowed = masks.compact(masks.mha_allowed(mask, kpm, b, h, tq, tk), (b, h, tq, tk))
    heads = rec.kept_heads(h, frame.target().name)
    causal = bool(a["is_causal"]) or (kind == "self" and masks.is_causal_mask(allowed, tq, tk, 0))
    rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, 0,
               lambda sl, hs: take(w4, sl, hs, shared), scores=scores)
