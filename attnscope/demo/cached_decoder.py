"""A small decoder with a key/value cache, and its twins with the cache bugs people keep shipping.

One forward over the whole sequence (``model(ids)``) and incremental decoding with the cache
(``model.step(chunk, cache)``, chunk after chunk) must give the same logits at every position. The correct
model builds every mask and bias from *absolute* positions: query ``i`` of a chunk that starts after ``past``
cached keys sits at position ``past + i``. Each planted bug (``cache_bug=``) breaks that in one place, always in
:class:`CachedSelfAttention`'s forward, and leaves the full forward untouched, so training loss and
``check_causal`` on the full forward see nothing:

* ``"mask_only_without_cache"``: the causal mask is applied only ``if cache is None``; a multi-token chunk
  that arrives with a cache (a prefill after a system prompt, speculative decoding) attends to its own future.
* ``"top_left_causal"``: ``is_causal=True`` in ``F.scaled_dot_product_attention`` with a query shorter than
  the keys; torch aligns that mask top-left, so a one-token decode step sees key 0 only.
  ``torch.nn.attention.bias.causal_lower_right`` is the bottom-right mask the step needs.
* ``"window_over_query"``: the sliding-window band is built over the chunk's queries only and every cached
  key is let through, so decode steps see further back than the window.
* ``"alibi_over_query"``: the ALiBi distance bias (Press et al., ICLR 2022) uses query positions ``0..t-1``
  of the chunk instead of ``past..past+t-1``.

>>> import torch
>>> model = CachedDecoder(CachedDecoderConfig()).eval()
>>> ids = torch.randint(0, 16, (1, 6))
>>> logits, cache = model.step(ids[:, :4], None)
>>> more, cache = model.step(ids[:, 4:], cache)
>>> torch.allclose(torch.cat([logits, more], 1), model(ids), atol=1e-5)
True
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn

__all__ = ["CACHE_BUGS", "CachedDecoder", "CachedDecoderConfig", "CachedSelfAttention"]

#: The planted bugs, by name; ``"none"`` is the correct model.
CACHE_BUGS = ("none", "mask_only_without_cache", "top_left_causal", "window_over_query", "alibi_over_query")

KV = tuple[torch.Tensor, torch.Tensor]


@dataclass
class CachedDecoderConfig:
    """Sizes of :class:`CachedDecoder`, its attention pattern and which cache bug it carries."""

    vocab_size: int = 16  # token ids 0..15
    d_model: int = 32  # width D of the residual stream
    heads: int = 4  # attention heads per block; D / heads dims each
    layers: int = 2  # transformer blocks
    max_len: int = 64  # learned positions (unused with ALiBi)
    window: int | None = None  # sliding window: query i sees keys i-window+1..i; None: plain causal
    alibi: bool = False  # ALiBi distance bias instead of learned positions
    cache_bug: str = "none"  # one of CACHE_BUGS

    def __post_init__(self) -> None:
        if self.cache_bug not in CACHE_BUGS:
            raise ValueError(f"cache_bug must be one of {CACHE_BUGS}; received {self.cache_bug!r}")


class CachedSelfAttention(nn.Module):
    """Multi-head causal self-attention over the cached keys plus the chunk's own; returns the grown cache."""

    def __init__(self, config: CachedDecoderConfig) -> None:
        super().__init__()
        self.config, self.heads = config, config.heads
        self.qkv = nn.Linear(config.d_model, 3 * config.d_model)
        self.out_proj = nn.Linear(config.d_model, config.d_model)
        # ALiBi slopes 2^(-8h/H), h = 1..H (Press et al., ICLR 2022)
        slopes = torch.tensor([2.0 ** (-8.0 * (h + 1) / config.heads) for h in range(config.heads)])
        self.register_buffer("slopes", slopes.view(-1, 1, 1), persistent=False)  # (H, 1, 1)

    def _mask(self, t: int, past: int) -> torch.Tensor:
        """Additive float mask ``(H, t, past + t)`` built from absolute positions (the correct form)."""
        cfg = self.config
        q_pos = torch.arange(past, past + t)[:, None]  # (t, 1) absolute positions of the chunk's queries
        if cfg.cache_bug == "alibi_over_query":
            q_pos = torch.arange(t)[:, None]  # THE PLANTED BUG: positions of the chunk, not of the sequence
        k_pos = torch.arange(past + t)[None, :]  # (1, S)
        allowed = k_pos <= (torch.arange(past, past + t)[:, None])  # (t, S) causal in absolute positions
        if cfg.window is not None:
            if cfg.cache_bug == "window_over_query":  # THE PLANTED BUG: band over the chunk, cached keys all let in
                band = torch.ones(t, t, dtype=torch.bool).tril().triu(-(cfg.window - 1))  # (t, t)
                allowed = torch.cat([torch.ones(t, past, dtype=torch.bool), band], dim=1)  # (t, S)
            else:
                allowed = allowed & (torch.arange(past, past + t)[:, None] - k_pos < cfg.window)
        bias = torch.zeros(self.heads, t, past + t)  # (H, t, S)
        if cfg.alibi:
            bias = -self.slopes * (q_pos - k_pos).abs().float()  # (H, t, S)
        return bias.masked_fill(~allowed, float("-inf"))

    def forward(self, x: torch.Tensor, cache: KV | None) -> tuple[torch.Tensor, KV]:
        b, t, d = x.shape
        q, k, v = (z.view(b, t, self.heads, d // self.heads).transpose(1, 2)  # (B, H, t, D/H)
                   for z in self.qkv(x).chunk(3, dim=-1))
        past = 0 if cache is None else cache[0].size(2)
        if cache is not None:
            k, v = torch.cat([cache[0], k], dim=2), torch.cat([cache[1], v], dim=2)  # (B, H, S, D/H)
        bug = self.config.cache_bug
        if bug == "top_left_causal":
            y = F.scaled_dot_product_attention(q, k, v, is_causal=True)  # THE PLANTED BUG: top-left alignment
        elif bug == "mask_only_without_cache" and cache is not None:
            y = F.scaled_dot_product_attention(q, k, v)  # THE PLANTED BUG: no mask once a cache exists
        else:
            y = F.scaled_dot_product_attention(q, k, v, attn_mask=self._mask(t, past))  # (B, H, t, D/H)
        return self.out_proj(y.transpose(1, 2).reshape(b, t, d)), (k, v)


class Block(nn.Module):
    """Pre-LN block: x + attn(ln(x)), then x + mlp(ln(x))."""

    def __init__(self, config: CachedDecoderConfig) -> None:
        super().__init__()
        self.ln1, self.ln2 = nn.LayerNorm(config.d_model), nn.LayerNorm(config.d_model)
        self.attn = CachedSelfAttention(config)
        self.mlp = nn.Sequential(nn.Linear(config.d_model, 4 * config.d_model), nn.GELU(),
                                 nn.Linear(4 * config.d_model, config.d_model))

    def forward(self, x: torch.Tensor, cache: KV | None) -> tuple[torch.Tensor, KV]:
        a, cache = self.attn(self.ln1(x), cache)
        x = x + a
        return x + self.mlp(self.ln2(x)), cache


class CachedDecoder(nn.Module):
    """Token ids ``(B, T)`` to logits ``(B, T, V)``; :meth:`step` does the same one chunk at a time."""

    def __init__(self, config: CachedDecoderConfig) -> None:
        super().__init__()
        self.config = config
        self.embed = nn.Embedding(config.vocab_size, config.d_model)
        self.positions = None if config.alibi else nn.Embedding(config.max_len, config.d_model)
        self.blocks = nn.ModuleList(Block(config) for _ in range(config.layers))
        self.ln_f = nn.LayerNorm(config.d_model)
        self.head = nn.Linear(config.d_model, config.vocab_size, bias=False)
        nn.init.normal_(self.embed.weight, std=1.0 / math.sqrt(config.d_model) * 4)

    def step(self, ids: torch.Tensor, cache: list[KV] | None) -> tuple[torch.Tensor, list[KV]]:
        """Logits of one chunk ``(B, t, V)`` and the cache grown by it (``cache=None`` at the start)."""
        past = 0 if cache is None else cache[0][0].size(2)
        x = self.embed(ids)  # (B, t, D)
        if self.positions is not None:
            x = x + self.positions(torch.arange(past, past + ids.size(1), device=ids.device))
        grown = []
        for i, block in enumerate(self.blocks):
            x, kv = block(x, None if cache is None else cache[i])
            grown.append(kv)
        return self.head(self.ln_f(x)), grown

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        """The full forward: logits ``(B, T, V)`` of every position at once, no cache."""
        return self.step(ids, None)[0]
