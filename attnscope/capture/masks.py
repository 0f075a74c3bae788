"""Turn the masks an attention call applied into one boolean "allowed" array, and recompute SDPA weights.

Conventions differ between torch entry points, and this module is the one place that knows them:

* ``F.scaled_dot_product_attention``: a bool ``attn_mask`` is True where a query **may** attend; a float mask
  is added to the scores; ``is_causal`` applies a lower-triangular mask aligned to the top-left corner.
* ``nn.MultiheadAttention``: a bool ``attn_mask`` or ``key_padding_mask`` is True where a query may **not**
  attend; float masks are added.

A float mask counts as forbidding a key where it is ``-inf`` or at most :data:`FORBID_AT` (masks built with a
large finite negative number, as many libraries do, forbid keys just as ``-inf`` does).
"""

from __future__ import annotations

import functools
import math

import torch

__all__ = ["FORBID_AT", "UNFIT", "added_mask_allowed", "agrees_with_scores", "allowed_from_scores", "blocked_weights",
           "causal_allowed", "compact", "is_causal_mask", "only_forbids", "sdpa_weights"]

#: A float mask value at or below this forbids the key (``-inf``, ``finfo.min``, ``-1e9``, ``-1e4`` do).
FORBID_AT = -1.0e4


def _forbidden_from_float(mask: torch.Tensor) -> torch.Tensor:
    return mask <= FORBID_AT  # -inf <= x holds too


def only_forbids(mask: torch.Tensor | None) -> bool:
    """True when *mask* only allows or forbids keys: None, bool, or float of 0 and -inf (or at most half the
    dtype's lowest value, as HF builds them: ``exp`` of such a score is exactly 0). A float mask with other values
    adds a bias to the scores (ALiBi and the like)."""
    if mask is None or mask.dtype == torch.bool:
        return True
    m = mask.detach()
    return bool(((m == 0) | (m <= torch.finfo(m.dtype).min / 2)).all())


@functools.lru_cache(maxsize=64)
def causal_allowed(tq: int, tk: int, offset: int = 0) -> torch.Tensor:
    """``(Tq, Tk)`` bool: query *i* may see key *j* when ``j <= i + offset``. Cached: never modify it."""
    return torch.ones(tq, tk, dtype=torch.bool).tril(diagonal=offset)


@functools.lru_cache(maxsize=64)
def _causal_bias(tq: int, tk: int) -> torch.Tensor:
    """``(Tq, Tk)`` float32: 0 where allowed, -inf above the diagonal (adding it is cheaper than masked_fill)."""
    return torch.zeros(tq, tk).masked_fill_(~causal_allowed(tq, tk), float("-inf"))


def sdpa_allowed(attn_mask: torch.Tensor | None, is_causal: bool, tq: int, tk: int) -> torch.Tensor | None:
    """Allowed mask of one ``scaled_dot_product_attention`` call, broadcastable to ``(..., Tq, Tk)``."""
    allowed = causal_allowed(tq, tk) if is_causal else None
    if attn_mask is not None:
        m = attn_mask.detach()
        ok = m.to(torch.bool) if m.dtype == torch.bool else ~_forbidden_from_float(m)
        allowed = ok if allowed is None else allowed & ok
    return allowed


def mha_allowed(attn_mask: torch.Tensor | None, key_padding_mask: torch.Tensor | None,
                batch: int, heads: int, tq: int, tk: int) -> torch.Tensor | None:
    """Allowed mask of one ``nn.MultiheadAttention`` call as ``(B, H or 1, Tq, Tk)`` bool, or None.

    ``attn_mask`` is ``(Tq, Tk)`` or ``(B*H, Tq, Tk)``; ``key_padding_mask`` is ``(B, Tk)`` (or ``(Tk,)`` unbatched).
    Keys added by ``bias_k`` or ``add_zero_attn`` (beyond the masks' width) are allowed, as torch pads them so.
    """
    allowed = None
    if attn_mask is not None:
        m = attn_mask.detach()
        bad = m.to(torch.bool) if m.dtype == torch.bool else _forbidden_from_float(m)
        bad = bad.reshape(batch, heads, tq, -1) if bad.dim() == 3 else bad.reshape(1, 1, tq, -1)
        allowed = _pad_keys(~bad, tk)
    if key_padding_mask is not None:
        m = key_padding_mask.detach()
        bad = m.to(torch.bool) if m.dtype == torch.bool else _forbidden_from_float(m)
        ok = _pad_keys((~bad).reshape(batch, 1, 1, -1), tk)
        allowed = ok if allowed is None else allowed & ok
    return allowed


def _pad_keys(allowed: torch.Tensor, tk: int) -> torch.Tensor:
    extra = tk - allowed.shape[-1]
    if extra <= 0:
        return allowed
    pad = torch.ones(*allowed.shape[:-1], extra, dtype=torch.bool)
    return torch.cat([allowed, pad], dim=-1)


