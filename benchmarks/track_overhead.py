"""Overhead of attnscope.track on training: plain steps against tracked steps, measured side by side.

Run: ``python benchmarks/track_overhead.py [--repeats 15] [--batch 4] [--seq 64]``

Model: a 6-layer nn.TransformerEncoder (d_model 256, 8 heads, FFN 1024, dropout 0.1) with a linear read-out, in
train mode; a training step is forward, backward and an Adam step. Modes are interleaved in every repeat
(plain, plain again, non-recorded, recorded, plain forward, capture forward; the order rotates from repeat to
repeat) and the median of each is reported.

Targets (from the project's issue):
* a non-recorded step <= 1.01x a plain step;
* a recorded step costs no more than the stats capture: the seconds a recorded step adds to a plain step are at
  most the seconds ``attnscope.capture(model, keep="stats")`` adds to a plain forward of the same batch (train
  mode, gradients on, as in training); the script also prints the looser reading as ratios (recorded step /
  plain step against capture forward / plain forward);
* the average step with ``every=10`` (9 non-recorded, 1 recorded) <= 1.05x a plain step.

Floors printed in the same run: the ratio of two identical plain modes (plain / plain again): a ratio within
that distance of 1.00 cannot be told apart from noise on this machine; and a recorded step of a tracker with
``norms=False, blocks=[]`` (attention statistics only: the untouched call, its dropout-free twin, capture's
reduction), which shows what the head output norms and block ratios add on top of capture's own work.
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch
import torch.nn.functional as F
from torch import nn

import attnscope


def build() -> nn.Module:
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(256, 8, 1024, dropout=0.1, batch_first=True)
    return nn.Sequential(nn.TransformerEncoder(layer, 6, enable_nested_tensor=False), nn.Linear(256, 256)).train()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--repeats", type=int, default=15)
    ap.add_argument("--batch", type=int, default=4)
    ap.add_argument("--seq", type=int, default=64)
    opts = ap.parse_args()
    torch.set_num_threads(max(1, torch.get_num_threads()))
    model = build()
    opt = torch.optim.Adam(model.parameters(), lr=1e-5)  # tiny steps: the model stays the same kind of model
    x = torch.randn(opts.batch, opts.seq, 256)
    y = x.roll(1, dims=1)
    tr = attnscope.track(model, every=2)
    bare = attnscope.track(model, every=2, norms=False, blocks=[])  # attention statistics only
    counter = [0]

    def train_step(ctx) -> None:
        with ctx:
            loss = F.mse_loss(model(x), y)
        loss.backward()
        opt.step()
        opt.zero_grad(set_to_none=True)

    def plain() -> None:
        train_step(torch.enable_grad())

    def not_recorded() -> None:
        counter[0] += 2
        train_step(tr.step(counter[0] + 1))  # odd: not recorded

    def recorded() -> None:
        counter[0] += 2
        train_step(tr.step(counter[0]))  # even: recorded

    def recorded_bare() -> None:
        counter[0] += 2
        train_step(bare.step(counter[0]))

    def plain_forward() -> None:
        model(x).sum()

    def capture_forward() -> None:
        with attnscope.capture(model, keep="stats"):
            model(x).sum()

    modes = {"plain": plain, "plain again": plain, "not recorded": not_recorded, "recorded": recorded,
             "recorded, stats only": recorded_bare, "plain forward": plain_forward, "capture forward": capture_forward}
    for fn in modes.values():  # warm-up
        fn()
    times: dict[str, list[float]] = {k: [] for k in modes}
    names = list(modes)
    for r in range(opts.repeats):
        for name in names[r % len(names):] + names[: r % len(names)]:  # rotated: no mode always follows another
            fn = modes[name]
            t0 = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - t0)
    med = {k: statistics.median(v) for k, v in times.items()}
    print(f"6-layer encoder d=256, batch {opts.batch}, T={opts.seq}, {opts.repeats} interleaved repeats, "
          f"{torch.get_num_threads()} threads; medians:")
    for k, v in med.items():
        print(f"  {k:21s} {v * 1e3:9.1f} ms")
    floor = med["plain again"] / med["plain"]
    print(f"floor: plain again / plain = {floor:.3f}x (two identical modes; noise on this machine)")

    def verdict(ok: bool) -> str:
        return "met" if ok else "NOT met"

    r1 = med["not recorded"] / med["plain"]
    print(f"non-recorded step / plain step = {r1:.3f}x   target <= 1.01x: {verdict(r1 <= 1.01)}"
          f" (floor {abs(floor - 1):.3f} from 1)")
    added = med["recorded"] - med["plain"]
    cap_added = med["capture forward"] - med["plain forward"]
    print(f"recorded step adds {added * 1e3:.1f} ms ({med['recorded'] / med['plain']:.2f}x a plain step); "
          f"stats capture adds {cap_added * 1e3:.1f} ms to a forward "
          f"({med['capture forward'] / med['plain forward']:.2f}x)   target added <= capture's: "
          f"{verdict(added <= cap_added)}")
    r_rec, r_cap = med["recorded"] / med["plain"], med["capture forward"] / med["plain forward"]
    print(f"read as ratios: recorded step / plain step = {r_rec:.2f}x, capture forward / plain forward = {r_cap:.2f}x"
          f"   target ratio <= capture's: {verdict(r_rec <= r_cap)}")
    bare_added = med["recorded, stats only"] - med["plain"]
    print(f"floor: the attention statistics alone (norms=False, no blocks) add {bare_added * 1e3:.1f} ms to a step: "
          f"capture's own work (the untouched call, a dropout-free twin, the reduction); head output norms and "
          f"block ratios add the other {(added - bare_added) * 1e3:.1f} ms")
    avg = (9 * med["not recorded"] + med["recorded"]) / 10 / med["plain"]
    print(f"average step with every=10 / plain step = {avg:.3f}x   target <= 1.05x: {verdict(avg <= 1.05)}")


if __name__ == "__main__":
    main()
