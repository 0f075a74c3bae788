"""A small decoder whose attention is FlexAttention: the pattern is a ``mask_mod``, the bias a ``score_mod``.

Rows are *packed*: several short documents (warehouse pick lists) share one training row, and ``docs`` gives
each position's document id. The mask the model builds each forward says which keys a query may see:

* ``pattern="causal"``: keys at or before the query, across documents too (the packed-row leak: resetting
  position ids is not enough, document 2 still reads document 1);
* ``pattern="documents"``: causal inside each document, nothing across (the fix);
* ``pattern="window"``: the query itself plus the ``window - 1`` keys before it; with ``window_off_by_one=True``
  the planted bug ``q_idx - kv_idx <= window`` lets ``window + 1`` keys in.

:meth:`FlexDecoder.mask_mod` returns the very predicate the model hands to ``create_block_mask``, so a check
can be given the model's own contract. ``alibi=True`` adds a per-head distance bias through ``score_mod``
(ALiBi, Press et al., ICLR 2022).

FlexAttention has no backward pass on CPU, so training runs ``forward(..., dense=True)``: the same
``mask_mod`` made dense by ``create_mask`` and handed to ``F.scaled_dot_product_attention`` (same weights, same
pattern; ``alibi`` is flex-only).

>>> import torch, warnings
>>> model = FlexDecoder(FlexDecoderConfig(pattern="documents")).eval()
>>> ids = torch.randint(0, 16, (1, 8)); docs = torch.tensor([[0, 0, 0, 1, 1, 1, 1, 1]])
>>> with warnings.catch_warnings(), torch.no_grad():   # no FlexAttention backward on CPU
...     warnings.simplefilter("ignore")            # FlexAttention's note that it runs uncompiled
...     model(ids, docs).shape
torch.Size([1, 8, 16])
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn
from torch.nn.attention.flex_attention import create_block_mask, create_mask, flex_attention

__all__ = ["FlexDecoder", "FlexDecoderConfig", "FlexSelfAttention", "PATTERNS"]

PATTERNS = ("causal", "documents", "window")


@dataclass
class FlexDecoderConfig:
    """Sizes of :class:`FlexDecoder` and the attention pattern it builds."""

    vocab_size: int = 16  # token ids 0..15
    d_model: int = 32  # width D of the residual stream
    heads: int = 4  # attention heads per block
    layers: int = 2  # transformer blocks
    max_len: int = 256  # learned positions
    pattern: str = "documents"  # one of PATTERNS
    window: int = 8  # keys a query sees with pattern="window", itself included
    window_off_by_one: bool = False  # the planted bug: q - kv <= window (window + 1 keys)
    alibi: bool = False  # per-head distance bias through score_mod

    def __post_init__(self) -> None:
        if self.pattern not in PATTERNS:
            raise ValueError(f"pattern must be one of {PATTERNS}; received {self.pattern!r}")


class FlexSelfAttention(nn.Module):
    """Multi-head self-attention through ``flex_attention`` with the model's block mask and score_mod."""

    def __init__(self, config: FlexDecoderConfig) -> None:
        super().__init__()
        self.heads = config.heads
        self.qkv = nn.Linear(config.d_model, 3 * config.d_model)
        self.out_proj = nn.Linear(config.d_model, config.d_model)
        slopes = torch.tensor([2.0 ** (-8.0 * (h + 1) / config.heads) for h in range(config.heads)])
        self.register_buffer("slopes", slopes, persistent=False)  # (H,)
        self.alibi = config.alibi

    def score_mod(self, score: torch.Tensor, b: torch.Tensor, h: torch.Tensor, q_idx: torch.Tensor,
                  kv_idx: torch.Tensor) -> torch.Tensor:
        """ALiBi: minus slope(h) times the distance back to the key."""
        return score - self.slopes[h] * (q_idx - kv_idx)

    def forward(self, x: torch.Tensor, block_mask) -> torch.Tensor:
        b, t, d = x.shape
        q, k, v = (z.view(b, t, self.heads, d // self.heads).transpose(1, 2)  # (B, H, T, D/H)
                   for z in self.qkv(x).chunk(3, dim=-1))
        if isinstance(block_mask, torch.Tensor):  # dense (B, 1, T, T) bool: the training path
            y = F.scaled_dot_product_attention(q, k, v, attn_mask=block_mask)
        else:
            y = flex_attention(q, k, v, score_mod=self.score_mod if self.alibi else None, block_mask=block_mask)
        return self.out_proj(y.transpose(1, 2).reshape(b, t, d))  # (B, T, D)


class Block(nn.Module):
    def __init__(self, config: FlexDecoderConfig) -> None:
        super().__init__()
        self.ln1, self.ln2 = nn.LayerNorm(config.d_model), nn.LayerNorm(config.d_model)
        self.attn = FlexSelfAttention(config)
        self.mlp = nn.Sequential(nn.Linear(config.d_model, 4 * config.d_model), nn.GELU(),
                                 nn.Linear(4 * config.d_model, config.d_model))

    def forward(self, x: torch.Tensor, block_mask) -> torch.Tensor:
        x = x + self.attn(self.ln1(x), block_mask)
        return x + self.mlp(self.ln2(x))


class FlexDecoder(nn.Module):
    """Token ids ``(B, T)`` and document ids ``(B, T)`` to logits ``(B, T, V)``."""

    def __init__(self, config: FlexDecoderConfig) -> None:
        super().__init__()
        self.config = config
        self.embed = nn.Embedding(config.vocab_size, config.d_model)
        self.positions = nn.Embedding(config.max_len, config.d_model)
        self.blocks = nn.ModuleList(Block(config) for _ in range(config.layers))
        self.ln_f = nn.LayerNorm(config.d_model)
        self.head = nn.Linear(config.d_model, config.vocab_size, bias=False)
        nn.init.normal_(self.embed.weight, std=4.0 / math.sqrt(config.d_model))

    def mask_mod(self, docs: torch.Tensor | None) -> Callable[..., torch.Tensor]:
        """The predicate ``(b, h, q_idx, kv_idx) -> bool`` this model attends with, for document ids *docs*."""
        cfg = self.config
        if cfg.pattern == "documents":
            if docs is None:
                raise ValueError("pattern='documents' needs the document id of every position (docs=)")
            return lambda b, h, q_idx, kv_idx: (docs[b, q_idx] == docs[b, kv_idx]) & (q_idx >= kv_idx)
        if cfg.pattern == "window":
            reach = cfg.window if cfg.window_off_by_one else cfg.window - 1  # THE PLANTED BUG when off by one
            return lambda b, h, q_idx, kv_idx: (q_idx >= kv_idx) & (q_idx - kv_idx <= reach)
        return lambda b, h, q_idx, kv_idx: q_idx >= kv_idx

    def forward(self, ids: torch.Tensor, docs: torch.Tensor | None = None, *, dense: bool = False) -> torch.Tensor:
        B, T = ids.shape
        if dense and self.config.alibi:
            raise ValueError("dense=True (the SDPA training path) has no score_mod; build the model with alibi=False")
        make = create_mask if dense else create_block_mask
        block_mask = make(self.mask_mod(docs), B, None, T, T, device="cpu")
        x = self.embed(ids) + self.positions(torch.arange(T, device=ids.device))  # (B, T, D)
        for block in self.blocks:
            x = block(x, block_mask)
        return self.head(self.ln_f(x))
