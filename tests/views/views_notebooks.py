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

# GPT-2-small's shape (12 layers x 12 heads, T=1024) with a narrow width to keep the forward cheap; random
# weights from a config (no download). The twins matrix gets its distances from the heads' mean key profiles
# (scipy's Jensen–Shannon distance, about a second) rather than head_distances over every row (much longer).
GPT2_144 = """\
import numpy as np, torch, transformers, attnscope
from scipy.spatial.distance import jensenshannon, pdist, squareform
torch.manual_seed(0)
cfg = transformers.GPT2Config(n_layer=12, n_head=12, n_embd=96, n_positions=1024, vocab_size=500,
                              resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
model = transformers.GPT2Model._from_config(cfg, attn_implementation="eager").eval()
ids = torch.randint(0, 500, (1, 1024))
with torch.no_grad(), attnscope.capture(model) as cap:
    model(ids)
profiles = np.concatenate([r.weights[0].mean(axis=1) for r in cap.attention])  # (144, 1024) mean weight per key
distances = squareform(pdist(profiles, jensenshannon))
board = attnscope.dashboard(cap, tokens=[f"w{i}" for i in range(1024)], distances=distances)
board
"""


def write(path: Path, *cells: str) -> Path:
    nb = new_notebook(cells=[new_code_cell(c) for c in cells])
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3 (ipykernel)", "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    nbformat.validate(nb)
    nbformat.write(nb, path)
    return path