def compact(allowed: torch.Tensor | None, shape: tuple[int, int, int, int]) -> torch.Tensor | None:
    """Return *allowed* as ``(B or 1, H or 1, Tq, Tk)`` bool with size-1 axes where it does not vary, or None if all True."""
    if allowed is None:
        return None
    b, h, tq, tk = shape
    a = allowed.to(torch.bool)
    while a.dim() < 4:
        a = a.unsqueeze(0)
    if a.dim() > 4:  # extra leading batch axes were folded into B by the caller
        a = a.reshape(-1, *a.shape[-3:])
    a = a.expand(a.shape[0] if a.shape[0] != 1 else 1, a.shape[1], tq, tk)
    if bool(a.all()):
        return None
    if a.shape[1] > 1 and bool((a == a[:, :1]).all()):
        a = a[:, :1]
    if a.shape[0] > 1 and bool((a == a[:1]).all()):
        a = a[:1]
    return a.contiguous()


def allowed_from_scores(scores: torch.Tensor) -> torch.Tensor | None:
    """The compact allowed mask (as :func:`compact` gives it) of ``(B, H, Tq, Tk)`` scores a softmax received.

    A key is forbidden where its score is at most :data:`FORBID_AT`. Most calls apply one mask to every batch
    item and head (a causal mask, no padding): the minimum and maximum over the (B·H) maps find that out and
    gives the ``(1, 1, Tq, Tk)`` mask without building a ``(B, H, Tq, Tk)`` bool array; other calls take the
    general way.
    """
    b, h, tq, tk = scores.shape
    if b * h > 1 and scores.is_contiguous():
        flat = scores.reshape(b * h, tq * tk)
        low, high = flat.amin(dim=0), flat.amax(dim=0)  # (Tq*Tk,) each; 4x faster than aminmax over dim 0
        forbidden_somewhere, forbidden_everywhere = low <= FORBID_AT, high <= FORBID_AT
        if torch.equal(forbidden_somewhere, forbidden_everywhere):
            if not bool(forbidden_somewhere.any()):
                return None
            return (~forbidden_somewhere).reshape(1, 1, tq, tk)
    return compact(~(scores <= FORBID_AT), (b, h, tq, tk))


#: what :func:`added_mask_allowed` returns for a mask that does not fit the scores (read the scores instead)
UNFIT = object()


def added_mask_allowed(mask: torch.Tensor, shape: tuple[int, int, int, int]):
    """The compact allowed mask (as :func:`compact` gives it) of a float mask added to ``(B, H, Tq, Tk)`` scores.

    The mask must carry the scores' query and key sizes itself (``(..., Tq, Tk)``, broadcast only over batch
    and heads); a mask a module would still slice or widen (``(B, 1, 1, Tk)`` padding beside a causal buffer of
    its own) returns :data:`UNFIT`.
    """
    b, h, tq, tk = shape
    if mask.dim() > 4 or mask.dim() < 2 or tuple(mask.shape[-2:]) != (tq, tk):
        return UNFIT
    m = mask.detach()
    while m.dim() < 4:
        m = m.unsqueeze(0)
    if m.shape[0] not in (1, b) or m.shape[1] not in (1, h):
        return UNFIT
    # HF builds one (B, 1, Tq, Tk) mask per forward, most often the same for every item: an exact comparison
    # of the float values (one pass, no bool temporary) keeps the first item before any threshold is taken
    for axis in (0, 1):
        if m.shape[axis] > 1 and torch.equal(m, m.narrow(axis, 0, 1).expand_as(m)):
            m = m.narrow(axis, 0, 1)
    return compact(~_forbidden_from_float(m), shape)


def _equal_bools(a: torch.Tensor, b: torch.Tensor) -> bool:
    """``torch.equal`` of two bool tensors of one shape, compared eight keys to a 64-bit word where their layout
    allows (measured on the reference machine for two 256x256 maps: 9 µs against 32 µs key by key)."""
    try:
        return torch.equal(a.view(torch.int64), b.view(torch.int64))
    except RuntimeError:  # a last axis not a multiple of 8 long, or not of unit stride: key by key
        return torch.equal(a, b)


