"""Notebooks the browser tests and benchmarks open: written with nbformat, without outputs, with NO set-up cell.

The dashboard must bring BokehJS itself; no cell calls ``output_notebook``.
"""

from __future__ import annotations

from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_notebook

HOSTILE = "<script>alert(1)</script>"

# A small encoder–decoder (self- and cross-attention, a causal target mask) captured for real.
TRANSLATOR = f"""\
import torch, attnscope, attnscope.views
torch.manual_seed(0)
model = torch.nn.Transformer(d_model=16, nhead=4, num_encoder_layers=2, num_decoder_layers=2,
                             dim_feedforward=32, dropout=0.0, batch_first=True).eval()
source = ["<s>", {HOSTILE!r}, "lamp", "is", "lit", "</s>"]
target = ["<s>", "la", "lampe", "brille"]
src, tgt = torch.randn(2, len(source), 16), torch.randn(2, len(target), 16)
with torch.no_grad(), attnscope.capture(model) as cap:
    model(src, tgt, tgt_mask=model.generate_square_subsequent_mask(len(target)), tgt_is_causal=True)
findings = [("encoder.layers.0.self_attn", 2, {HOSTILE!r})]
board = attnscope.views.dashboard(cap, tokens={{"source": source, "target": target}}, findings=findings)
board
"""


def write(path: Path, *cells: str) -> Path:
    nb = new_notebook(cells=[new_code_cell(c) for c in cells])
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3 (ipykernel)", "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    nbformat.validate(nb)
    nbformat.write(nb, path)
    return path
