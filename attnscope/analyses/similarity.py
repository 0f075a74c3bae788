"""Pairwise distance between the attention maps of heads: how alike two heads look at the same input.

The distance of two heads is the Jensen–Shannon distance (base 2, so it lies in [0, 1]) between their
weight rows for the same (batch item, query), each row normalised to sum 1 as
``scipy.spatial.distance.jensenshannon`` does, averaged over the rows both heads count. The Jensen–Shannon
divergence is from J. Lin, "Divergence measures based on the Shannon entropy", IEEE Trans. Inf. Theory
37(1), 1991; its square root is a metric (D. M. Endres and J. E. Schindelin, IEEE Trans. Inf. Theory 49(7), 2003).

**A cheap two-sided bound.** With the Bhattacharyya coefficient ``BC = Σ_k √(p_k q_k)`` and the squared
Hellinger distance ``h² = 1 − BC``, the Jensen–Shannon divergence in nats obeys ``ln 2 · h² ≤ JS ≤ h²``
(bounds of this kind between the Jensen–Shannon divergence, the triangular discrimination and the Hellinger
distance are in F. Topsøe, "Some inequalities for information divergence and related measures of
discrimination", IEEE Trans. Inf. Theory 46(4), 2000). Proof: both are sums over keys of
one-homogeneous terms, ``½p ln(2p/(p+q)) + ½q ln(2q/(p+q))`` and ``½(√p − √q)²``; with ``t = p/q`` their
ratio is a function of ``t`` alone that runs from ``ln 2`` (``t → 0`` or ``∞``) to 1 (``t = 1``), so the ratio
of the sums lies in ``[ln 2, 1]`` too. In bits, ``h² ≤ JS₂ ≤ h² / ln 2``, so each row's distance lies in
``[h, h / √ln 2]`` and so does the mean over rows: ``mean h ≤ distance ≤ 1.2011 · mean h``. Every ``BC``
of every head pair on a row is one matrix product of the heads' square-rooted rows, which is what makes
:func:`distance_bounds` cheap; :func:`~attnscope.analyses.heads.duplicate_heads` uses the lower bound to
rule out far pairs before it computes the exact distance of the rest.

>>> import numpy as np
>>> from attnscope.records import AttentionRecord, HeadSums
>>> w = np.array([[[[1.0, 0.0], [0.5, 0.5]], [[0.0, 1.0], [0.5, 0.5]]]], dtype=np.float32)  # (B, H, Tq, Tk)
>>> rec = AttentionRecord("blk", "self", w, None, False, HeadSums.zeros(2), (1, 2, 2, 2), (0, 1))
>>> d = head_distances([rec])
>>> round(float(d.iloc[0, 1]), 3)    # rows: disjoint (distance 1) and equal (distance 0), mean 0.5
0.5
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import torch

from attnscope.errors import OptionError
from attnscope.records import AttentionRecord

__all__ = ["distance_bounds", "head_distances"]

#: Upper over lower bound of a row's Jensen–Shannon distance by its Hellinger distance: ``1 / √ln 2``.
UPPER_FACTOR = 1.0 / math.sqrt(math.log(2.0))

_CHUNK_BYTES = 32 << 20  # rows of all heads of a group held at once while bounding (float32)
_PAIR_BYTES = 64 << 20  # float64 rows held at once while computing exact distances


def _records(cap: Any) -> Sequence[AttentionRecord]:
    return cap.attention if hasattr(cap, "attention") else list(cap)


@dataclass
class _Group:
    """Heads whose maps have one shape: their column in the full matrix and where their rows live."""

    cols: list[int]
    maps: list[tuple[np.ndarray, int]]  # (record weights (B, H, Tq, Tk) or the one item, head position)
    batch: int
    tq: int
    tk: int

    def spans(self, rows: int) -> Iterator[tuple[int, int, int]]:
        """``(item, q0, q1)`` pieces of at most *rows* query rows."""
        for b in range(self.batch):
            for q0 in range(0, self.tq, rows):
                yield b, q0, min(q0 + rows, self.tq)

    def rows(self, heads: Sequence[int], b: int, q0: int, q1: int) -> torch.Tensor:
        """``(len(heads), q1 - q0, Tk)`` float64 rows, normalised to sum 1, bad rows (NaN/inf, sum 0) zero."""
        x = torch.from_numpy(np.stack([self.maps[i][0][b, self.maps[i][1], q0:q1] for i in heads])).double()
        good = torch.isfinite(x).all(dim=-1, keepdim=True)  # (n, r, 1)
        x = torch.where(good, x, 0.0)
        s = x.sum(dim=-1, keepdim=True)  # (n, r, 1)
        return torch.where(s > 0, x / torch.where(s > 0, s, 1.0), 0.0)


def _groups(recs: Sequence[AttentionRecord], item: int | None) -> tuple[list[tuple[int, str, int]], list[_Group]]:
    labels = [(r.call, r.name, h) for r in recs for h in r.heads]
    groups: dict[tuple[int, ...], _Group] = {}
    at = 0
    for r in recs:
        if r.weights is not None:
            w = r.weights if item is None else r.weights[item:item + 1]  # (B, H, Tq, Tk)
            b, _, tq, tk = w.shape
            g = groups.setdefault((b, tq, tk), _Group([], [], b, tq, tk))
            for j in range(w.shape[1]):
                g.cols.append(at + j)
                g.maps.append((w, j))
        at += len(r.heads)
    return labels, list(groups.values())


def _hellinger_sums(g: _Group) -> tuple[np.ndarray, np.ndarray]:
    """Sum over rows of a lower bound of each row's Hellinger distance, and the rows both heads count.

    Float32 matrix products; each ``1 − BC`` is lowered by ``(Tk + 4) · 2⁻²³``, more than the rounding error
    of a float32 dot product of ``Tk`` terms, so the result never exceeds the exact Hellinger sum.
    """
    n = len(g.cols)
    total, count = np.zeros((n, n)), np.zeros((n, n))
    slack = (g.tk + 4) * 2.0 ** -23
    rows = max(1, _CHUNK_BYTES // max(1, 4 * n * g.tk))
    heads = list(range(n))
    for b, q0, q1 in g.spans(rows):
        x = g.rows(heads, b, q0, q1)  # (n, r, Tk) float64, normalised
        good = (x.sum(dim=-1) > 0).float().T  # (r, n)
        root = x.sqrt().float().transpose(0, 1)  # (r, n, Tk)
        del x
        bc = torch.bmm(root, root.transpose(1, 2))  # (r, n, n): Bhattacharyya coefficient of every pair per row
        hel = (1.0 - bc - slack).clamp_(min=0.0).sqrt_()  # (r, n, n)
        both = good[:, :, None] * good[:, None, :]  # (r, n, n)
        total += (hel * both).sum(dim=0).double().numpy()
        count += both.sum(dim=0).double().numpy()
    return total, count


def _exact_sums(g: _Group, pairs: Sequence[tuple[int, int]]) -> tuple[np.ndarray, np.ndarray]:
    """Exact sums of the Jensen–Shannon distance (bits, float64) over rows both heads count, per pair."""
    total, count = np.zeros(len(pairs)), np.zeros(len(pairs))
    if not pairs:
        return total, count
    heads = sorted({i for p in pairs for i in p})
    pos = {h: k for k, h in enumerate(heads)}
    a_idx = torch.tensor([pos[a] for a, _ in pairs])
    b_idx = torch.tensor([pos[b] for _, b in pairs])
    rows = max(1, _PAIR_BYTES // max(1, 8 * len(heads) * g.tk))
    per = max(1, _PAIR_BYTES // max(1, 8 * rows * g.tk))  # pairs per piece
    for b, q0, q1 in g.spans(rows):
        x = g.rows(heads, b, q0, q1)  # (n, r, Tk)
        good = x.sum(dim=-1) > 0  # (n, r)
        own = -torch.special.xlogy(x, x).sum(dim=-1) / math.log(2.0)  # (n, r) entropies in bits
        for s in range(0, len(pairs), per):
            ia, ib = a_idx[s:s + per], b_idx[s:s + per]
            mid = 0.5 * (x[ia] + x[ib])  # (p, r, Tk)
            js = -torch.special.xlogy(mid, mid).sum(dim=-1) / math.log(2.0) - 0.5 * (own[ia] + own[ib])  # (p, r)
            both = good[ia] & good[ib]  # (p, r)
            dist = js.clamp(0.0, 1.0).sqrt() * both
            total[s:s + per] += dist.sum(dim=-1).numpy()
            count[s:s + per] += both.sum(dim=-1).double().numpy()
    return total, count


def _mean(total: np.ndarray, count: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.where(count > 0, count, 1.0), np.nan)


def _frame(labels: list[tuple[int, str, int]], values: np.ndarray) -> pd.DataFrame:
    idx = pd.MultiIndex.from_tuples(labels, names=["call", "name", "head"])
    return pd.DataFrame(values, index=idx, columns=idx)


def distance_bounds(cap: Any, item: int | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Lower and upper bounds of :func:`head_distances` from the Hellinger distance, one matrix product per row.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 4, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> low, high = distance_bounds(cap)
    >>> exact = head_distances(cap, exact=True)
    >>> bool((low.to_numpy() <= exact.to_numpy() + 1e-12).all() and (exact.to_numpy() <= high.to_numpy()).all())
    True

    The lower bound is the mean over rows of each row's Hellinger distance ``√(1 − Σ_k √(p_k q_k))`` (rounded
    down past float32 error), the upper bound that times ``1/√ln 2 ≈ 1.2011`` (capped at 1); see the module
    docstring for the inequality. Same index, columns and NaNs as :func:`head_distances`.
    """
    labels, groups = _groups(_records(cap), item)
    low = np.full((len(labels), len(labels)), np.nan)
    for g in groups:
        total, count = _hellinger_sums(g)
        low[np.ix_(g.cols, g.cols)] = _mean(total, count)
    high = np.minimum(low * (UPPER_FACTOR * (1 + 1e-6)) + 1e-6, 1.0)
    return _frame(labels, low), _frame(labels, high)


