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
:func:`distance_bounds` cheap (float32, over the keys the rows reach; ``h`` is rounded down past the product's
rounding error and the upper bound widened by as much); :func:`~attnscope.analyses.heads.duplicate_heads` uses
the lower bound to rule out far pairs before it computes the exact distance of the rest, and
:func:`head_distances` the two bounds and a sample of exact rows for its estimate.

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

_PIECE_BYTES = 8 << 20  # float32 rows of a group's heads gathered at once for the Gram product
_PAIR_BYTES = 8 << 20  # float64 pair rows held at once in the exact pass
_EDGE = 32  # key columns looked at together when trimming columns no row of a piece reaches
_TINY = 1e-300  # added to every weight before a logarithm: zeros then give 0·log, other values are unchanged
_SAMPLE_ROWS = 8  # sampled rows computed together in the exact pass
_CLOSE = 1e-4  # rows with a Jensen–Shannon divergence (nats) below this are recomputed term by term


def _records(cap: Any) -> Sequence[AttentionRecord]:
    return cap.attention if hasattr(cap, "attention") else list(cap)


def _slack(tk: int) -> float:
    """Twice the largest error of a float32 Bhattacharyya coefficient ``1 − h²`` of rows of *tk* keys.

    Rounding of the inputs' square roots (``u = 2⁻²⁴`` each), of the float32 dot product of ``k ≤ tk`` terms
    (at most ``k·u`` times the sum of their sizes, which is at most 1 after normalising, in any summation
    order; N. J. Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., SIAM 2002, §3.1), of the
    normalisation (four roundings) and of ``1 − slack − BC`` (two): at most ``(tk + 8)·u·(1 + 10⁻⁴)``, below
    ``(tk + 16)·u`` up to 80 000 keys.
    """
    return (tk + 16) * 2.0 ** -23


@dataclass
class _Group:
    """Heads whose maps have one shape: their column in the full matrix and where their rows live."""

    cols: list[int]
    maps: list[tuple[np.ndarray, int]]  # (record weights (B, H, Tq, Tk) or the one item, head position)
    hints: list[tuple[np.ndarray, np.ndarray] | None]  # per map: first and last allowed key per query, if known
    batch: int
    tq: int
    tk: int

    def spans(self, rows: int) -> Iterator[tuple[int, int, int]]:
        """``(item, q0, q1)`` pieces of at most *rows* query rows."""
        for b in range(self.batch):
            for q0 in range(0, self.tq, rows):
                yield b, q0, min(q0 + rows, self.tq)

    def extent(self, heads: Sequence[int], b: int, qs: slice | np.ndarray) -> tuple[int, int]:
        """Key columns ``[k0, k1)`` outside which every weight of query rows *qs* of every head in *heads* is 0.

        Read from the weights themselves (a mask is only a first guess, checked against them), a few columns
        at a time from each end; a causal map's piece ends where its last query does.
        """
        k0, k1 = self.tk, 0
        seen: set[int] = set()
        for i in heads:
            w, _ = self.maps[i]
            if id(w) in seen:
                continue
            seen.add(id(w))
            js = [self.maps[m][1] for m in heads if self.maps[m][0] is w]
            view = w[b, min(js):max(js) + 1, qs]  # (h, r, Tk), a view for a slice of rows
            hint = self.hints[i]
            lo, hi = (0, self.tk) if hint is None else (int(hint[0][qs].min()), int(hint[1][qs].max()) + 1)
            hi = hi if hi <= lo or not view[..., hi:].any() else self.tk
            lo = lo if lo >= hi or not view[..., :lo].any() else 0
            while hi > max(lo, k1) and not view[..., max(hi - _EDGE, lo):hi].any():
                hi = max(hi - _EDGE, lo)
            while lo < min(hi, k0) and not view[..., lo:min(lo + _EDGE, hi)].any():
                lo = min(lo + _EDGE, hi)
            k0, k1 = min(k0, lo), max(k1, hi)
        return (k0, k1) if k0 < k1 else (0, 0)

    def gather(self, heads: Sequence[int], b: int, qs: slice | np.ndarray, k0: int, k1: int,
               head_first: bool = False) -> np.ndarray:
        """float32 query rows *qs*, keys ``k0:k1`` of *heads*: ``(r, n, k)``, or ``(n, r, k)`` if *head_first*."""
        r = len(range(self.tq)[qs]) if isinstance(qs, slice) else len(qs)
        out = np.empty((len(heads), r, k1 - k0) if head_first else (r, len(heads), k1 - k0), np.float32)
        for pos, i in enumerate(heads):
            w, j = self.maps[i]
            if head_first:
                out[pos] = w[b, j, qs, k0:k1]
            else:
                out[:, pos] = w[b, j, qs, k0:k1]
        return out


