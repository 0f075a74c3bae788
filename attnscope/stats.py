"""Per-head statistics of one attention call, reduced to mergeable sums.

One implementation serves both capture modes (``keep="stats"`` reduces each call on the fly, ``keep="maps"``
reduces the stored weights when the head table is asked for) and the analyses built on top.

The reduction is one pass over memory: the map is walked in pieces small enough to stay in cache
(:data:`PIECE_BYTES`), and every statistic of a piece (entropy, maximum, distance, leak mass) is taken while the
piece is there, with one reused temporary (no allocation per piece). Float32 weights are read as they are (no
copy of the map); half precision pieces are widened to float32 one piece at a time. Per-row values are float32
(relative error about 1e-7); they are summed over rows in float64.

>>> import torch
>>> w = torch.full((1, 1, 4, 4), 0.25)            # uniform over 4 keys
>>> round(float(head_sums(w).means()["entropy"][0]), 4)   # ln 4 (common practice, no source)
1.3863
"""

from __future__ import annotations

import dataclasses
import functools
import math
import threading

import torch

from attnscope.records import HeadSums

__all__ = ["PIECE_BYTES", "ROW_BLOCK_MIN", "SCORE_PIECE_BYTES", "ScorePlan", "head_sums", "row_block", "row_spans",
           "score_plan", "score_sums"]

#: Bytes of float32 weights one piece holds. The piece and its one temporary of the same size are split between
#: torch's intra-op threads and stay in cache while every statistic is taken. Measured on the reference machine
#: (2 cores, 1 MiB L2 each, 32 MiB L3; a 64x256x256 map): 2 MiB pieces take 0.75x the time of 1 MiB pieces,
#: 0.6x that of 256 KiB pieces (more pieces, more per-operation overhead) and 0.6x that of whole maps.
PIECE_BYTES = 2 * 1024**2

_TINY = torch.finfo(torch.float32).tiny


@functools.lru_cache(maxsize=16)
def _distance_matrix(tq: int, tk: int, offset: int) -> torch.Tensor:
    """``(Tq, Tk)`` float32 ``|i + offset - k|``. Cached: never modify it."""
    q_pos = torch.arange(tq, dtype=torch.float32) + offset
    k_pos = torch.arange(tk, dtype=torch.float32)
    return (q_pos[:, None] - k_pos[None, :]).abs()


#: Bytes of scratch (per buffer, two buffers) a thread keeps between calls (:func:`_workspace`); a call that needs
#: more allocates its own. The pieces of both reductions fit (2 MiB, a little more when one block row is larger).
WORKSPACE_BYTES = 4 * 1024**2

_local = threading.local()


def _workspace(n: int, dtype: torch.dtype = torch.float32) -> tuple[torch.Tensor, torch.Tensor]:
    """Two flat scratch tensors of *n* elements of *dtype*, kept by this thread between calls (grown to the largest
    request, up to :data:`WORKSPACE_BYTES` each). Fresh memory costs a page fault per 4 KiB on first touch (about
    6 µs a page measured on the reference machine, a VM), and glibc may hand blocks of this size back to the
    system when they are freed (its mmap and trim thresholds): scratch allocated per call paid that for every
    layer (a 64-map causal call alone: 4.7 ms as-is, 3.7 ms with kept scratch). Not re-entrant: a caller uses
    the pair only until it returns."""
    if n * dtype.itemsize > WORKSPACE_BYTES:
        return torch.empty(n, dtype=dtype), torch.empty(n, dtype=dtype)
    kept = getattr(_local, "scratch", None)
    if kept is None:
        kept = _local.scratch = {}
    pair = kept.get(dtype)
    if pair is None or pair[0].numel() < n:
        pair = kept[dtype] = (torch.empty(n, dtype=dtype), torch.empty(n, dtype=dtype))
    return pair[0][:n], pair[1][:n]


