"""Cost of capture against the plain forward, against the peer (the model's own way to hand out weights), and
against the floors measured in the same run.

Run: ``python benchmarks/capture_overhead.py [--repeats 7] [--batch 8] [--seq 256] [--heap as-is|warm]``

Setup: 6 layers, d_model 256, 8 heads, batch 8, T=256, eval mode under no_grad, three models:

* ``encoder``: ``nn.TransformerEncoder`` (the MHA path). Peer: torch's own ``need_weights=True,
  average_attn_weights=False`` asked of every ``self_attn`` by a forward pre-hook (fast path off, as it must be
  for MHA to hand out weights).
* ``gpt2 eager``: a GPT-2-shaped transformers model with ``attn_implementation="eager"`` (the softmax path).
  Peer: transformers' ``output_attentions=True`` on the same model.
* ``gpt2 sdpa``: the same weights with ``attn_implementation="sdpa"`` (the fused path). Peer: transformers'
  ``output_attentions=True``, which needs the eager model (same weights).

Timings are interleaved (every case once, then again, ...: a round) and the median of each is reported, so a
noisy neighbour hits every case alike; every ratio is the median over rounds of the two cases' times in the same
round, with the quartiles of those per-round ratios printed beside the targets (see ``benchmarks.scale.Paired``).
``--heap warm`` times the computation alone: the allocator keeps freed memory faulted in (:data:`WARM_HEAP`), so
no case pays for fresh pages; as-is, keeping maps pays for the fresh memory it holds, as it does in a user's
process, and which case gets fresh memory varies from run to run.
Targets (from the project's issues):

* eager paths: ``keep="maps"`` <= 1.03x the peer (printed beside it, for information: ``residual=False``, which
  keeps only what the peer hands out);
* fused path: time to all maps with ``sdpa="weights"`` <= 1.00x the peer (eager ``output_attentions``);
* ``keep="stats"`` <= 1.20x plain on every model and below ``keep="maps"``;
* ``keep="maps"``: peak extra memory <= 1.2x the bytes kept.

Floors, measured in the same run: what the peer's weights already cost (eager paths: the weights exist, so
keeping them costs nothing beyond the peer), and the peer under capture's mechanism doing nothing (a pre-hook
and hook on every module, a torch function mode seeing every call); the plain forward plus recomputing 6 maps
(fused path left bit-identical); for ``keep="stats"``: on the softmax path the plain forward plus the statistics
of 6 maps already in memory (the entropy from the scores beside them); on fused calls (SDPA, and MHA asked for no
weights, which stays on torch's fused path) the plain forward plus every score some query may see and its
softmax, in score_sums' row blocks and pieces, nothing reduced: an exact statistic beside an untouched fused
call cannot cost less. For ``nn.TransformerEncoder`` that plain forward runs with torch's MHA fast path off
(:func:`slow_path`): the fast path is one fused C++ call per layer that nothing can look inside. Beside
``keep="stats"`` / ``keep="maps"``: on the eager models the plain forward plus the statistics of 6 maps in memory,
over ``keep="maps"`` (the maps exist, so exact statistics cost at least their reduction on top; above 1.00x the
target sits below that floor); on the SDPA default the plain forward plus every score and its softmax, over maps.
Memory: each mode runs in a fresh subprocess with glibc told to return every freed block of 128 KiB or more
(``benchmarks.scale.EXACT_RSS``); the figure is the peak RSS of a captured forward (its results kept) minus the
peak RSS of a plain forward of the same process (Linux's VmHWM, reset before each): the plain forward's own
peak is the floor every forward pays.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import subprocess
import sys
import time

import torch
from torch import nn
from torch.overrides import TorchFunctionMode

import attnscope
from attnscope.stats import head_sums

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))  # the repository: `benchmarks` imports
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)
from benchmarks.scale import EXACT_RSS, Paired  # noqa: E402  (shared with the users'-size benchmark)

LAYERS, HEADS, D = 6, 8, 256
SCORES_FLOOR = "floor: plain + 6 layers' scores, softmax"


def build(kind: str):
    """The model of *kind* and a function making its inputs for (batch, T)."""
    torch.manual_seed(0)
    if kind == "encoder":
        layer = nn.TransformerEncoderLayer(D, HEADS, 4 * D, dropout=0.0, batch_first=True)
        model = nn.TransformerEncoder(layer, LAYERS, enable_nested_tensor=False).eval()
        return model, lambda b, t: (torch.randn(b, t, D),)
    import transformers

    cfg = transformers.GPT2Config(n_layer=LAYERS, n_head=HEADS, n_embd=D, n_positions=1024, vocab_size=1000,
                                  bos_token_id=0, eos_token_id=0, resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
    attn = "eager" if kind == "gpt2 eager" else "sdpa"
    model = transformers.GPT2Model._from_config(cfg, attn_implementation=attn).eval()
    return model, lambda b, t: (torch.randint(0, 1000, (b, t)),)


def forward(model, args, keep=None, **options):
    with torch.no_grad():
        if keep is None:
            return model(*args)
        with attnscope.capture(model, keep=keep, **options):
            return model(*args)


def captured(model, args, keep, **options):
    """One forward under capture; returns the capture, so its records count in the peak."""
    with torch.no_grad(), attnscope.capture(model, keep=keep, **options) as cap:
        model(*args)
    return cap


def mha_peer(model, args):
    """torch's own per-head weights of every MHA call: need_weights=True, average_attn_weights=False."""
    kept, handles = [], []

    def ask(module, a, kw):
        return a, {**kw, "need_weights": True, "average_attn_weights": False}

    def keep(module, a, kw, out):
        kept.append(out[1])

    for m in model.modules():
        if isinstance(m, nn.MultiheadAttention):
            handles.append(m.register_forward_pre_hook(ask, with_kwargs=True))
            handles.append(m.register_forward_hook(keep, with_kwargs=True))
    try:
        with torch.no_grad(), fast_path_off():
            model(*args)
    finally:
        for h in handles:
            h.remove()
    return kept


