"""Static leak view: weight on keys the recorded mask forbids, and future mass of calls declared causal.

References: brute-force loops over (item, head, query, key) written in the test, and the plain fact that a
correctly masked softmax puts exactly zero weight on a masked key (common practice, no source).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import attnscope
from attnscope.analyses.leaks import declared_causal, leak_summary, leak_table
from attnscope.errors import OptionError
from attnscope.records import AttentionRecord, HeadSums

D, H = 16, 2


class TappedAttention(nn.Module):
    """Builds a causal mask and hands it to tap, but forgets to apply it to the scores (a planted leak)."""

    def __init__(self, apply_mask: bool):
        super().__init__()
        self.apply_mask = apply_mask
        self.qkv = nn.Linear(D, 3 * D)

    def forward(self, x):
        b, t, _ = x.shape
        q, k, v = self.qkv(x).view(b, t, 3, H, D // H).permute(2, 0, 3, 1, 4)  # (B, H, T, dh)
        allowed = torch.ones(t, t, dtype=torch.bool).tril()  # (T, T)
        scores = q @ k.transpose(-2, -1) / math.sqrt(D // H)  # (B, H, T, T)
        if self.apply_mask:
            scores = scores.masked_fill(~allowed, float("-inf"))
        w = attnscope.tap(torch.softmax(scores, dim=-1), allowed=allowed)
        return (w @ v).transpose(1, 2).reshape(b, t, D)


def brute_force(w, allowed, offset=0):
    """Mean per row of weight on forbidden keys and on keys after the query; the largest such cell."""
    b, h, tq, tk = w.shape
    leak, future, n, worst, at = 0.0, 0.0, 0, -1.0, None
    for i in range(b):
        for j in range(h):
            for q in range(tq):
                if not allowed[i, j, q].any():
                    continue
                n += 1
                for k in range(tk):
                    bad_mask, bad_time = not allowed[i, j, q, k], k > q + offset
                    leak += w[i, j, q, k] * bad_mask
                    future += w[i, j, q, k] * bad_time
                    if (bad_mask or bad_time) and w[i, j, q, k] > worst:
                        worst, at = w[i, j, q, k], (i, j, q + offset, k)
    return leak / n, future / n, worst, at


def capture(model, *args, keep="maps"):
    with torch.no_grad(), attnscope.capture(model, keep=keep) as cap:
        model(*args)
    return cap


def test_mask_handed_to_tap_but_not_applied_shows_as_mask_leak():
    torch.manual_seed(0)
    x = torch.randn(2, 6, D)
    cap = capture(TappedAttention(apply_mask=False), x)
    rec = cap.attention[0]
    assert rec.source == "tap"
    leak, future, worst, at = brute_force(rec.weights.astype(np.float64), rec.allowed_full())
    summary = leak_summary(cap)  # causal=None: capture saw the (tapped) causal mask
    row = summary.iloc[0]
    assert bool(row.recorded_causal) and bool(row.declared_causal) and bool(row.leaks)
    assert row.leak_mass == pytest.approx(leak, rel=1e-5)  # reference: brute-force loops
    assert row.future_mass == pytest.approx(future, rel=1e-5)
    assert row.max_leak == pytest.approx(worst, rel=1e-6)
    assert (row.worst_item, row.worst_head, row.worst_query, row.worst_key) == at
    table = leak_table(cap)
    np.testing.assert_allclose(table["leak_mass"].mean(), leak, rtol=1e-5)
    np.testing.assert_allclose(table["leak_mass"], cap.head_table()["leak_mass"], rtol=1e-6)  # same as head table


def test_correct_mask_shows_nothing():
    torch.manual_seed(0)
    cap = capture(TappedAttention(apply_mask=True), torch.randn(2, 6, D))
    row = leak_summary(cap, causal=True).iloc[0]
    assert row.leak_mass == 0.0 and row.future_mass == 0.0 and not row.leaks  # masked softmax: exactly 0
    assert row.worst_query == -1


def test_missing_causal_mask_shows_as_future_mass_when_declared():
    torch.manual_seed(1)
    layer = nn.TransformerEncoderLayer(D, H, 32, dropout=0.0, batch_first=True).eval()
    x = torch.randn(3, 5, D)
    cap = capture(layer, x)  # no mask at all: nothing is forbidden, so no mask leak
    assert not leak_summary(cap)["leaks"].any()  # not declared causal: nothing to hold it to
    row = leak_summary(cap, causal=["self_attn"]).iloc[0]
    rec = cap.attention[0]
    _, future, worst, at = brute_force(rec.weights.astype(np.float64), rec.allowed_full())
    assert row.leaks and row.leak_mass == 0.0
    assert row.future_mass == pytest.approx(future, rel=1e-5)  # reference: brute-force loops
    assert row.max_future == pytest.approx(worst, rel=1e-6)
    assert (row.worst_item, row.worst_head, row.worst_query, row.worst_key) == at


def test_query_offset_places_cached_queries_at_their_positions():
    rng = np.random.default_rng(0)
    w = rng.random((2, 2, 2, 5)).astype(np.float32)
    w /= w.sum(axis=-1, keepdims=True)  # queries at absolute positions 2 and 3 over 5 keys
    rec = AttentionRecord("attn", "self", w, None, False, HeadSums.zeros(2), (2, 2, 2, 5), (0, 1), query_offset=2)
    _, future, worst, at = brute_force(w.astype(np.float64), np.ones(w.shape, bool), offset=2)
    row = leak_summary([rec], causal=True).iloc[0]
    assert row.future_mass == pytest.approx(future, rel=1e-5)  # reference: brute force with the offset
    assert (row.worst_item, row.worst_head, row.worst_query, row.worst_key) == at

    class Step(nn.Module):  # one decoding step over a cache: the last query sees every key, no leak
        def forward(self, q, k, v):
            return F.scaled_dot_product_attention(q, k, v)

    q, k = torch.randn(1, 2, 1, 4), torch.randn(1, 2, 6, 4)
    step = Step()
    with attnscope.capture(step, kinds={"": "self"}) as cap:  # self-attention over its own cache
        step(q, k, k)
    assert cap.attention[0].query_offset == 5
    assert leak_summary(cap, causal=True).loc[0, "future_mass"] == 0.0


def test_patterns_declare_self_attention_only_and_predicates_decide():
    torch.manual_seed(2)
    model = nn.Transformer(D, H, num_encoder_layers=1, num_decoder_layers=1, dim_feedforward=32, dropout=0.0,
                           batch_first=True).eval()
    src, tgt = torch.randn(2, 7, D), torch.randn(2, 4, D)
    mask = nn.Transformer.generate_square_subsequent_mask(4)
    cap = capture(model, src, tgt)  # the decoder forgot its tgt_mask
    names = [(r.name, r.kind) for r in cap.attention]
    assert names == [("encoder.layers.0.self_attn", "self"), ("decoder.layers.0.self_attn", "self"),
                     ("decoder.layers.0.multihead_attn", "cross")]
    assert declared_causal(cap.attention, ["decoder.*"]) == [False, True, False]
    summary = leak_summary(cap, causal="decoder.*")
    assert summary["leaks"].tolist() == [False, True, False]
    assert np.isnan(summary.loc[2, "future_mass"])  # cross-attention is not held to the diagonal
    by_predicate = leak_summary(cap, causal=lambda r: r.name.startswith("encoder"))
    assert by_predicate["declared_causal"].tolist() == [True, False, False]
    fixed = capture(model, src, tgt, None, mask)  # tgt_mask given: the decoder is clean
    assert not leak_summary(fixed, causal="decoder.*")["leaks"].any()
    assert bool(leak_summary(fixed).loc[1, "recorded_causal"])


def test_stats_only_capture_gives_mask_leak_but_no_future_mass():
    torch.manual_seed(0)
    x = torch.randn(2, 6, D)
    maps = capture(TappedAttention(apply_mask=False), x)
    stats = capture(TappedAttention(apply_mask=False), x, keep="stats")
    torch.manual_seed(0)
    a, b = leak_summary(maps).iloc[0], leak_summary(stats).iloc[0]
    assert b.leaks and np.isnan(b.future_mass) and b.worst_query == -1
    assert b.leak_mass == pytest.approx(float(leak_table(stats)["leak_mass"].mean()))
    assert a.leak_mass > 0


def test_unknown_pattern_suggests_a_name():
    layer = nn.TransformerEncoderLayer(D, H, 32, batch_first=True)
    cap = capture(layer, torch.randn(1, 3, D))
    with pytest.raises(OptionError, match="Did you mean 'self_attn'"):
        leak_summary(cap, causal=["self_atn"])
    with pytest.raises(OptionError, match="tolerance"):
        leak_summary(cap, tolerance=-1)


def test_hf_gpt2_has_no_leak():
    transformers = pytest.importorskip("transformers")
    torch.manual_seed(0)
    cfg = transformers.GPT2Config(n_layer=2, n_head=2, n_embd=16, vocab_size=30, n_positions=16)
    model = transformers.GPT2LMHeadModel._from_config(cfg, attn_implementation="eager").eval()
    cap = capture(model, torch.randint(0, 30, (2, 8)))
    summary = leak_summary(cap, causal=True)
    assert summary["declared_causal"].all() and not summary["leaks"].any()
    assert (summary["future_mass"] < 1e-6).all()
