""":func:`attnscope.tap`: weights the user's own code hands over, with an optional allowed mask.

A tap of the very tensor a softmax in the same module produced refines that softmax's record instead of adding
a second one.
"""

from __future__ import annotations

import torch

from attnscope.capture import masks
from attnscope.capture.recorder import Recorder, take
from attnscope.errors import ShapeError

SOURCE = "tap"
FUNCS = ()


def on_tap(rec: Recorder, weights: torch.Tensor, allowed: torch.Tensor | None, causal: bool | None,
           kind: str | None) -> None:
    frame = rec.frame()
    if frame is None or not frame.selected:
        return
    w = weights.detach()
    if w.dim() < 2 or w.dim() > 4:
        raise ShapeError(f"tap() expects weights [batch, heads, queries, keys]; '{frame.name}' passed a "
                         f"{w.dim()}-dim tensor of shape {tuple(w.shape)}")
    while w.dim() < 4:
        w = w.unsqueeze(0)
    b, h, tq, tk = w.shape  # (B, H, Tq, Tk)
    if allowed is not None:
        allowed = allowed.detach().to(torch.bool)
        try:
            torch.broadcast_shapes(allowed.shape, w.shape)
        except RuntimeError:
            raise ShapeError(f"tap() in '{frame.name}': allowed of shape {tuple(allowed.shape)} does not "
                             f"broadcast to the weights' {tuple(w.shape)}") from None
    kind = kind or frame.kind()
    offset = 0 if kind == "cross" else max(tk - tq, 0)
    allowed4 = masks.compact(allowed, (b, h, tq, tk))
    if causal is None:
        causal = kind == "self" and rec.is_causal(allowed4, tq, tk, offset)
    heads = rec.kept_heads(h, frame.target().name)
    replace_at = None
    last = frame.target().last_softmax
    if last is not None and last[0] is weights:
        replace_at = last[1]  # the same tensor the softmax produced: tap refines that record
    rec.record(frame, kind, (b, h, tq, tk), heads, allowed4, bool(causal), SOURCE, offset,
               lambda sl, hs: take(w, sl, hs, shared=True), replace_at=replace_at)
