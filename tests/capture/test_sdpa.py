"""Capture of F.scaled_dot_product_attention calls in hand-written blocks.

Reference: an independent softmax(QKᵀ·scale + mask) recomputation written here, and the fused SDPA output
itself (recomputed weights @ V must equal it).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import attnscope


class Block(nn.Module):
    """A hand-written multi-head self-attention block that calls the fused kernel."""

    def __init__(self, d=16, h=4, kv_heads=None, scale=None):
        super().__init__()
        self.h, self.kv = h, kv_heads or h
        self.q = nn.Linear(d, d)
        self.kv_proj = nn.Linear(d, 2 * d // h * self.kv)
        self.scale = scale
        self.seen = {}

    def forward(self, x, attn_mask=None, is_causal=False):
        b, t, d = x.shape
        q = self.q(x).view(b, t, self.h, d // self.h).transpose(1, 2)  # (B, H, T, d)
        k, v = self.kv_proj(x).view(b, t, 2, self.kv, d // self.h).permute(2, 0, 3, 1, 4)  # (B, Hk, T, d)
        out = F.scaled_dot_product_attention(q, k, v, attn_mask=attn_mask, is_causal=is_causal, scale=self.scale,
                                             enable_gqa=self.kv != self.h)
        self.seen = {"q": q.detach(), "k": k.detach(), "v": v.detach(), "out": out.detach()}
        return out.transpose(1, 2).reshape(b, t, d)


def brute_weights(q, k, mask=None, causal=False, scale=None):
    """Independent reference: softmax(QKᵀ·scale + mask), one head at a time, in float64."""
    q, k = q.double(), k.double()
    if k.size(1) != q.size(1):
        k = k.repeat_interleave(q.size(1) // k.size(1), dim=1)
    b, h, tq, e = q.shape
    tk = k.size(2)
    scale = 1 / math.sqrt(e) if scale is None else scale
    out = torch.zeros(b, h, tq, tk, dtype=torch.float64)
    for i in range(b):
        for j in range(h):
            s = q[i, j] @ k[i, j].T * scale
            if causal:
                s = s.masked_fill(torch.ones(tq, tk, dtype=torch.bool).triu(1), float("-inf"))
            if mask is not None:
                m = mask.expand(b, h, tq, tk)[i, j]
                s = s.masked_fill(~m, float("-inf")) if m.dtype == torch.bool else s + m.double()
            out[i, j] = torch.softmax(s, -1)
    return out.numpy()


CASES = {
    "plain": dict(),
    "causal": dict(is_causal=True),
    "bool_2d": dict(attn_mask=torch.ones(6, 6, dtype=torch.bool).tril()),
    "bool_padding": dict(attn_mask=torch.tensor([1, 1, 1, 1, 0, 0], dtype=torch.bool).view(1, 1, 1, 6)),
    "float_bias": dict(attn_mask=torch.linspace(-2, 0, 6).view(1, 1, 1, 6)),
    "float_minus_inf": dict(attn_mask=torch.zeros(2, 1, 6, 6).masked_fill(torch.ones(6, 6, dtype=torch.bool).triu(1),
                                                                           float("-inf"))),
}


@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize("gqa", [False, True])
def test_sdpa_weights_match_recomputation_and_fused_output(case, gqa, seeded):
    block = Block(kv_heads=2 if gqa else None, scale=0.3 if case == "plain" else None)
    x = torch.randn(2, 6, 16)
    kw = CASES[case]
    with attnscope.capture(block) as cap:
        y = block(x, **kw)
    (rec,) = cap.attention
    s = block.seen
    ref = brute_weights(s["q"], s["k"], kw.get("attn_mask"), kw.get("is_causal", False), block.scale)
    np.testing.assert_allclose(rec.weights, ref, atol=1e-6)  # reference: independent recomputation
    v = s["v"].repeat_interleave(2, dim=1) if gqa else s["v"]
    recomposed = torch.from_numpy(rec.weights) @ v  # weights @ V must give the fused kernel's output
    torch.testing.assert_close(recomposed, s["out"], atol=1e-5, rtol=1e-5)
    assert rec.source == "sdpa" and rec.kind == "self" and rec.shape == (2, 4, 6, 6)
    assert rec.causal == (case in ("causal", "bool_2d", "float_minus_inf"))
    if case == "bool_padding":
        assert not rec.allowed_full()[..., 4:].any()
    if case in ("plain", "float_bias"):
        assert rec.allowed is None  # no key forbidden
    torch.testing.assert_close(y, block(x, **kw))  # the same output without capture


def test_fully_masked_row_is_zero_like_the_fused_kernel(seeded):
    block = Block()
    x = torch.randn(1, 6, 16)
    mask = torch.ones(1, 1, 6, 6, dtype=torch.bool)
    mask[..., 2, :] = False  # query 2 may see nothing
    with attnscope.capture(block) as cap:
        block(x, attn_mask=mask)
    rec = cap.attention[0]
    assert np.all(rec.weights[0, :, 2] == 0)
    torch.testing.assert_close(block.seen["out"][0, :, 2], torch.zeros(4, 4))  # fused kernel: zero output there
    table = cap.head_table()
    assert (table["rows"] == 5).all()  # the empty row is not counted


class CrossBlock(nn.Module):
    def __init__(self, d=16, h=2):
        super().__init__()
        self.h, self.q, self.kv = h, nn.Linear(d, d), nn.Linear(d, 2 * d)

    def forward(self, x, memory):
        b, t, d = x.shape
        q = self.q(x).view(b, t, self.h, -1).transpose(1, 2)
        k, v = self.kv(memory).view(b, memory.size(1), 2, self.h, -1).permute(2, 0, 3, 1, 4)
        return F.scaled_dot_product_attention(q, k, v).transpose(1, 2).reshape(b, t, d)


def test_cross_attention_is_labelled_cross(seeded):
    block = CrossBlock()
    with attnscope.capture(block) as cap:
        block(torch.randn(2, 3, 16), torch.randn(2, 5, 16))
    assert cap.attention[0].kind == "cross" and cap.attention[0].shape == (2, 2, 3, 5)
    with attnscope.capture(block, kinds={"": "self"}) as cap2:  # the user's word wins
        block(torch.randn(2, 3, 16), torch.randn(2, 5, 16))
    assert cap2.attention[0].kind == "self"


def test_calls_outside_the_model_are_not_recorded(seeded):
    block, other = Block(), Block()
    x = torch.randn(1, 4, 16)
    with attnscope.capture(block) as cap:
        other(x)  # another model's attention
        block(x)
        F.scaled_dot_product_attention(torch.randn(1, 1, 2, 4), torch.randn(1, 1, 2, 4), torch.randn(1, 1, 2, 4))
    assert len(cap.attention) == 1 and cap.attention[0].name == ""
