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


# ---------------------------------------------------------------- the fast passes against brute force
def _brute(recs):
    """Brute force: scipy's Jensen–Shannon distance (base 2) per (item, query) row, averaged, for every pair."""
    heads = [r.weights[:, j].reshape(-1, r.weights.shape[-1]).astype(np.float64) for r in recs
             for j in range(r.weights.shape[1])]
    out = np.zeros((len(heads), len(heads)))
    for a in range(len(heads)):
        for b in range(a + 1, len(heads)):
            rows = [jensenshannon(p, q, base=2) for p, q in zip(heads[a], heads[b])
                    if np.isfinite(p).all() and np.isfinite(q).all() and p.sum() > 0 and q.sum() > 0]
            out[a, b] = out[b, a] = np.mean(rows)
    return out


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_estimate_within_stated_bound_of_brute_force_scipy(seed):
    recs = _planted_maps(seed, heads=12, tq=150, tk=150)
    ref = _brute(recs)  # reference: scipy jensenshannon on every row of every pair
    for kwargs in ({}, {"sample": 20}, {"error": 0.01}, {"error": 0.03, "confidence": 0.99}):
        est = head_distances(recs, seed=seed, **kwargs)
        bound = est.attrs["error_bound"]
        m, conf = est.attrs["sample"], kwargs.get("confidence", 0.95)
        if m == 0:  # the error asked for needs every row: computed exactly
            assert "error" in kwargs and bound == 0.0
        else:
            assert m < 150 and 0 < bound <= 0.19 * np.sqrt(np.log(2 / (1 - conf)) / (2 * m))  # documented cap
            assert m == kwargs.get("sample", m) and ("error" in kwargs or m == kwargs.get("sample", 64))
        if "error" in kwargs:
            assert bound <= kwargs["error"]
        # Hoeffding's bound holds per pair with the stated confidence; it is loose, so none of these exceed it
        assert np.abs(est.to_numpy() - ref).max() <= bound + 1e-9  # 1e-9: float64 rounding of the exact part
    exact = head_distances(recs, exact=True)
    np.testing.assert_allclose(exact.to_numpy(), ref, atol=1e-9)
    assert exact.attrs["error_bound"] == 0.0


def test_sample_chosen_from_error_shrinks_with_the_spread():
    # spread-out heads (small Hellinger distances, narrow sampled terms) need fewer rows for the same error
    from attnscope.records import AttentionRecord, HeadSums

    rng = np.random.default_rng(0)
    sizes = []
    for scale in (0.05, 1.0, 8.0):
        s = rng.normal(size=(1, 4, 400, 50)) * scale
        w = np.exp(s - s.max(-1, keepdims=True))
        w = (w / w.sum(-1, keepdims=True)).astype(np.float32)  # (B, H, Tq, Tk)
        rec = AttentionRecord("blk", "self", w, None, False, HeadSums.zeros(4), w.shape, tuple(range(4)))
        est = head_distances([rec], error=0.02)
        sizes.append(est.attrs["sample"])
        assert 0 < est.attrs["error_bound"] <= 0.02
        assert np.abs(est.to_numpy() - _brute([rec])).max() <= est.attrs["error_bound"]  # reference: scipy
    assert 0 < sizes[0] < sizes[1] < sizes[2] < 400, sizes


def test_upper_bound_holds_for_near_copies():
    # rows differing by 1e-4 relative: the exact distance is tiny but positive; the float32 lower bound rounds
    # to 0, and the upper bound must still cover it (reference: scipy jensenshannon)
    from attnscope.analyses.similarity import distance_bounds
    from attnscope.records import AttentionRecord, HeadSums

    rng = np.random.default_rng(1)
    base = rng.dirichlet(np.ones(64), size=30)  # (Tq, Tk)
    other = base * (1 + 1e-4 * rng.normal(size=base.shape))
    w = np.stack([base, other / other.sum(-1, keepdims=True)])[None].astype(np.float32)  # (B, H, Tq, Tk)
    rec = AttentionRecord("blk", "self", w, None, False, HeadSums.zeros(2), w.shape, (0, 1))
    low, high = (f.to_numpy()[0, 1] for f in distance_bounds([rec]))
    ref = np.mean([jensenshannon(p, q, base=2) for p, q in zip(w[0, 0].astype(np.float64), w[0, 1].astype(np.float64))])
    assert 0 < ref and low <= ref <= high


