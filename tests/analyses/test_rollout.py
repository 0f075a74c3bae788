"""Attention rollout (Abnar & Zuidema 2020) on hand-computed worked examples and brute-force loops."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

import attnscope
from attnscope.analyses.rollout import attention_rollout, rollout_records
from attnscope.errors import OptionError, ShapeError
from attnscope.records import AttentionRecord, HeadSums


def record(name, heads, call=0, kind="self"):
    w = np.asarray(heads, dtype=np.float32)[None]  # (1, H, T, T)
    return AttentionRecord(name, kind, w, None, True, HeadSums.zeros(w.shape[1]), w.shape, tuple(range(w.shape[1])),
                           call=call)


LAYER_1 = [[[1, 0, 0], [0.5, 0.5, 0], [0.2, 0.3, 0.5]],
           [[1, 0, 0], [0.5, 0.5, 0], [0.4, 0.3, 0.3]]]
LAYER_2 = [[[1, 0, 0], [1, 0, 0], [1, 0, 0]],
           [[1, 0, 0], [0, 1, 0], [0, 1, 0]]]


def test_worked_example_by_hand():
    # Worked by hand:
    #   heads averaged, layer 1: A1 = [[1, 0, 0], [.5, .5, 0], [.3, .3, .4]]
    #   0.5·A1 + 0.5·I        = [[1, 0, 0], [.25, .75, 0], [.15, .15, .7]]      (rows already sum to 1)
    #   layer 2: A2 = [[1, 0, 0], [.5, .5, 0], [.5, .5, 0]] -> [[1, 0, 0], [.25, .75, 0], [.25, .25, .5]]
    #   rollout = Ã2 · Ã1: row 1 = .25·[1, 0, 0] + .75·[.25, .75, 0]             = [.4375, .5625, 0]
    #                      row 2 = .25·[1, 0, 0] + .25·[.25, .75, 0] + .5·[.15, .15, .7] = [.3875, .2625, .35]
    expected = np.array([[1, 0, 0], [0.4375, 0.5625, 0], [0.3875, 0.2625, 0.35]])
    recs = [record("l1", LAYER_1, 0), record("l2", LAYER_2, 1)]
    np.testing.assert_allclose(attention_rollout(recs, item=0), expected, atol=1e-7)
    steps = attention_rollout(recs, cumulative=True)  # (L, B, T, T)
    np.testing.assert_allclose(steps[0, 0], [[1, 0, 0], [0.25, 0.75, 0], [0.15, 0.15, 0.7]], atol=1e-7)
    np.testing.assert_allclose(steps[1, 0], expected, atol=1e-7)


def test_worked_example_with_an_empty_row_and_no_residual():
    # An empty row (a query with no allowed key; the fused kernels give zero weights) becomes 0.5·e_i, which
    # renormalises to e_i: the position keeps only itself. By hand, one layer, one head:
    #   A = [[.5, .5], [0, 0]] -> 0.5·A + 0.5·I = [[.75, .25], [0, .5]] -> rows renormalised [[.75, .25], [0, 1]]
    rec = record("l", [[[0.5, 0.5], [0.0, 0.0]]])
    np.testing.assert_allclose(attention_rollout([rec], item=0), [[0.75, 0.25], [0.0, 1.0]], atol=1e-7)
    # residual=0 multiplies the raw maps: [[.5, .5], [.5, .5]] @ [[1, 0], [0, 1]] by hand is the map itself
    a = record("a", [[[0.5, 0.5], [0.5, 0.5]]], 0)
    b = record("b", [[[1.0, 0.0], [0.0, 1.0]]], 1)
    np.testing.assert_allclose(attention_rollout([a, b], residual=0.0, item=0), [[0.5, 0.5], [0.5, 0.5]])


def brute_rollout(maps, residual=0.5):
    """Brute force: explicit loops over positions for the mixing, renormalising and the matrix products."""
    t = maps[0].shape[-1]
    out = [[1.0 if i == j else 0.0 for j in range(t)] for i in range(t)]
    for a in maps:  # a: (H, T, T) of one item
        mixed = [[(1 - residual) * float(a[:, i, j].mean()) + residual * (i == j) for j in range(t)] for i in range(t)]
        mixed = [[v / sum(row) for v in row] for row in mixed]
        out = [[sum(mixed[i][m] * out[m][j] for m in range(t)) for j in range(t)] for i in range(t)]
    return np.array(out)


def test_encoder_stack_matches_brute_force_and_picks_one_stack():
    torch.manual_seed(0)
    model = nn.Transformer(16, 2, num_encoder_layers=2, num_decoder_layers=1, dim_feedforward=32, dropout=0.0,
                           batch_first=True).eval()
    src, tgt = torch.randn(2, 6, 16), torch.randn(2, 4, 16)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(src, tgt)
    with pytest.raises(ShapeError, match="select one stack"):
        attention_rollout(cap)  # encoder (6 positions) and decoder (4) do not multiply
    enc = rollout_records(cap, "encoder.*")
    assert [r.name for r in enc] == ["encoder.layers.0.self_attn", "encoder.layers.1.self_attn"]
    got = attention_rollout(cap, layers="encoder.*")  # (B, T, T)
    for b in range(2):
        np.testing.assert_allclose(got[b], brute_rollout([r.weights[b] for r in enc]), atol=1e-6)
    np.testing.assert_allclose(got.sum(axis=-1), 1.0, atol=1e-6)
    dec = attention_rollout(cap, layers=["decoder.*"], item=1)
    assert dec.shape == (4, 4)  # the cross-attention record (4 x 6) is left out
    np.testing.assert_allclose(dec, brute_rollout([cap.attention[2].weights[1]]), atol=1e-6)


def test_bad_inputs_say_what_is_wrong():
    rec = record("layers.0", LAYER_1)
    with pytest.raises(OptionError, match="residual"):
        attention_rollout([rec], residual=2.0)
    with pytest.raises(OptionError, match="item"):
        attention_rollout([rec], item=3)
    with pytest.raises(OptionError, match="Did you mean 'layers.0'"):
        attention_rollout([rec], layers="layer.0")
    stats = AttentionRecord("s", "self", None, None, False, HeadSums.zeros(2), (1, 2, 3, 3), (0, 1))
    with pytest.raises(ShapeError, match="keep='maps'"):
        attention_rollout([stats])
    with pytest.raises(ShapeError, match="found none"):
        attention_rollout([record("x", LAYER_1, kind="cross")])
