"""Tiny real training runs shared by the tracking tests: a torch MHA stack and a hand-written SDPA decoder."""

from __future__ import annotations

from collections.abc import Callable

import torch
import torch.nn.functional as F
from torch import nn

WIDTH, HEADS, LENGTH, BATCH = 32, 4, 8, 6


def mha_stack(dropout: float = 0.1) -> nn.Module:
    """Two torch encoder layers (nn.MultiheadAttention inside), dropout on, a linear read-out."""
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(WIDTH, HEADS, 2 * WIDTH, dropout=dropout, batch_first=True)
    return nn.Sequential(nn.TransformerEncoder(layer, 2, enable_nested_tensor=False), nn.Linear(WIDTH, WIDTH))


class SdpaAttention(nn.Module):
    """Causal self-attention through F.scaled_dot_product_attention, with attention dropout in training."""

    def __init__(self, width: int, heads: int, dropout: float) -> None:
        super().__init__()
        self.heads, self.dropout = heads, dropout
        self.qkv = nn.Linear(width, 3 * width)
        self.o_proj = nn.Linear(width, width)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        b, t, d = x.shape
        q, k, v = self.qkv(x).view(b, t, 3, self.heads, d // self.heads).permute(2, 0, 3, 1, 4)  # (B, H, T, Dh)
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True,
                                           dropout_p=self.dropout if self.training else 0.0)  # (B, H, T, Dh)
        return self.o_proj(y.transpose(1, 2).reshape(b, t, d))


class SdpaBlock(nn.Module):
    def __init__(self, width: int, heads: int, dropout: float) -> None:
        super().__init__()
        self.ln1, self.ln2 = nn.LayerNorm(width), nn.LayerNorm(width)
        self.attn = SdpaAttention(width, heads, dropout)
        self.mlp = nn.Sequential(nn.Linear(width, 2 * width), nn.GELU(), nn.Linear(2 * width, width), nn.Dropout(dropout))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = x + self.attn(self.ln1(x))
        return x + self.mlp(self.ln2(x))


class SdpaDecoder(nn.Module):
    """Pre-LN causal decoder over a small vocabulary; blocks in a ModuleList."""

    def __init__(self, vocab: int = 16, width: int = WIDTH, heads: int = HEADS, layers: int = 2,
                 dropout: float = 0.1) -> None:
        super().__init__()
        self.embed = nn.Embedding(vocab, width)
        self.blocks = nn.ModuleList(SdpaBlock(width, heads, dropout) for _ in range(layers))
        self.head = nn.Linear(width, vocab)

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        x = self.embed(ids)
        for block in self.blocks:
            x = block(x)
        return self.head(x)


def sdpa_decoder(dropout: float = 0.1) -> nn.Module:
    torch.manual_seed(0)
    return SdpaDecoder(dropout=dropout)


def batches(kind: str, steps: int, seed: int = 1) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """Inputs and targets: random vectors -> their neighbours (MHA stack), token runs -> next token (decoder)."""
    g = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(steps):
        if kind == "mha":
            x = torch.randn(BATCH, LENGTH, WIDTH, generator=g)
            out.append((x, x.roll(1, dims=1)))
        else:
            ids = torch.randint(0, 16, (BATCH, LENGTH + 1), generator=g)
            out.append((ids[:, :-1], ids[:, 1:]))
    return out


def loss_of(model: nn.Module, kind: str, x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    out = model(x)
    if kind == "mha":
        return F.mse_loss(out, y)
    return F.cross_entropy(out.reshape(-1, out.shape[-1]), y.reshape(-1))


def train(model: nn.Module, kind: str, steps: int, tracker=None, lr: float = 1e-3,
          before_step: Callable[[int, nn.Module], None] | None = None, seed: int = 1):
    """A plain training loop (train mode, dropout on, Adam); returns losses, gradients per step, final params."""
    model.train()
    opt = torch.optim.Adam(model.parameters(), lr=lr)
    torch.manual_seed(seed)  # the dropout stream
    losses, grads = [], []
    for step, (x, y) in enumerate(batches(kind, steps, seed)):
        if before_step is not None:
            before_step(step, model)
        if tracker is None:
            loss = loss_of(model, kind, x, y)
        else:
            with tracker.step(step):
                loss = loss_of(model, kind, x, y)
        loss.backward()
        grads.append([p.grad.detach().clone() for p in model.parameters()])
        opt.step()
        opt.zero_grad()
        losses.append(loss.detach().clone())
    return losses, grads, [p.detach().clone() for p in model.parameters()]


def plant_collapse(layer: int, head: int, at: int, scale: float = 30.0):
    """before_step callback: at step *at*, scale one head's query weights of the MHA stack (sharp, collapsed maps)."""

    def plant(step: int, model: nn.Module) -> None:
        if step == at:
            attn = model[0].layers[layer].self_attn
            dh = attn.head_dim
            with torch.no_grad():
                attn.in_proj_weight[head * dh:(head + 1) * dh] *= scale
                attn.in_proj_bias[head * dh:(head + 1) * dh] *= scale
    return plant