@pytest.mark.parametrize("piece_rows", [3, 1000])
def test_keys_left_out_only_where_every_weight_is_zero(monkeypatch, piece_rows):
    # windows, left padding, a leaky head the mask does not admit, a NaN row and an all-zero row: the passes
    # skip key columns by reading the weights, so every variant must match brute-force scipy; pieces of a few
    # rows, as at scale (the piece size is the only thing changed)
    from attnscope.analyses import similarity
    from attnscope.records import AttentionRecord, HeadSums

    monkeypatch.setattr(similarity, "_PIECE_BYTES", piece_rows * 4 * 4 * 70 * 2)

    rng = np.random.default_rng(2)
    tq = tk = 70
    q, k = np.arange(tq)[:, None], np.arange(tk)[None, :]
    allowed = (k <= q) & (k > q - 12) & (k >= 5)  # window of 12 keys, 5 padded keys on the left
    s = rng.normal(size=(2, 4, tq, tk)) * 2.0
    s = np.where(allowed, s, -np.inf)
    w = np.exp(s - np.where(allowed, s, 0.0).max(-1, keepdims=True)) * allowed
    w = (w / np.maximum(w.sum(-1, keepdims=True), 1e-30)).astype(np.float32)  # (B, H, Tq, Tk); rows 0-4 all 0
    w[1, 2, :, -1] = 0.3  # a head reading a key its mask forbids: the mask is a guess, the weights decide
    w[0, 3, 40, 7] = np.nan  # a broken row, left out of every pair with head 3
    mask = np.broadcast_to(allowed, (2, 1, tq, tk))
    rec = AttentionRecord("blk", "self", w, mask, True, HeadSums.zeros(4), w.shape, tuple(range(4)))
    ref = _brute([rec])  # reference: scipy jensenshannon on the rows both heads count
    np.testing.assert_allclose(head_distances([rec], exact=True).to_numpy(), ref, atol=1e-9)
    est = head_distances([rec], sample=30)
    assert np.abs(est.to_numpy() - ref).max() <= est.attrs["error_bound"]
    from attnscope.analyses.similarity import distance_bounds

    low, high = (f.to_numpy() for f in distance_bounds([rec]))
    assert (low <= ref + 1e-12).all() and (ref <= high + 1e-12).all()


def test_sample_and_error_options_fail_at_the_door():
    from attnscope.errors import OptionError

    recs = _planted_maps(0)
    for kwargs, word in (({"sample": 0}, "sample"), ({"error": 1.5}, "error"), ({"sample": 8, "error": 0.1}, "not both"),
                         ({"confidence": 1.0}, "confidence")):
        with pytest.raises(OptionError, match=word):
            head_distances(recs, **kwargs)


def test_lowered_float32_matmul_precision_does_not_loosen_the_bounds():
    # torch may trade float32 matmul precision for speed when asked; the bounds then use numpy's product
    from attnscope.analyses.similarity import distance_bounds

    recs = _planted_maps(4)
    ref = _brute(recs)  # reference: scipy jensenshannon on every row
    before = torch.get_float32_matmul_precision()
    try:
        torch.set_float32_matmul_precision("medium")
        low, high = (f.to_numpy() for f in distance_bounds(recs))
    finally:
        torch.set_float32_matmul_precision(before)
    assert (low <= ref + 1e-12).all() and (ref <= high + 1e-12).all()
    np.testing.assert_allclose(low, distance_bounds(recs)[0].to_numpy(), atol=1e-6)


def test_near_copies_one_rounding_step_apart_are_exact():
    # head 1 is head 0 with weights moved by one float32 step: the distance is ~1e-8, where a difference of
    # entropies loses every digit; the exact pass recomputes such rows term by term (reference: scipy)
    from attnscope.analyses.heads import duplicate_heads
    from attnscope.records import AttentionRecord, HeadSums

    rng = np.random.default_rng(5)
    a = rng.dirichlet(np.ones(300), size=20).astype(np.float32)  # (Tq, Tk)
    b = a.copy()
    b[:, ::7] = np.nextafter(b[:, ::7], np.float32(1))
    w = np.stack([a, b])[None]  # (B, H, Tq, Tk)
    rec = AttentionRecord("blk", "self", w, None, False, HeadSums.zeros(2), w.shape, (0, 1))
    ref = np.mean([jensenshannon(p, q, base=2) for p, q in zip(a.astype(np.float64), b.astype(np.float64))])
    assert 0 < ref < 1e-6
    assert head_distances([rec], exact=True).iloc[0, 1] == pytest.approx(ref, rel=1e-6, abs=1e-15)
    assert duplicate_heads([rec], max_distance=0.01)[0].distance == pytest.approx(ref, rel=1e-6, abs=1e-15)


def test_estimate_with_a_lone_head_of_its_shape():
    # a record whose maps share no shape with another head's: its row and column stay NaN off the diagonal
    from attnscope.records import AttentionRecord, HeadSums

    recs = _planted_maps(6, heads=12, tq=100, tk=100)
    w = np.full((1, 1, 100, 30), 1 / 30, np.float32)  # (B, H, Tq, Tk): one head of another shape
    recs.append(AttentionRecord("other", "cross", w, None, False, HeadSums.zeros(1), w.shape, (0,), call=2))
    est = head_distances(recs, sample=16).to_numpy()
    assert np.isnan(est[12, :12]).all() and est[12, 12] == 0.0
    ref = _brute(recs[:2])  # reference: scipy jensenshannon on the twelve same-shaped heads
    assert np.abs(est[:12, :12] - ref).max() <= head_distances(recs, sample=16).attrs["error_bound"] + 1e-9
