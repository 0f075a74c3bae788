"""Cache agreement: does incremental decoding with a key/value cache give the full forward's outputs?

:func:`check_cache` runs the sequence ``ids`` through the cached path chunk by chunk, under several chunk
schedules, and compares every position's output with one forward over the whole sequence. The classic bugs
it catches show only on some schedules: a causal mask applied only when there is no cache breaks a
multi-token chunk that follows a cache, a top-left ``is_causal`` breaks every step whose query is shorter
than its keys, a window or ALiBi bias built over the chunk's own length breaks once the cache holds more
than the chunk. :func:`assert_cache` raises ``AssertionError`` for pytest.

>>> import torch
>>> from attnscope.demo.cached_decoder import CachedDecoder, CachedDecoderConfig
>>> ids = torch.randint(0, 16, (2, 12))
>>> good = CachedDecoder(CachedDecoderConfig()).eval()
>>> check_cache(good.step, ids, full=good).ok
True
>>> bad = CachedDecoder(CachedDecoderConfig(cache_bug="top_left_causal")).eval()
>>> report = check_cache(bad.step, ids, full=bad, model=bad)
>>> report.ok, report.first_position, report.blame
(False, 1, 'blocks.0.attn')

What is compared:
    ``full(ids)`` gives the reference ``(B, T, ...)``; a schedule of chunk lengths (summing to ``T``) gives the
    cached outputs, concatenated along the position axis. A position's *difference* is the largest absolute
    difference over batch items and features divided by the root mean square of the reference output.
    Differences up to ``tol`` count as float noise: by default 1e-4 for float32 outputs (1e-8 float64, 2e-2
    float16/bfloat16), as in :func:`~attnscope.check_causal`; the two paths sum in different orders and
    agree to ~1e-6 in float32.

Blame:
    When a model is known (the HF form, or ``model=``), a failing schedule is replayed with observing hooks on
    every submodule: first the full forward, keeping each module call's tensors, then the cached path, chunk by
    chunk, comparing each module call's tensors with the reference at the same absolute positions (a chunk's
    query axis against ``[start, start + t)``, a key axis that spans the cache against ``[0, start + t)``).
    Blame goes to the first module whose outputs differ while its inputs agree, or, when a module's inputs
    differ before any module produced differing outputs, to the module whose own forward code made them.
"""

from __future__ import annotations

import inspect
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Iterator

import numpy as np
import torch
from torch import nn

from attnscope.analyses.probes.blame import _moved, _tensors
from attnscope.analyses.probes.runner import default_tolerance, output_tensor
from attnscope.errors import OptionError, ProbeError, ShapeError

__all__ = ["CacheReport", "ScheduleResult", "assert_cache", "check_cache", "default_schedules"]

Step = Callable[[torch.Tensor, Any], tuple[Any, Any]]
DEFAULT_MAX_BYTES = 256 * 1024**2


