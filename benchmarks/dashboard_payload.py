"""Bytes the dashboard sends to the browser, against a naive float JSON of every map.

Run: ``python benchmarks/dashboard_payload.py [--layers 12] [--heads 12] [--seq 256]``

Model: an nn.TransformerEncoder of 12 layers x 12 heads (d_model 48) with a causal mask, one sequence of 256
positions, captured with keep="maps". Reported side by side in one run:

* first render: every widget's opening state (controls, layouts, the Bokeh document) as its comm carries it,
  BokehJS itself not counted (``Dashboard.first_render_bytes``);
* a head switch: the bytes of the messages the widget sends when another head is selected;
* naive: ``json.dumps`` of every map as nested float lists (what plotting every map directly would ship).

Targets (from the project's issue): first render <= 2 MB; naive / first render >= 40.
"""

from __future__ import annotations

import argparse
import json
import time

import torch
from torch import nn

import attnscope
import attnscope.views


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--layers", type=int, default=12)
    ap.add_argument("--heads", type=int, default=12)
    ap.add_argument("--seq", type=int, default=256)
    args = ap.parse_args()

    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(4 * args.heads, args.heads, 8 * args.heads, dropout=0.0, batch_first=True)
    model = nn.TransformerEncoder(layer, args.layers, enable_nested_tensor=False).eval()
    x = torch.randn(1, args.seq, 4 * args.heads)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(x, mask=nn.Transformer.generate_square_subsequent_mask(args.seq), is_causal=True)
    tokens = [f"tok{i}" for i in range(args.seq)]

    t0 = time.perf_counter()
    board = attnscope.views.dashboard(cap, tokens=tokens)
    build_s = time.perf_counter() - t0
    first = board.first_render_bytes()

    sent: list[int] = []
    plain_send = board.plot.send

    def counting_send(content, buffers=None):  # the widget's comm messages, as jupyter_bokeh sends them
        sent.append(len(json.dumps(content)) + sum(len(memoryview(b).cast("B")) for b in buffers or []))
        return plain_send(content, buffers)

    board.plot.send = counting_send
    switch_bytes = []
    for g in (1, 77, 143):
        sent.clear()
        board.head = g
        switch_bytes.append(sum(sent))

    naive = sum(len(json.dumps(rec.weights[0, j].tolist())) for rec in cap.attention for j in range(len(rec.heads)))
    print(f"capture: {args.layers} layers x {args.heads} heads, T={args.seq}, "
          f"{sum(r.weights.nbytes for r in cap.attention) / 1e6:.1f} MB of float32 maps")
    print(f"dashboard built in {build_s:.2f} s")
    print(f"first render      {first / 1e6:8.3f} MB   (target <= 2 MB)")
    print(f"naive float JSON  {naive / 1e6:8.1f} MB")
    print(f"ratio naive/first {naive / first:8.0f} x  (target >= 40 x)")
    print(f"head switch       {min(switch_bytes) / 1e3:.0f}-{max(switch_bytes) / 1e3:.0f} kB per selection "
          f"(one full-resolution map + its veil)")


if __name__ == "__main__":
    main()
