"""A softmax inside an attention module: the weights are the softmax's own output (HF ``eager``, hand-written).

Only a softmax over the last axis of a 4-D ``(B, H, Tq, Tk)`` tensor, called while an attention module (see
:mod:`attnscope.capture.rules`) is the innermost running module, counts. Forbidden keys are read off the
scores (at most :data:`~attnscope.capture.masks.FORBID_AT`).
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from attnscope.capture import masks
from attnscope.capture.recorder import Recorder, take

SOURCE = "softmax"
FUNCS = (F.softmax, torch.softmax, torch.Tensor.softmax, torch.special.softmax)


def on_call(rec: Recorder, func, args, kwargs):
    out = func(*args, **kwargs)
    frame = rec.frame()
    if frame is None or not frame.selected or frame.name not in rec.map.attention:
        return out
    x = args[0] if args else kwargs.get("input")
    dim = args[1] if len(args) > 1 else kwargs.get("dim")
    if not isinstance(out, torch.Tensor) or out.dim() != 4 or dim not in (-1, 3):
        return out
    scores = x.detach()
    b, h, tq, tk = out.shape  # (B, H, Tq, Tk)
    allowed = masks.allowed_from_scores(scores)  # (B or 1, H or 1, Tq, Tk) bool, or None
    kind = frame.kind_hint or "self"
    offset = 0 if kind == "cross" else max(tk - tq, 0)
    heads = rec.kept_heads(h, frame.name)
    causal = kind == "self" and masks.is_causal_mask(allowed, tq, tk, offset)
    w = out.detach()
    index = rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, offset,
                       lambda sl, hs: take(w, sl, hs, shared=True))  # the model keeps using it
    frame.last_softmax = (out, index)
    return out
