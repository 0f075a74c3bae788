"""check_mask's screen against a naive per-position loop, for a documents pattern and a window pattern, in one run.

A 2-layer, width-64 decoder with attention written out by hand (masks by plain torch comparisons) at
T = 256, batch 1, on the CPU, checked two ways for each declared pattern:

- screen: ``check_mask(mode="screen")`` (group testing: blocks of inputs forbidden to whole groups of outputs);
- naive loop: one unperturbed forward, then one forward per position with that position's id replaced,
  comparing every output against the pattern (T + 1 forwards, one sequence each).

Patterns: packed documents (8 documents of uneven length, causal inside each) and a causal sliding window
of 16 keys over 2 layers (reach 31). Methods take turns, ``--repeat`` times after a warm-up; medians.
Target: the screen makes at least 10x fewer calls of fn than the loop. Printed beside it: sequences
evaluated (the screen stacks its perturbed copies into few calls, so it evaluates more sequences than it
makes calls), the time ratio, and the floor: one plain forward of the model.

    python benchmarks/mask_probe.py [--repeat 1] [--threads N]
"""

from __future__ import annotations

import argparse
import math

import torch
from torch import nn

from attnscope.analyses.contracts import check_mask
from attnscope.analyses.patterns import documents_pattern, window_pattern
from causal_probe import timed  # benchmarks/ is the script's own directory

T, WIDTH, LAYERS, HEADS, VOCAB, WINDOW = 256, 64, 2, 4, 256, 16
DOCS = torch.repeat_interleave(torch.arange(8), torch.tensor([40, 17, 33, 25, 48, 30, 36, 27]))[None]  # (1, T)


class Attention(nn.Module):
    def __init__(self, allowed: torch.Tensor) -> None:
        super().__init__()
        self.qkv, self.out = nn.Linear(WIDTH, 3 * WIDTH), nn.Linear(WIDTH, WIDTH)
        self.register_buffer("allowed", allowed)  # (T, T) True = may attend

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        B, t, D = h.shape
        q, k, v = self.qkv(h).view(B, t, 3, HEADS, D // HEADS).permute(2, 0, 3, 1, 4)  # (B, H, T, Dh)
        scores = q @ k.transpose(-2, -1) / math.sqrt(D // HEADS)  # (B, H, T, T)
        y = scores.masked_fill(~self.allowed, float("-inf")).softmax(-1) @ v  # (B, H, T, Dh)
        return self.out(y.transpose(1, 2).reshape(B, t, D))


class Decoder(nn.Module):
    def __init__(self, allowed: torch.Tensor) -> None:
        super().__init__()
        self.tok, self.pos = nn.Embedding(VOCAB, WIDTH), nn.Embedding(T, WIDTH)
        self.attn = nn.ModuleList([Attention(allowed) for _ in range(LAYERS)])
        self.mlp = nn.ModuleList([nn.Sequential(nn.Linear(WIDTH, 2 * WIDTH), nn.GELU(), nn.Linear(2 * WIDTH, WIDTH))
                                  for _ in range(LAYERS)])
        self.head = nn.Linear(WIDTH, VOCAB)

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        h = self.tok(ids) + self.pos(torch.arange(ids.shape[1]))  # (B, T, D)
        for attn, mlp in zip(self.attn, self.mlp):
            h = h + attn(h)
            h = h + mlp(h)
        return self.head(h)  # (B, T, V)


def naive_loop(model: nn.Module, ids: torch.Tensor, allowed: torch.Tensor, tol: float = 1e-4) -> bool:
    """T + 1 forwards: perturb one position at a time; True when no forbidden pair moved."""
    gen = torch.Generator().manual_seed(0)
    with torch.no_grad():
        base = model(ids)  # (1, T, V)
        scale = base.square().mean().sqrt()
        for j in range(T):
            bumped = ids.clone()
            bumped[0, j] = (bumped[0, j] + torch.randint(1, VOCAB, (), generator=gen)) % VOCAB
            moved = (model(bumped) - base).abs().amax(dim=-1)[0] / scale > tol  # (T,)
            if bool((moved & ~allowed[:, j]).any()):
                return False
    return True


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument("--threads", type=int, default=None)
    args = parser.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)
    patterns = {"documents": documents_pattern(DOCS)[0], "window": window_pattern(T, WINDOW)}
    declared = {"documents": patterns["documents"], "window": window_pattern(T, WINDOW, layers=LAYERS)}
    print(f"check_mask screen vs naive loop, {LAYERS}-layer width-{WIDTH} decoder, T={T}, batch 1, "
          f"{torch.get_num_threads()} threads, median of {args.repeat}, taking turns")
    print(f"{'pattern':<11}{'method':<12}{'seconds':>9}{'fn calls':>10}{'sequences':>11}{'calls ratio':>13}"
          f"{'time ratio':>12}")
    verdicts = []
    for name, allowed in patterns.items():
        torch.manual_seed(0)
        model = Decoder(allowed).eval()
        ids = torch.randint(0, VOCAB, (1, T), generator=torch.Generator().manual_seed(1))

        def one_forward() -> None:
            with torch.no_grad():
                model(ids)

        runs = timed({
            "floor": one_forward,
            "loop": lambda: naive_loop(model, ids, declared[name]),
            "screen": lambda: check_mask(model, ids, declared[name], mode="screen"),
        }, args.repeat, cold=("loop",))  # the loop is its own warm-up
        (floor_s, _), (loop_s, loop_ok), (screen_s, screen) = runs["floor"], runs["loop"], runs["screen"]
        assert loop_ok and screen.ok, "the benchmark models keep to their declared patterns"
        ratio = (T + 1) / screen.forwards
        print(f"{name:<11}{'naive loop':<12}{loop_s:>9.3f}{T + 1:>10}{T + 1:>11}{1.0:>13.1f}{1.0:>12.2f}")
        print(f"{'':<11}{'screen':<12}{screen_s:>9.3f}{screen.forwards:>10}{screen.sequences:>11}{ratio:>13.1f}"
              f"{loop_s / screen_s:>12.2f}")
        print(f"{'':<11}{'floor':<12}{floor_s:>9.3f}{1:>10}{1:>11}  (one plain forward: no probe can be cheaper)")
        verdicts.append((name, ratio))
    for name, ratio in verdicts:
        print(f"target {name}: screen >= 10x fewer calls of fn than the loop: measured {ratio:.1f}x, "
              f"{'met' if ratio >= 10 else 'NOT met'}")


if __name__ == "__main__":
    main()