def head_sums(weights: torch.Tensor, allowed: torch.Tensor | None = None, query_offset: int = 0,
              scores: torch.Tensor | None = None) -> HeadSums:
    """Reduce attention weights to per-head sums over (batch, query) rows, in one pass over cache-sized pieces.

    Args:
        weights: ``(B, H, Tq, Tk)`` attention weights (any float dtype; float32 is read in place, other dtypes
            are widened to float32 one piece at a time; row sums are added up in float64).
        allowed: bool, broadcastable to ``(B, H, Tq, Tk)``, True where the mask lets a query see a key;
            ``None`` when no mask was applied.
        query_offset: absolute position of query 0 on the key axis, for ``mean_distance``.
        scores: optional ``(B, H, Tq, Tk)`` float32 scores whose last-axis softmax *weights* are (masked scores
            as the softmax received them). The entropy is then taken without a logarithm per weight: with
            ``m`` the row's largest score, ``ln w_j = s_j - m + ln max(w)``, so
            ``-sum w ln w = -sum w (s - m) - ln max(w) * sum w`` (one logarithm per row).

    Returns:
        :class:`~attnscope.records.HeadSums` with one entry per head.
    """
    w = weights.detach()  # (B, H, Tq, Tk)
    w_dtype = w.dtype if w.dtype in (torch.float32, torch.float64) else torch.float32  # others: widened per piece
    b, h, tq, tk = w.shape
    w3 = w.reshape(b * h, tq, tk)  # (B*H, Tq, Tk)  a view for stored or freshly made maps
    s3 = None
    if scores is not None and w.dtype == torch.float32 and scores.dtype == torch.float32 \
            and tuple(scores.shape) == (b, h, tq, tk):
        s3 = scores.detach().reshape(b * h, tq, tk)  # (B*H, Tq, Tk)  a view when contiguous
    a = None if allowed is None else allowed.to(torch.bool)
    while a is not None and a.dim() < 4:
        a = a.unsqueeze(0)
    dist = _distance_matrix(tq, tk, int(query_offset)).to(w_dtype)  # (Tq, Tk)
    # per-row results over the flat (B*H*Tq) rows: small (Tk times smaller than the map)
    rows = {k: torch.empty(b * h * tq, dtype=w_dtype) for k in ("sum", "entropy", "max", "distance", "leak")}
    if a is None:
        n_allowed = torch.full((b, h, tq), tk, dtype=torch.int64)
        first = torch.zeros(b * h * tq, 1, dtype=torch.int64)
    else:
        n_allowed = a.sum(dim=-1).expand(b, h, tq)  # (B, H, Tq)  the mask is small: (B or 1, H or 1, Tq, Tk)
        first = a.to(torch.uint8).argmax(dim=-1).expand(b, h, tq).reshape(-1, 1)  # (B*H*Tq, 1) first allowed key
        a_full = a.expand(b, h, tq, tk)
        # a mask shared by every map: its forbidden keys as 0/1 weights once, so a piece's leak is one product
        shared = (~a[0, 0]).to(w_dtype) if a.shape[0] == 1 and a.shape[1] == 1 else None  # (Tq, Tk)
    slab = max(1, tq * tk * 4)  # bytes of one (batch item, head) map in float32 (1 for an empty map)
    if slab <= PIECE_BYTES:
        per = max(1, PIECE_BYTES // slab)
        pieces = [(s0, min(b * h, s0 + per), 0, tq) for s0 in range(0, b * h, per)]  # whole maps
        shape = (min(per, b * h), tq, tk)  # (s, Tq, Tk)  one scratch piece, reused by every piece
    else:
        per = max(1, PIECE_BYTES // (tk * 4))
        pieces = [(s0, s0 + 1, r0, min(tq, r0 + per)) for s0 in range(b * h) for r0 in range(0, tq, per)]
        shape = (1, min(per, tq), tk)  # (1, r, Tk)
    scratch = _workspace(math.prod(shape), w_dtype)[0].view(shape)  # kept by the thread between calls
    top_score = torch.empty(b * h * tq, dtype=w_dtype) if s3 is not None else None
    for s0, s1, r0, r1 in pieces:
        p = w3[s0:s1, r0:r1]  # (s, r, Tk)  a contiguous view: no copy of the map
        if p.dtype != w_dtype:
            p = p.to(w_dtype)
        lo, hi = s0 * tq + r0, (s1 - 1) * tq + r1  # its rows in the flat row order
        out = {k: v[lo:hi].view(s1 - s0, r1 - r0) for k, v in rows.items()}  # (s, r) each
        tmp = scratch[:s1 - s0, :r1 - r0]  # (s, r, Tk)  the piece's one temporary, in cache with it
        torch.sum(p, dim=-1, out=out["sum"])
        torch.amax(p, dim=-1, out=out["max"])
        if s3 is None:
            torch.clamp(p, min=_TINY, out=tmp).log_().mul_(p)  # w ln w with 0 ln 0 = 0
            torch.sum(tmp, dim=-1, out=out["entropy"])
        else:
            sp = s3[s0:s1, r0:r1]  # (s, r, Tk)
            m = top_score[lo:hi].view(s1 - s0, r1 - r0)
            torch.amax(sp, dim=-1, out=m)
            torch.sub(sp, m.unsqueeze(-1), out=tmp).mul_(p)  # w (s - m); a -inf score has w = 0: NaN, skipped
            torch.nansum(tmp, dim=-1, out=out["entropy"])
        torch.mul(p, dist[r0:r1], out=tmp)
        torch.sum(tmp, dim=-1, out=out["distance"])
        if a is None:
            continue
        if shared is not None:
            torch.mul(p, shared[r0:r1], out=tmp)  # (s, r, Tk)
        else:
            idx = torch.arange(s0, s1)
            ap = a_full[idx // h, idx % h, r0:r1]  # (s, r, Tk)  a small copy of the piece's mask
            torch.mul(p, ~ap, out=tmp)
        torch.sum(tmp, dim=-1, out=out["leak"])
    if a is None:
        rows["leak"].zero_()
    if s3 is not None:  # + ln max(w) * sum w, once over all rows
        top = rows["max"]
        rows["entropy"].add_(torch.where(top > 0, top.log() * rows["sum"], 0.0))
    sink = w.reshape(b * h * tq, tk).gather(-1, first).reshape(b, h, tq).to(w_dtype) if w.is_contiguous() else \
        w.gather(-1, first.reshape(b, h, tq, 1)).reshape(b, h, tq).to(w_dtype)  # (B, H, Tq)
    rows = {k: v.view(b, h, tq) for k, v in rows.items()}
    rows["sink"] = sink
    rows["entropy"] = rows["entropy"].neg_()  # -Σ w ln w
    return _totals(rows, n_allowed)


def _totals(rows: dict[str, torch.Tensor], n_allowed: torch.Tensor) -> HeadSums:
    """Per-head sums of per-row values ``(B, H, Tq)`` (keys ``sum``, ``entropy``, ``max``, ``sink``, ``distance``,
    ``leak``) over the rows that count: finite, with at least one allowed key (*n_allowed*, ``(B, H, Tq)``).
    Every sum is taken in float64, all in one reduction."""
    # weights are >= 0, so a NaN or inf anywhere in a row shows in its sum
    finite = torch.isfinite(rows["sum"])  # (B, H, Tq)
    counted = finite & (n_allowed >= 1)
    with_choice = counted & (n_allowed >= 2)
    entropy = rows["entropy"]
    ratio = entropy / torch.log(n_allowed.clamp_min(2).to(entropy.dtype))
    keys = ("entropy", "max", "sink", "distance", "leak")
    values = torch.stack([*(rows[k] for k in keys), ratio]).double()  # (6, B, H, Tq)
    where = torch.stack([*(counted,) * len(keys), with_choice])  # (6, B, H, Tq)  rows each value counts in
    sums = torch.where(where, values, 0.0).sum(dim=(1, 3)).numpy()  # (6, H)  NaN rows drop out
    counts = torch.stack([counted, with_choice, ~finite]).sum(dim=(1, 3), dtype=torch.float64).numpy()  # (3, H)
    entropy_sum, max_sum, sink_sum, distance_sum, leak_sum, ratio_sum = sums
    return HeadSums(rows=counts[0], entropy=entropy_sum, ratio_rows=counts[1], entropy_ratio=ratio_sum,
                    max_weight=max_sum, sink_mass=sink_sum, distance=distance_sum, leak_mass=leak_sum,
                    nonfinite=counts[2])


#: Query rows of one block of :func:`score_sums`: at least this many, else an eighth of the queries, so a causal
#: or windowed mask leaves out most of the products above the diagonal while each block stays a good matrix product
#: (measured on the reference machine at T=256: 64-row blocks take 0.6x the time of 32-row blocks).
ROW_BLOCK_MIN = 64

def row_block(tq: int) -> int:
    """Query rows per block of :func:`score_sums` for *tq* queries (:data:`ROW_BLOCK_MIN`, or an eighth)."""
    return max(1, min(tq, max(ROW_BLOCK_MIN, -(-tq // 8))))  # at least 1: a call may have no queries


def row_spans(seen: torch.Tensor | None, tq: int, tk: int) -> list[tuple[int, int, int, int]]:
    """``(r0, r1, k0, k1)`` of each block of query rows (:func:`row_block`) and the keys some row of it may see.

    *seen* is ``(Tq, Tk)`` bool, True where some map's query may see a key (None: every key); a block whose rows
    see no key is left out, and each block's keys run from the first to the last one any of its rows sees.
    """
    if tk == 0:
        return []  # no key: every row is empty
    rb = row_block(tq)
    spans = []
    for r0 in range(0, tq, rb):
        r1 = min(tq, r0 + rb)
        k0, k1 = 0, tk
        if seen is not None:
            cols = seen[r0:r1].any(dim=0).nonzero()
            if cols.numel() == 0:
                continue  # no row of the block sees a key: every weight is 0
            k0, k1 = int(cols[0]), int(cols[-1]) + 1
        spans.append((r0, r1, k0, k1))
    return spans


#: Bytes of scores one piece of :func:`score_sums` holds (with the piece's weights beside it: twice this in cache).
#: Measured inside a forward on the reference machine (6 layers, 64 maps of 256x256 per layer, interleaved runs):
#: 2 MiB pieces take 0.96-0.99x the time of 1 MiB pieces (fewer pieces, less per-operation overhead), 4 MiB the
#: same as 2 MiB.
SCORE_PIECE_BYTES = 2 * 1024**2


#: The score a forbidden key gets in :func:`score_sums`: the lowest float32. ``exp`` of it less any row's top score
#: is exactly 0, as for ``-inf``, and 0 times it is 0 (not NaN), so the pieces are summed without ``nansum``.
_LOWEST = torch.finfo(torch.float32).min


@dataclasses.dataclass(frozen=True)
class ScorePlan:
    """What :func:`score_sums` works out from the mask and the shape alone (:func:`score_plan`): the layers of a
    forward share one mask (or none), so a caller that keeps the plan per mask tensor (capture's recorder does)
    pays for it once per forward instead of once per layer."""

    shape: tuple[int, int, int, int]  # (B, H, Tq, Tk) of the scores
    allowed: torch.Tensor | None  # (B or 1, H or 1, Tq, Tk) bool, or None: every key
    spans: list[tuple[int, int, int, int]]  # row_spans of the keys some map's query may see
    bias_blocks: list[torch.Tensor | None]  # per span: (r, K) 0 / lowest float of a mask every map shares
    picks: list[torch.Tensor]  # per span: (B*H, r, 1) the first allowed key (the sink) within the span's keys
    room: int  # floats of the largest piece
    n_allowed: torch.Tensor  # (B, H, Tq) allowed keys per row
    empty: torch.Tensor  # (B, H, Tq) rows with no allowed key
    any_empty: bool


def score_plan(allowed: torch.Tensor | None, b: int, h: int, tq: int, tk: int) -> ScorePlan:
    """The :class:`ScorePlan` of *allowed* (as :func:`score_sums` takes it) for ``(B, H, Tq, Tk)`` scores: its row
    blocks and the keys each sees (:data:`ROW_BLOCK_MIN`, :data:`SCORE_PIECE_BYTES` as they are now), a shared
    mask's bias per block, each row's first allowed key, the allowed keys per row."""
    n = b * h
    a = None if allowed is None else allowed.to(torch.bool)
    while a is not None and a.dim() < 4:
        a = a.unsqueeze(0)
    if a is not None:
        a = a.expand(a.shape[0], a.shape[1], tq, tk)  # (B or 1, H or 1, Tq, Tk)
    bias = None  # a mask shared by every map, as the lowest float where forbidden: added with the product
    if a is not None and a.shape[0] == 1 and a.shape[1] == 1:
        bias = torch.zeros(tq, tk).masked_fill_(~a[0, 0], _LOWEST)  # (Tq, Tk)
    seen = None if a is None else a.any(dim=1).any(dim=0)  # (Tq, Tk) keys some map's query may see
    if a is None or tk == 0:
        n_allowed = torch.full((b, h, tq), tk, dtype=torch.int64)
        first = torch.zeros(n, tq, dtype=torch.int64)
    else:
        n_allowed = a.sum(dim=-1).expand(b, h, tq)  # (B, H, Tq)
        first = a.to(torch.uint8).argmax(dim=-1).expand(b, h, tq).reshape(n, tq)  # first allowed key
    spans = row_spans(seen, tq, tk)
    room = max([min(n, max(1, SCORE_PIECE_BYTES // ((r1 - r0) * (k1 - k0) * 4))) * (r1 - r0) * (k1 - k0)
                for r0, r1, k0, k1 in spans] or [0])
    empty = n_allowed == 0
    return ScorePlan(
        shape=(b, h, tq, tk), allowed=a, spans=spans,
        bias_blocks=[None if bias is None else bias[r0:r1, k0:k1] for r0, r1, k0, k1 in spans],
        picks=[(first[:, r0:r1] - k0).clamp_(0, k1 - k0 - 1).unsqueeze(-1) for r0, r1, k0, k1 in spans],
        room=room, n_allowed=n_allowed, empty=empty, any_empty=bool(empty.any()))


def score_sums(q: torch.Tensor, k: torch.Tensor, allowed: torch.Tensor | None = None, scale: float | None = None,
               query_offset: int = 0, v: torch.Tensor | None = None, plan: ScorePlan | None = None):
    """Per-head sums of the weights ``softmax(Q Kᵀ · scale)`` over the *allowed* keys, without forming the map.

    What :func:`head_sums` gives for the weights :func:`attnscope.capture.masks.sdpa_weights` would build with a
    bool mask (forbidden keys -inf, rows with no allowed key all zero), up to float rounding, for a fraction of
    the work: statistics that observe a fused attention call (``keep="stats"``) need no weights, only their sums.

    The queries are taken in blocks of rows (:data:`ROW_BLOCK_MIN`); each block computes only the keys some row
    of it may see, so a causal or sliding-window mask skips most products it forbids. Each piece (at most
    :data:`SCORE_PIECE_BYTES` of scores) is reduced while it is in cache, as :func:`head_sums` reduces weights with
    their scores (the entropy with one logarithm per row). A forbidden key's score is the lowest float32 (added
    with the product, ``baddbmm``), so its weight is exactly zero and the leak mass is 0. What the blocks need
    from the mask alone is the :class:`ScorePlan` (*plan*, or worked out here).

    Args:
        q: ``(B, H, Tq, E)`` queries.
        k: ``(B, H, Tk, E)`` keys, one key head per query head (expand grouped keys first).
        allowed: bool, broadcastable to ``(B, H, Tq, Tk)``, True where a query may see a key; None: every key.
        scale: the score scale (default ``1/sqrt(E)``, as ``scaled_dot_product_attention``).
        query_offset: absolute position of query 0 on the key axis, for ``mean_distance``.
        v: ``(B, H, Tk, Ev)`` values, one value head per query head: then the attention output ``weights @ V``
            is built from the same pieces (in *v*'s dtype; rows with no allowed key are 0, as the fused kernels
            give) and ``(sums, output)`` is returned, ``output`` ``(B, H, Tq, Ev)``.
        plan: :func:`score_plan` of *allowed* for these shapes, when the caller keeps it.

    Returns:
        The :class:`~attnscope.records.HeadSums`, or ``(sums, output)`` when *v* is given.
    """
    q, k = q.detach().float(), k.detach().float()
    b, h, tq, e_dim = q.shape
    tk = k.shape[-2]
    n = b * h
    scale = 1.0 / math.sqrt(e_dim) if scale is None else scale
    q3 = q.reshape(n, tq, e_dim)  # (B*H, Tq, E)  the scale is the product's alpha: no scaled copy of q
    k3 = k.reshape(n, tk, e_dim)  # (B*H, Tk, E)
    if plan is None:
        plan = score_plan(allowed, b, h, tq, tk)
    elif plan.shape != (b, h, tq, tk):
        raise ValueError(f"score_sums: the plan is for scores {plan.shape}, not {(b, h, tq, tk)}")
    a = plan.allowed
    dist = _distance_matrix(tq, tk, int(query_offset))  # (Tq, Tk)
    # per row, written in place by every piece: top score, Σ w (s - m), max weight, distance, sink weight
    rows = torch.zeros(5, n, tq)  # rows of blocks that see no key stay 0
    v3 = None if v is None else v.detach().reshape(n, tk, v.shape[-1])  # (B*H, Tk, Ev)
    out3 = None if v is None else torch.zeros(n, tq, v.shape[-1], dtype=v.dtype)  # rows no key reaches stay 0
    # one pair of scratch buffers for every piece of the call: (scores, then products) and the piece's weights
    scratch, wscratch = _workspace(plan.room)
    for (r0, r1, k0, k1), bb, pick in zip(plan.spans, plan.bias_blocks, plan.picks):
        r, kn = r1 - r0, k1 - k0
        per = min(n, max(1, SCORE_PIECE_BYTES // (r * kn * 4)))
        qb, kb = q3[:, r0:r1], k3[:, k0:k1].transpose(1, 2)  # (n, r, E), (n, E, K)
        db = dist[r0:r1, k0:k1]  # (r, K)
        span_rows = rows[:, :, r0:r1]  # (5, n, r)
        bufs, wbufs = (x[:per * r * kn].view(per, r, kn) for x in (scratch, wscratch))  # (per, r, K) each
        for s0 in range(0, n, per):
            s1 = min(n, s0 + per)
            buf, wbuf = (bufs, wbufs) if s1 - s0 == per else (bufs[:s1 - s0], wbufs[:s1 - s0])
            if bb is not None:  # the shared mask's lowest-float bias, added as the product is made
                sc = torch.baddbmm(bb, qb[s0:s1], kb[s0:s1], alpha=scale, out=buf)  # (s, r, K)
            else:
                sc = torch.baddbmm(buf, qb[s0:s1], kb[s0:s1], beta=0, alpha=scale, out=buf)  # (s, r, K)
                if a is not None:
                    idx = torch.arange(s0, s1)
                    ap = a[idx // h if a.shape[0] > 1 else 0, idx % h if a.shape[1] > 1 else 0, r0:r1, k0:k1]
                    sc.masked_fill_(~ap.expand_as(sc), _LOWEST)  # (s, r, K)
            top, ent, mx, dst, snk = span_rows[:, s0:s1]  # (s, r) views: written in place
            # (softmax's exponential is the fast one)
            w = torch.softmax(sc, dim=-1, out=wbuf)  # (s, r, K)
            torch.amax(sc, dim=-1, out=top)
            torch.sum(sc.sub_(top.unsqueeze(-1)).mul_(w), dim=-1, out=ent)  # Σ w (s - m); forbidden: w = 0
            torch.amax(w, dim=-1, out=mx)
            torch.sum(torch.mul(w, db, out=sc), dim=-1, out=dst)
            torch.gather(w, -1, pick[s0:s1], out=snk.unsqueeze(-1))
            if v3 is not None:
                out3[s0:s1, r0:r1] = torch.bmm(w.to(v3.dtype), v3[s0:s1, k0:k1])  # (s, r, Ev)
    top, ent, mx, dst, snk = rows.view(5, b, h, tq)
    # the weights of a row with a finite top score sum to 1 (softmax); a NaN or +inf score makes them NaN
    total = torch.where(torch.isfinite(top), 1.0, float("nan"))
    entropy = ent.neg_().sub_(torch.where(mx > 0, mx.log() * total, 0.0))  # - Σ w (s - m) - ln max(w) * Σ w
    out = {"sum": total, "entropy": entropy, "max": mx, "distance": dst, "sink": snk}
    if plan.any_empty:  # rows with no allowed key: all zeros, as sdpa_weights leaves them (softmax gave NaN)
        for row in out.values():
            row.masked_fill_(plan.empty, 0.0)
    out["leak"] = torch.zeros(b, h, tq)
    if v3 is None:
        return _totals(out, plan.n_allowed)
    o = out3.view(b, h, tq, v.shape[-1])
    if plan.any_empty:
        o.masked_fill_(plan.empty.unsqueeze(-1), 0.0)  # a row with no allowed key: NaN weights, the kernels give 0
    return _totals(out, plan.n_allowed), o
