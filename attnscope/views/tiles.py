"""Display-only reductions: pooling a map to a small tile, quantising it, coding the mask for colour.

Nothing here is an analysis: these functions only decide how many pixels and which colour index a
browser gets. The numbers a user reads (statistics, distances) come from the capture or the analyses.

>>> import numpy as np
>>> pool(np.eye(4, dtype=np.float32), 2).tolist()    # mean of each 2x2 block
[[0.5, 0.0], [0.0, 0.5]]
"""

from __future__ import annotations

import numpy as np

__all__ = ["LEAK_FLOOR", "TILE_TOP", "mask_codes", "pool", "quantise_tile", "quantise_weights"]

#: A forbidden cell whose weight is above this is drawn as a leak. It sits well above float32
#: rounding of an exact zero (common practice, no source) and far below any weight a reader can see.
LEAK_FLOOR = 1e-6

#: Highest code of a quantised tile; the code above it means "no data" and is drawn in the background.
TILE_TOP = 254


def _edges(n: int, size: int) -> np.ndarray:
    return np.linspace(0, n, size + 1).round().astype(np.int64)[:-1]


def _bins(n: int, size: int) -> tuple[np.ndarray, np.ndarray]:
    """First position and length of each of *size* bins over *n* positions."""
    edges = _edges(n, size)
    return edges, np.diff(np.append(edges, n))


def _reduce_rows(a: np.ndarray, edges: np.ndarray, counts: np.ndarray, op: np.ufunc) -> np.ndarray:
    """*op* (add or maximum) over bins of the second-to-last axis, one gather per offset within a bin.

    Sums are taken in position order in the array's dtype. Single-threaded numpy on purpose: many small
    parallel regions stall when a shared machine's other cores are busy.
    """
    out = a[..., edges, :]  # a copy: the first row of every bin
    for j in range(1, int(counts.max())):
        idx = np.flatnonzero(counts > j)
        if len(idx) == len(edges):
            op(out, a[..., edges + j, :], out=out)
        else:
            out[..., idx, :] = op(out[..., idx, :], a[..., edges[idx] + j, :])
    return out


def pool(a: np.ndarray, size: int, how: str = "mean") -> np.ndarray:
    """Pool the last two axes of *a* to at most ``size x size`` cells (never upsampled).

    Means are float32 sums over each block divided by the block's cell count; maxima are taken in the input's
    dtype, so codes stay exact.

    Args:
        a: ``(..., Tq, Tk)`` array.
        size: the largest number of cells along each of the two axes.
        how: ``"mean"`` (weights) or ``"max"`` (mask codes: a block with a leak stays a leak).

    Returns:
        float32 ``(..., min(Tq, size), min(Tk, size))``.
    """
    tq, tk = a.shape[-2:]
    sq, sk = min(tq, size), min(tk, size)
    mean = how != "max"
    out = np.asarray(a, dtype=np.float32) if mean else np.asarray(a)
    if sq < tq:
        edges, counts = _bins(tq, sq)
        out = _reduce_rows(out, edges, counts, np.add if mean else np.maximum)
        if mean:
            out /= counts[:, None].astype(np.float32)
    if sk < tk:
        edges, counts = _bins(tk, sk)
        out = (np.add if mean else np.maximum).reduceat(out, edges, axis=-1)  # contiguous runs of each row
        if mean:
            out /= counts.astype(np.float32)
    return np.ascontiguousarray(out, dtype=np.float32)


def quantise_tile(tile: np.ndarray) -> np.ndarray:
    """Scale a tile to its own maximum and round to uint8 codes ``0..254`` (NaN becomes 255, "no data").

    Each overview tile uses the full palette, so the pattern of a head shows even when its weights are
    spread thin; the exact weights are in the selected head's map.
    """
    t = np.asarray(tile, dtype=np.float32)
    finite = np.isfinite(t)
    top = float(t[finite].max()) if finite.any() else 0.0
    scaled = np.zeros_like(t) if top <= 0 else np.where(finite, t, 0.0) / top
    codes = np.rint(np.clip(scaled, 0.0, 1.0) * TILE_TOP).astype(np.uint8)
    codes[~finite] = TILE_TOP + 1
    return codes


def quantise_weights(m: np.ndarray) -> tuple[np.ndarray, float]:
    """Code a weight map as uint16 with one scale: ``weight ≈ code * scale`` (error ≤ scale / 2).

    Returns:
        ``(codes, scale)``; NaN and inf become code 0.
    """
    m = np.asarray(m, dtype=np.float32)
    finite = np.isfinite(m)
    top = float(m[finite].max()) if finite.any() else 0.0
    scale = top / 65535.0 if top > 0 else 1.0
    codes = np.rint(np.where(finite, m, 0.0).astype(np.float64) / scale).clip(0, 65535).astype(np.uint16)
    return codes, scale


def mask_codes(weights: np.ndarray | None, allowed: np.ndarray | None) -> np.ndarray:
    """Colour codes of the mask overlay: 0 allowed, 1 forbidden, 2 forbidden but holding weight (a leak).

    Args:
        weights: ``(Tq, Tk)`` float weights of one head and batch item, or ``None`` (no leak marks).
        allowed: ``(Tq, Tk)`` bool, True where the applied mask lets the query see the key, or ``None``.

    Returns:
        uint8 ``(Tq, Tk)``.
    """
    if allowed is None:
        shape = (0, 0) if weights is None else weights.shape
        return np.zeros(shape, dtype=np.uint8)
    forbidden = ~np.asarray(allowed, dtype=bool)
    codes = forbidden.astype(np.uint8)
    if weights is not None:
        codes[forbidden & (weights > LEAK_FLOOR)] = 2  # NaN compares False: never a leak
    return codes
