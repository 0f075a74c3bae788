"""The pick-path rewrite again, with a hand-written pre-LN encoder–decoder whose attention calls SDPA.

Pre-LN puts the layer norm in front of each sub-layer and leaves the residual stream itself unnormalised
(one final norm after the last block). Xiong et al. (2020), "On Layer Normalization in the Transformer
Architecture" (ICML), show that this keeps gradients well-scaled at the start of training, and that the
residual stream's norm grows with depth, where post-LN (:mod:`attnscope.demo.seq2seq_post_ln`) renormalises it
after every sub-layer. Both models are trained on the same task with the same sizes, so their residual norms
can be compared block by block.

>>> from attnscope.demo import load, task
>>> model = load("seq2seq_pre_ln")
>>> src, _, _ = task.seq2seq_batch(task.make_examples(1, seed=5, split="held_out"))
>>> task.render(model.vocab.decode(model.generate(src)[0]))
'B7-S70-R2'

Module names mirror ``nn.Transformer`` so the two models' head tables line up:
``transformer.encoder.layers.{0,1}.self_attn``, ``transformer.decoder.layers.{0,1}.self_attn`` (causal) and
``transformer.decoder.layers.{0,1}.multihead_attn`` (cross-attention). Each is an :class:`SDPAttention`, whose
one ``F.scaled_dot_product_attention`` call sees queries and keys as ``(B, H, T, D/H)``.

Head 0 of the last decoder layer's cross-attention (:data:`GUIDED_HEAD`) was trained to follow the task's
alignment with a guided-alignment loss (Garg et al. 2019, "Jointly Learning to Align and Translate with
Transformer Models"), so its map shows the block permutation of the rewrite cleanly: the pick path's first
field (bin) reads the end of the label, its last field (row) the start. The other heads were left free.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn

from attnscope.demo.task import VOCAB, Vocab, greedy_continue

__all__ = ["GUIDED_HEAD", "PreLNConfig", "PreLNSeq2Seq", "SDPAttention"]


@dataclass
class PreLNConfig:
    """Sizes of :class:`PreLNSeq2Seq` (the same defaults as the post-LN model)."""

    vocab_size: int = len(VOCAB)  # token ids, one vocabulary for label and pick path
    d_model: int = 32  # width D of the residual stream
    heads: int = 4  # attention heads per attention module; D / heads = 8 dims each
    encoder_layers: int = 2  # encoder blocks
    decoder_layers: int = 2  # decoder blocks
    ff_width: int = 64  # hidden width of each feed-forward sub-layer
    max_len: int = 16  # learned positions; the longest label or pick path is 12 tokens with <eos>
    pad_id: int = VOCAB.pad_id  # id the batch helpers pad with; masked out as a key everywhere
    bos_id: int = VOCAB.bos_id  # first decoder input
    eos_id: int = VOCAB.eos_id  # generation stops once every row has produced it


class SDPAttention(nn.Module):
    """Multi-head attention computed by one ``F.scaled_dot_product_attention`` call.

    ``forward(x, context, allowed)``: queries from ``x`` (B, Tq, D), keys and values from ``context``
    (B, Tk, D) (the same tensor for self-attention); ``allowed`` is a bool mask broadcastable to
    ``(B, H, Tq, Tk)``, True where a query may see a key.
    """

    def __init__(self, d_model: int, heads: int) -> None:
        super().__init__()
        self.heads = heads
        self.q_proj = nn.Linear(d_model, d_model)
        self.k_proj = nn.Linear(d_model, d_model)
        self.v_proj = nn.Linear(d_model, d_model)
        self.out_proj = nn.Linear(d_model, d_model)

    def split_heads(self, x: torch.Tensor) -> torch.Tensor:
        b, t, d = x.shape
        return x.view(b, t, self.heads, d // self.heads).transpose(1, 2)  # (B, H, T, D/H)

    def forward(self, x: torch.Tensor, context: torch.Tensor, allowed: torch.Tensor) -> torch.Tensor:
        q = self.split_heads(self.q_proj(x))  # (B, H, Tq, D/H)
        k = self.split_heads(self.k_proj(context))  # (B, H, Tk, D/H)
        v = self.split_heads(self.v_proj(context))  # (B, H, Tk, D/H)
        y = F.scaled_dot_product_attention(q, k, v, attn_mask=allowed)  # (B, H, Tq, D/H)
        b, _, tq, _ = y.shape
        return self.out_proj(y.transpose(1, 2).reshape(b, tq, -1))  # (B, Tq, D)


def feed_forward(config: PreLNConfig) -> nn.Sequential:
    return nn.Sequential(
        nn.Linear(config.d_model, config.ff_width), nn.ReLU(), nn.Linear(config.ff_width, config.d_model)
    )


class EncoderLayer(nn.Module):
    """``x + self_attn(norm1(x))``, then ``x + ff(norm2(x))``."""

    def __init__(self, config: PreLNConfig) -> None:
        super().__init__()
        self.norm1 = nn.LayerNorm(config.d_model)
        self.self_attn = SDPAttention(config.d_model, config.heads)
        self.norm2 = nn.LayerNorm(config.d_model)
        self.ff = feed_forward(config)

    def forward(self, x: torch.Tensor, allowed: torch.Tensor) -> torch.Tensor:
        h = self.norm1(x)  # (B, Ts, D)
        x = x + self.self_attn(h, h, allowed)  # (B, Ts, D)
        return x + self.ff(self.norm2(x))  # (B, Ts, D)


class DecoderLayer(nn.Module):
    """Causal self-attention, cross-attention over the encoder's output, feed-forward; each pre-normed."""

    def __init__(self, config: PreLNConfig) -> None:
        super().__init__()
        self.norm1 = nn.LayerNorm(config.d_model)
        self.self_attn = SDPAttention(config.d_model, config.heads)
        self.norm2 = nn.LayerNorm(config.d_model)
        self.multihead_attn = SDPAttention(config.d_model, config.heads)
        self.norm3 = nn.LayerNorm(config.d_model)
        self.ff = feed_forward(config)

    def forward(
        self, x: torch.Tensor, memory: torch.Tensor, self_allowed: torch.Tensor, memory_allowed: torch.Tensor
    ) -> torch.Tensor:
        h = self.norm1(x)  # (B, Tt, D)
        x = x + self.self_attn(h, h, self_allowed)  # (B, Tt, D)
        x = x + self.multihead_attn(self.norm2(x), memory, memory_allowed)  # (B, Tt, D)
        return x + self.ff(self.norm3(x))  # (B, Tt, D)


