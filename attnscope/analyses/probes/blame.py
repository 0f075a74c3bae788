"""Which module brings a leak in: the first one, in call order, whose outputs at observed positions move.

The model runs twice with forward hooks on every submodule: once on the unperturbed input, keeping a copy of
each module's tensor inputs and outputs, then once on a perturbed copy, comparing as it goes. A tensor is
*tainted* when its values at the observed positions (for causality: positions at or before the split, whose
inputs did not change) differ from the unperturbed run by more than the tolerance.

The sequence axis of an intermediate tensor is found by its length: every axis of length ``T`` is a
candidate, and a tensor counts as tainted only if its observed slice moved along *every* candidate axis.
That keeps ``(B, H, Tq, Tk)`` attention weights right (rows of later queries change legitimately, so the
key axis alone would always look tainted) and survives a width or batch that happens to equal ``T``.
Tensors with no axis of length ``T`` (pooled vectors, flattened ``(B·T, D)`` views) are not compared.

Blame goes to the first event that shows taint:

- a module whose outputs are tainted while its inputs were not: the leak is in that module (children finish
  before their parent, so this is the innermost one);
- a module whose *inputs* are tainted although no module before it produced tainted outputs: the leak is
  in the code of its caller (the enclosing module's own forward), or before the model was called (``None``);
- in both cases, if a module inside the blamed one reduced the sequence axis away (its output has no ``T``
  axis, at most 1/T the size of its positional input) and that output moved, the reduction is blamed.

>>> import torch
>>> from torch import nn
>>> net = nn.Sequential(nn.Linear(4, 4), nn.Conv1d(3, 3, 1))  # mixes positions: the conv sees T as channels
>>> x = torch.randn(1, 3, 4)
>>> bumped = x.clone(); bumped[:, 2] += 1.0
>>> find_blame(net, net, x, bumped, T=3, observe=torch.arange(2), tol=1e-4, max_bytes=2**20)
('1', 'Conv1d')
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from typing import Any

import torch
from torch import nn

__all__ = ["find_blame"]


def _tensors(obj: Any, depth: int = 0) -> list[torch.Tensor | None]:
    """Tensors inside nested tuples, lists and dicts, in a fixed order (``None`` keeps the slots aligned)."""
    if isinstance(obj, torch.Tensor):
        return [obj]
    if depth > 4:
        return []
    if isinstance(obj, (tuple, list)):
        return [t for item in obj for t in _tensors(item, depth + 1)]
    if isinstance(obj, dict):
        return [t for item in obj.values() for t in _tensors(item, depth + 1)]
    return []


def _rms(t: torch.Tensor) -> float:
    finite = t[torch.isfinite(t)].double()
    value = float(finite.square().mean().sqrt()) if finite.numel() else 0.0
    return value if value > 0 else 1.0


def _moved(base: torch.Tensor, new: torch.Tensor) -> float:
    """Largest change between two same-shape tensors, relative to *base*'s RMS (ints: 0 or inf)."""
    if base.numel() == 0:
        return 0.0
    if not (base.is_floating_point() or base.is_complex()):
        return 0.0 if torch.equal(base, new) else float("inf")
    d = (new - base).abs()
    d = torch.where((new == base) | (torch.isnan(new) & torch.isnan(base)), torch.zeros_like(d), d)
    return float(torch.nan_to_num(d, nan=float("inf")).max()) / _rms(base)


