"""``F.scaled_dot_product_attention``: left to run unchanged with its weights recomputed beside it, or (opt-in)
computed once from the weights.

The fused kernels never form the weights, so :func:`attnscope.capture.masks.sdpa_weights` recomputes
softmax(Q Kᵀ · scale + mask) from the same query, key, mask and scale (GQA aware), only for the kept heads.

Grouped-query decode steps packed as ``(B, H_kv, n_rep, E)`` queries (one query per head folded onto the
key/value heads, as HF transformers does for a single token with a mask) are unpacked to
``(B, H_q, 1, E)`` when the owning module declares ``num_key_value_groups`` and its head count.

With ``keep="stats"`` and a mask that only allows or forbids keys (or none) no map is formed:
:func:`attnscope.stats.score_sums` reduces the scores piece by piece, skipping the blocks of keys the mask
forbids to every query of a block.

With ``capture(..., sdpa="weights")`` the call is not run at all: capture builds the weights of every head and
returns ``weights @ V`` as the call's output (equal to the kernel's up to float rounding), so attention is
computed once. With ``keep="stats"`` as well (and a mask that only allows or forbids keys) the output and the
statistics come from the same pieces of scores (:func:`attnscope.stats.score_sums` with ``v``): no map at all.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from attnscope.capture import masks, rules
from attnscope.capture.recorder import Recorder, as_4d, needs_grad, take
from attnscope.stats import score_sums

SOURCE = "sdpa"
FUNCS = (F.scaled_dot_product_attention,)
_PARAMS = ("query", "key", "value", "attn_mask", "dropout_p", "is_causal", "scale", "enable_gqa")


def on_call(rec: Recorder, func, args, kwargs):
    frame = rec.frame()
    if frame is None or not frame.selected:
        return func(*args, **kwargs)
    p = dict(zip(_PARAMS, args))
    p.update(kwargs)
    if (rec.sdpa == "weights" and _from_weights_applies(p)
            and not _packed_groups(frame.target().module, as_4d(p["query"]), as_4d(p["key"]))):
        return _from_weights(rec, frame, p)
    out = func(*args, **kwargs)
    q, k = p["query"], p["key"]
    attn_mask, is_causal = p.get("attn_mask"), bool(p.get("is_causal", False))
    q4, k4, mask4 = as_4d(q), as_4d(k), attn_mask
    if mask4 is not None and q.dim() > 4:
        mask4 = mask4.reshape(-1, *mask4.shape[-3:]) if mask4.dim() > 4 else mask4
    rep = q4.shape[1] // k4.shape[1] if p.get("enable_gqa", False) else 1
    groups = _packed_groups(frame.target().module, q4, k4)
    if groups:
        q4, rep = _unpack(q4, groups), groups  # (B, H_kv, n_rep, E) -> (B, H_q, 1, E)
        if mask4 is not None and mask4.dim() == 4 and mask4.shape[1] == q.shape[-3] and mask4.shape[-2] == groups:
            mask4 = _unpack(mask4, groups)  # a per-head mask was packed the same way
    b, hq, tq, _ = q4.shape  # (B, Hq, Tq, E)
    tk = k4.shape[-2]
    kind = frame.kind()
    offset = 0 if (is_causal or kind == "cross") else max(tk - tq, 0)
    allowed, forbids_only = rec.sdpa_mask(mask4, is_causal, (b, hq, tq, tk))
    heads = rec.kept_heads(hq, frame.target().name)

    def compute(sl: slice, hs: list[int], with_scores: bool = False):
        m = mask4
        if m is not None and m.dim() == 4:
            m = m[sl] if m.shape[0] == b else m
            m = m[:, hs] if m.shape[1] == hq else m
        kh = [h // rep for h in hs] if k4.shape[1] > 1 else [0]
        # the row blocks of the mask are worked out once per forward (per part of the batch), not per layer
        plan = None if allowed is None or with_scores or not forbids_only else rec.score_plan(
            allowed, (len(range(b)[sl]), len(hs), tq, tk), batch=sl, heads=hs)
        return masks.sdpa_weights(q4[sl][:, hs], k4[sl][:, kh], m, is_causal, p.get("scale"),
                                  with_scores=with_scores, plan=plan)

    causal = is_causal or (kind == "self" and rec.is_causal(allowed, tq, tk, offset))
    rec.record(frame, kind, (b, hq, tq, tk), heads, allowed, causal, SOURCE, offset, compute, builds=True,
               scored=lambda sl, hs: compute(sl, hs, with_scores=True),
               sums=(lambda hs: fused_sums(rec, q4, k4, allowed, hs, rep, p.get("scale"), offset))
               if forbids_only else None)
    return out


def fused_sums(rec: Recorder, q4: torch.Tensor, k4: torch.Tensor, allowed: torch.Tensor | None, hs: list[int],
               rep: int, scale: float | None, offset: int):
    """keep="stats" of a fused call whose mask only allows or forbids keys: statistics of heads *hs* with no map
    formed (:func:`~attnscope.stats.score_sums`). *q4* ``(B, Hq, Tq, E)``, *k4* ``(B, Hkv, Tk, E)`` with ``Hq =
    rep · Hkv`` (or one key head), *allowed* compact ``(B or 1, Hq or 1, Tq, Tk)`` or None."""
    b, hq = q4.shape[:2]
    every = hs == list(range(hq))
    kh = [h // rep for h in hs] if k4.shape[1] > 1 else [0] * len(hs)
    a = allowed if allowed is None or allowed.shape[1] == 1 or every else allowed[:, hs]
    qq = q4 if every else q4[:, hs]  # (B, h, Tq, E)
    kk = k4 if kh == list(range(k4.shape[1])) else k4[:, kh]  # (B, h, Tk, E)  one key head per query head
    plan = rec.score_plan(a, (b, len(hs), q4.shape[2], k4.shape[2]))  # once per mask: every layer shares it
    return score_sums(qq, kk.expand(b, len(hs), *k4.shape[-2:]), a, scale, offset, plan=plan)


def _packed_groups(module, q4, k4) -> int:
    """``n_rep`` when *q4* is a packed grouped-query decode step of *module*, else 0."""
    groups = getattr(module, "num_key_value_groups", None)
    if not isinstance(groups, int) or groups <= 1:
        return 0
    heads = rules.head_count(module)
    if heads is None or q4.shape[1] * groups != heads or k4.shape[1] != q4.shape[1] or q4.shape[2] != groups:
        return 0
    return groups


def _unpack(t, groups: int):
    b, hkv, _, e = t.shape
    return t.reshape(b, hkv * groups, 1, e)


def _from_weights_applies(p: dict) -> bool:
    """Whether the call may be computed as ``weights @ V``: no attention dropout, no gradient needed."""
    return (not needs_grad(p["query"], p["key"], p["value"], p.get("attn_mask")) and not p.get("dropout_p")
            and p["value"].is_floating_point())


def _from_weights(rec: Recorder, frame, p: dict) -> torch.Tensor:
    """``sdpa="weights"``: build every head's weights once, record them, and return ``weights @ V``."""
    q, k, v = p["query"], p["key"], p["value"]
    attn_mask, is_causal = p.get("attn_mask"), bool(p.get("is_causal", False))
    q4, k4, v4, mask4 = as_4d(q), as_4d(k), as_4d(v), attn_mask
    if mask4 is not None and q.dim() > 4:
        mask4 = mask4.reshape(-1, *mask4.shape[-3:]) if mask4.dim() > 4 else mask4
    b, hq, tq, _ = q4.shape  # (B, Hq, Tq, E)
    tk = k4.shape[-2]
    gqa = bool(p.get("enable_gqa", False))
    kind = frame.kind()
    offset = 0 if (is_causal or kind == "cross") else max(tk - tq, 0)
    allowed, forbids_only = rec.sdpa_mask(mask4, is_causal, (b, hq, tq, tk))
    heads = rec.kept_heads(hq, frame.target().name)
    causal = is_causal or (kind == "self" and rec.is_causal(allowed, tq, tk, offset))
    vv = v4.repeat_interleave(hq // v4.shape[1], dim=1) if v4.shape[1] != hq else v4  # (B, Hq, Tk, Ev)
    # one key head per query head (GQA repeated, a single shared head broadcast): (B, Hq, Tk, E)
    kk = (k4.repeat_interleave(hq // k4.shape[1], dim=1) if k4.shape[1] not in (1, hq) else k4).expand(
        b, hq, tk, k4.shape[-1])
    if rec.keep == "stats" and forbids_only:
        # statistics and output from the same pieces of scores: no map, attention computed once
        sums, out = score_sums(q4, kk, allowed, p.get("scale"), offset, v=vv.expand(b, hq, tk, v4.shape[-1]),
                               plan=rec.score_plan(allowed, (b, hq, tq, tk)))
        rec.record(frame, kind, (b, hq, tq, tk), heads, allowed, causal, SOURCE, offset, None, sums=sums.take)
        return out.reshape(*q.shape[:-1], v.shape[-1])
    scores = None  # keep="stats" takes the entropy from the masked scores (no logarithm per weight)
    blocked = None
    if rec.keep == "stats":
        w, scores = masks.sdpa_weights(q4, k4, mask4, is_causal, p.get("scale"), enable_gqa=gqa, with_scores=True)
    elif (mask4 is None or mask4.dtype == torch.bool) and (k4.shape[1] in (1, hq) or gqa):
        # weights and output in the same row blocks, leaving out the keys the mask forbids to a whole block
        blocked = masks.blocked_weights(q4.detach().float(), kk.detach().float(), mask4, is_causal, p.get("scale"),
                                        v=vv.expand(b, hq, tk, v4.shape[-1]),
                                        plan=None if allowed is None else rec.score_plan(allowed, (b, hq, tq, tk)))
    if blocked is not None:
        w, out = blocked  # (B, Hq, Tq, Tk) float32, (B, Hq, Tq, Ev)
    else:
        if scores is None:
            w = masks.sdpa_weights(q4, k4, mask4, is_causal, p.get("scale"), enable_gqa=gqa)  # (B, Hq, Tq, Tk)
        out = torch.matmul(w.to(v.dtype), vv)  # (B, Hq, Tq, Ev)
    rec.record(frame, kind, (b, hq, tq, tk), heads, allowed, causal, SOURCE, offset,
               lambda sl, hs: take(w, sl, hs), scores=scores)  # capture's own tensor: kept without a copy
    return out.reshape(*q.shape[:-1], v.shape[-1])