def _exact_matrix(cap: Any, item: int | None, below: np.ndarray | None = None) -> tuple[list, np.ndarray]:
    """Column labels and a matrix with the exact distance where *below* holds (NaN elsewhere); internal."""
    labels, groups = _groups(_records(cap), item)
    out = np.full((len(labels), len(labels)), np.nan)
    for g in groups:
        n = len(g.cols)
        pairs = [(a, b) for a in range(n) for b in range(a + 1, n)
                 if below is None or below[g.cols[a], g.cols[b]]]
        total, count = _exact_sums(g, pairs)
        mean = _mean(total, count)
        for (a, b), d in zip(pairs, mean):
            out[g.cols[a], g.cols[b]] = out[g.cols[b], g.cols[a]] = d
        if below is None:
            for a in range(n):  # a head against itself: 0 when it counts any row
                w, j = g.maps[a]
                counted = bool((np.isfinite(w[:, j]).all(axis=-1) & (w[:, j].sum(axis=-1) > 0)).any())
                out[g.cols[a], g.cols[a]] = 0.0 if counted else np.nan
    return labels, out


def head_distances(cap: Any, item: int | None = None, *, exact: bool = False, sample: int = 64,
                   confidence: float = 0.95, seed: int = 0) -> pd.DataFrame:
    """Jensen–Shannon distance between every pair of kept heads whose maps have the same shape.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 4, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> head_distances(cap).shape
    (2, 2)

    Args:
        cap: a capture (``.attention``) or a list of :class:`~attnscope.records.AttentionRecord`.
        item: use one batch item only; ``None`` averages over all of them.
        exact: compute every row of every pair (float64). Otherwise, when a group of same-shaped maps has
            more than *sample* rows, the distance is estimated (see below).
        sample: rows drawn (without replacement, the same rows for every pair) for the estimate.
        confidence: the probability the stated error bound holds for each pair.
        seed: seed of the row draw.

    **The estimate.** Every row's Hellinger distance ``h_r`` is known cheaply for all rows
    (:func:`distance_bounds`), and the row's Jensen–Shannon distance ``d_r`` lies in ``[h_r, 1.2011·h_r]``. The
    estimate is ``mean_all(h) + mean_sample(d − h)``; the sampled terms lie in ``[0, 0.2011·max h]``, so by
    Hoeffding's inequality (W. Hoeffding, "Probability inequalities for sums of bounded random variables",
    JASA 58, 1963, whose bounds hold for sampling without replacement too) the error is at most
    ``0.2011 · max_r h_r · √(ln(2/(1 − confidence)) / (2·sample)) ≤ 0.2011 · √(ln(2/(1 − confidence)) /
    (2·sample))`` with probability *confidence*: below 0.035 for 64 rows at 95 %, whatever the sequence length.
    The estimate is kept within the two bounds.
    The largest such bound over all pairs is in ``frame.attrs["error_bound"]`` (0 when exact).
    :func:`~attnscope.analyses.heads.duplicate_heads` never uses the estimate.

    Returns:
        A square DataFrame, index and columns a MultiIndex ``(call, name, head)`` in capture order. NaN for
        heads of records without maps (``keep="stats"``), for pairs of different shapes and pairs with no row
        counted by both (rows with a NaN/inf weight or summing to 0 are left out).
    """
    if not isinstance(sample, int) or sample < 1:
        raise OptionError(f"sample must be a positive int; received {sample!r}")
    if not isinstance(confidence, (int, float)) or not 0 < confidence < 1:
        raise OptionError(f"confidence must be a number in (0, 1); received {confidence!r}")
    recs = _records(cap)
    labels, groups = _groups(recs, item)
    if exact or all(g.batch * g.tq <= sample for g in groups):
        frame = _frame(*_exact_matrix(recs, item))
        frame.attrs["error_bound"] = 0.0
        return frame
    out = np.full((len(labels), len(labels)), np.nan)
    worst = 0.0
    rng = np.random.default_rng(seed)
    for g in groups:
        n = len(g.cols)
        h_total, h_count = _hellinger_sums(g)
        low = _mean(h_total, h_count)
        if g.batch * g.tq <= sample:
            sub = g
        else:
            picks = np.sort(rng.choice(g.batch * g.tq, size=sample, replace=False))
            sub = _Group(list(range(n)), [(np.stack([m[0][p // g.tq, m[1], p % g.tq] for p in picks])[None, None], 0)
                                          for m in g.maps], 1, sample, g.tk)
        pairs = [(a, b) for a in range(n) for b in range(a + 1, n)]
        d_total, d_count = _exact_sums(sub, pairs)
        s_total, s_count = _hellinger_sums(sub)
        block = np.zeros((n, n))
        for k, (a, b) in enumerate(pairs):
            extra = (d_total[k] - s_total[a, b]) / d_count[k] if d_count[k] > 0 else 0.0
            block[a, b] = block[b, a] = low[a, b] + extra
        block = np.clip(block, low, np.minimum(low * UPPER_FACTOR, 1.0))
        np.fill_diagonal(block, np.where(np.diag(h_count) > 0, 0.0, np.nan))
        out[np.ix_(g.cols, g.cols)] = block
        spread = (UPPER_FACTOR - 1.0) * math.sqrt(math.log(2.0 / (1.0 - confidence)) / (2.0 * sample))
        worst = max(worst, spread if sub is not g else 0.0)
    frame = _frame(labels, out)
    frame.attrs["error_bound"] = worst
    return frame
