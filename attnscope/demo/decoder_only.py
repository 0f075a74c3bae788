"""A small decoder-only model of the pick-path rewrite, and its twin with a planted causal-mask bug.

The task is one sequence, ``<bos> R 3 ␣ S 1 2 ␣ B 7 ; B 7 - S 1 2 - R 3 <eos>``; the model is trained as a
language model on all of it and asked, at test time, to continue a prompt that ends in ``;``.

Two checkpoints share this file:

* ``decoder_only``: the causal mask of :func:`causal_mask`, query ``i`` sees keys ``0..i``.
* ``decoder_only_leaky``: the mask of :func:`off_by_one_mask`, ``tril(diagonal=1)``: query ``i`` also sees
  key ``i + 1``, the very token it is trained to predict. Training loss falls far below what the task allows
  (the label's own digits are random, yet get predicted), while free-running generation fails: at the last
  position of a prompt there is no next token to peek at.

>>> from attnscope.demo import load, task
>>> model = load("decoder_only")
>>> ids, prompt_len = task.lm_batch(task.make_examples(1, seed=5, split="held_out"))
>>> task.render(model.vocab.decode(model.generate(ids[:, : prompt_len[0]])[0]))
'B7-S70-R2'

Attention modules: ``blocks.{0,1}.attn``, each a :class:`MaskedSelfAttention` that passes its mask buffer to
``F.scaled_dot_product_attention`` with queries and keys shaped ``(B, H, T, D/H)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn

from attnscope.demo.task import VOCAB, Vocab, greedy_continue

__all__ = ["DecoderOnly", "DecoderOnlyConfig", "MaskedSelfAttention", "causal_mask", "off_by_one_mask"]


@dataclass
class DecoderOnlyConfig:
    """Sizes of :class:`DecoderOnly`, and which mask it is built with."""

    vocab_size: int = len(VOCAB)  # token ids of the demo vocabulary
    d_model: int = 32  # width D of the residual stream
    heads: int = 4  # attention heads per block; D / heads = 8 dims each
    layers: int = 2  # transformer blocks
    ff_width: int = 96  # hidden width of each feed-forward sub-layer
    max_len: int = 32  # learned positions; the longest sequence is 25 tokens
    leaky_mask: bool = False  # the planted bug: True builds every block's mask with off_by_one_mask
    pad_id: int = VOCAB.pad_id  # right padding; no key mask needed, a causal query never sees later pads
    eos_id: int = VOCAB.eos_id  # generation stops once every row has produced it


def causal_mask(size: int) -> torch.Tensor:
    """Correct: bool ``(T, T)``, True where query ``i`` may see key ``j``, i.e. ``j <= i``."""
    return torch.ones(size, size, dtype=torch.bool).tril()


def off_by_one_mask(size: int) -> torch.Tensor:
    """THE PLANTED BUG: ``tril(diagonal=1)`` lets query ``i`` see key ``i + 1`` as well, one token of the future."""
    return torch.ones(size, size, dtype=torch.bool).tril(diagonal=1)


class MaskedSelfAttention(nn.Module):
    """Multi-head self-attention; the mask is an explicit buffer handed to ``F.scaled_dot_product_attention``."""

    def __init__(self, config: DecoderOnlyConfig) -> None:
        super().__init__()
        self.heads = config.heads
        self.q_proj = nn.Linear(config.d_model, config.d_model)
        self.k_proj = nn.Linear(config.d_model, config.d_model)
        self.v_proj = nn.Linear(config.d_model, config.d_model)
        self.out_proj = nn.Linear(config.d_model, config.d_model)
        make_mask = off_by_one_mask if config.leaky_mask else causal_mask
        self.register_buffer("mask", make_mask(config.max_len), persistent=False)  # (T, T) True = may see

    def split_heads(self, x: torch.Tensor) -> torch.Tensor:
        b, t, d = x.shape
        return x.view(b, t, self.heads, d // self.heads).transpose(1, 2)  # (B, H, T, D/H)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        b, t, d = x.shape
        q = self.split_heads(self.q_proj(x))  # (B, H, T, D/H)
        k = self.split_heads(self.k_proj(x))  # (B, H, T, D/H)
        v = self.split_heads(self.v_proj(x))  # (B, H, T, D/H)
        y = F.scaled_dot_product_attention(q, k, v, attn_mask=self.mask[:t, :t])  # (B, H, T, D/H)
        return self.out_proj(y.transpose(1, 2).reshape(b, t, d))  # (B, T, D)


class Block(nn.Module):
    """Pre-LN block: ``x + attn(ln1(x))``, then ``x + ff(ln2(x))``."""

    def __init__(self, config: DecoderOnlyConfig) -> None:
        super().__init__()
        self.ln1 = nn.LayerNorm(config.d_model)
        self.attn = MaskedSelfAttention(config)
        self.ln2 = nn.LayerNorm(config.d_model)
        self.ff = nn.Sequential(
            nn.Linear(config.d_model, config.ff_width), nn.ReLU(), nn.Linear(config.ff_width, config.d_model)
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = x + self.attn(self.ln1(x))  # (B, T, D)
        return x + self.ff(self.ln2(x))  # (B, T, D)


class DecoderOnly(nn.Module):
    """Embeddings, :class:`Block` stack, final norm, linear read-out; ``forward(ids)`` gives ``(B, T, V)`` logits."""

    def __init__(self, config: DecoderOnlyConfig | None = None) -> None:
        super().__init__()
        self.config = config = config or DecoderOnlyConfig()
        self.vocab: Vocab = VOCAB
        self.embed = nn.Embedding(config.vocab_size, config.d_model)
        self.position = nn.Embedding(config.max_len, config.d_model)
        self.blocks = nn.ModuleList(Block(config) for _ in range(config.layers))
        self.norm = nn.LayerNorm(config.d_model)
        self.readout = nn.Linear(config.d_model, config.vocab_size)

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        """Next-token logits ``(B, T, V)`` at every position of ``ids`` (B, T)."""
        positions = torch.arange(ids.shape[1], device=ids.device)  # (T,)
        x = self.embed(ids) + self.position(positions)  # (B, T, D)
        for block in self.blocks:
            x = block(x)  # (B, T, D)
        return self.readout(self.norm(x))  # (B, T, V)

    @torch.no_grad()
    def generate(self, prompt: torch.Tensor, max_new: int | None = None) -> torch.Tensor:
        """Greedy continuation of equal-length prompts ``(B, P)``: ``(B, N)`` new ids, ``<pad>`` after ``<eos>``."""
        c = self.config
        out = greedy_continue(self, prompt, max_new or c.max_len - prompt.shape[1], c.pad_id, c.eos_id)
        return out[:, prompt.shape[1]:]
