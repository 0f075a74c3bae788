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

import threading

import torch
import torch.nn.functional as F

from attnscope.capture import masks, rules
from attnscope.capture.recorder import Recorder, take

SOURCE = "softmax"


class SoftmaxNotes:
    """Keeps the input and output of the softmax torch's math path calls (``F.softmax``, looked up by name in
    :mod:`torch.nn.functional`), per thread; every call runs unchanged.

    A torch function mode cannot see it: torch leaves the mode that routed ``multi_head_attention_forward`` here
    for as long as that call runs. So for the call's duration ``F.softmax`` is a thin wrapper that calls the
    original and notes its tensors; the wrapper goes in with the first thread to enter and out with the last. A
    capture running in another thread meanwhile still sees its own softmax calls: the wrapper is one of
    :data:`FUNCS`.
    """

    _lock = threading.Lock()
    _users = 0
    _original = None
    _local = threading.local()

    def __enter__(self) -> "SoftmaxNotes":
        cls = type(self)
        with cls._lock:
            if cls._users == 0:
                cls._original = F.softmax
                F.softmax = noting_softmax
            cls._users += 1
        self.calls: list[tuple[torch.Tensor, torch.Tensor]] = []
        self._outer = getattr(cls._local, "calls", None)
        cls._local.calls = self.calls
        return self

    def __exit__(self, *exc) -> None:
        cls = type(self)
        cls._local.calls = self._outer
        with cls._lock:
            cls._users -= 1
            if cls._users == 0:
                F.softmax = cls._original

    def scores_of(self, weights: torch.Tensor) -> torch.Tensor | None:
        """The ``(B, H, Tq, Tk)`` scores whose softmax *weights* are (the very tensor), else None."""
        for x, out in self.calls:
            if (isinstance(x, torch.Tensor) and x.dtype == out.dtype == torch.float32 and out.numel() == weights.numel()
                    and out.data_ptr() == weights.data_ptr() and x.numel() == weights.numel()):
                return x.detach().reshape(weights.shape if weights.dim() == 4 else (1, *weights.shape))
        return None


def noting_softmax(input, dim=None, _stacklevel=3, dtype=None):  # noqa: A002  (F.softmax's own signature)
    """``F.softmax`` while a :class:`SoftmaxNotes` is open: the original, and a note of its tensors in this thread."""
    out = SoftmaxNotes._original(input, dim, _stacklevel, dtype)
    calls = getattr(SoftmaxNotes._local, "calls", None)
    if calls is not None and isinstance(out, torch.Tensor):
        calls.append((input, out))
    return out


FUNCS = (F.softmax, torch.softmax, torch.Tensor.softmax, torch.special.softmax, noting_softmax)


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
    causal = kind == "self" and masks.is_causal_mask(allowed, tq, tk, offset)
    index = rec.record(frame, kind, (b, h, tq, tk), heads, allowed, causal, SOURCE, offset,
                       lambda sl, hs: take(w, sl, hs, shared=True),  # the model keeps using it
                       scores=scores if scores.dtype == w.dtype == torch.float32 else None)
    target.last_softmax = (out, index)
    return out
