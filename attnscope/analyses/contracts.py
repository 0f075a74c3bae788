"""Declared dependency patterns checked behaviourally: :func:`check_mask` and :func:`assert_mask`.

The causal probe generalised: ``allowed[i, j]`` (or ``allowed[b, i, j]``) says which input positions each
output position may depend on, and the probe perturbs inputs and watches outputs to find any dependence the
pattern forbids: packed documents leaking into each other, a sliding window off by one, a prefix that is too
long, or a leak outside attention (a convolution over the sequence). Dependence the pattern allows but the
model does not use is not a violation; it shows in the measured reach.

>>> import torch, torch.nn.functional as F
>>> from attnscope.analyses.patterns import window_pattern
>>> def windowed(h, keys=3):                              # attends the query and keys - 1 before it
...     T = h.shape[1]
...     i, j = torch.arange(T)[:, None], torch.arange(T)[None]
...     return F.scaled_dot_product_attention(h, h, h, attn_mask=(i >= j) & (i - j < keys))
>>> x = torch.randn(1, 16, 4)
>>> check_mask(windowed, x, window_pattern(16, 3)).ok
True
>>> report = check_mask(lambda h: windowed(h, keys=4), x, window_pattern(16, 3), mode="exhaustive")
>>> report.ok, report.window_declared, report.window_used
(False, 3, 4)

The screen (default) is group testing. For each batch item it perturbs, in one copy each:

- *group blocks*: outputs are cut into runs of consecutive positions (at most ⌈T / 2⌈log2 T⌉⌉ long, and cut
  wherever the pattern changes shape, e.g. at a document boundary or where a prefix ends); a group's block is
  every input forbidden to *all* its outputs (for documents: all other documents at once);
- *earlier blocks*: all inputs up to a split point ``s``; outputs that may see none of them must hold;
- *later blocks*: all inputs after ``s``; outputs that may see none of them must hold.

Split points are ⌈log2 T⌉ evenly spaced positions plus every position where the earliest allowed input of
an output jumps (document starts) and where the pattern changes shape. The screen tests (finds unless every
draw leaves the output unchanged):

- any dependence on an input forbidden to the whole group of the output: across documents always (groups
  never straddle a boundary); for a window of ``w`` keys, any dependence reaching ``w − 1 + g`` or more back
  (``g`` the group length);
- any dependence of ``i`` on ``j`` when a split ``s`` lies in ``j <= s`` with every input ``<= s``
  forbidden to ``i`` (or ``s < j`` with every input ``> s`` forbidden): for a window that uses one key too
  many at every position, the split at ``s`` tests output ``s + w`` against input ``s``, so an off-by-one
  present along the sequence is tested by every split; a prefix that reaches one position too far is
  tested by the later block at the prefix's end;
- a leak present at every position (a convolution, a norm over the sequence) by every block.

It does not guarantee a dependence confined to one pair between two splits inside a group's allowed
neighbourhood (one output peeking one key too far, once). ``mode="exhaustive"`` perturbs every position on
its own (T copies) and measures every pair, and the exact reach.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
import torch
from torch import nn

from attnscope.analyses.causality import (
    DEFAULT_MAX_BYTES,
    ProbeReport,
    _check_options,
    _dims,
    _finish,
    _Probe,
    _steady,
    resolve_axes,
)
from attnscope.analyses.patterns import as_pattern
from attnscope.analyses.probes.runner import Runner, default_tolerance
from attnscope.errors import OptionError

__all__ = ["MaskReport", "MaskViolation", "assert_mask", "check_mask"]

_LISTED = 8


class MaskViolation(NamedTuple):
    """One output position that moved when an input the pattern forbids to it changed."""

    output_pos: int
    input_pos: int
    magnitude: float  # change of the output position, relative to the output scale
    item: int  # batch item where the pair is forbidden and the change was largest


@dataclass(frozen=True, repr=False, eq=False)
class MaskReport(ProbeReport):
    """Result of :func:`check_mask`: the fields of :class:`~attnscope.analyses.causality.ProbeReport` plus reach.

    Extra fields:
        allowed: bool ``(B, T, T)``, the declared pattern as evaluated.
        reach_back: int ``(T,)``, for each output the farthest earlier input it was measured to depend on,
            as a distance ``i − j`` (0: only itself or nothing earlier; -1: nothing measured).
        reach_ahead: int ``(T,)``, the farthest later input, as ``j − i`` (0: none).
        window_declared: largest ``i − j + 1`` the pattern allows over its causal part, or None if the
            pattern lets some output see a later input.
        window_used: largest ``i − j + 1`` measured (a lower bound in screen mode: only measured columns).
    """

    allowed: np.ndarray | None = None
    reach_back: np.ndarray | None = None
    reach_ahead: np.ndarray | None = None
    window_declared: int | None = None
    window_used: int | None = None

    def reach_line(self) -> str:
        """One line on the reach: "declared window 8, uses 9" (screen mode: "at least")."""
        if self.window_used is None:
            return "no dependence measured on earlier inputs."
        used = f"{'at least ' if self.mode == 'screen' else ''}{self.window_used}"
        if self.window_declared is None:
            return f"uses a window of {used} positions (the pattern is not causal, so it declares no window)."
        return f"declared window {self.window_declared}, uses {used}."

    def _pass_text(self) -> str:
        return f"keeps to the declared pattern on this input: nothing moved where it must not; {self.reach_line()}"

    def _fail_verb(self) -> str:
        return "breaks the declared pattern"

    def _pair_text(self, i: int, j: int, m: float) -> str:
        item = next((v.item for v in self.violations if v.output_pos == i and v.input_pos == j), 0)
        return (f"output position {i} depends on input position {j}, which the pattern forbids (batch item "
                f"{item}, change {m:.3g} x the output scale); {self.reach_line()[:-1]}")

    def _screen_note(self) -> str:
        return " (the screen perturbs groups of forbidden inputs and need not find all; mode='exhaustive' does)"


# -- the screen's blocks --------------------------------------------------------------------------------------


def _shape(allowed: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Earliest and latest allowed input per output: ``(B, T)`` each (−1 where a row allows nothing)."""
    T = allowed.shape[-1]
    pos = torch.arange(T)
    has = allowed.any(-1)
    first = torch.where(allowed, pos, T).amin(-1)
    last = torch.where(allowed, pos, -1).amax(-1)
    return torch.where(has, first, -1), last


