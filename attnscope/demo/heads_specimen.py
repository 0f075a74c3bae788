"""A decoder-only model with planted uniform, silent, duplicate and sink heads, made by weight surgery.

The specimen starts as a copy of the trained ``decoder_only`` model (:mod:`attnscope.demo.decoder_only`,
2 blocks x 4 heads, 8 dims per head). Four heads are then cut, each by a documented change of its weights
(``dh = 8`` rows or columns per head; head ``h`` owns rows ``h*dh : (h+1)*dh`` of ``q_proj``/``k_proj`` and the
same columns of ``out_proj``):

* **uniform**, ``blocks.1.attn`` head 1: its ``q_proj`` and ``k_proj`` rows and biases are zeroed, so every score
  is 0 and each query spreads its weight evenly over the keys the causal mask allows (``1/(i+1)`` each).
* **silent**, ``blocks.0.attn`` head 3: its columns of ``out_proj.weight`` are zeroed. The map still looks busy,
  but the head adds nothing to the residual stream; removing it changes no output.
* **duplicate**, ``blocks.1.attn`` head 2 gets the ``q_proj`` and ``k_proj`` rows and biases of head 0 of the same
  block, so its map equals head 0's on every input (its values and output columns stay its own).
* **sink**, ``blocks.0.attn`` head 1: its query is a constant (weights zeroed, bias ``s·e₀``) and its key reads
  one direction, ``k = s·(v·x)·e₀`` with ``v`` the unit vector of the normalised input at position 0. Position 0
  always holds ``<bos>``, and the first block's normalised input there is the same vector in every sequence,
  so that key scores far above all others: the head puts nearly all its weight on the first key.
  ``s`` is :data:`SINK_SCALE`.

The cut model is then healed: fine-tuned on the task with the cuts re-applied after every optimiser step,
so the remaining heads learn to do without (:func:`recut`). Generation stays accurate; the heads story is
that four of the eight heads stand out: three are useless, and ablation confirms it (removing them barely
moves the loss); the duplicate only shares its *map* with head 0 — its values and output columns are its own,
so ablating it costs a lot. A duplicate map marks a candidate for pruning; ablation decides.

>>> from attnscope.demo import load
>>> from attnscope.demo.heads_specimen import PLANTED
>>> model = load("heads_specimen")
>>> PLANTED["silent"]
[('blocks.0.attn', 3)]
"""

from __future__ import annotations

import torch
from torch import nn

from attnscope.demo.decoder_only import DecoderOnly
from attnscope.errors import OptionError

__all__ = ["PLANTED", "SINK_SCALE", "cut", "recut"]

#: What was planted, as data: kind -> list of (attention module name, head). Duplicates are
#: ((original name, head), (copy name, head)).
PLANTED: dict[str, list] = {
    "uniform": [("blocks.1.attn", 1)],
    "silent": [("blocks.0.attn", 3)],
    "duplicate": [(("blocks.1.attn", 0), ("blocks.1.attn", 2))],
    "sink": [("blocks.0.attn", 1)],
}

#: ``s`` of the sink head: query bias and key weight scale (score of key j is ``s² (v·x_j) / √dh``).
SINK_SCALE = 6.0


def _rows(model: DecoderOnly, head: int) -> slice:
    dh = model.config.d_model // model.config.heads
    return slice(head * dh, (head + 1) * dh)


def _attn(model: DecoderOnly, name: str) -> nn.Module:
    return model.get_submodule(name)


@torch.no_grad()
def recut(model: DecoderOnly) -> None:
    """Apply every cut of :data:`PLANTED` to *model* in place (again); used after each healing step."""
    for name, head in PLANTED["uniform"]:
        attn, rows = _attn(model, name), _rows(model, head)
        for proj in (attn.q_proj, attn.k_proj):
            proj.weight[rows] = 0.0
            proj.bias[rows] = 0.0
    for name, head in PLANTED["silent"]:
        _attn(model, name).out_proj.weight[:, _rows(model, head)] = 0.0
    for (src_name, src_head), (dst_name, dst_head) in PLANTED["duplicate"]:
        src, dst = _attn(model, src_name), _attn(model, dst_name)
        for a, b in ((src.q_proj, dst.q_proj), (src.k_proj, dst.k_proj)):
            b.weight[_rows(model, dst_head)] = a.weight[_rows(model, src_head)]
            b.bias[_rows(model, dst_head)] = a.bias[_rows(model, src_head)]
    for name, head in PLANTED["sink"]:
        if name != "blocks.0.attn":
            raise OptionError(f"expected the sink head in blocks.0.attn, whose position-0 input is fixed; received {name!r}")
        attn, rows = _attn(model, name), _rows(model, head)
        bos = torch.tensor([[model.vocab.bos_id]])
        first = model.blocks[0].ln1(model.embed(bos) + model.position(torch.tensor([0])))[0, 0]  # (D,)
        v = first / first.norm()  # (D,)
        for proj in (attn.q_proj, attn.k_proj):
            proj.weight[rows] = 0.0
            proj.bias[rows] = 0.0
        attn.q_proj.bias[rows.start] = SINK_SCALE
        attn.k_proj.weight[rows.start] = SINK_SCALE * v


def cut(trained: DecoderOnly) -> DecoderOnly:
    """A copy of a trained :class:`~attnscope.demo.decoder_only.DecoderOnly` with the cuts of :data:`PLANTED`."""
    model = DecoderOnly(trained.config)
    model.load_state_dict(trained.state_dict())
    recut(model)
    return model.eval()
