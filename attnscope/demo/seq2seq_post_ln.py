"""A small encoder–decoder built on ``nn.Transformer`` (post-LN), trained on the pick-path rewrite.

Post-LN is the layout of the original transformer: each sub-layer's output is added to the residual stream
and the sum is normalised (``norm_first=False``), so every block hands on a stream of the same, fixed scale.
Compare :mod:`attnscope.demo.seq2seq_pre_ln`, the same task with the norms moved in front of each sub-layer.

>>> from attnscope.demo import load, task
>>> model = load("seq2seq_post_ln")
>>> src, _, _ = task.seq2seq_batch(task.make_examples(1, seed=5, split="held_out"))
>>> task.render(model.vocab.decode(model.generate(src)[0]))
'B7-S70-R2'

Attention modules, as capture names them: ``transformer.encoder.layers.{0,1}.self_attn``,
``transformer.decoder.layers.{0,1}.self_attn`` (causal) and ``transformer.decoder.layers.{0,1}.multihead_attn``
(cross-attention over the label), all ``nn.MultiheadAttention``.

Head 0 of the last decoder layer's cross-attention (:data:`GUIDED_HEAD`) was trained to follow the task's
alignment with a guided-alignment loss (Garg et al. 2019, "Jointly Learning to Align and Translate with
Transformer Models"), so its map shows the block permutation of the rewrite cleanly: the pick path's first
field (bin) reads the end of the label, its last field (row) the start. The other heads were left free.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn

from attnscope.demo.task import VOCAB, Vocab, greedy_continue

__all__ = ["GUIDED_HEAD", "PostLNConfig", "PostLNSeq2Seq"]


@dataclass
class PostLNConfig:
    """Sizes of :class:`PostLNSeq2Seq`."""

    vocab_size: int = len(VOCAB)  # token ids, one vocabulary for label and pick path
    d_model: int = 32  # width D of the residual stream
    heads: int = 4  # attention heads per attention module; D / heads = 8 dims each
    encoder_layers: int = 2  # encoder blocks
    decoder_layers: int = 2  # decoder blocks
    ff_width: int = 64  # hidden width of each feed-forward sub-layer
    max_len: int = 16  # learned positions; the longest label or pick path is 12 tokens with <eos>
    dropout: float = 0.0  # none: the task is generated afresh, and it keeps training deterministic and simple
    pad_id: int = VOCAB.pad_id  # id the batch helpers pad with; masked out as a key everywhere
    bos_id: int = VOCAB.bos_id  # first decoder input
    eos_id: int = VOCAB.eos_id  # generation stops once every row has produced it


#: The one cross-attention head trained to follow the task's alignment (guided alignment, see
#: :func:`attnscope.demo.training.seq2seq_loss`): (module name, head index). The other heads are free.
GUIDED_HEAD = ("transformer.decoder.layers.1.multihead_attn", 0)


class PostLNSeq2Seq(nn.Module):
    """Token and position embeddings, ``nn.Transformer(norm_first=False)``, a linear read-out.

    ``forward(src, tgt_in)`` returns next-token logits ``(B, Tt, V)``; padding masks come from ``pad_id``.
    """

    GUIDED_HEAD = GUIDED_HEAD

    def __init__(self, config: PostLNConfig | None = None) -> None:
        super().__init__()
        self.config = config = config or PostLNConfig()
        self.vocab: Vocab = VOCAB
        self.embed = nn.Embedding(config.vocab_size, config.d_model)
        self.position = nn.Embedding(config.max_len, config.d_model)
        # The encoder is passed in only to switch off nested tensors (an eval-mode shortcut that warns and
        # drops padded positions); it is the encoder nn.Transformer would build itself.
        encoder_layer = nn.TransformerEncoderLayer(
            config.d_model, config.heads, config.ff_width, config.dropout, batch_first=True, norm_first=False
        )
        encoder = nn.TransformerEncoder(
            encoder_layer, config.encoder_layers, norm=nn.LayerNorm(config.d_model), enable_nested_tensor=False
        )
        self.transformer = nn.Transformer(
            d_model=config.d_model,
            nhead=config.heads,
            num_decoder_layers=config.decoder_layers,
            dim_feedforward=config.ff_width,
            dropout=config.dropout,
            custom_encoder=encoder,
            batch_first=True,
            norm_first=False,
        )
        self.readout = nn.Linear(config.d_model, config.vocab_size)
        # The decoder's causal mask, kept as a buffer so it can be read: True where query i may see key j.
        self.register_buffer(
            "causal", torch.ones(config.max_len, config.max_len, dtype=torch.bool).tril(), persistent=False
        )

    def _inputs(self, ids: torch.Tensor) -> torch.Tensor:
        positions = torch.arange(ids.shape[1], device=ids.device)  # (T,)
        return self.embed(ids) + self.position(positions)  # (B, T, D)

    def forward(self, src: torch.Tensor, tgt_in: torch.Tensor) -> torch.Tensor:
        """Logits ``(B, Tt, V)`` of the next pick-path token at every decoder position."""
        tq = tgt_in.shape[1]
        src_pad = src == self.config.pad_id  # (B, Ts) True = padding, nn.Transformer's convention
        hidden = self.transformer(
            self._inputs(src),
            self._inputs(tgt_in),
            tgt_mask=~self.causal[:tq, :tq],  # (Tt, Tt) True = forbidden, nn.Transformer's convention
            src_key_padding_mask=src_pad,
            tgt_key_padding_mask=tgt_in == self.config.pad_id,  # (B, Tt)
            memory_key_padding_mask=src_pad,
            tgt_is_causal=True,
        )  # (B, Tt, D)
        return self.readout(hidden)  # (B, Tt, V)

    @torch.no_grad()
    def generate(self, src: torch.Tensor, max_len: int | None = None) -> torch.Tensor:
        """Greedy decoding: ``(B, T)`` pick-path ids (without ``<bos>``), ``<pad>`` after each row's ``<eos>``."""
        c = self.config
        start = torch.full((src.shape[0], 1), c.bos_id, dtype=torch.long, device=src.device)  # (B, 1)
        return greedy_continue(lambda out: self(src, out), start, (max_len or c.max_len) - 1, c.pad_id, c.eos_id)[:, 1:]
