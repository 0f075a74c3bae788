"""A zoo of small decoders for the probe tests: correct ones and ones with a planted leak of each kind.

Every decoder maps token ids ``(B, T)`` (or float embeddings ``(B, T, D)``) to logits ``(B, T, V)``.
In the hand-written decoders the planted part sits in block 1 of 2, so blame must point past a correct
block 0; the torch-layer models leak from their first layer.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn


@dataclass
class ZooConfig:
    vocab: int = 50       # token ids 0..49
    width: int = 32       # model width D (kept different from T so no axis is mistaken for positions)
    heads: int = 2        # attention heads
    layers: int = 2       # blocks
    max_len: int = 32     # learned position embeddings
    dropout: float = 0.0  # dropout inside blocks (the dropout test turns it on)


class Attention(nn.Module):
    """Multi-head self-attention written out by hand, with the mask chosen by *kind*.

    kinds: "causal" (correct), "off_by_one" (allows one key ahead), "unapplied" (mask built, never used),
    "sdpa_causal" (F.scaled_dot_product_attention, is_causal=True), "sdpa_full" (is_causal=False).
    """

    def __init__(self, cfg: ZooConfig, kind: str = "causal") -> None:
        super().__init__()
        self.kind, self.heads = kind, cfg.heads
        self.qkv = nn.Linear(cfg.width, 3 * cfg.width)
        self.out = nn.Linear(cfg.width, cfg.width)
        self.drop = nn.Dropout(cfg.dropout)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        B, T, D = h.shape
        q, k, v = self.qkv(h).view(B, T, 3, self.heads, D // self.heads).permute(2, 0, 3, 1, 4)  # (B, H, T, Dh)
        if self.kind.startswith("sdpa"):
            y = F.scaled_dot_product_attention(q, k, v, is_causal=self.kind == "sdpa_causal")
        else:
            scores = q @ k.transpose(-2, -1) / math.sqrt(D // self.heads)  # (B, H, Tq, Tk)
            diagonal = 1 if self.kind == "off_by_one" else 0
            allowed = torch.tril(torch.ones(T, T, dtype=torch.bool, device=h.device), diagonal=diagonal)
            if self.kind != "unapplied":
                scores = scores.masked_fill(~allowed, float("-inf"))
            y = self.drop(scores.softmax(dim=-1)) @ v  # (B, H, Tq, Dh)
        return self.out(y.transpose(1, 2).reshape(B, T, D))


class SeqConv(nn.Module):
    """A Conv1d over positions; causal=True pads two steps on the left only, False pads one on each side."""

    def __init__(self, cfg: ZooConfig, causal: bool) -> None:
        super().__init__()
        self.causal = causal
        self.conv = nn.Conv1d(cfg.width, cfg.width, kernel_size=3, padding=0 if causal else 1)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        c = h.transpose(1, 2)  # (B, D, T)
        if self.causal:
            c = F.pad(c, (2, 0))
        return self.conv(c).transpose(1, 2)


class SeqInstanceNorm(nn.Module):
    """InstanceNorm1d on (B, D, T): normalises each channel over the sequence, also in eval mode."""

    def __init__(self, cfg: ZooConfig) -> None:
        super().__init__()
        self.norm = nn.InstanceNorm1d(cfg.width, affine=True)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.norm(h.transpose(1, 2)).transpose(1, 2)


class SeqLayerNorm(nn.Module):
    """LayerNorm over the sequence axis (normalized_shape = T) instead of the width."""

    def __init__(self, cfg: ZooConfig, T: int) -> None:
        super().__init__()
        self.norm = nn.LayerNorm(T)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.norm(h.transpose(1, 2)).transpose(1, 2)


class MeanPool(nn.Module):
    """Adds a projection of the mean over all positions (the mean is taken in this module's own code)."""

    def __init__(self, cfg: ZooConfig) -> None:
        super().__init__()
        self.proj = nn.Linear(cfg.width, cfg.width)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.proj(h.mean(dim=1, keepdim=True)).expand_as(h)


class PoolMix(nn.Module):
    """Adds the average over positions, taken by an nn.AdaptiveAvgPool1d submodule."""

    def __init__(self, cfg: ZooConfig) -> None:
        super().__init__()
        self.pool = nn.AdaptiveAvgPool1d(1)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.pool(h.transpose(1, 2)).transpose(1, 2).expand_as(h)  # (B, 1, D) -> (B, T, D)


class Lookahead(nn.Module):
    """Shifts the sequence one step back with torch.roll: position i receives position i + 1."""

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return torch.roll(h, shifts=-1, dims=1)


class PairLeak(nn.Module):
    """Position *i* receives a copy of position *j* (one planted pair, nothing else)."""

    def __init__(self, i: int, j: int) -> None:
        super().__init__()
        self.i, self.j = i, j

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        extra = torch.zeros_like(h)
        extra[:, self.i] = h[:, self.j]
        return extra


class Block(nn.Module):
    """Pre-norm block: attention, an optional sequence mixer (the planted part), an MLP."""

    def __init__(self, cfg: ZooConfig, attn: str = "causal", mix: nn.Module | None = None) -> None:
        super().__init__()
        self.norm1 = nn.LayerNorm(cfg.width)
        self.attn = Attention(cfg, attn)
        self.mix = mix
        self.norm2 = nn.LayerNorm(cfg.width)
        self.mlp = nn.Sequential(nn.Linear(cfg.width, 2 * cfg.width), nn.GELU(), nn.Linear(2 * cfg.width, cfg.width),
                                 nn.Dropout(cfg.dropout))

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        h = h + self.attn(self.norm1(h))
        if self.mix is not None:
            h = h + self.mix(h)
        return h + self.mlp(self.norm2(h))


class TinyDecoder(nn.Module):
    """Token and position embeddings, blocks, a final norm and an LM head. ``front`` acts on the embeddings."""

    def __init__(self, cfg: ZooConfig, blocks: list[Block] | None = None, front: nn.Module | None = None) -> None:
        super().__init__()
        self.tok = nn.Embedding(cfg.vocab, cfg.width)
        self.pos = nn.Embedding(cfg.max_len, cfg.width)
        self.front = front
        self.blocks = nn.ModuleList(blocks or [Block(cfg) for _ in range(cfg.layers)])
        self.norm = nn.LayerNorm(cfg.width)
        self.head = nn.Linear(cfg.width, cfg.vocab)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = x if x.is_floating_point() else self.tok(x)  # (B, T, D)
        h = h + self.pos(torch.arange(h.shape[1], device=h.device))
        if self.front is not None:
            h = h + self.front(h)
        for block in self.blocks:
            h = block(h)
        return self.head(self.norm(h))  # (B, T, V)


class TorchEncoderLM(nn.Module):
    """nn.TransformerEncoder used as a decoder: correct only when the causal mask is passed."""

    def __init__(self, cfg: ZooConfig, causal: bool = True) -> None:
        super().__init__()
        self.causal = causal
        self.tok = nn.Embedding(cfg.vocab, cfg.width)
        layer = nn.TransformerEncoderLayer(cfg.width, cfg.heads, 2 * cfg.width, dropout=cfg.dropout, batch_first=True)
        self.encoder = nn.TransformerEncoder(layer, cfg.layers, enable_nested_tensor=False)
        self.head = nn.Linear(cfg.width, cfg.vocab)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.tok(x)  # (B, T, D)
        if self.causal:
            mask = nn.Transformer.generate_square_subsequent_mask(h.shape[1], device=h.device)
            h = self.encoder(h, mask=mask, is_causal=True)
        else:
            h = self.encoder(h)
        return self.head(h)


class Seq2Seq(nn.Module):
    """nn.TransformerEncoder over the source, nn.TransformerDecoder over the target; tgt_mask optional."""

    def __init__(self, cfg: ZooConfig, tgt_mask: bool = True) -> None:
        super().__init__()
        self.use_mask = tgt_mask
        self.src_tok = nn.Embedding(cfg.vocab, cfg.width)
        self.tgt_tok = nn.Embedding(cfg.vocab, cfg.width)
        enc = nn.TransformerEncoderLayer(cfg.width, cfg.heads, 2 * cfg.width, dropout=0.0, batch_first=True)
        dec = nn.TransformerDecoderLayer(cfg.width, cfg.heads, 2 * cfg.width, dropout=0.0, batch_first=True)
        self.encoder = nn.TransformerEncoder(enc, cfg.layers, enable_nested_tensor=False)
        self.decoder = nn.TransformerDecoder(dec, cfg.layers)
        self.head = nn.Linear(cfg.width, cfg.vocab)

    def forward(self, src: torch.Tensor, tgt: torch.Tensor) -> torch.Tensor:
        memory = self.encoder(self.src_tok(src))  # (B, S, D)
        t = self.tgt_tok(tgt)  # (B, T, D)
        mask = nn.Transformer.generate_square_subsequent_mask(t.shape[1]) if self.use_mask else None
        return self.head(self.decoder(t, memory, tgt_mask=mask, tgt_is_causal=self.use_mask))


T_ZOO = 16  # positions used by the tests (LayerNorm over the sequence needs it fixed)


def _second(c: ZooConfig, **planted) -> TinyDecoder:
    """A correct block 0, then block 1 with the planted part."""
    return TinyDecoder(c, [Block(c), Block(c, **planted)])


# name -> (builder, dotted name of the module that brings the leak in)
LEAKY = {
    "symmetric_conv": (lambda c: _second(c, mix=SeqConv(c, causal=False)), "blocks.1.mix.conv"),
    "instance_norm_over_seq": (lambda c: _second(c, mix=SeqInstanceNorm(c)), "blocks.1.mix.norm"),
    "layer_norm_over_seq": (lambda c: _second(c, mix=SeqLayerNorm(c, T_ZOO)), "blocks.1.mix.norm"),
    "mean_pool": (lambda c: _second(c, mix=MeanPool(c)), "blocks.1.mix"),
    "adaptive_pool": (lambda c: _second(c, mix=PoolMix(c)), "blocks.1.mix.pool"),
    "off_by_one_mask": (lambda c: _second(c, attn="off_by_one"), "blocks.1.attn"),
    "mask_never_applied": (lambda c: _second(c, attn="unapplied"), "blocks.1.attn"),
    "roll_lookahead": (lambda c: _second(c, mix=Lookahead()), "blocks.1.mix"),
    "sdpa_not_causal": (
        lambda c: TinyDecoder(c, [Block(c, attn="sdpa_causal"), Block(c, attn="sdpa_full")]), "blocks.1.attn"),
    "encoder_without_mask": (lambda c: TorchEncoderLM(c, causal=False), "encoder.layers.0.self_attn"),
}

CORRECT = {
    "hand_written_causal": lambda c: TinyDecoder(c),
    "sdpa_causal": lambda c: TinyDecoder(c, [Block(c, attn="sdpa_causal") for _ in range(c.layers)]),
    "causal_conv": lambda c: TinyDecoder(c, [Block(c), Block(c, mix=SeqConv(c, causal=True))]),
    "torch_encoder_causal_mask": lambda c: TorchEncoderLM(c, causal=True),
}


def build(builder, seed: int = 0, **cfg) -> nn.Module:
    """A zoo model with fixed random weights, in eval mode."""
    torch.manual_seed(seed)
    return builder(ZooConfig(**cfg)).eval()
