"""Per-head statistics of a library's own attention maps, in float64 numpy and scipy: the reference the family
tests (transformers, x-transformers) hold capture's ``keep="stats"`` to. Independent of attnscope.stats."""

from __future__ import annotations

import numpy as np
import torch
from scipy.special import entr


def reference_means(w: torch.Tensor, offset: int) -> dict[str, np.ndarray]:
    """Per-head means over (batch, query) rows of ``(B, H, Tq, Tk)`` weights *w* a library handed out.

    The allowed keys are those the library's softmax gave a weight above zero (a key its mask forbids gets exactly
    zero), so every query must have one; *offset* is the absolute position of query 0 on the key axis.
    """
    w = w.double().numpy()  # (B, H, Tq, Tk)
    b, h, tq, tk = w.shape
    ok = w > 0
    assert ok.any(-1).all(), "a query sees no key: the reference cannot tell its allowed keys"
    dist = np.abs(np.arange(tq)[:, None] + offset - np.arange(tk)[None, :])  # |i - k| on absolute positions
    per_row = {"entropy": entr(w).sum(-1),  # scipy's -x ln x
               "max_weight": w.max(-1),
               "sink_mass": np.take_along_axis(w, ok.argmax(-1)[..., None], -1)[..., 0],  # first allowed key
               "mean_distance": (w * dist).sum(-1),
               "leak_mass": np.zeros((b, h, tq))}  # nothing beyond the library's own mask
    return {k: v.mean(axis=(0, 2)) for k, v in per_row.items()}


def assert_means_match(rec, w: torch.Tensor, label: str) -> None:
    """Capture's ``keep="stats"`` record *rec* against :func:`reference_means` of the library's own weights *w* of
    the same call (rtol and atol 1e-5: float32 reductions against float64), statistic by statistic."""
    means = rec.stats.means()
    for key, val in reference_means(w, rec.query_offset).items():
        np.testing.assert_allclose(means[key], val, rtol=1e-5, atol=1e-5, err_msg=f"{label} {key}")