class Encoder(nn.Module):
    def __init__(self, config: PreLNConfig) -> None:
        super().__init__()
        self.layers = nn.ModuleList(EncoderLayer(config) for _ in range(config.encoder_layers))
        self.norm = nn.LayerNorm(config.d_model)  # pre-LN's one norm on the residual stream, at the very end

    def forward(self, x: torch.Tensor, allowed: torch.Tensor) -> torch.Tensor:
        for layer in self.layers:
            x = layer(x, allowed)  # (B, Ts, D)
        return self.norm(x)


class Decoder(nn.Module):
    def __init__(self, config: PreLNConfig) -> None:
        super().__init__()
        self.layers = nn.ModuleList(DecoderLayer(config) for _ in range(config.decoder_layers))
        self.norm = nn.LayerNorm(config.d_model)
        # The causal mask as a buffer: True where query i may see key j (j <= i).
        self.register_buffer(
            "causal", torch.ones(config.max_len, config.max_len, dtype=torch.bool).tril(), persistent=False
        )

    def forward(
        self, x: torch.Tensor, memory: torch.Tensor, tgt_allowed: torch.Tensor, memory_allowed: torch.Tensor
    ) -> torch.Tensor:
        t = x.shape[1]
        self_allowed = self.causal[:t, :t] & tgt_allowed  # (B, 1, Tt, Tt)
        for layer in self.layers:
            x = layer(x, memory, self_allowed, memory_allowed)  # (B, Tt, D)
        return self.norm(x)


class Transformer(nn.Module):
    """Encoder and decoder, named as in ``nn.Transformer``."""

    def __init__(self, config: PreLNConfig) -> None:
        super().__init__()
        self.encoder = Encoder(config)
        self.decoder = Decoder(config)


#: The one cross-attention head trained to follow the task's alignment (guided alignment, see
#: :func:`attnscope.demo.training.seq2seq_loss`): (module name, head index). The other heads are free.
GUIDED_HEAD = ("transformer.decoder.layers.1.multihead_attn", 0)


class PreLNSeq2Seq(nn.Module):
    """Token and position embeddings, the pre-LN :class:`Transformer`, a linear read-out.

    ``forward(src, tgt_in)`` returns next-token logits ``(B, Tt, V)``; padding masks come from ``pad_id``.
    """

    GUIDED_HEAD = GUIDED_HEAD

    def __init__(self, config: PreLNConfig | None = None) -> None:
        super().__init__()
        self.config = config = config or PreLNConfig()
        self.vocab: Vocab = VOCAB
        self.embed = nn.Embedding(config.vocab_size, config.d_model)
        self.position = nn.Embedding(config.max_len, config.d_model)
        self.transformer = Transformer(config)
        self.readout = nn.Linear(config.d_model, config.vocab_size)

    def _inputs(self, ids: torch.Tensor) -> torch.Tensor:
        positions = torch.arange(ids.shape[1], device=ids.device)  # (T,)
        return self.embed(ids) + self.position(positions)  # (B, T, D)

    def forward(self, src: torch.Tensor, tgt_in: torch.Tensor) -> torch.Tensor:
        """Logits ``(B, Tt, V)`` of the next pick-path token at every decoder position."""
        src_allowed = (src != self.config.pad_id)[:, None, None, :]  # (B, 1, 1, Ts) key is not padding
        tgt_allowed = (tgt_in != self.config.pad_id)[:, None, None, :]  # (B, 1, 1, Tt)
        memory = self.transformer.encoder(self._inputs(src), src_allowed)  # (B, Ts, D)
        hidden = self.transformer.decoder(self._inputs(tgt_in), memory, tgt_allowed, src_allowed)  # (B, Tt, D)
        return self.readout(hidden)  # (B, Tt, V)

    @torch.no_grad()
    def generate(self, src: torch.Tensor, max_len: int | None = None) -> torch.Tensor:
        """Greedy decoding: ``(B, T)`` pick-path ids (without ``<bos>``), ``<pad>`` after each row's ``<eos>``."""
        c = self.config
        start = torch.full((src.shape[0], 1), c.bos_id, dtype=torch.long, device=src.device)  # (B, 1)
        return greedy_continue(lambda out: self(src, out), start, (max_len or c.max_len) - 1, c.pad_id, c.eos_id)[:, 1:]
