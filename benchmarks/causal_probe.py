"""How long the causality probe takes, against a naive per-position perturbation loop, in one run.

A 6-layer, width-256 decoder (nn.TransformerEncoder with a causal mask, token embeddings and an LM head)
at T = 128, batch 1, on the CPU. Three ways to ask "is it causal?":

- screen: ``check_causal(mode="screen")``, the default of ``assert_causal``;
- exhaustive: ``check_causal(mode="exhaustive")``, the full (T, T) dependency matrix;
- naive loop: one unperturbed forward, then one forward per position with that position's id replaced,
  comparing every output (T + 1 forwards), which also yields the full matrix.

Each is timed ``--repeat`` times (median reported) after one warm-up. Targets: screen at least 10x faster
than the loop, exhaustive no slower than the loop.

    python benchmarks/causal_probe.py [--repeat 5] [--threads N]
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable, Collection
from typing import Any

import torch
from torch import nn

from attnscope.analyses.causality import check_causal

T, WIDTH, LAYERS, HEADS, VOCAB = 128, 256, 6, 8, 512


class Decoder(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.tok = nn.Embedding(VOCAB, WIDTH)
        self.pos = nn.Embedding(T, WIDTH)
        layer = nn.TransformerEncoderLayer(WIDTH, HEADS, 4 * WIDTH, dropout=0.0, batch_first=True)
        self.layers = nn.TransformerEncoder(layer, LAYERS, enable_nested_tensor=False)
        self.head = nn.Linear(WIDTH, VOCAB)
        self.register_buffer("mask", nn.Transformer.generate_square_subsequent_mask(T))

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        t = ids.shape[1]
        h = self.tok(ids) + self.pos(torch.arange(t))  # (B, T, D)
        return self.head(self.layers(h, mask=self.mask[:t, :t], is_causal=True))  # (B, T, V)


def naive_loop(model: nn.Module, ids: torch.Tensor, tol: float = 1e-4) -> torch.Tensor:
    """T + 1 forwards: the dependency matrix [output i, input j] by perturbing one position at a time."""
    gen = torch.Generator().manual_seed(0)
    with torch.no_grad():
        base = model(ids)  # (1, T, V)
        scale = base.square().mean().sqrt()
        dep = torch.zeros(T, T)
        for j in range(T):
            bumped = ids.clone()
            bumped[0, j] = (bumped[0, j] + torch.randint(1, VOCAB, (), generator=gen)) % VOCAB
            dep[:, j] = (model(bumped) - base).abs().amax(dim=-1)[0] / scale
    return dep > tol


def timed(methods: dict[str, Callable[[], Any]], repeat: int,
          cold: Collection[str] = ()) -> dict[str, tuple[float, Any]]:
    """Median seconds and last result of each method; the methods take turns, so they share the load.

    Every method but those named in *cold* runs once first, untimed (warm-up); ``repeat`` must be at least 1.
    """
    results = {name: fn() for name, fn in methods.items() if name not in cold}  # warm-up
    times: dict[str, list[float]] = {name: [] for name in methods}
    for _ in range(repeat):
        for name, fn in methods.items():
            start = time.perf_counter()
            results[name] = fn()
            times[name].append(time.perf_counter() - start)
    return {name: (statistics.median(times[name]), results[name]) for name in methods}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--threads", type=int, default=None)
    args = parser.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    model = Decoder().eval()
    ids = torch.randint(0, VOCAB, (1, T))

    runs = timed({
        "loop": lambda: naive_loop(model, ids),
        "screen": lambda: check_causal(model, ids, mode="screen"),
        "exhaustive": lambda: check_causal(model, ids, mode="exhaustive"),
    }, args.repeat)
    (loop_s, loop_dep), (screen_s, screen), (exh_s, exh) = runs["loop"], runs["screen"], runs["exhaustive"]

    assert screen.ok and exh.ok and not bool(loop_dep.triu(1).any()), "the benchmark model must be causal"
    agree = bool(((exh.dependency > exh.tolerance) == loop_dep.numpy()).all())

    print(f"causality probe, {LAYERS}-layer width-{WIDTH} decoder, T={T}, batch 1, "
          f"{torch.get_num_threads()} threads, median of {args.repeat}, taking turns")
    print(f"{'method':<12}{'seconds':>10}{'fn calls':>10}{'sequences':>11}{'loop / method':>15}")
    print(f"{'naive loop':<12}{loop_s:>10.3f}{T + 1:>10}{T + 1:>11}{1.0:>15.2f}")
    print(f"{'screen':<12}{screen_s:>10.3f}{screen.forwards:>10}{screen.sequences:>11}{loop_s / screen_s:>15.2f}")
    print(f"{'exhaustive':<12}{exh_s:>10.3f}{exh.forwards:>10}{exh.sequences:>11}{loop_s / exh_s:>15.2f}")
    print(f"targets: screen >= 10x faster than the loop: {'met' if loop_s / screen_s >= 10 else 'MISSED'}; "
          f"exhaustive no slower than the loop: {'met' if exh_s <= loop_s else 'MISSED'}")
    print(f"exhaustive dependency pattern equals the loop's: {agree}")


if __name__ == "__main__":
    main()