class _Watch:
    """The hooks' shared state: kept copies in the first run, comparisons and the verdict in the second."""

    def __init__(self, T: int, observe: torch.Tensor, tol: float, max_bytes: int) -> None:
        self.T, self.observe, self.tol, self.max_bytes = T, observe, tol, max_bytes
        self.recording = True
        self.kept: dict[tuple[str, int, str], list[torch.Tensor | None]] = {}
        self.kept_bytes = 0
        self.calls: Counter[str] = Counter()
        self.stack: list[tuple[str, int]] = []
        self.blame: str | None = None
        self.decided = False
        self.reducers: list[str] = []  # modules that reduced T away and whose output moved, call order

    def compare(self) -> None:
        self.recording = False
        self.calls.clear()
        self.stack.clear()

    # one group of tensors (a module's inputs or outputs) ---------------------------------------------

    def _keep(self, key: tuple[str, int, str], tensors: list[torch.Tensor | None]) -> None:
        size = sum(t.numel() * t.element_size() for t in tensors if t is not None)
        if self.kept_bytes + size > self.max_bytes:
            return  # over budget: this group is not compared in the second run
        self.kept_bytes += size
        self.kept[key] = [None if t is None else t.detach().clone() for t in tensors]

    def _taint(self, key: tuple[str, int, str], tensors: list[torch.Tensor | None]) -> tuple[float, bool]:
        """(largest taint over positional tensors, whether a non-positional tensor moved)."""
        base = self.kept.get(key)
        if base is None or len(base) != len(tensors):
            return 0.0, False
        taint, moved = 0.0, False
        for b, t in zip(base, tensors):
            if b is None or t is None or b.shape != t.shape:
                continue
            axes = [a for a, n in enumerate(b.shape) if n == self.T]
            if not axes:
                moved = moved or _moved(b, t.detach()) > self.tol
                continue
            idx = self.observe.to(b.device)
            taint = max(taint, min(_moved(b.index_select(a, idx), t.detach().index_select(a, idx)) for a in axes))
        return taint, moved

    def _decide(self, culprit: str | None) -> None:
        self.decided = True
        inside = [r for r in self.reducers if culprit == "" or (culprit is not None and r.startswith(culprit + "."))]
        self.blame = inside[0] if inside else culprit

    # the hooks ----------------------------------------------------------------------------------------

    def pre(self, name: str) -> Callable[..., None]:
        def hook(module: nn.Module, args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
            call = self.calls[name]
            self.calls[name] += 1
            tensors = _tensors((args, kwargs))
            if self.recording:
                self._keep((name, call, "in"), tensors)
            elif not self.decided and self._taint((name, call, "in"), tensors)[0] > self.tol:
                self._decide(self.stack[-1][0] if self.stack else None)
            self.stack.append((name, call))
        return hook

    def post(self, name: str) -> Callable[..., None]:
        def hook(module: nn.Module, args: tuple[Any, ...], kwargs: dict[str, Any], output: Any) -> None:
            call = self.stack.pop()[1] if self.stack and self.stack[-1][0] == name else self.calls[name] - 1
            tensors = _tensors(output)
            if self.recording:
                self._keep((name, call, "out"), tensors)
                return
            if self.decided:
                return
            taint, moved = self._taint((name, call, "out"), tensors)
            if taint > self.tol:
                self._decide(name)
            elif moved and self._reduces(_tensors((args, kwargs)), tensors):
                self.reducers.append(name)
        return hook

    def _reduces(self, inputs: list[torch.Tensor | None], outputs: list[torch.Tensor | None]) -> bool:
        """Whether outputs without a T axis are at most 1/T the size of a positional input."""
        positional = [t.numel() for t in inputs if t is not None and self.T in t.shape]
        flat = [t.numel() for t in outputs if t is not None and self.T not in t.shape]
        return bool(positional and flat) and max(flat) * self.T <= max(positional)


def find_blame(
    model: nn.Module,
    run: Callable[[torch.Tensor], Any],
    x: torch.Tensor,
    perturbed: torch.Tensor,
    *,
    T: int,
    observe: torch.Tensor,
    tol: float,
    max_bytes: int,
) -> tuple[str | None, str | None]:
    """Dotted name and class name of the module of *model* that brings the change in, or ``(None, None)``.

    Args:
        model: the module whose submodules get the hooks (all hooks are removed before returning).
        run: calls the model on an input (``run(x)``, then ``run(perturbed)``).
        x, perturbed: the unperturbed input and a copy whose perturbation moved the observed outputs.
        T: number of positions; axes of this length are the sequence axes of intermediate tensors.
        observe: positions (LongTensor) that must not move in a model without the leak.
        tol: relative change that counts as movement.
        max_bytes: most bytes of intermediate tensors kept from the first run; the rest are not compared.

    Returns:
        ``(name, class name)``; name ``""`` is the model's own forward code, ``None`` means before the model.
    """
    watch = _Watch(T, observe, tol, max_bytes)
    handles = []
    try:
        for name, module in model.named_modules():
            handles.append(module.register_forward_pre_hook(watch.pre(name), with_kwargs=True))
            handles.append(module.register_forward_hook(watch.post(name), with_kwargs=True))
        run(x)
        watch.compare()
        run(perturbed)
    finally:
        for handle in handles:
            handle.remove()
    if watch.blame is None:
        return None, None
    return watch.blame, type(model.get_submodule(watch.blame)).__name__
