"""Overhead of capture: time(forward under capture) / time(plain forward), and the extra memory of each mode.

Run: ``python benchmarks/capture_overhead.py [--repeats 7] [--batch 8] [--seq 256]``

Models: a 6-layer nn.TransformerEncoder (d_model 256, 8 heads, FFN 1024) and an HF GPT-2-shaped model of the
same size (sdpa attention), both in eval mode under no_grad, batch 8, T=256. Timings are interleaved (plain,
maps, stats, plain, ...) and the median of each is reported, so a noisy neighbour hits every mode alike.
Memory: each mode runs in a fresh subprocess; the figure is the peak RSS of a captured forward (its results
kept) minus the peak RSS of a plain forward of the same process (Linux's VmHWM, reset before each). Targets (from the project's issue): maps <= 1.10x,
stats <= 1.05x, stats extra memory O(layers * heads * T).
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time

import torch
from torch import nn

import attnscope


def build(kind: str):
    torch.manual_seed(0)
    if kind == "encoder":
        layer = nn.TransformerEncoderLayer(256, 8, 1024, dropout=0.0, batch_first=True)
        model = nn.TransformerEncoder(layer, 6, enable_nested_tensor=False).eval()
        return model, lambda b, t: (torch.randn(b, t, 256),)
    import transformers

    cfg = transformers.GPT2Config(n_layer=6, n_head=8, n_embd=256, n_positions=1024, vocab_size=1000,
                                  resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
    model = transformers.GPT2Model._from_config(cfg, attn_implementation="sdpa").eval()
    return model, lambda b, t: (torch.randint(0, 1000, (b, t)),)


def forward(model, args, keep):
    with torch.no_grad():
        if keep is None:
            return model(*args)
        with attnscope.capture(model, keep=keep):
            return model(*args)


def captured(model, args, keep):
    """One forward under capture; returns the capture, so its records count in the peak."""
    with torch.no_grad(), attnscope.capture(model, keep=keep) as cap:
        model(*args)
    return cap


def materialise_floor(batch: int, seq: int):
    """What keeping full maps costs at the very least: building and writing 6 maps of (B, 8, T, T) float32."""
    def run():
        return [torch.empty(batch, 8, seq, seq).fill_(0.5) for _ in range(6)]
    return run


def recompute_floor(batch: int, seq: int, causal: bool):
    """What observing costs at the least without touching the computation: softmax(QKᵀ/√d) of 6 layers."""
    from attnscope.capture.masks import sdpa_weights

    q, k = torch.randn(batch, 8, seq, 32), torch.randn(batch, 8, seq, 32)

    def run():
        return [sdpa_weights(q, k, None, causal) for _ in range(6)]
    return run


def fastpath_off(model, args):
    torch.backends.mha.set_fastpath_enabled(False)
    try:
        return forward(model, args, None)
    finally:
        torch.backends.mha.set_fastpath_enabled(True)


def time_modes(kind: str, batch: int, seq: int, repeats: int) -> dict[str, float]:
    model, make = build(kind)
    args = make(batch, seq)
    runs = {"plain": lambda: forward(model, args, None), "maps": lambda: forward(model, args, "maps"),
            "stats": lambda: forward(model, args, "stats")}
    if kind == "encoder":
        runs["plain, fast path off"] = lambda: fastpath_off(model, args)
    floor = materialise_floor(batch, seq)
    runs["plain + write 6 maps (floor)"] = lambda: (forward(model, args, None), floor())
    again = recompute_floor(batch, seq, causal=kind == "gpt2")
    runs["plain + recompute 6 maps (floor)"] = lambda: (forward(model, args, None), again())
    for fn in runs.values():  # warm-up
        fn()
    times = {k: [] for k in runs}
    for _ in range(repeats):
        for k, fn in runs.items():
            t0 = time.perf_counter()
            fn()
            times[k].append(time.perf_counter() - t0)
    return {k: statistics.median(v) for k, v in times.items()}


def _peak_of(fn) -> int:
    """Peak RSS (bytes) reached while *fn* runs, above the RSS before it (Linux: VmHWM reset via clear_refs)."""
    def status(key: str) -> int:
        with open("/proc/self/status") as f:
            return next(int(line.split()[1]) * 1024 for line in f if line.startswith(key + ":"))
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")  # reset the peak-RSS mark of this process
    before = status("VmRSS")
    keep = fn()
    peak = status("VmHWM") - before
    del keep
    return peak


def peak_extra(kind: str, keep: str, batch: int, seq: int) -> int:
    """In a fresh process: peak RSS of a captured forward (results kept) minus that of a plain forward."""
    code = ("import sys, json; import benchmarks.capture_overhead as b;"
            f"m, mk = b.build({kind!r}); a = mk({batch}, {seq}); b.forward(m, a, None); b.forward(m, a, {keep!r});"
            "plain = b._peak_of(lambda: b.forward(m, a, None));"
            f"cap = b._peak_of(lambda: b.captured(m, a, {keep!r}));"
            "print(json.dumps(cap - plain))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return int(json.loads(out.stdout.strip().splitlines()[-1]))


def kept_bytes(kind: str, keep: str, batch: int, seq: int) -> int:
    """Bytes of numpy arrays held by the records of one captured forward."""
    from dataclasses import fields

    model, make = build(kind)
    cap = captured(model, make(batch, seq), keep)
    total = 0
    for rec in cap.attention:
        total += sum(a.nbytes for a in (rec.weights, rec.allowed) if a is not None)
        if rec.stats is not None:
            total += sum(getattr(rec.stats, f.name).nbytes for f in fields(rec.stats))
    return total + sum(r.norms.nbytes for r in cap.residual)


def _size(n: int) -> str:
    return f"{n / 2**20:.1f} MiB" if n >= 2**20 else f"{n / 1024:.1f} KiB"


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--repeats", type=int, default=7)
    p.add_argument("--batch", type=int, default=8)
    p.add_argument("--seq", type=int, default=256)
    a = p.parse_args(argv)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, batch {a.batch}, T={a.seq}, "
          f"6 layers x 8 heads, d_model 256; median of {a.repeats} interleaved runs")
    maps_bytes = 6 * a.batch * 8 * a.seq * a.seq * 4
    print(f"{'model':<10} {'mode':<34} {'time (ms)':>10} {'ratio':>7} {'target':>7} {'kept':>10} {'peak RSS +':>11}")
    for kind in ("encoder", "gpt2"):
        t = time_modes(kind, a.batch, a.seq, a.repeats)
        extra = {k: peak_extra(kind, k, a.batch, a.seq) for k in ("maps", "stats")}
        kept = {k: kept_bytes(kind, k, a.batch, a.seq) for k in ("maps", "stats")}
        for mode, sec in t.items():
            ratio = sec / t["plain"]
            target = {"maps": "<=1.10", "stats": "<=1.05"}.get(mode, "")
            k = _size(kept[mode]) if mode in kept else ""
            mem = _size(max(extra[mode], 0)) if mode in extra else ""
            print(f"{kind:<10} {mode:<34} {sec * 1e3:>10.1f} {ratio:>6.2f}x {target:>7} {k:>10} {mem:>11}")
    print("kept: bytes held by the capture's records (exact); peak RSS +: peak RSS of the captured forward minus "
          "a plain one's (approximate, allocator noise of a few MiB)")
    print(f"(the kept maps themselves are {maps_bytes / 2**20:.0f} MiB per model: 6 x {a.batch} x 8 x {a.seq}^2 float32; "
          f"stats keep 9 float64 per head per call = {6 * 8 * 9 * 8} bytes)")


if __name__ == "__main__":
    main()