def _hints(rec: AttentionRecord, tq: int, tk: int) -> tuple[np.ndarray, np.ndarray] | None:
    """First and last allowed key of each query over every item and head, from the record's mask (a guess)."""
    if rec.allowed is None or rec.allowed.shape[-2:] != (tq, tk):
        return None
    any_ = rec.allowed.reshape(-1, tq, tk).any(axis=0)  # (Tq, Tk)
    first = np.where(any_.any(axis=1), any_.argmax(axis=1), 0)
    last = np.where(any_.any(axis=1), tk - 1 - any_[:, ::-1].argmax(axis=1), tk - 1)
    return first, last


def _groups(recs: Sequence[AttentionRecord], item: int | None) -> tuple[list[tuple[int, str, int]], list[_Group]]:
    labels = [(r.call, r.name, h) for r in recs for h in r.heads]
    groups: dict[tuple[int, ...], _Group] = {}
    at = 0
    for r in recs:
        if r.weights is not None:
            w = r.weights if item is None else r.weights[item:item + 1]  # (B, H, Tq, Tk)
            b, _, tq, tk = w.shape
            g = groups.setdefault((b, tq, tk), _Group([], [], [], b, tq, tk))
            hint = _hints(r, tq, tk)
            for j in range(w.shape[1]):
                g.cols.append(at + j)
                g.maps.append((w, j))
                g.hints.append(hint)
        at += len(r.heads)
    return labels, list(groups.values())


def _gram(x: np.ndarray) -> np.ndarray:
    """``(r, n, n)``: ``x[:, i] · x[:, j]`` for every row of a float32 ``(n, r, k)`` array, in float32 arithmetic.

    torch's batched product keeps its own thread pool steady on a busy machine (a BLAS thread pool that spins
    can be many times slower there); numpy's product is used when torch is allowed to lower float32 precision
    (``torch.set_float32_matmul_precision``), so the rounding bound of :func:`_slack` always holds.
    """
    if torch.get_float32_matmul_precision() != "highest":
        y = x.transpose(1, 0, 2)  # (r, n, k)
        return np.matmul(y, y.transpose(0, 2, 1))
    t = torch.from_numpy(x).transpose(0, 1)  # (r, n, k), shares memory
    return torch.bmm(t, t.transpose(1, 2)).numpy()  # (r, n, n)


@dataclass
class _Bounds:
    """Sums over the rows both heads count of each pair's row bounds, and what the estimate needs."""

    low: np.ndarray  # (n, n) sum of the rounded-down Hellinger distance h̃ (float64)
    high: np.ndarray  # (n, n) sum of the row upper bound min(1, U·√(h̃² + 2·slack)) (float64)
    count: np.ndarray  # (n, n) rows both heads count
    spread: np.ndarray  # (n, n) largest (upper bound − h̃) over those rows: the range of the sampled term
    kept: dict[int, np.ndarray]  # row (b·Tq + q) -> (n, n) h̃ of that row, NaN where a head does not count it


