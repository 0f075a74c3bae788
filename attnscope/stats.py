"""Per-head statistics of one attention call, reduced to mergeable sums.

One implementation serves both capture modes (``keep="stats"`` reduces each call on the fly, ``keep="maps"``
reduces the same full-precision weights before they are stored) and the analyses built on top.

>>> import torch
>>> w = torch.full((1, 1, 4, 4), 0.25)            # uniform over 4 keys
>>> round(float(head_sums(w).means()["entropy"][0]), 4)   # ln 4 (common practice, no source)
1.3863
"""

from __future__ import annotations

import numpy as np
import torch

from attnscope.records import HeadSums

__all__ = ["head_sums"]


def _forbidden_float(allowed: torch.Tensor) -> torch.Tensor:
    return (~allowed).to(torch.float32)


def head_sums(weights: torch.Tensor, allowed: torch.Tensor | None = None, query_offset: int = 0) -> HeadSums:
    """Reduce attention weights to per-head sums over (batch, query) rows.

    Args:
        weights: ``(B, H, Tq, Tk)`` attention weights (any float dtype; reduced in float32, summed in float64).
        allowed: bool, broadcastable to ``(B, H, Tq, Tk)``, True where the mask lets a query see a key;
            ``None`` when no mask was applied.
        query_offset: absolute position of query 0 on the key axis, for ``mean_distance``.

    Returns:
        :class:`~attnscope.records.HeadSums` with one entry per head.
    """
    w = weights.detach().float()  # (B, H, Tq, Tk)
    b, h, tq, tk = w.shape
    row_sum = w.sum(dim=-1)  # (B, H, Tq); weights are >= 0, so a NaN or inf anywhere in a row shows here
    finite = torch.isfinite(row_sum)
    if not bool(finite.all()):
        w = torch.where(finite.unsqueeze(-1), w, torch.zeros((), dtype=w.dtype))
    if allowed is None:
        n_allowed = torch.full((b, h, tq), tk, dtype=torch.int64)
        first = torch.zeros((b, h, tq, 1), dtype=torch.int64)
        leak = torch.zeros((b, h, tq))
    else:
        a = allowed.to(torch.bool)  # broadcastable, often (1, 1, Tq, Tk): keep it small
        n_allowed = a.sum(dim=-1).expand(b, h, tq)  # (B, H, Tq)
        first = a.to(torch.uint8).argmax(dim=-1, keepdim=True).expand(b, h, tq, 1)  # first allowed key
        leak = (w * _forbidden_float(a)).sum(dim=-1)  # (B, H, Tq)
    counted = finite & (n_allowed >= 1)  # (B, H, Tq)
    with_choice = counted & (n_allowed >= 2)
    # -Σ w ln w with 0 ln 0 = 0; ln of the clamped weight is vectorised where torch.special.entr is not (4x here)
    entropy = -(w * torch.log(w.clamp_min(torch.finfo(w.dtype).tiny))).sum(dim=-1)  # (B, H, Tq)
    ratio = entropy / torch.log(n_allowed.clamp_min(2).to(w.dtype))
    q_pos = torch.arange(tq, dtype=w.dtype) + query_offset
    k_pos = torch.arange(tk, dtype=w.dtype)
    dist = (q_pos[:, None] - k_pos[None, :]).abs()  # (Tq, Tk)
    distance = (w * dist).sum(dim=-1)  # (B, H, Tq)

    def total(x: torch.Tensor, where: torch.Tensor) -> np.ndarray:
        return (x.double() * where).sum(dim=(0, 2)).numpy()  # (H,)

    return HeadSums(
        rows=counted.double().sum(dim=(0, 2)).numpy(),
        entropy=total(entropy, counted),
        ratio_rows=with_choice.double().sum(dim=(0, 2)).numpy(),
        entropy_ratio=total(ratio, with_choice),
        max_weight=total(w.amax(dim=-1), counted),
        sink_mass=total(w.gather(-1, first).squeeze(-1), counted),
        distance=total(distance, counted),
        leak_mass=total(leak, counted),
        nonfinite=(~finite).double().sum(dim=(0, 2)).numpy(),
    )
