"""FlexAttention capture: weights recomputed from q, k, score_mod and the block mask, outputs untouched.

References: an independent recomputation written here, softmax(score_mod(Q Kᵀ · scale)) with torch
FlexAttention's own ``create_mask`` as the dense mask; and the kernel's own output, which must equal
weights @ V.
"""

from __future__ import annotations

import math

import numpy as np

import pytest
import torch
from torch import nn
from torch.nn.attention import flex_attention as flex_module
from torch.nn.attention.flex_attention import create_block_mask, create_mask, flex_attention

import attnscope
from attnscope.analyses.leaks import pattern_table
from attnscope.demo.flex_decoder import FlexDecoder, FlexDecoderConfig

pytestmark = pytest.mark.filterwarnings("ignore:flex_attention called without torch.compile")

B, H, T, E = 2, 4, 10, 8
DOCS = torch.tensor([[0] * 4 + [1] * 6, [0] * 7 + [1] * 3])


def documents(b, h, q, kv):
    return (DOCS[b, q] == DOCS[b, kv]) & (q >= kv)


def alibi(score, b, h, q, kv):
    return score - (h + 1) * 0.25 * (q - kv)


def softcap(score, b, h, q, kv):
    return 5.0 * torch.tanh(score / 5.0)


class Probe(nn.Module):
    """One attention module around flex_attention, keeping what it was given (for the reference)."""

    def __init__(self, score_mod=None, mask_mod=None, gqa=False, scale=None):
        super().__init__()
        self.qkv = nn.Linear(E * H, (E * H) + 2 * E * (H // 2 if gqa else H))
        self.score_mod, self.mask_mod, self.gqa, self.scale = score_mod, mask_mod, gqa, scale

    def forward(self, x):
        hk = H // 2 if self.gqa else H
        q, k, v = self.qkv(x).split([E * H, E * hk, E * hk], dim=-1)
        q = q.view(B, T, H, E).transpose(1, 2)  # (B, H, T, E)
        k, v = (z.view(B, T, hk, E).transpose(1, 2) for z in (k, v))  # (B, Hk, T, E)
        self.seen = (q.detach(), k.detach(), v.detach())
        mask = None if self.mask_mod is None else create_block_mask(self.mask_mod, B, None, T, T, device="cpu")
        return flex_attention(q, k, v, score_mod=self.score_mod, block_mask=mask, scale=self.scale,
                              enable_gqa=self.gqa)


def reference(q, k, score_mod, mask_mod, scale, gqa):
    """softmax(score_mod(Q Kᵀ · scale)) masked with FlexAttention's create_mask, written independently."""
    if gqa:
        k = k.repeat_interleave(q.size(1) // k.size(1), dim=1)
    s = (q.double() @ k.double().transpose(-2, -1)) * (1 / math.sqrt(E) if scale is None else scale)
    if score_mod is not None:
        for b in range(B):  # plain loops: one cell at a time
            for h in range(H):
                for i in range(T):
                    for j in range(T):
                        s[b, h, i, j] = score_mod(s[b, h, i, j], torch.tensor(b), torch.tensor(h),
                                                  torch.tensor(i), torch.tensor(j))
    if mask_mod is not None:
        dense = create_mask(mask_mod, B, H, T, T, device="cpu")  # torch FlexAttention's own dense mask
        s = s.masked_fill(~dense, float("-inf"))
    return torch.nan_to_num(torch.softmax(s, dim=-1), nan=0.0)


CASES = {"plain": (None, None, False, None), "documents": (None, documents, False, None),
         "alibi + documents": (alibi, documents, False, None), "softcap + causal": (softcap, lambda b, h, q, kv: q >= kv,
                                                                                  False, 0.5),
         "gqa + documents": (alibi, documents, True, None)}


@pytest.mark.parametrize("case", CASES)
def test_weights_equal_independent_recomputation_and_output_is_untouched(case):
    score_mod, mask_mod, gqa, scale = CASES[case]
    torch.manual_seed(0)
    m = Probe(score_mod, mask_mod, gqa, scale).eval()
    x = torch.randn(B, T, E * H)
    with torch.no_grad():
        plain = m(x)
        with attnscope.capture(m) as cap:
            out = m(x)
    assert torch.equal(out, plain)  # outputs unchanged by capture
    assert [r.source for r in cap.attention] == ["flex"]  # one record: the kernel's own softmax is not counted twice
    rec = cap.attention[0]
    q, k, v = m.seen
    ref = reference(q, k, score_mod, mask_mod, scale, gqa)
    torch.testing.assert_close(torch.from_numpy(rec.weights).double(), ref, atol=1e-5, rtol=1e-4)
    vv = v.repeat_interleave(H // v.size(1), dim=1) if gqa else v
    torch.testing.assert_close(torch.from_numpy(rec.weights) @ vv, out, atol=1e-5, rtol=1e-4)  # the kernel's output
    if mask_mod is not None:
        dense = create_mask(mask_mod, B, H, T, T, device="cpu")  # FlexAttention's own mask = recorded allowed
        assert torch.equal(torch.tensor(rec.allowed_full()).expand(B, H, T, T), dense)


def test_flex_decoder_capture_and_its_declared_pattern():
    torch.manual_seed(0)
    ids = torch.randint(0, 16, (B, T))
    leaky, fixed = (FlexDecoder(FlexDecoderConfig(pattern=p)).eval() for p in ("causal", "documents"))
    for model in (leaky, fixed):
        with torch.no_grad(), attnscope.capture(model) as cap:
            model(ids, DOCS)
        assert [r.name for r in cap.attention] == ["blocks.0.attn", "blocks.1.attn"]
        outside = pattern_table(cap, fixed.mask_mod(DOCS))["outside_mass"]
        if model is leaky:
            assert (outside > 1e-3).all()  # causal only: weight crosses documents
        else:
            assert (outside < 1e-7).all()


def test_wrapper_is_removed_on_exit_and_on_error():
    original = flex_module.flex_attention
    import attnscope.demo.flex_decoder as specimen

    model = FlexDecoder(FlexDecoderConfig(pattern="causal")).eval()
    ids = torch.randint(0, 16, (1, 6))
    with pytest.raises(RuntimeError, match="inside"):
        with attnscope.capture(model):
            assert specimen.flex_attention is not original  # the wrapper stands in while open
            raise RuntimeError("inside")
    assert flex_module.flex_attention is original and specimen.flex_attention is original
    with torch.no_grad(), attnscope.capture(model) as outer:
        with attnscope.capture(model.blocks[0]) as inner:
            model(ids)
        assert specimen.flex_attention is not original  # the outer capture still holds it
    assert specimen.flex_attention is original
    assert [r.name for r in outer.attention] == ["blocks.0.attn", "blocks.1.attn"]  # both captures record
    assert [r.name for r in inner.attention] == ["attn"]
    assert torch.equal(torch.tensor(inner.attention[0].weights), torch.tensor(outer.attention[0].weights))


def test_statistics_in_pieces_keep_each_items_batch_index(monkeypatch):
    from attnscope.capture import recorder

    def per_item(score, b, h, q, kv):  # item 1 is pushed onto key 0: the batch index matters
        return score + 4.0 * b * (kv == 0)

    torch.manual_seed(0)
    m = Probe(per_item, documents).eval()
    x = torch.randn(B, T, E * H)
    with torch.no_grad(), attnscope.capture(m) as maps:
        m(x)
    monkeypatch.setattr(recorder, "_STATS_CHUNK_BYTES", 1)  # one batch item (and head) per piece
    with torch.no_grad(), attnscope.capture(m, keep="stats") as stats:
        m(x)
    a, b = maps.head_table(), stats.head_table()
    # reference: the same statistics computed from the full maps (keep="maps") and from one item at a time
    for column in ("entropy", "sink_mass"):
        np.testing.assert_allclose(a[column], b[column], rtol=1e-5, atol=1e-6)


@pytest.mark.slow
def test_check_mask_takes_the_flex_models_own_mask_mod():
    from attnscope.analyses.contracts import check_mask
    from attnscope.analyses.patterns import window_pattern

    torch.manual_seed(0)
    ids = torch.randint(0, 16, (1, 16))
    docs = torch.tensor([[0] * 6 + [1] * 5 + [2] * 5])
    fixed, leaky = (FlexDecoder(FlexDecoderConfig(pattern=p)).eval() for p in ("documents", "causal"))
    contract = fixed.mask_mod(docs)  # the predicate the fixed model hands to create_block_mask

    def run(model):
        return lambda t: model(t, docs.expand(t.size(0), -1))  # perturbed copies are stacked along the batch

    assert check_mask(run(fixed), ids, contract, model=fixed).ok
    report = check_mask(run(leaky), ids, contract, model=leaky, mode="exhaustive")
    assert not report.ok
    # reference: hand derivation from the causal-only mask_mod: output i reads every j <= i, so every pair
    # (i, j) with j < i in another document is a violation, and only those
    expected = {(i, j) for i in range(16) for j in range(i) if docs[0, i] != docs[0, j]}
    assert {(v.output_pos, v.input_pos) for v in report.violations} == expected
    assert report.blame == "blocks.0.attn"

    one_layer = dict(pattern="window", window=4, layers=1)
    right = FlexDecoder(FlexDecoderConfig(**one_layer)).eval()
    off = FlexDecoder(FlexDecoderConfig(**one_layer, window_off_by_one=True)).eval()
    assert check_mask(lambda t: right(t), ids, right.mask_mod(None), model=right).ok
    report = check_mask(lambda t: off(t), ids, window_pattern(16, 4), model=off)
    assert not report.ok and (report.window_declared, report.window_used) == (4, 5)  # the planted q - kv <= 4
