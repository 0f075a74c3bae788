"""Head-to-head Jensen–Shannon distances, against scipy.spatial.distance.jensenshannon."""

from __future__ import annotations

import numpy as np
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
