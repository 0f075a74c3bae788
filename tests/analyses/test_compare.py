"""Diffing two captures: per-head entropy change and Jensen–Shannon distance between maps.

References: ``scipy.stats.entropy`` and ``scipy.spatial.distance.jensenshannon`` (base 2) row by row.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
from scipy.spatial.distance import jensenshannon
from scipy.stats import entropy
from torch import nn

import attnscope
from attnscope.analyses.compare import compare_captures
from attnscope.errors import ShapeError


def encoder(seed=0):
    torch.manual_seed(seed)
    layer = nn.TransformerEncoderLayer(16, 4, 32, dropout=0.0, batch_first=True)
    return nn.TransformerEncoder(layer, 2, enable_nested_tensor=False).eval()


def run(model, x, keep="maps", mask=None):
    with torch.no_grad(), attnscope.capture(model, keep=keep) as cap:
        model(x, mask=mask)
    return cap


def row_entropy(w):
    return float(np.mean([entropy(r) for r in w.reshape(-1, w.shape[-1]).astype(np.float64)]))


def row_js(a, b):
    a, b = (z.reshape(-1, z.shape[-1]).astype(np.float64) for z in (a, b))
    return float(np.mean([jensenshannon(p, q, base=2) for p, q in zip(a, b)]))


@pytest.mark.parametrize("causal", [False, True])
def test_entropy_change_and_js_distance_match_scipy(causal):
    before_model = encoder()
    after_model = copy.deepcopy(before_model)
    with torch.no_grad():  # a second checkpoint: layer 1's queries and keys moved
        after_model.layers[1].self_attn.in_proj_weight[:32] += 0.5 * torch.randn(32, 16)
    x = torch.randn(3, 7, 16)
    mask = nn.Transformer.generate_square_subsequent_mask(7) if causal else None
    before, after = run(before_model, x, mask=mask), run(after_model, x, mask=mask)
    diff = compare_captures(before, after)
    assert len(diff) == 8 and list(diff["head"]) == [0, 1, 2, 3] * 2
    for row in diff.itertuples():
        wa = next(r for r in before.attention if r.name == row.name).weights[:, row.head]
        wb = next(r for r in after.attention if r.name == row.name).weights[:, row.head]
        assert row.entropy_before == pytest.approx(row_entropy(wa), rel=1e-5)  # reference: scipy.stats.entropy
        assert row.entropy_after == pytest.approx(row_entropy(wb), rel=1e-5)
        assert row.entropy_change == pytest.approx(row_entropy(wb) - row_entropy(wa), abs=1e-5)
        assert row.js_distance == pytest.approx(row_js(wa, wb), abs=1e-5)  # reference: scipy jensenshannon
    layer0 = diff[diff["name"] == "layers.0.self_attn"]
    assert (layer0["js_distance"] == 0).all() and (layer0["entropy_change"] == 0).all()  # untouched layer
    assert (diff[diff["name"] == "layers.1.self_attn"]["js_distance"] > 0.01).all()


def test_one_item_and_stats_only():
    model = encoder(1)
    x = torch.randn(2, 5, 16)
    a, b = run(model, x), run(encoder(2), x)
    one = compare_captures(a, b, item=1)
    wa, wb = a.attention[0].weights[1:2, 2], b.attention[0].weights[1:2, 2]
    assert one.loc[2, "js_distance"] == pytest.approx(row_js(wa, wb), abs=1e-5)
    stats = compare_captures(run(model, x, keep="stats"), b)
    assert stats["js_distance"].isna().all()
    np.testing.assert_allclose(stats["entropy_before"], compare_captures(a, b)["entropy_before"], rtol=1e-6)


def test_captures_of_different_calls_or_shapes_are_refused():
    model = encoder()
    a = run(model, torch.randn(2, 5, 16))
    with pytest.raises(ShapeError, match="differs between the captures"):
        compare_captures(a, run(model, torch.randn(2, 6, 16)))
    with torch.no_grad(), attnscope.capture(model, layers=["layers.0.self_attn"]) as part:
        model(torch.randn(2, 5, 16))
    with pytest.raises(ShapeError, match="calls only in the first: 'layers.1.self_attn' #0"):
        compare_captures(a, part)