def agrees_with_scores(allowed: torch.Tensor | None, scores: torch.Tensor) -> bool:
    """Whether the first and the last (batch item, head) of ``(B, H, Tq, Tk)`` *scores* forbid exactly the keys
    *allowed* (compact, or None) forbids: a check of 2 maps out of B·H that a module masked nothing more."""
    b, h = scores.shape[:2]
    # a NaN score counts as forbidden here, where allowed_from_scores reads it as allowed: a map with NaN fails
    # the check and the scores are read the general way
    if allowed is not None and b * h > 1 and scores.is_contiguous():
        # both maps in one strided view (no copy) and one comparison: this runs once per layer
        ends = scores.view(b * h, *scores.shape[2:])[::b * h - 1]  # (2, Tq, Tk)  maps (0, 0) and (B-1, H-1)
        want = torch.stack([allowed[0, 0], allowed[-1, -1]]) if allowed.shape[0] * allowed.shape[1] > 1 \
            else allowed[0, 0].expand_as(ends)  # (2, Tq, Tk)
        return _equal_bools(ends > FORBID_AT, want)
    for bi, hi in {(0, 0), (b - 1, h - 1)}:
        ok = scores[bi, hi] > FORBID_AT  # (Tq, Tk)
        if allowed is None:
            if not bool(ok.all()):
                return False
        elif not torch.equal(ok, allowed[min(bi, allowed.shape[0] - 1), min(hi, allowed.shape[1] - 1)]):
            return False
    return True


def is_causal_mask(allowed: torch.Tensor | None, tq: int, tk: int, offset: int) -> bool:
    """True when *allowed* forbids every key later than the query (``j > i + offset``).

    With no mask (None) that holds only when no key lies after any query: a cached decode step of one query
    (``offset = Tk - 1``) sees only earlier keys and itself.
    """
    if allowed is None:
        return tk - 1 <= offset
    future = ~causal_allowed(tq, tk, offset)  # (Tq, Tk)
    return not bool((allowed & future).any())


def _empty_rows(m: torch.Tensor | None, is_causal: bool, tq: int, tk: int) -> torch.Tensor | None:
    """Bool ``(..., Tq, 1)`` of rows with no allowed key under mask *m* (and the causal mask), or None if none."""
    if m is None:
        return None  # with is_causal alone every query sees key 0
    ok = m if m.dtype == torch.bool else ~torch.isneginf(m)
    if is_causal:
        ok = ok & causal_allowed(tq, tk)
    empty = ~ok.any(dim=-1, keepdim=True)
    return empty if bool(empty.any()) else None


