"""Small packed / windowed / prefix decoders for the mask-contract tests: correct twins and planted bugs.

Masks here are written out by hand with plain torch comparisons (not with attnscope's pattern builders), so
the probe is checked against code that does not share its assumptions. Each planted bug sits in block 1 of
2, so blame must point past a correct block 0.
"""

from __future__ import annotations

import math

import torch
from torch import nn

VOCAB, WIDTH, HEADS = 40, 24, 2


def hand_mask(kind: str, T: int, docs: torch.Tensor | None, param: int) -> torch.Tensor:
    """Allowed (True = may attend) as ``(B or 1, T, T)``, written directly from each convention's definition."""
    i = torch.arange(T).view(T, 1)
    j = torch.arange(T).view(1, T)
    if kind == "documents":  # causal inside a document
        same = docs[:, :, None] == docs[:, None, :]  # (B, T, T)
        return same & (j <= i)
    if kind == "documents_leak":  # the classic bug: position ids reset, mask left plain causal
        return (j <= i)[None]
    if kind == "window":  # `param` keys: the query and param - 1 before it
        return ((j <= i) & (i - j < param))[None]
    if kind == "window_off_by_one":  # one key too many: i - j <= param
        return ((j <= i) & (i - j <= param))[None]
    if kind == "prefix":  # bidirectional over the first `param`, causal after
        return ((j < param) | (j <= i))[None]
    if kind == "prefix_long":  # the prefix reaches one position too far
        return ((j < param + 1) | (j <= i))[None]
    if kind == "causal":
        return (j <= i)[None]
    raise ValueError(kind)


class MaskedAttention(nn.Module):
    """Self-attention written out by hand: softmax(QKᵀ/√d, masked) V."""

    def __init__(self, kind: str, param: int = 0) -> None:
        super().__init__()
        self.kind, self.param = kind, param
        self.qkv = nn.Linear(WIDTH, 3 * WIDTH)
        self.out = nn.Linear(WIDTH, WIDTH)

    def forward(self, h: torch.Tensor, docs: torch.Tensor | None = None) -> torch.Tensor:
        B, T, D = h.shape
        q, k, v = self.qkv(h).view(B, T, 3, HEADS, D // HEADS).permute(2, 0, 3, 1, 4)  # (B, H, T, Dh)
        scores = q @ k.transpose(-2, -1) / math.sqrt(D // HEADS)  # (B, H, Tq, Tk)
        allowed = hand_mask(self.kind, T, docs, self.param)[:, None]  # (B or 1, 1, Tq, Tk)
        y = scores.masked_fill(~allowed, float("-inf")).softmax(-1) @ v  # (B, H, Tq, Dh)
        return self.out(y.transpose(1, 2).reshape(B, T, D))


class ShiftMix(nn.Module):
    """A causal depthwise mix of the previous position (a 2-tap convolution over the sequence).

    ``per_document=True`` zeroes the tap where the previous position belongs to another document (correct
    for packed rows); False lets it cross the boundary (the planted leak outside attention).
    """

    def __init__(self, per_document: bool) -> None:
        super().__init__()
        self.per_document = per_document
        self.tap = nn.Parameter(torch.randn(WIDTH) * 0.5)

    def forward(self, h: torch.Tensor, docs: torch.Tensor | None = None) -> torch.Tensor:
        prev = torch.cat([torch.zeros_like(h[:, :1]), h[:, :-1]], 1)  # (B, T, D): h at t - 1
        if self.per_document and docs is not None:
            same = torch.cat([torch.zeros_like(docs[:, :1], dtype=torch.bool), docs[:, 1:] == docs[:, :-1]], 1)
            prev = prev * same[..., None]  # (B, T, D)
        return h + self.tap * prev


class Block(nn.Module):
    def __init__(self, kind: str, param: int = 0, mix: nn.Module | None = None) -> None:
        super().__init__()
        self.norm = nn.LayerNorm(WIDTH)
        self.attn = MaskedAttention(kind, param)
        self.mix = mix
        self.mlp = nn.Sequential(nn.Linear(WIDTH, 2 * WIDTH), nn.GELU(), nn.Linear(2 * WIDTH, WIDTH))

    def forward(self, h: torch.Tensor, docs: torch.Tensor | None = None) -> torch.Tensor:
        h = h + self.attn(self.norm(h), docs)
        if self.mix is not None:
            h = self.mix(h, docs)
        return h + self.mlp(h)


class PackedDecoder(nn.Module):
    """Token ids ``(B, T)`` -> logits ``(B, T, V)``; ``docs`` ``(B, T)`` document ids for packed rows."""

    def __init__(self, block0: Block, block1: Block, max_len: int = 64) -> None:
        super().__init__()
        self.tok = nn.Embedding(VOCAB, WIDTH)
        self.pos = nn.Embedding(max_len, WIDTH)
        self.blocks = nn.ModuleList([block0, block1])
        self.head = nn.Linear(WIDTH, VOCAB)

    def forward(self, ids: torch.Tensor, docs: torch.Tensor | None = None) -> torch.Tensor:
        T = ids.shape[1]
        h = self.tok(ids) + self.pos(torch.arange(T))  # (B, T, D)
        for block in self.blocks:
            h = block(h, docs)
        return self.head(h)


def build(kind0: str, kind1: str, param: int = 0, mix1: nn.Module | None = None, seed: int = 0) -> PackedDecoder:
    torch.manual_seed(seed)
    return PackedDecoder(Block(kind0, param), Block(kind1, param, mix1)).eval()


def with_docs(model: nn.Module, docs: torch.Tensor):
    """The callable a probe gets: ids (N·B, T) -> logits, the document ids repeated for stacked copies."""
    return lambda ids: model(ids, docs.repeat(ids.shape[0] // docs.shape[0], 1))