@contextlib.contextmanager
def fast_path_off():
    """torch's MHA fast path switched off while the block runs (and back as it was after)."""
    was = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(False)
    try:
        yield
    finally:
        torch.backends.mha.set_fastpath_enabled(was)


class _Idle(TorchFunctionMode):
    """A torch function mode that runs every call unchanged (capture's own mode routes a few functions)."""

    def __torch_function__(self, func, types, args=(), kwargs=None):
        return func(*args, **(kwargs or {}))


def mechanism_floor(model, args, peer):
    """*peer* run under capture's mechanism doing nothing: a forward pre-hook and hook on every module and a torch
    function mode seeing every torch call. What any capture built this way pays before it records anything."""
    def run():
        handles = []
        for m in model.modules():
            handles.append(m.register_forward_pre_hook(lambda mod, a, kw: None, with_kwargs=True))
            handles.append(m.register_forward_hook(lambda mod, a, out: None, always_call=True))
        try:
            with _Idle():
                return peer(model, args)
        finally:
            for h in handles:
                h.remove()
    return run


def hf_peer(model, args):
    """transformers' own weights: output_attentions=True."""
    with torch.no_grad():
        return model(*args, output_attentions=True).attentions


def recompute_floor(batch: int, seq: int):
    """softmax(QKᵀ/√d + causal mask) of 6 layers: what observing a fused call costs with its output untouched."""
    from attnscope.capture.masks import sdpa_weights

    q, k = torch.randn(batch, HEADS, seq, D // HEADS), torch.randn(batch, HEADS, seq, D // HEADS)
    return lambda: [sdpa_weights(q, k, None, True) for _ in range(LAYERS)]


def scores_floor(batch: int, seq: int, causal: bool):
    """Every score of 6 layers some query may see and its softmax, nothing reduced, made as score_sums makes them
    (its plan's row blocks and shared-mask bias, added and scaled inside the product, in its pieces): the least
    an exact statistic of a fused call costs beside the untouched call."""
    import attnscope.stats as S

    e = D // HEADS
    q, k = torch.randn(batch * HEADS, seq, e), torch.randn(batch * HEADS, seq, e)
    allowed = torch.ones(seq, seq, dtype=torch.bool).tril() if causal else None
    plan = S.score_plan(allowed, batch, HEADS, seq, seq)  # the blocks and bias score_sums uses
    n, scale = batch * HEADS, 1.0 / e ** 0.5

    def run():
        for _ in range(LAYERS):
            for (r0, r1, k0, k1), bb in zip(plan.spans, plan.bias_blocks):
                per = min(n, max(1, S.SCORE_PIECE_BYTES // ((r1 - r0) * (k1 - k0) * 4)))
                buf = torch.empty(per, r1 - r0, k1 - k0)
                wbuf = torch.empty_like(buf)
                for s0 in range(0, n, per):
                    s1 = min(n, s0 + per)
                    qb, kb, out = q[s0:s1, r0:r1], k[s0:s1, k0:k1].transpose(1, 2), buf[:s1 - s0]
                    sc = torch.baddbmm(out, qb, kb, beta=0, alpha=scale, out=out) if bb is None else \
                        torch.baddbmm(bb, qb, kb, alpha=scale, out=out)
                    torch.softmax(sc, dim=-1, out=wbuf[:s1 - s0])
    return run


def reduce_floor(batch: int, seq: int, scores: bool):
    """The statistics of 6 causal maps already in memory (no capture, no copy); with *scores* the entropy is taken
    from the masked scores beside them, as capture does where the path has them (softmax, recomputed SDPA)."""
    allowed = torch.ones(seq, seq, dtype=torch.bool).tril()[None, None]
    s = torch.randn(batch, HEADS, seq, seq).masked_fill(~allowed, torch.finfo(torch.float32).min)
    w = s.softmax(-1)
    return lambda: [head_sums(w, allowed, scores=s if scores else None) for _ in range(LAYERS)]


def cases(kind: str, batch: int, seq: int) -> dict[str, object]:
    model, make = build(kind)
    args = make(batch, seq)
    runs = {"plain": lambda: forward(model, args)}
    if kind == "encoder":
        runs["peer: need_weights"] = lambda: mha_peer(model, args)
        runs["floor: peer + idle hooks and mode"] = mechanism_floor(model, args, mha_peer)
    elif kind == "gpt2 eager":
        runs["peer: output_attentions"] = lambda: hf_peer(model, args)
        runs["floor: peer + idle hooks and mode"] = mechanism_floor(model, args, hf_peer)
    else:
        eager, _ = build("gpt2 eager")
        eager.load_state_dict(model.state_dict())
        runs["peer: output_attentions (eager)"] = lambda: hf_peer(eager, args)
    runs["maps"] = lambda: forward(model, args, "maps")
    if kind != "gpt2 sdpa":  # like for like with the peer, which hands out no residual-stream norms
        runs["maps, residual=False"] = lambda: forward(model, args, "maps", residual=False)
    runs["stats"] = lambda: forward(model, args, "stats")
    if kind == "gpt2 sdpa":
        runs["maps, sdpa='weights'"] = lambda: forward(model, args, "maps", sdpa="weights")
        runs["stats, sdpa='weights'"] = lambda: forward(model, args, "stats", sdpa="weights")
        again = recompute_floor(batch, seq)
        runs["floor: plain + recompute 6 maps"] = lambda: (forward(model, args), again())
    reduce = reduce_floor(batch, seq, scores=True)  # every path hands its scores to the statistics
    runs["floor: plain + stats of 6 maps in memory"] = lambda: (forward(model, args), reduce())
    if kind == "gpt2 sdpa":  # fused calls: statistics need every score some query may see
        scores = scores_floor(batch, seq, causal=True)
        runs[SCORES_FLOOR] = lambda: (forward(model, args), scores())
    elif kind == "encoder":  # MHA asked for no weights: the same, on torch's Python path (see slow_path)
        scores = scores_floor(batch, seq, causal=False)
        runs["floor: plain, fast path off"] = lambda: slow_path(model, args)
        runs["floor: fast path off + 6 layers' scores, softmax"] = lambda: (slow_path(model, args), scores())
    return runs


def slow_path(model, args):
    """The plain forward with torch's MHA fast path switched off: ``nn.TransformerEncoderLayer`` then runs its
    Python code instead of one fused C++ call per layer, which no hook or function mode can look inside. Any
    capture of this model pays it (the peer too: MHA hands out weights only off the fast path)."""
    with fast_path_off():
        return forward(model, args)


def time_cases(runs: dict, repeats: int) -> dict[str, list[float]]:
    """Seconds of every run of every case: each round runs every case once, in order (interleaved)."""
    for fn in runs.values():  # warm-up
        fn()
    times = {k: [] for k in runs}
    for _ in range(repeats):
        for k, fn in runs.items():
            t0 = time.perf_counter()
            fn()
            times[k].append(time.perf_counter() - t0)
    return times


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


def memory(kind: str, keep: str, batch: int, seq: int) -> tuple[int, int]:
    """In a fresh process: (peak RSS of a captured forward minus that of a plain one, bytes the records hold)."""
    code = ("import json; import benchmarks.capture_overhead as b;"
            f"m, mk = b.build({kind!r}); a = mk({batch}, {seq}); b.forward(m, a); b.forward(m, a, {keep!r});"
            "plain = b._peak_of(lambda: b.forward(m, a));"
            f"cap = b._peak_of(lambda: b.captured(m, a, {keep!r}));"
            f"print(json.dumps([cap - plain, b.kept_bytes(b.captured(m, a, {keep!r}))]))")
    # glibc returns freed blocks (EXACT_RSS): RSS follows live memory
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=ROOT,
                         env={**os.environ, **EXACT_RSS})
    peak, kept = json.loads(out.stdout.strip().splitlines()[-1])
    return int(peak), int(kept)


def kept_bytes(cap) -> int:
    """Bytes of numpy arrays held by the records of one capture."""
    from dataclasses import fields

    total = 0
    for rec in cap.attention:
        total += sum(a.nbytes for a in (rec.weights, rec.allowed) if a is not None)
        if rec.stats is not None:
            total += sum(getattr(rec.stats, f.name).nbytes for f in fields(rec.stats))
    return total + sum(r.norms.nbytes for r in cap.residual)


#: ``--heap warm``: glibc keeps freed blocks up to 32 MiB in its heap and never gives the heap back to the
#: system, so every forward reuses memory that is already faulted in. On the reference machine (a VM) a fresh
#: page costs about 6 µs: a 16 MiB map written to fresh memory stalls ~24 ms, and which forward of an
#: interleaved run gets fresh memory is chance, which made the as-is ratios swing by 10-40 % between runs.
WARM_HEAP = {"MALLOC_MMAP_THRESHOLD_": str(32 * 2**20), "MALLOC_TRIM_THRESHOLD_": str(2**40)}


def heap_as_asked(heap: str, script: str, argv: list[str] | None) -> None:
    """With ``heap == "warm"``: run *script* again in a fresh process with :data:`WARM_HEAP` (the allocator
    settings only take effect at start-up) and exit with its status; in that process, fault the heap in."""
    if heap != "warm":
        return
    if os.environ.get("ATTNSCOPE_BENCH_WARM") != "1":
        env = {**os.environ, **WARM_HEAP, "ATTNSCOPE_BENCH_WARM": "1"}
        args = argv if argv is not None else sys.argv[1:]
        sys.exit(subprocess.run([sys.executable, os.path.abspath(script), *args], env=env).returncode)
    warm_heap()


def warm_heap(total: int = 2**30) -> None:
    """Fault in *total* bytes of heap (16 MiB blocks, each below the mmap threshold) and free them: with
    :data:`WARM_HEAP` they stay in the heap for the forwards to reuse."""
    blocks = [torch.ones(4 * 2**20) for _ in range(total // (16 * 2**20))]  # 16 MiB each, every page touched
    del blocks


def _size(n: int) -> str:
    return f"{n / 2**20:.1f} MiB" if n >= 2**20 else f"{n / 1024:.1f} KiB"


def _verdict(ok: bool) -> str:
    return "met" if ok else "NOT met"


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--repeats", type=int, default=7)
    p.add_argument("--batch", type=int, default=8)
    p.add_argument("--seq", type=int, default=256)
    p.add_argument("--no-memory", action="store_true", help="skip the peak-RSS subprocesses")
    p.add_argument("--heap", choices=("as-is", "warm"), default="as-is",
                   help="as-is: the allocator as a process has it (fresh memory is faulted in, and a forward may "
                        "or may not get it); warm: times the computation alone (see WARM_HEAP)")
    a = p.parse_args(argv)
    heap_as_asked(a.heap, __file__, argv)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, batch {a.batch}, T={a.seq}, "
          f"{LAYERS} layers x {HEADS} heads, d_model {D}; {a.repeats} interleaved rounds (ms: medians); heap {a.heap}")
    targets = []
    for kind in ("encoder", "gpt2 eager", "gpt2 sdpa"):
        run = Paired(time_cases(cases(kind, a.batch, a.seq), a.repeats))
        t = run.t
        peer_key = next(k for k in t if k.startswith("peer"))
        print(f"\n{kind}")
        print(f"  {'case':<50} {'ms':>8} {'/ plain':>8} {'/ peer':>8}")
        for k, sec in t.items():
            print(f"  {k:<50} {sec * 1e3:>8.1f} {run.ratio(k, 'plain'):>7.2f}x {run.ratio(k, peer_key):>7.2f}x")
        floor_stats = run.ratio("floor: plain + stats of 6 maps in memory", "plain")
        floor_scores = ""
        for scores_key, label in ((SCORES_FLOOR, "plain"),
                                  ("floor: fast path off + 6 layers' scores, softmax", "fast path off")):
            if scores_key in t:
                floor_scores = f"{label} + every score and its softmax {run.ratio(scores_key, 'plain'):.2f}x"

        def target(what: str, case: str, ref: str, limit: float | None, floor: str) -> None:
            targets.append((kind, what, run.ratio(case, ref), run.spread(case, ref), limit, floor))

        if kind == "gpt2 sdpa":
            target("maps (sdpa='weights') / peer", "maps, sdpa='weights'", peer_key, 1.00,
                   f"plain fused forward, nothing kept: {run.ratio('plain', peer_key):.2f}x peer")
            target("maps (default, bit-identical) / peer", "maps", peer_key, None,
                   f"plain + recompute 6 maps {run.ratio('floor: plain + recompute 6 maps', peer_key):.2f}x peer")
            for label in ("stats", "stats, sdpa='weights'"):
                target(f"{label} / plain", label, "plain", 1.20, floor_scores)
            scores_of_maps = run.ratio(SCORES_FLOOR, "maps")
            target("stats / maps (default)", "stats", "maps", 1.0,
                   f"plain + every score and its softmax {scores_of_maps:.2f}x maps")
            target("stats / maps (sdpa='weights')", "stats, sdpa='weights'", "maps, sdpa='weights'", 1.0,
                   "none measured: both build every score once; statistics reduce them, maps keep them")
        else:
            target("maps / peer", "maps", peer_key, 1.03,
                   f"1.00x (the weights exist); with capture's idle hooks and mode "
                   f"{run.ratio('floor: peer + idle hooks and mode', peer_key):.2f}x")
            target("maps, residual=False / peer", "maps, residual=False", peer_key, None,
                   "like for like: the peer keeps no residual-stream norms")
            target("stats / plain", "stats", "plain", 1.20,
                   floor_scores or f"plain + stats of 6 maps in memory {floor_stats:.2f}x")
            stats_of_maps = run.ratio("floor: plain + stats of 6 maps in memory", "maps")
            target("stats / maps", "stats", "maps", 1.0,
                   f"plain + statistics of 6 maps in memory {stats_of_maps:.2f}x maps (the maps exist)")
        if not a.no_memory:
            peak, kept = memory(kind, "maps", a.batch, a.seq)
            _, kept_s = memory(kind, "stats", a.batch, a.seq)
            print(f"  memory: maps kept {_size(kept)}, peak RSS +{_size(max(peak, 0))}; stats kept {_size(kept_s)}")
            targets.append((kind, "maps peak extra RSS / kept bytes", peak / kept, "-", 1.20,
                            "1.00x (the maps themselves)"))
    print(f"\nratios: median over the {a.repeats} rounds of the two cases' times in the same round; quartiles beside")
    print(f"{'model':<11} {'target':<38} {'measured':>9} {'quartiles':>10} {'target':>8}  {'verdict':<8} "
          "floor (same run)")
    for kind, what, ratio, spread, limit, floor in targets:
        if limit is None:
            print(f"{kind:<11} {what:<38} {ratio:>8.3f}x {spread:>10} {'-':>8}  {'(info)':<8} {floor}")
            continue
        ok = ratio < limit if what.startswith("stats /") and "plain" not in what else ratio <= limit
        print(f"{kind:<11} {what:<38} {ratio:>8.3f}x {spread:>10} "
              f"{'<=' if 'plain' in what or 'peer' in what or 'RSS' in what else '<'}{limit:>5.2f}x"
              f"  {_verdict(ok):<8} {floor}")
    print("peak RSS: allocator noise of a few MiB; kept: bytes held by the records (exact)")


if __name__ == "__main__":
    main()