def _bounds(g: _Group, keep: Sequence[int] = ()) -> _Bounds:
    """Every row's Hellinger bounds for every pair: float32 Gram products of the square-rooted rows.

    ``1 − BC`` is lowered by :func:`_slack` before the square root, so ``h̃ ≤ h`` (the exact Hellinger
    distance) and ``h² ≤ h̃² + 1.5·slack``; a row's Jensen–Shannon distance ``d`` then lies in
    ``[h̃, min(1, U·√(h̃² + 2·slack))]``. Keys no row of a piece reaches are left out of its product.
    """
    n = len(g.cols)
    low, high, count = np.zeros((n, n)), np.zeros((n, n)), np.zeros((n, n))
    spread = np.zeros((n, n), np.float32)
    kept: dict[int, np.ndarray] = {}
    wanted = set(int(k) for k in keep)
    slack = _slack(g.tk)
    rows = max(1, _PIECE_BYTES // max(1, 4 * n * g.tk))
    heads = list(range(n))
    for b, q0, q1 in g.spans(rows):
        k0, k1 = g.extent(heads, b, slice(q0, q1))
        root = np.empty((n, q1 - q0, k1 - k0), np.float32)  # (n, r, k) square roots of the weights
        s = np.empty((n, q1 - q0))  # (n, r) row sums, float64: finite exactly when every weight of the row is
        for i in heads:
            w, j = g.maps[i]
            src = w[b, j, q0:q1, k0:k1]  # (r, k), a view
            s[i] = src.sum(axis=-1, dtype=np.float64)
            np.sqrt(src, out=root[i])
        s = s.T  # (r, n)
        good = np.isfinite(s) & (s > 0)  # (r, n)
        if not good.all():
            root.transpose(1, 0, 2)[~good] = 0.0
        bc = _gram(root)  # (r, n, n): Bhattacharyya coefficients before normalising
        del root
        scale = np.where(good, 1.0 / np.sqrt(np.where(good, s, 1.0)), 0.0).astype(np.float32)  # (r, n)
        bc *= scale[:, :, None]
        bc *= scale[:, None, :]
        np.subtract(1.0 - slack, bc, out=bc)
        hel = np.sqrt(np.maximum(bc, 0.0, out=bc), out=bc)  # (r, n, n) h̃
        up = np.minimum(UPPER_FACTOR * np.sqrt(hel * hel + 2.0 * slack), 1.0)  # (r, n, n)
        if good.all():
            count += q1 - q0
        else:
            both = good[:, :, None] & good[:, None, :]  # (r, n, n)
            hel[~both] = 0.0
            up[~both] = 0.0
            count += both.sum(axis=0)
        low += hel.sum(axis=0, dtype=np.float64)
        high += up.sum(axis=0, dtype=np.float64)
        np.maximum(spread, (up - hel).max(axis=0), out=spread)
        for q in range(q0, q1):
            if b * g.tq + q in wanted:
                row = hel[q - q0].copy()
                row[~(good[q - q0][:, None] & good[q - q0][None, :])] = np.nan
                kept[b * g.tq + q] = row
    return _Bounds(low, high, count, spread, kept)


def _pair_rows(g: _Group, pairs: Sequence[tuple[int, int]],
               rows: Sequence[int] | None = None) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Exact Jensen–Shannon distances (bits, float64) of *pairs* on rows ``b·Tq + q``, piece by piece.

    Yields ``(row numbers (r,), distances (len(pairs), r))``, NaN where a head does not count the row. All
    rows in order when *rows* is None. Each row is normalised to sum 1 as scipy does; the divergence is
    ``Σ m log m − ½(Σ p log p + Σ q log q)`` with ``m = (p + q)/2``, one logarithm per pair and key, and where it
    comes out below ``_CLOSE`` nats (near-copies, where that difference loses digits) it is recomputed term by
    term as ``½ Σ (p log(p/m) + q log(q/m))``, as ``scipy.special.rel_entr`` does.
    """
    from scipy.special import rel_entr

    if not pairs:
        return
    heads = sorted({i for p in pairs for i in p})
    pos = {h: k for k, h in enumerate(heads)}
    partners: dict[int, list[tuple[int, int]]] = {}  # first head -> [(pair index, partner position)]
    for idx, (a, b) in enumerate(pairs):
        partners.setdefault(pos[a], []).append((idx, pos[b]))
    per = max(1, _PIECE_BYTES // max(1, 8 * len(heads) * g.tk))
    pieces: list[tuple[int, slice | np.ndarray]] = []
    if rows is None:
        pieces = [(b, slice(q0, q1)) for b, q0, q1 in g.spans(per)]
    else:  # sorted rows of one item, a few at a time: keys reached by one of them are computed for all
        rows = np.sort(np.asarray(rows, dtype=np.int64))
        for b in np.unique(rows // g.tq):
            qs = rows[rows // g.tq == b] % g.tq
            pieces += [(int(b), qs[i:i + _SAMPLE_ROWS]) for i in range(0, len(qs), _SAMPLE_ROWS)]
    for b, qs in pieces:
        ids = b * g.tq + (np.arange(g.tq)[qs])
        r = len(ids)
        out = np.full((len(pairs), r), np.nan)
        k0, k1 = g.extent(heads, b, qs)
        if k1 == k0:
            yield ids, out
            continue
        x = g.gather(heads, b, qs, k0, k1, head_first=True).astype(np.float64)  # (n, r, k)
        s = x.sum(axis=-1)  # (n, r)
        good = np.isfinite(s) & (s > 0)  # (n, r)
        x[~good] = 0.0
        x /= np.where(good, s, 1.0)[..., None]
        half = x * 0.5
        half += _TINY
        own = np.einsum("hrk,hrk->hr", x + 2 * _TINY, np.log(x + 2 * _TINY))  # (n, r): Σ p log p
        per = max(1, _PAIR_BYTES // max(1, 8 * r * (k1 - k0)))
        for a, plist in partners.items():
            for s0 in range(0, len(plist), per):
                chunk = plist[s0:s0 + per]
                idx = np.array([c[0] for c in chunk])
                bs = np.array([c[1] for c in chunk])
                contiguous = bs[-1] - bs[0] == len(bs) - 1 and bool((np.diff(bs) == 1).all())
                mid = half[bs[0]:bs[-1] + 1] + half[a] if contiguous else half[bs] + half[a]  # (p, r, k)
                js = 0.5 * (own[a] + own[bs]) - np.einsum("prk,prk->pr", mid, np.log(mid))  # (p, r) nats
                both = good[a] & good[bs]  # (p, r)
                close = np.nonzero(both & (js < _CLOSE))
                if close[0].size:
                    p_rows, q_rows = x[bs[close[0]], close[1]], x[a][close[1]]  # (c, k)
                    m = 0.5 * (p_rows + q_rows)
                    js[close] = 0.5 * (rel_entr(p_rows, m).sum(axis=-1) + rel_entr(q_rows, m).sum(axis=-1))
                dist = np.sqrt(np.clip(js / math.log(2.0), 0.0, 1.0))
                out[idx] = np.where(both, dist, np.nan)
        yield ids, out


def _exact_sums(g: _Group, pairs: Sequence[tuple[int, int]]) -> tuple[np.ndarray, np.ndarray]:
    """Exact sums of the Jensen–Shannon distance (bits, float64) over rows both heads count, per pair."""
    total, count = np.zeros(len(pairs)), np.zeros(len(pairs))
    for _, d in _pair_rows(g, pairs):
        counted = np.isfinite(d)
        total += np.where(counted, d, 0.0).sum(axis=1)
        count += counted.sum(axis=1)
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

    The lower bound is the mean over rows of each row's Hellinger distance ``h = √(1 − Σ_k √(p_k q_k))``,
    computed in float32 and rounded down past its rounding error (``h̃ ≤ h``); the upper bound the mean of
    ``min(1, 1.2011·√(h̃² + 2·slack))``, which covers ``1.2011·h`` (see the module docstring for the
    inequality; ``slack = (Tk + 16)·2⁻²³`` is twice the largest float32 error of ``Σ √(p q)``). Same index,
    columns and NaNs as :func:`head_distances`.
    """
    labels, groups = _groups(_records(cap), item)
    low = np.full((len(labels), len(labels)), np.nan)
    high = low.copy()
    for g in groups:
        sums = _bounds(g)
        low[np.ix_(g.cols, g.cols)] = _mean(sums.low, sums.count)
        high[np.ix_(g.cols, g.cols)] = _mean(sums.high, sums.count)
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


#: Largest range of a sampled term ``d − h̃`` (see :func:`head_distances`) on any row, before rounding: ``1 − 1/U``,
#: where the upper bound meets 1; rounding adds ``U·√(2·slack)`` per group. Sizes the rows the first pass keeps
#: when the sample is chosen from a requested error.
_RANGE_MAX = 1.0 - 1.0 / UPPER_FACTOR

#: Largest memory for the first-pass values of the rows the sample may draw (float32, (heads, heads) per row).
_KEEP_BYTES = 128 << 20

#: Added to the stated error bound: float64 rounding of the sampled exact distances (far above its worst case).
_ROUNDING = 1e-9


def _rows_for(error: float, spread: float, confidence: float) -> int:
    """Rows Hoeffding's inequality needs for an error of at most *error* when terms span *spread*."""
    return max(1, math.ceil(math.log(2.0 / (1.0 - confidence)) * spread ** 2 / (2.0 * error ** 2)))


def head_distances(cap: Any, item: int | None = None, *, exact: bool = False, sample: int | None = None,
                   error: float | None = None, confidence: float = 0.95, seed: int = 0) -> pd.DataFrame:
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
            more rows than the sample, the distance is estimated (see below).
        sample: rows drawn (without replacement, the same rows for every pair) for the estimate; default 64.
        error: instead of *sample*, the largest error wanted: the sample is the fewest rows whose stated
            bound (below) is at most *error* for every pair, given the spreads measured in the first pass
            (every row, computed exactly, when that takes all rows or more first-pass values than 128 MiB hold).
        confidence: the probability the stated error bound holds for each pair.
        seed: seed of the row draw.

    **The estimate.** A first pass gives every row's rounded-down Hellinger distance ``h̃_r`` for every pair
    (one float32 matrix product per row, :func:`distance_bounds`), and the row's Jensen–Shannon distance
    ``d_r`` lies in ``[h̃_r, u_r]`` with ``u_r = min(1, 1.2011·√(h̃_r² + 2·slack))``. The estimate is
    ``mean_all(h̃) + mean_sample(d − h̃)``, with ``d`` exact (float64) on the sampled rows; the sampled terms
    lie in ``[0, s]`` with ``s = max_r (u_r − h̃_r)`` over all rows, measured per pair, so by Hoeffding's
    inequality (W. Hoeffding, "Probability inequalities for sums of bounded random variables", JASA 58,
    1963, whose bounds hold for sampling without replacement too) the error is at most
    ``s · √(ln(2/(1 − confidence)) / (2·m))`` for ``m`` sampled rows, with probability *confidence*. ``s`` is
    at most ``1 − 1/1.2011 + 1.2011·√(2·slack) < 0.19`` up to 1024 keys, so 64 rows at 95 % give at most
    0.033 whatever the maps; spread-out heads (small ``h̃``) give much less. The estimate is kept within the
    two bounds. ``frame.attrs["error_bound"]`` is the largest stated bound over all pairs (0 when exact),
    ``frame.attrs["sample"]`` the rows drawn per group of maps (0 when exact).
    :func:`~attnscope.analyses.heads.duplicate_heads` never uses the estimate.

    Returns:
        A square DataFrame, index and columns a MultiIndex ``(call, name, head)`` in capture order. NaN for
        heads of records without maps (``keep="stats"``), for pairs of different shapes and pairs with no row
        counted by both (rows with a NaN/inf weight or summing to 0 are left out).
    """
    if sample is not None and error is not None:
        raise OptionError(f"give sample or error, not both; received sample={sample!r}, error={error!r}")
    if sample is not None and (not isinstance(sample, int) or isinstance(sample, bool) or sample < 1):
        raise OptionError(f"sample must be a positive int; received {sample!r}")
    if error is not None and (not isinstance(error, (int, float)) or not 0 < error < 1):
        raise OptionError(f"error must be a number in (0, 1); received {error!r}")
    if not isinstance(confidence, (int, float)) or not 0 < confidence < 1:
        raise OptionError(f"confidence must be a number in (0, 1); received {confidence!r}")
    recs = _records(cap)
    labels, groups = _groups(recs, item)
    widest = max((_RANGE_MAX + UPPER_FACTOR * math.sqrt(2.0 * _slack(g.tk)) for g in groups), default=0.0)
    most = (64 if sample is None else sample) if error is None else _rows_for(error, widest, confidence)

    def keeps(g: _Group) -> int:  # rows whose first-pass values are kept for the sample (bounded memory)
        return min(g.batch * g.tq, most, max(1, _KEEP_BYTES // (4 * len(g.cols) ** 2)))

    if exact or all(g.batch * g.tq <= (most if error is None else 0) or keeps(g) < min(most, g.batch * g.tq)
                    for g in groups):
        frame = _frame(*_exact_matrix(recs, item))
        frame.attrs["error_bound"] = 0.0
        frame.attrs["sample"] = 0
        return frame
    out = np.full((len(labels), len(labels)), np.nan)
    worst, drawn = 0.0, 0
    rng = np.random.default_rng(seed)
    for g in groups:
        n, rows = len(g.cols), g.batch * g.tq
        order = rng.permutation(rows)[:keeps(g)]
        first = _bounds(g, keep=order)
        low, high = _mean(first.low, first.count), _mean(first.high, first.count)
        pairs = [(a, b) for a in range(n) for b in range(a + 1, n)]
        ia, ib = np.array([p[0] for p in pairs], int), np.array([p[1] for p in pairs], int)
        spread = first.spread[ia, ib].astype(np.float64)  # (P,)
        m = len(order) if error is None else _rows_for(error, float(spread.max(initial=0.0)), confidence)
        block = np.full((n, n), np.nan)
        if not pairs:
            pass
        elif m >= rows:
            total, count = _exact_sums(g, pairs)
            block[ia, ib] = block[ib, ia] = _mean(total, count)
        else:
            picks = np.sort(order[:m])
            d = np.concatenate([part for _, part in _pair_rows(g, pairs, picks)], axis=1)  # (P, m)
            h = np.stack([first.kept[int(r)][ia, ib] for r in picks], axis=1)  # (P, m)
            counted = np.isfinite(d) & np.isfinite(h)
            taken = counted.sum(axis=1)  # (P,)
            extra = _mean(np.where(counted, d - h, 0.0).sum(axis=1), taken)
            est = np.clip(low[ia, ib] + np.nan_to_num(extra), low[ia, ib], high[ia, ib])
            block[ia, ib] = block[ib, ia] = est
            with np.errstate(divide="ignore"):
                bound = spread * np.sqrt(math.log(2.0 / (1.0 - confidence)) / (2.0 * taken)) + _ROUNDING
            known = np.isfinite(est) & (taken > 0)
            worst = max(worst, float(bound[known].max(initial=0.0)))
            drawn = max(drawn, m)
        np.fill_diagonal(block, np.where(np.diag(first.count) > 0, 0.0, np.nan))
        out[np.ix_(g.cols, g.cols)] = block
    frame = _frame(labels, out)
    frame.attrs["error_bound"] = worst
    frame.attrs["sample"] = drawn
    return frame
