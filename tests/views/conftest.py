"""Real captures of real torch models for the view tests."""

from __future__ import annotations

import torch
import pytest
from torch import nn

import attnscope

HOSTILE = "<script>alert(1)</script>"
SOURCE = ["<s>", HOSTILE, "lamp", "is", "lit", "</s>"]
TARGET = ["<s>", "la", "lampe", "brille"]


def translator_capture(batch: int = 2):
    """nn.Transformer (self-attention in encoder and decoder, cross-attention, causal target mask)."""
    torch.manual_seed(0)
    model = nn.Transformer(d_model=16, nhead=4, num_encoder_layers=2, num_decoder_layers=2, dim_feedforward=32,
                           dropout=0.0, batch_first=True).eval()
    src, tgt = torch.randn(batch, len(SOURCE), 16), torch.randn(batch, len(TARGET), 16)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(src, tgt, tgt_mask=model.generate_square_subsequent_mask(len(TARGET)), tgt_is_causal=True)
    return cap


@pytest.fixture(scope="module")
def translator():
    return translator_capture()


class SharedMHA(nn.Module):
    """One nn.MultiheadAttention run through capture; the test asks torch itself for the weights too."""

    def __init__(self, d: int = 8, h: int = 2) -> None:
        super().__init__()
        self.attn = nn.MultiheadAttention(d, h, batch_first=True)

    def forward(self, x: torch.Tensor, pad: torch.Tensor | None = None) -> torch.Tensor:
        return self.attn(x, x, x, key_padding_mask=pad)[0]


@pytest.fixture(scope="module")
def mha_case():
    """A capture of a padded 2-head MHA, and torch's own per-head weights of the same call."""
    torch.manual_seed(1)
    model = SharedMHA().eval()
    x = torch.randn(2, 5, 8)
    pad = torch.tensor([[False] * 5, [False, False, False, True, True]])  # item 1: last two keys are padding
    with torch.no_grad():
        # reference: torch's own per-head weights
        _, ref = model.attn(x, x, x, key_padding_mask=pad, need_weights=True, average_attn_weights=False)
        with attnscope.capture(model) as cap:
            model(x, pad)
    return cap, ref.numpy(), pad.numpy()


class LeakyBlock(nn.Module):
    """A planted bug: the softmax ignores the causal mask, while the block reports it as applied."""

    def __init__(self, d: int = 8, h: int = 2) -> None:
        super().__init__()
        self.h = h
        self.qk = nn.Linear(d, 2 * d)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        b, t, d = x.shape
        q, k = self.qk(x).view(b, t, 2, self.h, d // self.h).permute(2, 0, 3, 1, 4)  # (B, H, T, d)
        causal = torch.ones(t, t, dtype=torch.bool).tril()  # (T, T)
        att = (q @ k.transpose(-2, -1) / (d // self.h) ** 0.5).softmax(-1)  # bug: no masked_fill
        att = attnscope.tap(att, allowed=causal)  # (B, H, T, T)
        return (att @ q).transpose(1, 2).reshape(b, t, d)


@pytest.fixture(scope="module")
def leaky():
    torch.manual_seed(2)
    model = LeakyBlock().eval()
    x = torch.randn(1, 6, 8)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(x)
    return cap
