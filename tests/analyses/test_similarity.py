"""Head-to-head Jensen–Shannon distances, against scipy.spatial.distance.jensenshannon."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.spatial.distance import jensenshannon
from torch import nn

import attnscope
from attnscope.analyses.similarity import head_distances


def _capture():
    torch.manual_seed(0)
    model = nn.Transformer(d_model=16, nhead=2, num_encoder_layers=1, num_decoder_layers=1, dim_feedforward=16,
                           dropout=0.0, batch_first=True).eval()
    src, tgt = torch.randn(2, 5, 16), torch.randn(2, 3, 16)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(src, tgt, tgt_mask=model.generate_square_subsequent_mask(3), tgt_is_causal=True)
    return cap


def test_distances_match_scipy_row_by_row():
    cap = _capture()
    d = head_distances(cap)
    maps = [(r.call, r.name, h, r.weights[:, j]) for r in cap.attention for j, h in enumerate(r.heads)]
    assert list(d.index) == [(c, n, h) for c, n, h, _ in maps]
    for a, (_, _, _, wa) in enumerate(maps):
        for b, (_, _, _, wb) in enumerate(maps):
            got = d.iloc[a, b]
            if wa.shape != wb.shape:
                assert np.isnan(got)
                continue
            # reference: scipy's Jensen–Shannon distance (base 2) per (item, query) row, averaged
            rows = [jensenshannon(p, q, base=2) for p, q in zip(wa.reshape(-1, wa.shape[-1]),
                                                                 wb.reshape(-1, wb.shape[-1]))]
            np.testing.assert_allclose(got, np.mean(rows), atol=1e-6)
    assert np.allclose(np.diag(d.to_numpy()), 0.0)


def test_one_item_and_hand_computed_extremes():
    cap = _capture()
    one = head_distances(cap, item=1)
    w = cap.attention[0].weights[1]  # (H, Tq, Tk)
    expected = np.mean([jensenshannon(p, q, base=2) for p, q in zip(w[0], w[1])])
    np.testing.assert_allclose(one.iloc[0, 1], expected, atol=1e-6)
    # hand-computed: disjoint one-hot rows are 1 apart, equal rows 0 (common practice, no source)
    from attnscope.records import AttentionRecord, HeadSums

    x = np.array([[[[1, 0], [0, 1]], [[0, 1], [0, 1]]]], dtype=np.float32)  # (B, H, Tq, Tk)
    rec = AttentionRecord("blk", "self", x, None, False, HeadSums.zeros(2), (1, 2, 2, 2), (0, 1))
    np.testing.assert_allclose(head_distances([rec]).iloc[0, 1], 0.5)


def test_stats_only_records_give_nan():
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(8, 2, batch_first=True)
    x = torch.randn(1, 3, 8)
    with torch.no_grad(), attnscope.capture(mha, keep="stats") as cap:
        mha(x, x, x)
    assert np.isnan(head_distances(cap).to_numpy()).all()


# ---------------------------------------------------------------- bounds, estimate and exact pruning at scale
def test_hellinger_bound_holds_term_by_term_and_on_random_rows():
    # the inequality ln2·h² ≤ JS ≤ h² (nats) term by term: ratio of the one-homogeneous generators, brute force
    t = np.logspace(-9, 9, 20001)
    js = 0.5 * t * np.log(2 * t / (1 + t)) + 0.5 * np.log(2 / (1 + t))
    h2 = 0.5 * (np.sqrt(t) - 1) ** 2
    keep = h2 > 1e-12
    ratio = js[keep] / h2[keep]
    assert ratio.min() >= np.log(2) - 1e-9 and ratio.max() <= 1 + 1e-6
    # and on the mean over rows the code reports, against scipy per row (reference: scipy jensenshannon)
    from attnscope.analyses.similarity import UPPER_FACTOR, _slack, distance_bounds
    from attnscope.records import AttentionRecord, HeadSums

    rng = np.random.default_rng(0)
    logits = rng.normal(size=(2, 5, 7, 9)) * rng.choice([0.1, 1.0, 6.0], size=(2, 5, 1, 1))
    logits[:, :, :, 6:] = -np.inf  # some keys masked: exact zeros
    w = np.exp(logits - logits.max(-1, keepdims=True))
    w = (w / w.sum(-1, keepdims=True)).astype(np.float32)  # (B, H, Tq, Tk)
    rec = AttentionRecord("blk", "self", w, None, False, HeadSums.zeros(5), w.shape, tuple(range(5)))
    low, high = (f.to_numpy() for f in distance_bounds([rec]))
    for a in range(5):
        for b in range(5):
            ref = np.mean([jensenshannon(p, q, base=2) for p, q in zip(w[:, a].reshape(-1, 9).astype(np.float64),
                                                                       w[:, b].reshape(-1, 9).astype(np.float64))])
            assert low[a, b] <= ref + 1e-12 <= high[a, b] + 1e-12
            # the upper bound is 1.2011 × (lower bound widened by the float32 rounding allowance)
            assert high[a, b] <= min(1.0, UPPER_FACTOR * (low[a, b] + np.sqrt(2 * _slack(9)))) + 1e-12


def _planted_maps(seed: int, heads: int = 12, tq: int = 40, tk: int = 40):
    """Random causal maps with planted near-copies at several distances."""
    from attnscope.records import AttentionRecord, HeadSums

    rng = np.random.default_rng(seed)
    s = rng.normal(size=(1, heads, tq, tk)) * 2.0
    for a, b, noise in ((0, 5, 0.0), (1, 7, 0.05), (2, 9, 0.2), (3, 11, 0.5), (4, 6, 0.9)):
        s[:, b] = s[:, a] + noise * rng.normal(size=(1, tq, tk))
    s = np.where(np.tril(np.ones((tq, tk), bool)), s, -np.inf)
    w = np.exp(s - s.max(-1, keepdims=True))
    w = (w / w.sum(-1, keepdims=True)).astype(np.float32)  # (B, H, Tq, Tk)
    half = heads // 2
    return [AttentionRecord(f"layers.{i}", "self", np.ascontiguousarray(w[:, i * half:(i + 1) * half]), None, True,
                            HeadSums.zeros(half), (1, half, tq, tk), tuple(range(half)), call=i) for i in range(2)]


@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("threshold", [0.02, 0.1, 0.3])
def test_duplicate_heads_match_brute_force_scipy(seed, threshold):
    from attnscope.analyses.heads import duplicate_heads

    recs = _planted_maps(seed)
    heads = [(r.name, h, r.weights[0, h]) for r in recs for h in r.heads]
    expected = {}
    for i in range(len(heads)):
        for j in range(i + 1, len(heads)):
            # reference: brute force, scipy's Jensen–Shannon distance per query row, averaged
            d = np.mean([jensenshannon(p, q, base=2) for p, q in zip(heads[i][2].astype(np.float64),
                                                                     heads[j][2].astype(np.float64))])
            if d <= threshold:
                expected[(heads[i][0], heads[i][1], heads[j][0], heads[j][1])] = d
    got = {(p.name_a, p.head_a, p.name_b, p.head_b): p.distance for p in duplicate_heads(recs, max_distance=threshold)}
    assert set(got) == set(expected)
    for k, d in expected.items():
        assert got[k] == pytest.approx(d, abs=1e-9)
    if threshold == 0.1:
        assert len(expected) >= 2  # the planted copies are found, so the check is not vacuous


def test_estimate_within_its_stated_bound_and_exact_when_asked():
    recs = _planted_maps(3, heads=12, tq=300, tk=300)
    exact = head_distances(recs, exact=True)
    est = head_distances(recs, sample=64)
    assert exact.attrs["error_bound"] == 0.0 and 0 < est.attrs["error_bound"] < 0.05
    err = np.abs(est.to_numpy() - exact.to_numpy())
    assert np.nanmax(err) <= est.attrs["error_bound"]
    w = recs[0].weights[0]  # reference: scipy on one pair, exact mode
    ref = np.mean([jensenshannon(p, q, base=2) for p, q in zip(w[0].astype(np.float64), w[1].astype(np.float64))])
    assert exact.iloc[0, 1] == pytest.approx(ref, abs=1e-9)
