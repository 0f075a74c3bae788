"""A softmax inside an attention module: the weights are the softmax's own output (HF ``eager``, hand-written).

A softmax counts when an attention module owns the call (it runs in the module itself or in any module below
it: an ``Attend`` helper, an ``nn.Softmax`` child, a ``functools.partial(F.softmax, dim=-1)`` attribute; see
:mod:`attnscope.capture.rules`) and it normalises the last axis of

* a 4-D ``(B, H, Tq, Tk)`` tensor, or
* a 3-D ``(B·H, Tq, Tk)`` tensor (the ``bmm`` style of older seq2seq code): heads are recovered from the
  owning module's head count (``num_heads``, ``n_head``, ...) when it divides ``B·H``, else every row of the
  first axis is kept as a batch item of one head.

``log_softmax`` is never routed here. Forbidden keys come from the ``attention_mask`` the attention module was
called with when it fits the scores and agrees with two of their maps (HF eager attention adds exactly that
mask), else they are read off the scores (at most :data:`~attnscope.capture.masks.FORBID_AT`); see
:mod:`attnscope.capture.rules`.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from attnscope.capture import rules
from attnscope.capture.notes import noting
from attnscope.capture.recorder import Recorder, take

SOURCE = "softmax"
# noting("softmax"): F.softmax while nn.MultiheadAttention's scores are noted (attnscope.capture.notes)
FUNCS = (F.softmax, torch.softmax, torch.Tensor.softmax, torch.special.softmax, noting("softmax"))


def on_call(rec: Recorder, func, args, kwargs):
    out = func(*args, **kwargs)
    frame = rec.frame()
    if frame is None or not frame.selected or frame.owner is None:
        return out
    x = args[0] if args else kwargs.get("input")
    dim = args[1] if len(args) > 1 else kwargs.get("dim")
    if not isinstance(out, torch.Tensor) or out.dim() not in (3, 4) or dim not in (-1, out.dim() - 1):
        return out
    target = frame.target()
    scores, w = x.detach(), out.detach()
    if out.dim() == 3:
        bh, tq, tk = out.shape  # (B·H, Tq, Tk)
        h = rules.head_count(target.module)
        h = h if h is not None and bh % h == 0 else 1
        scores = scores.reshape(bh // h, h, tq, tk)
        w = w.reshape(bh // h, h, tq, tk)  # a view: the model's own tensor, never written
    b, h, tq, tk = w.shape  # (B, H, Tq, Tk)
    allowed = rec.allowed_of_softmax(frame, scores)  # (B or 1, H or 1, Tq, Tk) bool, or None
    kind = frame.kind()
    offset = 0 if kind == "cross" else max(tk - tq, 0)
    heads = rec.kept_heads(h, target.name)
    causal = kind == "self" and rec.is_causal(allowed, tq, tk, offset)
    index = rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, offset,
                       lambda sl, hs: take(w, sl, hs, shared=True),  # the model keeps using it
                       scores=scores if scores.dtype == w.dtype == torch.float32 else None)
    target.last_softmax = (out, index)
    return out