def _groups(first: torch.Tensor, last: torch.Tensor, size: int) -> list[tuple[int, int]]:
    """Runs ``[lo, hi)`` of consecutive outputs of one item, cut every *size* and where the shape changes."""
    T = first.shape[0]
    step = torch.stack([first.diff(), last.diff()], 1)  # (T-1, 2)
    runs, lo = [], 0
    for i in range(1, T):
        changed = i >= 2 and not torch.equal(step[i - 1], step[i - 2])
        jump = int(step[i - 1, 0]) not in (0, 1) or int(step[i - 1, 1]) not in (0, 1)
        if changed or jump or i - lo >= size:
            runs.append((lo, i))
            lo = i
    runs.append((lo, T))
    return runs


def screen_blocks(forbidden: torch.Tensor, allowed: torch.Tensor) -> list[torch.Tensor]:
    """The screen's perturbation masks, each ``(B, T)`` bool (item ``b`` perturbs its own block).

    >>> from attnscope.analyses.patterns import documents_pattern
    >>> a = documents_pattern(torch.tensor([[0, 0, 1, 1]]))
    >>> [m[0].int().tolist() for m in screen_blocks(~a, a)]   # blocks of output groups, then splits
    [[0, 1, 1, 1], [0, 0, 1, 1], [1, 1, 0, 1], [1, 1, 0, 0], [1, 0, 0, 0], [0, 0, 0, 1]]
    """
    B, T, _ = forbidden.shape
    pos = torch.arange(T)
    n = max(1, math.ceil(math.log2(max(T, 2))))
    size = max(1, math.ceil(T / (2 * n)))
    first, last = _shape(allowed)
    per_item: list[list[torch.Tensor]] = []
    for b in range(B):
        blocks: list[torch.Tensor] = []
        runs = _groups(first[b], last[b], size)
        for lo, hi in runs:
            block = forbidden[b, lo:hi].all(0)  # (T,) forbidden to every output of the run
            if bool(block.any()):
                blocks.append(block)
        cuts = {round(k * (T - 2) / max(1, n - 1)) for k in range(n)} if T >= 2 else set()
        cuts |= {lo - 1 for lo, _ in runs if lo > 0}
        cuts |= {int(f) - 1 for f in first[b].unique() if int(f) > 0}
        cuts |= {int(z) for z in last[b].unique() if 0 <= int(z) < T - 1}
        for s in sorted(cuts):
            for block in (pos <= s, pos > s):
                hold = (~(block[None] & ~forbidden[b]).any(-1)).any()  # some output may see none of it
                if bool(hold) and bool(block.any()):
                    blocks.append(block)
        unique: dict[bytes, torch.Tensor] = {}
        for block in blocks:
            unique.setdefault(block.numpy().tobytes(), block)
        per_item.append(list(unique.values()))
    rows = max((len(p) for p in per_item), default=0)
    masks = []
    for r in range(rows):
        m = torch.zeros(B, T, dtype=torch.bool)
        for b, blocks in enumerate(per_item):
            if r < len(blocks):
                m[b] = blocks[r]
        masks.append(m)
    return masks


