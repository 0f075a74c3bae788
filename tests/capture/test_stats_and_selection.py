"""keep="stats", the head table's statistics, the memory guard, layers=/heads= selection and tap()."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from scipy.stats import entropy as scipy_entropy
from torch import nn

import attnscope
from attnscope.errors import MemoryBudgetError, ShapeError


def decoder(layers=2, d=32, h=4):
    torch.manual_seed(0)
    layer = nn.TransformerDecoderLayer(d, h, 2 * d, dropout=0.0, batch_first=True)
    return nn.TransformerDecoder(layer, layers).eval()


def run(model, keep, **kw):
    torch.manual_seed(1)
    tgt, mem = torch.randn(3, 6, 32), torch.randn(3, 9, 32)
    mask = nn.Transformer.generate_square_subsequent_mask(6)
    pad = torch.zeros(3, 9, dtype=torch.bool)
    pad[2, 5:] = True
    with torch.no_grad(), attnscope.capture(model, keep=keep, **kw) as cap:
        model(tgt, mem, tgt_mask=mask, memory_key_padding_mask=pad)
        model(tgt[:1], mem[:1], tgt_mask=mask)  # a second call, other batch size
    return cap


def test_stats_mode_equals_maps_mode_and_keeps_no_maps():
    model = decoder()
    maps, stats = run(model, "maps"), run(model, "stats")
    assert all(r.weights is None for r in stats.attention)
    assert all(r.weights is not None for r in maps.attention)
    a, b = maps.head_table(), stats.head_table()
    assert list(a.columns) == list(b.columns) and len(a) == 4 * 4 * 2  # heads x (2 layers x self, cross) x 2 calls
    assert (a[["name", "kind", "call", "head", "rows"]].values == b[["name", "kind", "call", "head", "rows"]].values).all()
    cols = ["entropy", "entropy_ratio", "max_weight", "sink_mass", "mean_distance", "leak_mass"]
    np.testing.assert_allclose(a[cols].to_numpy(), b[cols].to_numpy(), atol=1e-5)


def test_head_table_statistics_against_scipy_and_brute_force():
    cap = run(decoder(), "maps")
    table = cap.head_table()
    for rec in cap.attention:
        allowed = rec.allowed_full()
        for hi, head in enumerate(rec.heads):
            w = rec.weights[:, hi].astype(np.float64)  # (B, Tq, Tk)
            a = allowed[:, hi]
            ent, ratio, mx, sink, dist, leak = [], [], [], [], [], []
            for bi in range(w.shape[0]):
                for qi in range(w.shape[1]):
                    row, ok = w[bi, qi], a[bi, qi]
                    ent.append(scipy_entropy(row))  # reference: scipy.stats.entropy, natural log
                    if ok.sum() >= 2:
                        ratio.append(ent[-1] / math.log(ok.sum()))
                    mx.append(row.max())
                    sink.append(row[np.argmax(ok)])
                    dist.append(sum(row[k] * abs(qi + rec.query_offset - k) for k in range(len(row))))
                    leak.append(row[~ok].sum())
            got = table[(table["call"] == rec.call) & (table["head"] == head)].iloc[0]
            np.testing.assert_allclose(
                [got.entropy, got.entropy_ratio, got.max_weight, got.sink_mass, got.mean_distance, got.leak_mass],
                [np.mean(ent), np.mean(ratio), np.mean(mx), np.mean(sink), np.mean(dist), np.mean(leak)], atol=1e-5)


def test_uniform_attention_entropy_is_ln_n():
    class Uniform(nn.Module):
        def forward(self, x):  # all scores equal: uniform weights over the allowed keys
            q = torch.zeros(1, 2, 5, 4)
            return F.scaled_dot_product_attention(q, q, x)

    m = Uniform()
    with attnscope.capture(m) as cap:
        m(torch.randn(1, 2, 5, 4))
    t = cap.head_table()
    np.testing.assert_allclose(t.entropy, math.log(5), atol=1e-6)  # ln n for uniform over n keys (common practice, no source)
    np.testing.assert_allclose(t.entropy_ratio, 1.0, atol=1e-6)
    np.testing.assert_allclose(t.max_weight, 0.2, atol=1e-6)


def test_memory_guard_stops_before_materialising():
    model = decoder()
    with pytest.raises(MemoryBudgetError, match=r"3x4x6x9 float32.*keep='stats'.*layers=/heads="):
        run(model, "maps", max_bytes=2000)
    cap = run(model, "stats", max_bytes=2000)  # statistics hold no maps: the budget does not apply
    assert len(cap.attention) == 8


def test_layers_and_heads_selection():
    model = decoder(layers=3)
    cap = run(model, "maps", layers=["layers.1.*", 0], heads=[1, 3])
    names = sorted({r.name for r in cap.attention})
    assert names == ["layers.0.self_attn", "layers.1.multihead_attn", "layers.1.self_attn"]
    full = run(model, "maps")
    twins = [r for r in full.attention if r.name in names]  # same call order, all heads
    assert len(twins) == len(cap.attention)
    for rec, twin in zip(cap.attention, twins):
        assert rec.name == twin.name and rec.heads == (1, 3) and rec.weights.shape[1] == 2
        # unselected modules keep torch's fused path, so the selected ones see inputs equal within float noise
        np.testing.assert_allclose(rec.weights, twin.weights[:, [1, 3]], atol=1e-6)
    assert set(cap.head_table()["head"]) == {1, 3}


def test_selecting_a_block_selects_the_attention_inside():
    model = decoder(layers=2)
    cap = run(model, "stats", layers=["layers.1"])
    assert {r.name for r in cap.attention} == {"layers.1.self_attn", "layers.1.multihead_attn"}


class Hand(nn.Module):
    """Hand-written attention with its own softmax, marked with attnscope.tap."""

    def __init__(self, use_tap=True, name_it_mixer=False):
        super().__init__()
        self.proj = nn.Linear(8, 16)
        self.use_tap = use_tap

    def forward(self, x, mask):
        b, t, _ = x.shape
        q, k = self.proj(x).view(b, t, 2, 2, 4).permute(2, 0, 3, 1, 4)  # (B, H, T, d) each
        scores = (q @ k.transpose(-2, -1)) / 2.0
        w = torch.exp(scores.masked_fill(~mask, -1e30))
        w = w / w.sum(-1, keepdim=True)  # no softmax call: only tap can see this
        if self.use_tap:
            attnscope.tap(w, allowed=mask)
        return (w @ q).transpose(1, 2).reshape(b, t, 8)


class Mixer(nn.Module):  # a name capture does not recognise
    def __init__(self):
        super().__init__()
        self.inner = Hand()

    def forward(self, x, mask):
        return self.inner(x, mask)


def test_tap_records_hand_written_weights_with_the_module_name():
    torch.manual_seed(0)
    model = nn.ModuleDict({"mix": Mixer()})
    x = torch.randn(2, 5, 8)
    mask = torch.ones(5, 5, dtype=torch.bool).tril()
    with attnscope.capture(model["mix"], layers=["inner"]) as cap:
        model["mix"](x, mask)
    (rec,) = cap.attention
    assert rec.name == "inner" and rec.source == "tap" and rec.causal
    # reference: the same arithmetic, written again here
    q, k = model["mix"].inner.proj(x).view(2, 5, 2, 2, 4).permute(2, 0, 3, 1, 4)
    ref = torch.softmax(((q @ k.transpose(-2, -1)) / 2.0).masked_fill(~mask, float("-inf")), -1)
    np.testing.assert_allclose(rec.weights, ref.detach().numpy(), atol=1e-6)


def test_tap_outside_capture_is_a_no_op_and_checks_shapes():
    w = torch.rand(1, 2, 3, 3)
    assert attnscope.tap(w) is w

    class BadTap(nn.Module):
        def __init__(self, allowed, weights=None):
            super().__init__()
            self.allowed, self.weights = allowed, weights

        def forward(self, x):
            w = self.weights if self.weights is not None else torch.rand(1, 2, 3, 3)
            attnscope.tap(w, allowed=self.allowed)
            return x

    m = BadTap(torch.ones(4, 4, dtype=torch.bool))
    with pytest.raises(ShapeError, match=r"allowed of shape \(4, 4\) does not broadcast"):
        with attnscope.capture(m, layers=[""]):
            m(torch.randn(1))
    m = BadTap(None, torch.rand(1, 1, 1, 3, 3))
    with pytest.raises(ShapeError, match=r"expects weights \[batch, heads, queries, keys\]; '' passed a 5-dim"):
        with attnscope.capture(m, layers=[""]):
            m(torch.randn(1))


def test_tap_of_a_softmax_output_refines_the_softmax_record():
    class SelfAttn(nn.Module):
        def forward(self, q, k):
            w = torch.softmax(q @ k.transpose(-2, -1), dim=-1)
            return attnscope.tap(w, causal=False, kind="cross")

    m = SelfAttn()
    with attnscope.capture(m) as cap:
        m(torch.randn(1, 2, 3, 4), torch.randn(1, 2, 3, 4))
    assert len(cap.attention) == 1 and cap.attention[0].source == "tap" and cap.attention[0].kind == "cross"


def test_blocks_named_explicitly_for_a_custom_model():
    class Mix(nn.Module):
        def __init__(self):
            super().__init__()
            self.attn = nn.MultiheadAttention(8, 2, batch_first=True)
            self.ff = nn.Linear(8, 8)

        def forward(self, x):
            return x + self.ff(x + self.attn(x, x, x)[0])

    class Net(nn.Module):  # stages in plain attributes: no ModuleList to find blocks from
        def __init__(self):
            super().__init__()
            self.stage_a, self.stage_b = Mix(), Mix()

        def forward(self, x):
            return self.stage_b(self.stage_a(x))

    torch.manual_seed(0)
    net = Net()
    x = torch.randn(2, 3, 8)
    with pytest.warns(attnscope.AttnscopeWarning, match="found no transformer blocks in Net"):
        with attnscope.capture(net) as auto:  # says so instead of an empty residual view without a word
            net(x)
    assert auto.residual == []
    with attnscope.capture(net, blocks=["stage_*"]) as cap:
        out = net(x)
    assert [r.name for r in cap.residual] == ["stage_a", "stage_b"]
    np.testing.assert_allclose(cap.residual[1].norms, out.detach().norm(dim=-1).numpy(), rtol=1e-6)  # reference: the output's own norm
    with pytest.raises(attnscope.OptionError, match="Did you mean 'stage_b', 'stage_a'"):
        attnscope.capture(net, blocks=["stage_c"])


@pytest.mark.slow
@pytest.mark.parametrize("heads", [None, [0, 2, 3]])
def test_stats_mode_reduces_large_calls_in_chunks_and_still_equals_maps(heads):
    """A call bigger than the stats chunk (3 x 4 x 600 x 600 float32 = 17 MB) is reduced in head/batch pieces."""
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(16, 4, batch_first=True).eval()
    x = torch.randn(3, 600, 16)
    pad = torch.zeros(3, 600, dtype=torch.bool)
    pad[1, 400:] = True
    results = {}
    for keep in ("maps", "stats"):
        with torch.no_grad(), attnscope.capture(mha, keep=keep, heads=heads) as cap:
            mha(x, x, x, key_padding_mask=pad, attn_mask=torch.ones(600, 600, dtype=torch.bool).triu(1))
        results[keep] = cap.head_table()
    cols = ["rows", "entropy", "entropy_ratio", "max_weight", "sink_mass", "mean_distance", "leak_mass"]
    np.testing.assert_allclose(results["maps"][cols].to_numpy(), results["stats"][cols].to_numpy(), atol=1e-5)
    assert list(results["stats"]["head"]) == (heads or [0, 1, 2, 3])
