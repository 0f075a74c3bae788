"""Where capture's own time goes inside a forward: each part timed where it runs, beside the forward it adds to.

Run: ``python benchmarks/capture_parts.py [--repeats 10] [--batch 8] [--seq 256] [--heap warm|as-is]`` (warm
by default: the parts' own time, no case paying for fresh pages; see ``capture_overhead.WARM_HEAP``)

The models of ``capture_overhead.py`` (6 layers x 8 heads, d 256: ``nn.TransformerEncoder``, GPT-2-shaped eager
and SDPA), each captured with ``keep="maps"`` and ``keep="stats"``. In one process, plain and captured forwards
alternate; during the captured ones a timer wraps each of capture's parts listed in :data:`PARTS` (the functions
are replaced in their modules for the run, so the timed code is the code the capture runs). Printed per
captured forward, in ms: what the capture adds to the plain forward (for ``nn.TransformerEncoder`` with torch's
MHA fast path off, as capture runs it; ``capture_overhead.py`` prints what the fast path itself saves), each part, and
what no listed part accounts for ("elsewhere": the hooks' own bodies, the torch function mode's dispatch of
every call, and whatever capture's parts cost the model's own operations; the handlers' own calls are timed in
separate forwards, so within the noise it can come out below zero). Every figure
is a median over the repeats. Parts nest (a path's handler contains the reductions it calls), so they are not
summed; the outer parts (setup, teardown, handlers, residual norms) are, per forward, for the remainder. A
handler's line leaves out the call it makes for the model, timed on the plain forward (for MHA that call asks
for no weights, while capture's ``keep="maps"`` runs it with weights, as the peer does).

This is a diagnostic, not a target: capture_overhead.py holds the targets. Inside a forward every small
operation takes 3-10x what it takes in a loop (measured on the reference VM: a ``view`` of a 16-byte tensor 9 µs
inside against 1-2 µs in a loop; a large softmax or matrix product just before it outside a forward explains only
part of that), so the same part timed alone looks cheaper than it is; time parts here, where they run.
"""

from __future__ import annotations

import argparse
import collections
import functools
import importlib
import os
import statistics
import sys
import time

import torch

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))  # the repository: `benchmarks` imports
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)
from benchmarks.capture_overhead import build, heap_as_asked, slow_path  # noqa: E402

#: (label, module, attribute, outer): the parts timed. ``outer`` parts do not contain each other and are summed
#: for the remainder; the others run inside an outer one and are shown for where its time goes.
PARTS = [
    ("capture made (options, model map)", "attnscope.capture.session", "Capture.__init__", True),
    ("entered (hooks, mode, FlexAttention)", "attnscope.capture.session", "Capture.__enter__", True),
    ("  of which the FlexAttention lookup", "attnscope.capture.paths.flex", "hold", False),
    ("left (hooks off, checks)", "attnscope.capture.session", "Capture.__exit__", True),
    ("softmax path: handler, less the softmax", "attnscope.capture.paths.softmax", "on_call", True),
    ("  mask from the attention_mask argument", "attnscope.capture.masks", "added_mask_allowed", False),
    ("  mask agreement check (two maps)", "attnscope.capture.masks", "agrees_with_scores", False),
    ("  mask read off the scores", "attnscope.capture.masks", "allowed_from_scores", False),
    ("SDPA path: handler, less the fused call", "attnscope.capture.paths.sdpa", "on_call", True),
    ("  recomputed maps", "attnscope.capture.masks", "sdpa_weights", False),
    ("  statistics from the scores", "attnscope.capture.paths.sdpa", "fused_sums", False),
    ("MHA path: handler, less torch's own call", "attnscope.capture.paths.mha", "on_call", True),
    ("  statistics and output from the scores", "attnscope.capture.paths.mha", "score_sums", False),
    ("statistics of weights that exist", "attnscope.capture.recorder", "head_sums", False),
    ("records kept (maps taken or reduced)", "attnscope.capture.recorder", "Recorder.record", False),
    ("residual-stream norms", "attnscope.capture.recorder", "Recorder.record_residual", True),
]