def _reach(dependency: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray, int | None]:
    T = dependency.shape[0]
    dep = np.nan_to_num(dependency, nan=0.0) > tol  # (T, T)
    back = np.full(T, -1)
    ahead = np.zeros(T, dtype=np.int64)
    for i in range(T):
        js = np.flatnonzero(dep[i])
        if js.size:
            back[i] = max(0, i - int(js.min()))
            ahead[i] = max(0, int(js.max()) - i)
    used = int(back.max()) + 1 if (back >= 0).any() else None
    return back, ahead, used


def _declared(allowed: torch.Tensor) -> int | None:
    T = allowed.shape[-1]
    pos = torch.arange(T)
    if bool((allowed & (pos[None, :] > pos[:, None])).any()):
        return None
    gaps = torch.where(allowed, pos[:, None] - pos[None, :], -1)  # (B, T, T)
    return int(gaps.max()) + 1


# -- public functions -----------------------------------------------------------------------------------------


def check_mask(
    fn: Callable[[torch.Tensor], Any],
    x: torch.Tensor,
    allowed: Any,
    *,
    seq_dim: int | None = None,
    mode: str = "screen",
    model: nn.Module | None = None,
    tol: float | None = None,
    trials: int | None = None,
    seed: int = 0,
    vocab_size: int | None = None,
    noise: float = 1.0,
    batch_dim: int | None = None,
    rows_per_call: int = 16,
    max_bytes: int = DEFAULT_MAX_BYTES,
) -> MaskReport:
    """Check that output ``i`` of ``fn(x)`` depends only on inputs ``j`` that ``allowed`` permits.

    >>> import torch
    >>> from torch import nn
    >>> from attnscope.analyses.patterns import documents_pattern
    >>> conv = nn.Conv1d(4, 4, kernel_size=3, padding=1)            # sees one step either way
    >>> fn = lambda h: conv(h.transpose(1, 2)).transpose(1, 2)
    >>> docs = torch.tensor([0, 0, 0, 1, 1, 1])
    >>> r = check_mask(fn, torch.randn(1, 6, 4), documents_pattern(docs), model=conv, mode="exhaustive")
    >>> r.ok, [v[:2] for v in r.violations if v.input_pos < v.output_pos], r.blame_type   # across documents
    (False, [(3, 2)], 'Conv1d')

    Args:
        fn, x: as for :func:`~attnscope.analyses.causality.check_causal`.
        allowed: bool ``(T, T)`` or ``(B, T, T)`` (True: output ``i`` may depend on input ``j``), or a
            predicate ``(b, h, q_idx, kv_idx) -> bool`` in FlexAttention's ``mask_mod`` convention (``h`` is
            0), e.g. the one the model itself uses; see :mod:`attnscope.analyses.patterns` for builders.
        seq_dim: axis of positions; None infers it as :func:`check_causal` does.
        mode: ``"screen"`` (group testing, see the module docstring for what it guarantees) or
            ``"exhaustive"`` (every position perturbed on its own: every pair and the exact reach).
        model, tol, trials, seed, vocab_size, noise, batch_dim, rows_per_call, max_bytes: as for
            :func:`check_causal` (``trials`` defaults to 1).

    Returns:
        A :class:`MaskReport`; violations are :class:`MaskViolation` ``(output_pos, input_pos, magnitude,
        item)``; ``window_declared`` / ``window_used`` give "declared 8, uses 9" in one line.
    """
    trials = _check_options("causal", mode, model, trials, tol, noise, rows_per_call)
    _dims(x, 1 if seq_dim is None else seq_dim, batch_dim)
    root = model if model is not None else (fn if isinstance(fn, nn.Module) else None)
    modules = [m for m in (fn, model) if isinstance(m, nn.Module)]
    with _steady(modules, seed, x.device):
        axes = resolve_axes(fn, x, model, seq_dim, batch_dim)
        seq_dim, batch_dim = _dims(x, axes.seq_dim, axes.batch_dim)
        B, T = x.shape[batch_dim], x.shape[seq_dim]
        pattern = as_pattern(allowed, T, B)  # (B, T, T)
        forbidden = ~pattern
        runner = Runner(fn, x, seq_dim=seq_dim, batch_dim=batch_dim, vocab_size=vocab_size, noise=noise,
                        seed=seed, rows_per_call=rows_per_call, max_bytes=max_bytes, model=root, observed=None)
        runner.forwards += axes.forwards
        runner.sequences += axes.forwards * B
        tol = default_tolerance(runner.dtype) if tol is None else tol
        everything = torch.ones(B, T, dtype=torch.bool)
        probe = _Probe(runner, everything, everything, trials, tol, forbidden)
        if mode == "exhaustive":
            probe.columns(list(range(T)))
        else:
            blocks = screen_blocks(forbidden, pattern)
            if blocks:
                probe.note_blocks(blocks, probe.rows(blocks))

        def observe(i: int) -> torch.Tensor:
            mask = forbidden[:, i]
            hold = probe.must_hold(mask)[mask.any(1).numpy()]  # (B', T)
            return torch.from_numpy(np.flatnonzero(hold.all(0)))

        report = _finish(
            probe, MaskReport, mode=mode, fn=fn, model=model, splits=(), max_bytes=max_bytes,
            candidates_for=lambda i: [int(j) for j in torch.nonzero(forbidden[:, i].any(0)).flatten()],
            blame_mask=lambda i: forbidden[:, i], blame_observe=observe,
        )
    back, ahead, used = _reach(probe.dependency, tol)
    violations = tuple(MaskViolation(v.output_pos, v.input_pos, v.magnitude,
                                     int(probe.breach_item[v.output_pos, v.input_pos])) for v in report.violations)
    fields = {f: getattr(report, f) for f in report.__dataclass_fields__}
    fields.update(violations=violations, allowed=pattern.numpy(), reach_back=back, reach_ahead=ahead,
                  window_declared=_declared(pattern), window_used=used, seq_dim=seq_dim,
                  batch_dim=batch_dim, axis_source=axes.source)
    return MaskReport(**fields)


def assert_mask(fn: Callable[[torch.Tensor], Any], x: torch.Tensor, allowed: Any, **options: Any) -> None:
    """Raise ``AssertionError`` naming the first forbidden dependence, its size and the blamed module, else None.

    >>> import torch, torch.nn.functional as F
    >>> from attnscope.analyses.patterns import causal_pattern
    >>> assert_mask(lambda h: F.scaled_dot_product_attention(h, h, h, is_causal=True), torch.randn(1, 8, 4),
    ...             causal_pattern(8))

    Takes the options of :func:`check_mask`.
    """
    if "mode" in options and options["mode"] not in ("screen", "exhaustive"):
        raise OptionError(f"expected mode 'screen' or 'exhaustive'; got {options['mode']!r}")
    report = check_mask(fn, x, allowed, **options)
    if not report.ok:
        raise AssertionError(report.summary())