def default_schedules(T: int) -> dict[str, tuple[int, ...]]:
    """The chunk schedules tried by default for a sequence of ``T`` positions.

    >>> default_schedules(7)
    {'one at a time': (1, 1, 1, 1, 1, 1, 1), 'prefill then one at a time': (3, 1, 1, 1, 1), 'uneven chunks': (1, 3, 2, 1)}

    ``one at a time`` is plain decoding; ``prefill then one at a time`` reads the first half in one chunk, as
    generation after a prompt does; ``uneven chunks`` (lengths 1, 3, 2, 4, 1, 3, 2, 4, ...; the last cut to
    fit) sends multi-token chunks *after* a cache exists, which the other two never do.
    """
    if T < 1:
        raise ShapeError(f"expected at least one position; received T={T}")
    schedules = {"one at a time": (1,) * T}
    if T >= 2:
        head = max(1, T // 2)
        schedules["prefill then one at a time"] = (head,) + (1,) * (T - head)
        uneven, left, cycle = [], T, (1, 3, 2, 4)
        while left:
            uneven.append(min(cycle[len(uneven) % 4], left))
            left -= uneven[-1]
        schedules["uneven chunks"] = tuple(uneven)
    return schedules


@dataclass(frozen=True, repr=False, eq=False)
class ScheduleResult:
    """One chunk schedule's comparison with the full forward.

    Fields:
        name: the schedule's name.
        chunks: chunk lengths, in order; they sum to ``T``.
        ok: True when no position differs by more than the tolerance.
        difference: float64 ``(T,)``, each position's difference relative to the reference output scale.
        first_position: the first position that differs, or None.
        magnitude: its difference (0.0 when ok).
        blame: dotted name of the module blamed (``""``: the model's own forward code), or None (ok, no model,
            or nothing differed inside the model).
        blame_type: class name of that module, or None.
    """

    name: str
    chunks: tuple[int, ...]
    ok: bool
    difference: np.ndarray
    first_position: int | None
    magnitude: float
    blame: str | None
    blame_type: str | None

    def __repr__(self) -> str:
        return (f"ScheduleResult(name={self.name!r}, chunks={len(self.chunks)}, ok={self.ok}, "
                f"first_position={self.first_position}, blame={self.blame!r})")

    def chunk_of(self, position: int) -> tuple[int, int]:
        """``(index of the chunk, its start)`` that holds *position*."""
        start = 0
        for index, size in enumerate(self.chunks):
            if position < start + size:
                return index, start
            start += size
        raise IndexError(f"position {position} is beyond the schedule's {start} positions")


@dataclass(frozen=True, repr=False, eq=False)
class CacheReport:
    """Result of :func:`check_cache`: one :class:`ScheduleResult` per schedule, and the worst of them.

    Fields:
        ok: True when every schedule agrees with the full forward at every position.
        schedules: the per-schedule results, in the order tried.
        tolerance: relative difference treated as numerical noise.
        scale: root mean square of the reference output.
        forwards: calls of the step function and of the full forward made, blame replays included.
        subject: the name the messages use for the cached path.
    The properties ``first_position``, ``magnitude``, ``blame`` and ``blame_type`` are those of the first
    failing schedule (None / 0.0 when ok).
    """

    ok: bool
    schedules: tuple[ScheduleResult, ...]
    tolerance: float
    scale: float
    forwards: int
    subject: str

    @property
    def failing(self) -> tuple[ScheduleResult, ...]:
        """The schedules that disagree with the full forward."""
        return tuple(s for s in self.schedules if not s.ok)

    def _first(self, field: str, default: Any) -> Any:
        return getattr(self.failing[0], field) if self.failing else default

    @property
    def first_position(self) -> int | None:
        return self._first("first_position", None)

    @property
    def magnitude(self) -> float:
        return self._first("magnitude", 0.0)

    @property
    def blame(self) -> str | None:
        return self._first("blame", None)

    @property
    def blame_type(self) -> str | None:
        return self._first("blame_type", None)

    def __repr__(self) -> str:
        names = [s.name for s in self.failing]
        return (f"CacheReport(ok={self.ok}, schedules={len(self.schedules)}, failing={names}, "
                f"first_position={self.first_position}, blame={self.blame!r})")

    def summary(self) -> str:
        """One paragraph in words: which schedules disagree, where first, by how much, and the blame."""
        tail = f"[{len(self.schedules)} schedules, {self.forwards} forwards, tolerance {self.tolerance:.1e}]"
        if self.ok:
            tried = ", ".join(s.name for s in self.schedules)
            return (f"{self.subject} agrees with the full forward at every position under every schedule "
                    f"({tried}). {tail}")
        parts = [f"{self.subject} disagrees with the full forward."]
        for s in self.schedules:
            if s.ok:
                parts.append(f"Schedule '{s.name}' agrees.")
                continue
            index, start = s.chunk_of(s.first_position)
            size = s.chunks[index]
            where = (f"chunk {index} (positions {start}..{start + size - 1}, after {start} cached)"
                     if size > 1 else f"chunk {index} (a single token after {start} cached)")
            text = (f"Schedule '{s.name}': first difference at position {s.first_position}, "
                    f"{s.magnitude:.3g} x the output scale, in {where}")
            if s.blame == "":
                text += f"; it first appears in the model's own forward ({s.blame_type})"
            elif s.blame is not None:
                text += f"; it first appears in module '{s.blame}' ({s.blame_type})"
            parts.append(text + ".")
        return " ".join(parts) + " " + tail


# ---- the two paths --------------------------------------------------------------------------------------------


def _hf_paths(model: nn.Module) -> tuple[Step, Callable[[torch.Tensor], Any]]:
    """Step and full forward of a model in the HF convention (input_ids, past_key_values, use_cache).

    transformers 5.x renames ``past_key_values`` to ``cache`` (argument and output field); the name the
    model's forward declares is used, so neither version sees a deprecated keyword.
    """
    params = inspect.signature(model.forward).parameters
    key = "cache" if "cache" in params and "past_key_values" not in params else "past_key_values"

    def step(chunk: torch.Tensor, state: Any) -> tuple[Any, Any]:
        out = model(input_ids=chunk, use_cache=True, **{key: state})
        state = None
        for field in (key, "past_key_values", "cache"):
            value = out.get(field) if isinstance(out, Mapping) else getattr(out, field, None)
            if value is not None:
                state = value
                break
        if state is None:
            raise ProbeError(f"{type(model).__name__} returned no {key} with use_cache=True; give "
                             "check_cache a step function and full= instead")
        return out, state

    def full(ids: torch.Tensor) -> Any:
        return model(input_ids=ids, use_cache=False)

    return step, full


@contextmanager
def _steady(modules: Sequence[nn.Module]) -> Iterator[None]:
    """Eval mode and no autograd for the comparison; every module's mode is restored afterwards."""
    modes = [(m, m.training) for top in modules for m in top.modules()]
    try:
        for top in modules:
            top.eval()
        with torch.no_grad():
            yield
    finally:
        for m, mode in modes:
            m.train(mode)


def _run_schedule(step: Step, ids: torch.Tensor, chunks: Sequence[int], seq_dim: int,
                  on_chunk: Callable[[int, int], None] | None = None) -> torch.Tensor:
    state, outs, start = None, [], 0
    for size in chunks:
        if on_chunk is not None:
            on_chunk(start, size)
        result = step(ids[:, start:start + size], state)
        if not isinstance(result, tuple) or len(result) != 2:
            raise ProbeError(f"expected step(ids_chunk, state) to return (out_chunk, state); it returned "
                             f"{type(result).__name__}")
        out, state = result
        out = output_tensor(out, "step")
        if out.dim() <= seq_dim or out.size(seq_dim) != size:
            raise ShapeError(f"expected step's output to have the chunk's {size} positions on axis {seq_dim}; "
                             f"it returned shape {tuple(out.shape)} for chunk ids of shape {(ids.size(0), size)}")
        outs.append(out.detach())
        start += size
    return torch.cat(outs, dim=seq_dim)


def _difference(ref: torch.Tensor, got: torch.Tensor, seq_dim: int) -> tuple[np.ndarray, float]:
    """Per-position difference ``(T,)`` relative to the reference's RMS, and that RMS."""
    ref64, got64 = ref.double().movedim(seq_dim, 1), got.double().movedim(seq_dim, 1)  # (B, T, ...)
    finite = ref64[torch.isfinite(ref64)]
    scale = float(finite.square().mean().sqrt()) if finite.numel() else 0.0
    scale = scale if scale > 0 else 1.0
    d = (got64 - ref64).abs()
    d = torch.where((got64 == ref64) | (torch.isnan(got64) & torch.isnan(ref64)), torch.zeros_like(d), d)
    d = torch.nan_to_num(d, nan=float("inf"))
    per_pos = d.transpose(0, 1).reshape(ref64.size(1), -1).amax(dim=1)  # (T,)
    return per_pos.numpy() / scale, scale


# ---- blame ----------------------------------------------------------------------------------------------------


class _Replay:
    """Hooks' state: the full forward's module tensors kept, then the cached path compared chunk by chunk."""

    def __init__(self, T: int, tol: float, max_bytes: int) -> None:
        self.T, self.tol, self.max_bytes = T, tol, max_bytes
        self.recording = True
        self.kept: dict[tuple[str, int, str], list[torch.Tensor | None]] = {}
        self.kept_bytes = 0
        self.calls: Counter[str] = Counter()
        self.stack: list[str] = []
        self.start = self.size = 0
        self.blame: str | None = None
        self.decided = False

    def new_forward(self, start: int, size: int) -> None:
        self.calls.clear()
        self.stack.clear()
        self.start, self.size = start, size

    def _keep(self, key: tuple[str, int, str], tensors: list[torch.Tensor | None]) -> None:
        positional = [t if t is not None and self.T in t.shape else None for t in tensors]
        size = sum(t.numel() * t.element_size() for t in positional if t is not None)
        if self.kept_bytes + size > self.max_bytes:
            return
        self.kept_bytes += size
        self.kept[key] = [None if t is None else t.detach().clone() for t in positional]

    def _aligned(self, ref: torch.Tensor, got: torch.Tensor) -> torch.Tensor | None:
        """*ref* cut to the positions *got* holds, or None when the shapes do not line up."""
        if ref.dim() != got.dim():
            return None
        s, t = self.start, self.size
        for axis, (n, m) in enumerate(zip(ref.shape, got.shape)):
            if n == m and (n != self.T or (s == 0 and t == self.T)):
                continue
            if n != self.T:
                return None
            if m == t:  # a chunk axis: the chunk's own positions
                ref = ref.narrow(axis, s, t)
            elif m == s + t:  # a key axis over the cache and the chunk
                ref = ref.narrow(axis, 0, s + t)
            else:
                return None
        return ref

    def _differs(self, key: tuple[str, int, str], tensors: list[torch.Tensor | None]) -> bool:
        base = self.kept.get(key)
        if base is None or len(base) != len(tensors):
            return False
        for b, t in zip(base, tensors):
            if b is None or t is None:
                continue
            ref = self._aligned(b, t)
            if ref is not None and ref.numel() and _moved(ref, t.detach()) > self.tol:
                return True
        return False

    def pre(self, name: str) -> Callable[..., None]:
        def hook(module: nn.Module, args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
            call = self.calls[name]
            self.calls[name] += 1
            tensors = _tensors((args, kwargs))
            if self.recording:
                self._keep((name, call, "in"), tensors)
            elif not self.decided and self._differs((name, call, "in"), tensors):
                self.decided, self.blame = True, (self.stack[-1] if self.stack else None)
            self.stack.append(name)
        return hook

    def post(self, name: str) -> Callable[..., None]:
        def hook(module: nn.Module, args: tuple[Any, ...], kwargs: dict[str, Any], output: Any) -> None:
            if self.stack and self.stack[-1] == name:
                self.stack.pop()
            call = self.calls[name] - 1
            tensors = _tensors(output)
            if self.recording:
                self._keep((name, call, "out"), tensors)
            elif not self.decided and self._differs((name, call, "out"), tensors):
                self.decided, self.blame = True, name
        return hook


def _find_blame(model: nn.Module, step: Step, full: Callable[[torch.Tensor], Any], ids: torch.Tensor,
                chunks: Sequence[int], seq_dim: int, tol: float, max_bytes: int) -> tuple[str | None, str | None]:
    replay = _Replay(ids.size(1), tol, max_bytes)
    handles = []
    try:
        for name, module in model.named_modules():
            handles.append(module.register_forward_pre_hook(replay.pre(name), with_kwargs=True))
            handles.append(module.register_forward_hook(replay.post(name), with_kwargs=True))
        replay.new_forward(0, ids.size(1))
        full(ids)
        replay.recording = False
        _run_schedule(step, ids, chunks, seq_dim, on_chunk=replay.new_forward)
    finally:
        for handle in handles:
            handle.remove()
    if replay.blame is None:
        return None, None
    return replay.blame, type(model.get_submodule(replay.blame)).__name__


# ---- the check ------------------------------------------------------------------------------------------------


def _schedules(option: Any, T: int) -> dict[str, tuple[int, ...]]:
    if option is None:
        return default_schedules(T)
    items = option.items() if isinstance(option, Mapping) else (
        (f"schedule {i}", s) for i, s in enumerate(option))
    chosen = {}
    for name, chunks in items:
        chunks = tuple(int(c) for c in chunks)
        if not chunks or min(chunks) < 1 or sum(chunks) != T:
            raise OptionError(f"expected schedule {name!r} as positive chunk lengths summing to T={T}; "
                              f"received {chunks!r} (sum {sum(chunks)})")
        chosen[str(name)] = chunks
    if not chosen:
        raise OptionError("expected at least one schedule; received none")
    return chosen


def check_cache(
    step: Step | nn.Module,
    ids: torch.Tensor,
    *,
    full: Callable[[torch.Tensor], Any] | None = None,
    schedules: Mapping[str, Sequence[int]] | Sequence[Sequence[int]] | None = None,
    tol: float | None = None,
    model: nn.Module | None = None,
    seq_dim: int = 1,
    max_bytes: int = DEFAULT_MAX_BYTES,
) -> CacheReport:
    """Compare incremental decoding with a cache against one full forward, position by position.

    >>> import torch
    >>> from attnscope.demo.cached_decoder import CachedDecoder, CachedDecoderConfig
    >>> bad = CachedDecoder(CachedDecoderConfig(cache_bug="mask_only_without_cache")).eval()
    >>> report = check_cache(bad.step, torch.randint(0, 16, (1, 9)), full=bad, model=bad)
    >>> [s.ok for s in report.schedules]   # one token at a time never shows it; uneven chunks do
    [True, True, False]

    Args:
        step: an HF-style model (called as ``model(input_ids=, past_key_values=, use_cache=True)``, reading
            ``.logits`` and ``.past_key_values``; the full forward is ``model(input_ids=ids)``), or a function
            ``step(ids_chunk, state) -> (out_chunk, state)`` with ``state`` None at the start, ``ids_chunk``
            ``(B, t)`` and ``out_chunk`` ``(B, t, ...)`` (a tensor, or an object with ``.logits``).
        ids: token ids ``(B, T)``.
        full: the reference forward ``full(ids) -> (B, T, ...)``; needed with a step function.
        schedules: chunk schedules, ``{name: chunk lengths}`` or a list of them, each summing to ``T``
            (default: :func:`default_schedules`).
        tol: relative difference treated as noise (default by output dtype: 1e-4 for float32).
        model: the module whose submodules are blamed (default: *step* when it is a module).
        seq_dim: the position axis of the outputs.
        max_bytes: most bytes of the full forward's intermediate tensors kept for blame.

    Returns:
        :class:`CacheReport`.
    """
    if not isinstance(ids, torch.Tensor) or ids.dim() != 2 or ids.is_floating_point():
        got = f"shape {tuple(ids.shape)}, {ids.dtype}" if isinstance(ids, torch.Tensor) else type(ids).__name__
        raise ShapeError(f"expected token ids as an integer tensor (B, T); received {got}")
    if tol is not None and not tol > 0:
        raise OptionError(f"expected tol > 0; received {tol!r}")
    if isinstance(step, nn.Module) and full is None:
        model = step if model is None else model
        subject = type(step).__name__ + " with its cache"
        step, full = _hf_paths(step)
    elif full is None:
        raise OptionError("expected full= (the reference forward over the whole sequence) with a step function; "
                          "only an HF-style model (input_ids, past_key_values, use_cache) needs nothing else")
    else:
        subject = f"cached path {getattr(step, '__qualname__', type(step).__name__)}"
    if not callable(step) or not callable(full):
        raise OptionError(f"expected callables for step and full; received {type(step).__name__} and "
                          f"{type(full).__name__}")
    if model is not None and not isinstance(model, nn.Module):
        raise OptionError(f"model= takes the nn.Module to blame; received {type(model).__name__}")
    T = ids.size(1)
    chosen = _schedules(schedules, T)
    owners = [m for m in (model, step, full, getattr(step, "__self__", None)) if isinstance(m, nn.Module)]
    forwards = 0
    results = []
    with _steady(owners):
        ref = output_tensor(full(ids), "full").detach()
        forwards += 1
        if ref.dim() <= seq_dim or ref.size(seq_dim) != T:
            raise ShapeError(f"expected full(ids)'s output to have the {T} positions on axis {seq_dim}; "
                             f"it returned shape {tuple(ref.shape)}")
        tol = default_tolerance(ref.dtype) if tol is None else tol
        scale = 1.0
        for name, chunks in chosen.items():
            got = _run_schedule(step, ids, chunks, seq_dim)
            forwards += len(chunks)
            if got.shape != ref.shape:
                raise ShapeError(f"expected the cached outputs to have the full forward's shape "
                                 f"{tuple(ref.shape)}; schedule {name!r} gave {tuple(got.shape)}")
            diff, scale = _difference(ref, got, seq_dim)
            bad = np.flatnonzero(diff > tol)
            blame = blame_type = None
            if bad.size and model is not None:
                blame, blame_type = _find_blame(model, step, full, ids, chunks, seq_dim, tol, max_bytes)
                forwards += 1 + len(chunks)
            results.append(ScheduleResult(
                name=name, chunks=chunks, ok=not bad.size, difference=diff,
                first_position=int(bad[0]) if bad.size else None,
                magnitude=float(diff[bad[0]]) if bad.size else 0.0, blame=blame, blame_type=blame_type))
    return CacheReport(ok=all(r.ok for r in results), schedules=tuple(results), tolerance=float(tol),
                       scale=scale, forwards=forwards, subject=subject)


def assert_cache(step: Step | nn.Module, ids: torch.Tensor, *, full: Callable[[torch.Tensor], Any] | None = None,
                 **options: Any) -> CacheReport:
    """:func:`check_cache`, raising ``AssertionError`` with the summary when the paths disagree.

    >>> import torch
    >>> from attnscope.demo.cached_decoder import CachedDecoder, CachedDecoderConfig
    >>> good = CachedDecoder(CachedDecoderConfig(window=4)).eval()
    >>> assert_cache(good.step, torch.randint(0, 16, (1, 10)), full=good).ok
    True
    """
    report = check_cache(step, ids, full=full, **options)
    if not report.ok:
        raise AssertionError(report.summary())
    return report