class Timers:
    """Accumulates seconds per label into ``current`` while ``on`` is set; wraps functions in place and puts them
    back."""

    def __init__(self) -> None:
        self.on = False
        self.current: dict[str, float] = collections.defaultdict(float)
        self._undo: list[tuple[object, str, object]] = []

    def wrap(self, label: str, module: str, attribute: str) -> None:
        owner = importlib.import_module(module)
        *path, name = attribute.split(".")
        for part in path:
            owner = getattr(owner, part)
        original = getattr(owner, name)  # AttributeError here: a part was renamed; update PARTS

        @functools.wraps(original)
        def timed(*args, **kwargs):
            if not self.on:
                return original(*args, **kwargs)
            t0 = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                self.current[label] += time.perf_counter() - t0

        setattr(owner, name, timed)
        self._undo.append((owner, name, original))

    def restore(self) -> None:
        for owner, name, original in reversed(self._undo):
            setattr(owner, name, original)
        self._undo.clear()


def _model_call_time(plain, repeats: int) -> dict[str, float]:
    """Seconds per forward the plain model spends in the calls capture's handlers run for it (its softmax, the
    fused SDPA kernel, torch's MHA call), each wrapped where the model looks it up (``torch.nn.functional``):
    the handler lines subtract them, to show capture's part only."""
    timers = Timers()
    for key, name in (("softmax", "softmax"), ("sdpa", "scaled_dot_product_attention"),
                      ("mha", "multi_head_attention_forward")):
        timers.wrap(key, "torch.nn.functional", name)
    timers.on = True
    try:
        for _ in range(repeats):
            plain()
    finally:
        timers.restore()
    return {k: v / repeats for k, v in timers.current.items()}


def run_case(kind: str, keep: str, batch: int, seq: int, repeats: int) -> None:
    import attnscope

    model, make = build(kind)
    args = make(batch, seq)

    def plain():  # as capture runs the model: nn.TransformerEncoder with torch's fused fast path off
        with torch.no_grad():
            return slow_path(model, args) if kind == "encoder" else model(*args)

    timers = Timers()
    for label, module, attribute, _ in PARTS:
        timers.wrap(label, module, attribute)
    plains, captured, parts = [], [], []
    try:
        for i in range(repeats + 2):  # two warm-up pairs, not counted
            with torch.no_grad():
                t0 = time.perf_counter()
                plain()
                t1 = time.perf_counter()
                timers.current = collections.defaultdict(float)
                timers.on = True
                with attnscope.capture(model, keep=keep) as cap:
                    model(*args)
                timers.on = False
                t2 = time.perf_counter()
            del cap
            if i >= 2:
                plains.append(t1 - t0)
                captured.append(t2 - t1)
                parts.append(timers.current)
    finally:
        timers.restore()
    own = _model_call_time(plain, max(3, repeats // 3))
    for label, source in (("softmax path: handler, less the softmax", "softmax"),
                          ("SDPA path: handler, less the fused call", "sdpa"),
                          ("MHA path: handler, less torch's own call", "mha")):
        for one in parts:
            if one.get(label):
                one[label] = max(0.0, one[label] - own.get(source, 0.0))
    outer = [sum(one.get(label, 0.0) for label, _, _, is_outer in PARTS if is_outer) for one in parts]
    added = statistics.median(c - p for c, p in zip(captured, plains))
    rest = statistics.median(c - p - o for c, p, o in zip(captured, plains, outer))
    per = {label: statistics.median(one.get(label, 0.0) for one in parts) for label, *_ in PARTS}
    fast_off = " (torch's MHA fast path off, as capture runs it)" if kind == "encoder" else ""
    print(f"\n{kind}, keep={keep!r}: plain forward{fast_off} {statistics.median(plains) * 1e3:.1f} ms, capture adds "
          f"{added * 1e3:.2f} ms (median of {repeats} pairs)")
    for label, *_ in PARTS:
        if per[label]:
            print(f"  {label:<44} {per[label] * 1e3:8.3f} ms")
    print(f"  {'elsewhere: hooks, mode, the rest':<44} {rest * 1e3:8.3f} ms")


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--repeats", type=int, default=10)
    p.add_argument("--batch", type=int, default=8)
    p.add_argument("--seq", type=int, default=256)
    p.add_argument("--heap", choices=("as-is", "warm"), default="warm")
    a = p.parse_args(argv)
    heap_as_asked(a.heap, __file__, argv)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, batch {a.batch}, T={a.seq}; heap {a.heap}; "
          "ms per captured forward")
    for kind in ("encoder", "gpt2 eager", "gpt2 sdpa"):
        for keep in ("maps", "stats"):
            run_case(kind, keep, a.batch, a.seq, a.repeats)


if __name__ == "__main__":
    main()