def sdpa_weights(q: torch.Tensor, k: torch.Tensor, attn_mask: torch.Tensor | None = None,
                 is_causal: bool = False, scale: float | None = None, enable_gqa: bool = False,
                 with_scores: bool = False, plan=None):
    """softmax(Q Kᵀ · scale + mask) with the semantics of ``F.scaled_dot_product_attention``, in float32.

    ``q`` is ``(B, Hq, Tq, E)``, ``k`` is ``(B, Hk, Tk, E)``; with ``enable_gqa`` each key head serves
    ``Hq // Hk`` consecutive query heads. Rows with no allowed key are all zeros (the fused kernels return a
    zero output there). Returns ``(B, Hq, Tq, Tk)``, or ``(weights, masked scores)`` with ``with_scores``
    (for statistics that take the entropy from the scores, :func:`attnscope.stats.head_sums`). A bool or no
    mask is computed in row blocks (:func:`blocked_weights`, with *plan*, the call's
    :class:`~attnscope.stats.ScorePlan` when the caller keeps it).
    """
    q = q.detach().float()
    k = k.detach().float()
    if enable_gqa and k.size(-3) != q.size(-3):
        k = k.repeat_interleave(q.size(-3) // k.size(-3), dim=-3)
    if not with_scores and (attn_mask is None or attn_mask.dtype == torch.bool):
        blocked = blocked_weights(q, k, attn_mask, is_causal, scale, plan=plan)
        if blocked is not None:
            return blocked[0]
    tq, tk = q.size(-2), k.size(-2)
    scale = 1.0 / math.sqrt(q.size(-1)) if scale is None else scale
    scores = torch.matmul(q * scale, k.transpose(-2, -1))  # (B, H, Tq, Tk); scaling q is the cheaper side
    if is_causal:
        scores.add_(_causal_bias(tq, tk))
    m = None if attn_mask is None else attn_mask.detach()
    if m is not None:
        if m.dtype == torch.bool:
            scores.masked_fill_(~m, float("-inf"))
        else:
            if torch.broadcast_shapes(scores.shape, m.shape) == scores.shape:
                scores.add_(m.float())  # (B, H, Tq, Tk)  in place: no second map
            else:
                scores = scores + m.float()  # the mask broadcasts to a larger shape than the scores
    kept = scores.clone() if with_scores else None  # (B, H, Tq, Tk)
    weights = torch.softmax(scores, dim=-1, out=scores)  # in place (bit-equal): never scores beside weights
    empty = _empty_rows(m, is_causal, tq, tk)  # read off the (small) mask, never the full scores
    if empty is not None:
        weights.masked_fill_(empty, 0.0)  # softmax gives NaN there; the fused kernels give a zero output
    return (weights, kept) if with_scores else weights


#: :func:`blocked_weights` computes a call in blocks only when they leave out at least this share of the map
BLOCKED_MIN_SKIP = 0.1


def blocked_weights(q: torch.Tensor, k: torch.Tensor, attn_mask: torch.Tensor | None, is_causal: bool,
                    scale: float | None = None, v: torch.Tensor | None = None, plan=None):
    """softmax(Q Kᵀ · scale) under a mask that only allows or forbids keys, computing only the keys some query of
    a block of rows may see (:func:`attnscope.stats.row_spans`): a causal mask skips about 40 % of the products at
    T=256 and more at longer T. Equal to :func:`sdpa_weights` up to float rounding (a forbidden key's weight is
    exactly 0 either way; only the order of a row's sum can differ).

    ``q`` ``(B, H, Tq, E)`` and ``k`` ``(B, H, Tk, E)`` float32 (one key head per query head), ``attn_mask`` bool
    (True: may attend) broadcastable to ``(B, H, Tq, Tk)`` or None, ``v`` ``(B, H, Tk, Ev)`` or None. The row
    blocks, the shared mask's bias and the empty rows are those of the :class:`~attnscope.stats.ScorePlan` of the
    call's allowed keys: *plan* when the caller keeps it for these shapes (capture's recorder keeps one per mask
    tensor, so the layers of a forward share it), else worked out here from ``attn_mask`` and ``is_causal``.
    Returns ``(weights (B, H, Tq, Tk), output (B, H, Tq, Ev) in v's dtype, or None)``, rows with no allowed key all
    zero (as the fused kernels give), or None when the blocks would leave out less than :data:`BLOCKED_MIN_SKIP`
    of the map (no mask, a padding mask alone) or the shapes are not the plain 4-D ones.
    """
    from attnscope.stats import score_plan  # stats imports nothing of capture; import here keeps masks light

    if q.dim() != 4 or k.dim() != 4 or q.shape[:2] != k.shape[:2] or q.dtype != torch.float32 \
            or k.dtype != torch.float32:
        return None
    b, h, tq, e = q.shape
    tk = k.shape[-2]
    if plan is None:
        a = sdpa_allowed(attn_mask, is_causal, tq, tk)
        if a is None or a.dim() > 4:
            return None
        while a.dim() < 4:
            a = a.unsqueeze(0)
        if a.shape[0] not in (1, b) or a.shape[1] not in (1, h):
            return None  # broadcasts to more maps than the call has
        plan = score_plan(a, b, h, tq, tk)
    elif plan.shape != (b, h, tq, tk):
        raise ValueError(f"blocked_weights: the plan is for scores {plan.shape}, not {(b, h, tq, tk)}")
    a = plan.allowed  # (B or 1, H or 1, Tq, Tk) bool, or None
    if a is None or sum((r1 - r0) * (k1 - k0) for r0, r1, k0, k1 in plan.spans) > (1 - BLOCKED_MIN_SKIP) * tq * tk:
        return None
    n = b * h
    scale = 1.0 / math.sqrt(e) if scale is None else scale
    q3, k3 = q.reshape(n, tq, e), k.reshape(n, tk, e)  # the scale is the product's alpha: no scaled copy of q
    w = torch.zeros(b, h, tq, tk)  # keys no row of a block sees keep weight 0
    w3 = w.view(n, tq, tk)
    v3 = None if v is None else v.detach().reshape(n, tk, v.shape[-1])  # (B*H, Tk, Ev)
    out = None if v is None else torch.zeros(b, h, tq, v.shape[-1], dtype=v.dtype)
    out3 = None if out is None else out.view(n, tq, -1)
    for (r0, r1, k0, k1), bb in zip(plan.spans, plan.bias_blocks):
        kb = k3[:, k0:k1].transpose(1, 2)  # (n, E, K)
        if bb is not None:  # a mask every map shares: its lowest-float bias, added as the product is made
            sc = torch.baddbmm(bb, q3[:, r0:r1], kb, alpha=scale)  # (n, r, K)
        else:
            sc = torch.empty(n, r1 - r0, k1 - k0)
            torch.baddbmm(sc, q3[:, r0:r1], kb, beta=0, alpha=scale, out=sc)  # (n, r, K)
            sc.view(b, h, r1 - r0, k1 - k0).masked_fill_(~a[:, :, r0:r1, k0:k1], float("-inf"))
        torch.softmax(sc, dim=-1, out=sc)  # in place
        w3[:, r0:r1, k0:k1] = sc
        if out3 is not None:
            out3[:, r0:r1] = torch.bmm(sc.to(v3.dtype), v3[:, k0:k1])  # (n, r, Ev)
    if plan.any_empty:  # rows no key reaches: softmax gave NaN (or spread the lowest float evenly)
        w.masked_fill_(plan.empty.unsqueeze(-1), 0.0)
        if out is not None:
            out.masked_fill_(plan.empty.unsqueeze(-1), 0.0)
    return w, out
