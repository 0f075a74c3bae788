"""Behavioural probes: does an output position depend on inputs it must not see?

:func:`check_causal` asks whether output position ``i`` of a callable depends on any input position
``j > i``; :func:`check_padding` asks whether outputs at real positions depend on the content of padded
ones. Both treat the model as a black box: they change inputs and watch outputs, so they catch leaks that
never show in an attention map (a convolution with symmetric padding, a norm or pooling over the sequence,
a shifted copy of the input) as well as wrong masks. When a model is known, they also name the module that
brings the leak in. :func:`assert_causal` and :func:`assert_padding` raise ``AssertionError`` for pytest.

>>> import torch, torch.nn.functional as F
>>> from torch import nn
>>> class Block(nn.Module):
...     def __init__(self, causal):
...         super().__init__(); self.qkv, self.causal = nn.Linear(8, 24), causal
...     def forward(self, x):                                    # x: (B, T, D)
...         q, k, v = self.qkv(x).chunk(3, dim=-1)
...         return F.scaled_dot_product_attention(q, k, v, is_causal=self.causal)
>>> x = torch.randn(1, 12, 8)
>>> check_causal(Block(causal=True), x).ok
True
>>> report = check_causal(Block(causal=False), x)
>>> report.ok, report.violations[0][:2], report.blame
(False, (0, 1), '')

Perturbations and tolerance:
    Token ids (an integer ``x``) are replaced by other ids drawn uniformly from the vocabulary (see
    ``vocab_size``); float inputs get Gaussian noise of ``noise`` times ``x``'s standard deviation. The
    change of an output position is the largest absolute change over its batch items and features, divided
    by the root mean square of the unperturbed output (over the positions compared). Changes up to ``tol``
    count as numerical noise: by default 1e-4 for float32 outputs, 1e-8 for float64, 2e-2 for float16 and
    bfloat16. Perturbed copies go through ``fn`` several at a time, stacked along the batch axis, so
    batched and unbatched float32 arithmetic must agree to within ``tol`` (it does, by ~1e-6).

    A dependence that one draw happens to leave invisible (a *lucky zero*: the leak path gives the same
    value for the old and the new content) is caught by another, independent draw: each batch item gets
    its own draws, every perturbed set is drawn ``trials`` times, and in the causal screen a dependence is
    drawn once more for every further split it crosses (a leak present at every position, once per split).

Determinism:
    The probe puts ``fn`` (if it is a module) and ``model`` in eval mode, turns off autograd and seeds
    torch's global generator for its own calls, then restores every module's mode and the generator
    state. If outputs still move although the input did not (a callable that samples, or dropout in a
    model the probe was not told about), it raises :class:`~attnscope.errors.ProbeError` rather than
    report a leak.

Blame:
    When ``fn`` is an ``nn.Module`` or ``model=`` names one, a failing probe runs the model twice more with
    hooks on every submodule and blames the first module, in call order, whose outputs at positions that
    must not move did move (see :mod:`attnscope.analyses.probes.blame`). The hooks only observe and are
    removed before the function returns.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Sequence
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, replace
from typing import Any, NamedTuple

import numpy as np
import torch
from torch import nn

from attnscope.analyses.probes.blame import find_blame
from attnscope.analyses.probes.runner import Runner, default_tolerance, one_position_hint, output_tensor
from attnscope.errors import AttnscopeError, OptionError, ProbeError, ShapeError, suggest

__all__ = [
    "CausalReport",
    "PaddingReport",
    "ProbeReport",
    "Violation",
    "assert_causal",
    "assert_padding",
    "check_causal",
    "check_padding",
    "resolve_axes",
]

MODES = ("screen", "exhaustive")
DEFAULT_MAX_BYTES = 256 * 1024**2
# independent draws per perturbed set, by default: (causal screen, padding screen, exhaustive)
_TRIALS = {("causal", "screen"): 1, ("padding", "screen"): 3, ("causal", "exhaustive"): 1,
           ("padding", "exhaustive"): 1}
_LISTED = 8  # positions and pairs named in a message


class Violation(NamedTuple):
    """One output position that moved when an input it must not see changed."""

    output_pos: int
    input_pos: int
    magnitude: float  # change of the output position, relative to the output scale


@dataclass(frozen=True, repr=False, eq=False)
class ProbeReport:
    """What a behavioural probe found. Plain data: numpy arrays, tuples, strings.

    Fields:
        ok: True when no output position moved by more than ``tolerance``.
        violations: ``(output_pos, input_pos, magnitude)`` pairs measured by perturbing the input position
            on its own, sorted by output then input position. Exhaustive mode lists every such pair; screen
            mode lists the pairs of the columns it measured after finding a leak, which always include the
            first leaking output and the nearest input it depends on.
        leaking_outputs: every output position found to move, ascending (screen mode finds these by
            perturbing blocks of inputs, so some may have no entry in ``violations``).
        dependency: float64 ``(T, T)``; ``[i, j]`` is the change of output ``i`` when input ``j`` alone is
            perturbed (max over trials, batch items, features), relative to the output scale; NaN where not
            measured. Exhaustive mode measures every column (the padding probe: every padded column).
        gradient: float64 ``(T, T)`` or None; with ``grad_check=True``, ``[i, j]`` is the largest
            ``|∂(r·y_i)/∂x_j|`` over batch and features for a random direction ``r``, relative to the
            largest entry (for token ids: the gradient at the output of the embedding that takes them).
        blame: dotted name of the module that brings the leak in (``""``: the model's own forward code),
            or None (no leak, no model given, or the change appears before the model is called).
        blame_type: class name of that module, or None.
        mode: ``"screen"`` or ``"exhaustive"``.
        tolerance: relative change treated as numerical noise.
        scale: root mean square of the unperturbed output over the compared positions.
        splits: the split points of the screen (the causal probe; empty for padding).
        forwards: calls of ``fn`` made, including the unperturbed one and, on failure, the rerun and blame runs.
        sequences: input sequences evaluated over all calls (batch items times perturbed copies).
        subject: the name the messages use for ``fn``.
        seq_dim, batch_dim: the axes of ``x`` (and of the output) the probe perturbed and compared.
        axis_source: how ``seq_dim`` was chosen: ``"given"``, from the model's attention layers, from a
            probing forward, or a batch of one (see :func:`resolve_axes`).
    """

    ok: bool
    violations: tuple[Violation, ...]
    leaking_outputs: tuple[int, ...]
    dependency: np.ndarray
    gradient: np.ndarray | None
    blame: str | None
    blame_type: str | None
    mode: str
    tolerance: float
    scale: float
    splits: tuple[int, ...]
    forwards: int
    sequences: int
    subject: str
    seq_dim: int = 1
    batch_dim: int = 0
    axis_source: str = "given"

    def __repr__(self) -> str:
        first = tuple(self.violations[0][:2]) + (round(self.violations[0][2], 4),) if self.violations else None
        return (f"{type(self).__name__}(ok={self.ok}, mode={self.mode!r}, violations={len(self.violations)}, "
                f"first={first}, blame={self.blame!r}, forwards={self.forwards})")

    def summary(self) -> str:
        """One paragraph in words: the first violation with its magnitude, the leaking positions, the blame."""
        tail = (f"[{self.mode} mode, positions on axis {self.seq_dim} ({self.axis_source}), {self.forwards} calls "
                f"of fn, tolerance {self.tolerance:.1e}]")
        if self.ok:
            return f"{self.subject} {self._pass_text()} {tail}"
        parts = [f"{self.subject} {self._fail_verb()}:"]
        if self.violations:
            i, j, m = self.violations[0][:3]
            parts.append(self._pair_text(i, j, m) + ".")
        n = len(self.leaking_outputs)
        shown = ", ".join(map(str, self.leaking_outputs[:_LISTED])) + (", ..." if n > _LISTED else "")
        where = f"{n} output position{'s' if n != 1 else ''} found moving ({shown})"
        if self.mode == "screen":
            where += self._screen_note()
        parts.append(where + ".")
        if len(self.violations) > 1:
            pairs = ", ".join(f"{v[0]}<-{v[1]} ({v[2]:.3g})" for v in self.violations[:_LISTED])
            more = f" and {len(self.violations) - _LISTED} more" if len(self.violations) > _LISTED else ""
            parts.append(f"Pairs output<-input (change): {pairs}{more}.")
        parts.append(self._blame_text())
        return " ".join(p for p in parts if p) + " " + tail

    def _blame_text(self) -> str:
        if self.blame is None:
            return ""
        if self.blame == "":
            return f"The change first appears in the model's own forward ({self.blame_type}), not in a submodule."
        return f"The change first appears in module '{self.blame}' ({self.blame_type})."

    def _pass_text(self) -> str:
        return "passed."

    def _screen_note(self) -> str:
        return ""

    def _fail_verb(self) -> str:
        return "failed"

    def _pair_text(self, i: int, j: int, m: float) -> str:
        return f"output position {i} moved by {m:.3g} when input position {j} changed"


class CausalReport(ProbeReport):
    """Result of :func:`check_causal` (fields: see :class:`ProbeReport`)."""

    def _pass_text(self) -> str:
        return "is causal on this input: no output position moved when later inputs changed."

    def _screen_note(self) -> str:  # the causal screen perturbs blocks after a few splits, not every position
        return " (the screen perturbs at a few split points and need not find all; mode='exhaustive' does)"

    def _fail_verb(self) -> str:
        return "is not causal"

    def _pair_text(self, i: int, j: int, m: float) -> str:
        return (f"output position {i} depends on later input position {j} "
                f"(change {m:.3g} x the output scale)")


class PaddingReport(ProbeReport):
    """Result of :func:`check_padding` (fields: see :class:`ProbeReport`)."""

    def _pass_text(self) -> str:
        return "ignores padding on this input: no real output position moved when padded content changed."

    def _fail_verb(self) -> str:
        return "does not ignore padding"

    def _pair_text(self, i: int, j: int, m: float) -> str:
        return (f"real output position {i} moved by {m:.3g} x the output scale when padded input "
                f"position {j} changed")


# -- options ------------------------------------------------------------------------------------------------


def _subject(fn: Any) -> str:
    if isinstance(fn, nn.Module):
        return type(fn).__name__
    name = getattr(fn, "__name__", "")
    return name if name and name != "<lambda>" else "fn"


def _dims(x: Any, seq_dim: int, batch_dim: int | None) -> tuple[int, int]:
    if not isinstance(x, torch.Tensor):
        raise OptionError(f"expected x to be a torch.Tensor (token ids or float features); got {type(x).__name__}")
    if x.dim() < 2:
        raise ShapeError(
            f"expected x with a batch and a sequence axis, e.g. ids (B, T) or features (B, T, D); got shape "
            f"{tuple(x.shape)} (add a batch axis: x[None])"
        )
    if not -x.dim() <= seq_dim < x.dim():
        raise OptionError(f"seq_dim={seq_dim} is out of range for x of shape {tuple(x.shape)}")
    seq_dim %= x.dim()
    if batch_dim is None:
        batch_dim = 1 if seq_dim == 0 else 0
    if not -x.dim() <= batch_dim < x.dim() or batch_dim % x.dim() == seq_dim:
        raise OptionError(f"batch_dim={batch_dim} must be an axis of x other than seq_dim={seq_dim}")
    return seq_dim, batch_dim % x.dim()


def _check_options(probe: str, mode: str, model: Any, trials: int | None, tol: float | None, noise: float,
                   rows_per_call: int) -> int:
    if mode not in MODES:
        raise OptionError(f"expected mode 'screen' or 'exhaustive'; got {mode!r}." + suggest(str(mode), MODES))
    if model is not None and not isinstance(model, nn.Module):
        raise OptionError(f"expected model= to be an nn.Module or None; got {type(model).__name__}")
    if trials is None:
        trials = _TRIALS[probe, mode]
    if not isinstance(trials, int) or trials < 1:
        raise OptionError(f"expected trials to be a positive int; got {trials!r}")
    if tol is not None and not tol > 0:
        raise OptionError(f"expected tol > 0; got {tol!r}")
    if not noise > 0:
        raise OptionError(f"expected noise > 0; got {noise!r}")
    if not isinstance(rows_per_call, int) or rows_per_call < 1:
        raise OptionError(f"expected rows_per_call to be a positive int; got {rows_per_call!r}")
    return trials


def screen_splits(T: int, splits: int | Sequence[int] | None = None) -> tuple[int, ...]:
    """Split points of the screen: *splits* evenly spaced positions from 0 to T − 2 (default ⌈log2 T⌉).

    >>> screen_splits(16)
    (0, 5, 9, 14)
    >>> screen_splits(16, [3, 7])
    (3, 7)
    """
    if T < 2:
        return ()
    if splits is None or isinstance(splits, int):
        n = max(1, math.ceil(math.log2(T))) if splits is None else splits
        if n < 1:
            raise OptionError(f"expected splits >= 1; got {splits}")
        if n == 1:
            return (0,)
        return tuple(sorted({round(k * (T - 2) / (n - 1)) for k in range(n)}))
    chosen = tuple(sorted({int(s) for s in splits}))
    bad = [s for s in chosen if not 0 <= s <= T - 2]
    if bad or not chosen:
        raise OptionError(f"expected split points in 0..{T - 2} (T={T}); got {list(splits)}")
    return chosen


@contextmanager
def _steady(modules: Sequence[nn.Module], seed: int, device: torch.device) -> Iterator[None]:
    """Eval mode, no autograd and a seeded generator; restores every module's mode and the generator state."""
    modes = [(m, m.training) for module in modules for m in module.modules()]
    with ExitStack() as stack:
        stack.enter_context(torch.random.fork_rng(devices=[device] if device.type == "cuda" else []))
        torch.default_generator.manual_seed(seed)
        if device.type == "cuda":
            torch.cuda.manual_seed(seed)
        stack.enter_context(torch.no_grad())
        try:
            for module in modules:
                module.eval()
            yield
        finally:
            for m, training in modes:
                m.training = training


# -- which axis holds positions -------------------------------------------------------------------------------


class Axes(NamedTuple):
    """Where positions and batch items sit in ``x``, how that was decided, and the forwards it cost."""

    seq_dim: int
    batch_dim: int | None
    source: str
    forwards: int


def _layer_layout(root: nn.Module | None) -> dict[str, bool]:
    """``{attention module or block name: sequence-first?}`` from the model's torch attention layers."""
    if root is None:
        return {}
    from attnscope.capture.discovery import map_model

    found: dict[str, bool] = {}
    try:
        seq_first = getattr(map_model(root), "seq_first", frozenset())
    except Exception:  # noqa: BLE001 - the static map is a hint here; the probing forward decides the rest
        seq_first = frozenset()
    for name in sorted(seq_first):
        found[name or type(root).__name__] = True
    for name, m in root.named_modules():
        if isinstance(m, nn.MultiheadAttention) and not any(name.startswith(f + ".") for f in seq_first if f):
            found[name or type(root).__name__] = not m.batch_first
    return found


def _mixes(fn: Callable[[torch.Tensor], Any], x: torch.Tensor, y0: torch.Tensor, axis: int, tol: float) -> bool | None:
    """Whether changing index 0 along *axis* of ``x`` moves outputs at other indices along it (None: cannot say)."""
    bumped = x.clone()
    lead = bumped.narrow(axis, 0, 1)
    if x.is_floating_point() or x.is_complex():
        std = float(x.double().std()) if x.numel() > 1 else 1.0
        gen = torch.Generator().manual_seed(1234)
        lead += torch.randn(lead.shape, generator=gen, dtype=torch.float64).to(x.dtype).to(x.device) * (std or 1.0)
    else:
        lead.copy_(torch.where(lead == 0, torch.ones_like(lead), torch.zeros_like(lead)))
    y = output_tensor(fn(bumped)).detach()
    if y.shape != y0.shape or y.dim() <= axis or y.shape[axis] != x.shape[axis]:
        return None
    rest0, rest = y0.narrow(axis, 1, y0.shape[axis] - 1), y.narrow(axis, 1, y.shape[axis] - 1)
    finite = y0[torch.isfinite(y0)].double()
    scale = float(finite.square().mean().sqrt()) if finite.numel() else 1.0
    d = torch.nan_to_num((rest - rest0).abs(), nan=float("inf"))
    return bool(d.numel()) and float(d.max()) / (scale or 1.0) > tol


def resolve_axes(fn: Callable[[torch.Tensor], Any], x: Any, model: nn.Module | None, seq_dim: int | None,
                 batch_dim: int | None, pad_mask: torch.Tensor | None = None) -> Axes:
    """Decide which axis of ``x`` holds positions, or refuse; never guess.

    In order: ``seq_dim`` when given; a ``pad_mask`` ``(B, T)`` whose shape fits only one order of ``x``'s
    first two axes; a *probing forward*: change index 0 along axis 0, then along axis 1, and see which
    change stays in its own slice (the batch axis: items are independent) and which spreads (positions mix);
    the layout of the model's torch attention layers (``batch_first`` of ``nn.MultiheadAttention`` and the
    torch transformer layers, as :func:`attnscope.capture.discovery.map_model` reports them) when the
    probing forward cannot tell; a batch of one on axis 0. Otherwise it raises an
    :class:`~attnscope.errors.OptionError` naming the axes.

    >>> import torch
    >>> from torch import nn
    >>> mha = nn.MultiheadAttention(8, 2)                       # batch_first=False: (T, B, D)
    >>> resolve_axes(lambda h: mha(h, h, h)[0], torch.randn(6, 3, 8), mha, None, None)[:3]
    (0, 1, 'a probing forward: items are independent along axis 1')
    """
    if seq_dim is not None:
        return Axes(seq_dim, batch_dim, "given", 0)
    if not isinstance(x, torch.Tensor) or x.dim() < 2:
        return Axes(1, batch_dim, "default", 0)  # _dims refuses such an x with its own message
    if batch_dim is not None:
        seq = 1 if batch_dim % x.dim() == 0 else 0
        return Axes(seq, batch_dim, f"the other of the first two axes than batch_dim={batch_dim}", 0)
    d0, d1 = x.shape[0], x.shape[1]
    if pad_mask is not None and d0 != d1:
        shape = tuple(torch.as_tensor(pad_mask).shape)
        if shape == (d0, d1):
            return Axes(1, 0, "pad_mask (B, T) fits x's first two axes in this order", 0)
        if shape == (d1, d0):
            return Axes(0, 1, "pad_mask (B, T) fits x's first two axes swapped", 0)
    root = model if model is not None else (fn if isinstance(fn, nn.Module) else None)
    layout = _layer_layout(root)
    kinds = set(layout.values())
    forwards = 0
    if d0 > 1 and d1 > 1:
        try:
            y0 = output_tensor(fn(x)).detach()
            if y0.dim() >= 2 and (y0.shape[0] == 1 < d0 and y0.shape[1] == d1
                                  or y0.shape[1] == 1 < d1 and y0.shape[0] == d0):
                raise ShapeError(one_position_hint(tuple(y0.shape), max(d0, d1)))
            m0, m1 = _mixes(fn, x, y0, 0, 1e-4), _mixes(fn, x, y0, 1, 1e-4)
        except AttnscopeError:
            raise
        except Exception as err:
            raise ProbeError(f"fn raised on x: {type(err).__name__}: {err}") from err
        forwards = 3
        if m0 is True and m1 is False:
            return Axes(0, 1, "a probing forward: items are independent along axis 1", forwards)
        if m0 is False and m1 is True:
            return Axes(1, 0, "a probing forward: items are independent along axis 0", forwards)
        if m0 is False and m1 is False and not kinds:
            return Axes(1, 0, "default: a probing forward saw no dependence across either axis", forwards)
        if m0 and m1:  # everything moved: rule out a callable that is not deterministic before refusing
            again = output_tensor(fn(x)).detach()
            forwards += 1
            if again.shape != y0.shape or not torch.allclose(again, y0, rtol=0, atol=1e-6 * float(
                    y0.double().abs().max().clamp_min(1e-30))):
                raise ProbeError(
                    f"{_subject(fn)} is not deterministic: running the same unperturbed input twice changed its "
                    f"output, so changes cannot be told from leaks. Pass model= (the probe then evaluates it in "
                    f"eval mode, without dropout) or make the callable deterministic (no sampling).")
    if len(kinds) == 1:
        first = kinds.pop()
        how = "sequence-first (T, B)" if first else "batch-first (B, T)"
        return Axes(0 if first else 1, 1 if first else 0, f"the model's attention layers are {how}", forwards)
    if len(kinds) > 1:
        listed = ", ".join(f"'{n}' ({'seq-first' if v else 'batch-first'})" for n, v in list(layout.items())[:6])
        raise OptionError(
            f"cannot tell which axis of x (shape {tuple(x.shape)}) holds positions: the model mixes "
            f"sequence-first and batch-first attention layers ({listed}) and a probing forward could not "
            f"tell; pass seq_dim=0 for (T, B, ...) inputs or seq_dim=1 for (B, T, ...)")
    if d0 == 1:
        return Axes(1, 0, "a batch of one on axis 0", forwards)
    raise OptionError(
        f"cannot tell which axis of x (shape {tuple(x.shape)}) holds positions: axis 0 ({d0}) or axis 1 "
        f"({d1}); a probing forward found "
        + ("no axis whose items stay independent" if forwards else "one of them of length 1")
        + " and the model has no torch attention layer with a known layout; pass seq_dim=0 for (T, B, ...) "
          "inputs or seq_dim=1 for (B, T, ...)")


# -- the shared engine --------------------------------------------------------------------------------------


class _Probe:
    """One probe run: which inputs may change, which outputs are compared, and what was measured.

    The contract is one bool array ``forbidden`` ``(B, T, T)``: ``[b, i, j]`` True when output ``i`` of item
    ``b`` must not depend on input ``j``. Causality, padding and any declared pattern are instances of it.
    """

    def __init__(self, runner: Runner, allowed: torch.Tensor, observed: torch.Tensor, trials: int, tol: float,
                 forbidden: torch.Tensor) -> None:
        self.runner, self.trials, self.tol = runner, trials, tol
        self.allowed, self.observed = allowed, observed  # (B, T) bool: inputs perturbed, outputs compared
        self.forbidden = forbidden & observed[:, :, None]  # (B, T, T)
        T = runner.T
        self.pos = torch.arange(T)
        self.dependency = np.full((T, T), np.nan)
        self.breach = np.full((T, T), np.nan)  # like dependency, maxed only over items where the pair is forbidden
        self.breach_item = np.zeros((T, T), dtype=np.int64)  # the item giving that maximum
        self.leak = np.zeros(T)  # largest change seen at each output position where it must not move

    def rows(self, masks: list[torch.Tensor]) -> np.ndarray:
        """Each (B, T) mask perturbed ``trials`` times: changes ``(len(masks), trials, B, T)``."""
        stacked = torch.stack([m for m in masks for _ in range(self.trials)])  # (R, B, T)
        out = self.runner.measure(stacked)
        return out.reshape(len(masks), self.trials, self.runner.B, self.runner.T)

    def must_hold(self, mask: torch.Tensor) -> np.ndarray:
        """(B, T) bool: outputs that must not move when *mask* ``(B, T)`` is perturbed.

        Output ``i`` of item ``b`` must hold when item ``b`` perturbs something and every input it perturbs
        is forbidden to ``i``.
        """
        touches = (mask[:, None, :] & ~self.forbidden).any(-1)  # (B, T): a perturbed input is allowed to i
        return (~touches & mask.any(1, keepdim=True) & self.observed).numpy()

    def note_blocks(self, masks: list[torch.Tensor], changes: np.ndarray) -> None:
        """Record leaks seen when blocks of inputs were perturbed together."""
        for mask, change in zip(masks, changes):
            hold = self.must_hold(mask)  # (B, T)
            moved = np.where(hold[None], change, 0.0).max(axis=(0, 1))  # (T,)
            self.leak = np.maximum(self.leak, moved)

    def columns(self, js: list[int]) -> None:
        """Measure dependency columns *js*: each input position perturbed on its own."""
        if not js:
            return
        masks = [self.allowed & (self.pos == j)[None] for j in js]
        changes = self.rows(masks)  # (J, trials, B, T)
        obs = self.observed.numpy()
        bad = self.forbidden.numpy()  # (B, T, T)
        for j, mask, change in zip(js, masks, changes):
            valid = obs & mask.any(1).numpy()[:, None]  # (B, T): items where j was perturbed, outputs compared
            per_item = change.max(axis=0)  # (B, T)
            col = np.where(valid, per_item, -np.inf).max(axis=0)
            self.dependency[:, j] = np.where(np.isneginf(col), np.nan, col)
            hit = np.where(valid & bad[:, :, j], per_item, -np.inf)  # (B, T)
            top = hit.max(axis=0)
            self.breach[:, j] = np.where(np.isneginf(top), np.nan, top)
            self.breach_item[:, j] = hit.argmax(axis=0)
        self.note_blocks(masks, changes)

    def violations(self) -> list[Violation]:
        T = self.runner.T
        found = []
        for i in range(T):
            for j in range(T):
                m = self.breach[i, j]
                if np.isfinite(m) and m > self.tol or m == np.inf:
                    found.append(Violation(i, j, float(m)))
        return found

    def leaking(self) -> list[int]:
        return [int(i) for i in np.flatnonzero(self.leak > self.tol)]

    def locate(self, i: int, candidates: list[int]) -> tuple[int, float] | None:
        """The first input of *candidates* (ascending) whose prefix, perturbed, moves output *i*.

        A search over prefix lengths that tests several lengths per call: ``O(log T)`` calls.
        """
        obs = self.observed[:, i].numpy()
        n = len(candidates)
        lo, hi, hi_change = 0, None, 0.0
        width = max(1, self.runner.rows_per_call // self.trials) if self.runner.batched else 1
        while True:
            top = hi if hi is not None else n + 1
            span = list(range(lo + 1, top))
            if not span:
                break
            if len(span) > width:
                picks = sorted({span[round(t)] for t in np.linspace(0, len(span) - 1, width)})
            else:
                picks = span
            if hi is None and picks[-1] != n:
                picks[-1] = n
            masks = [self.allowed & self.forbidden[:, i] & torch.isin(self.pos, torch.tensor(candidates[:k]))[None]
                     for k in picks]
            changes = self.rows(masks)[:, :, obs, i].reshape(len(picks), -1).max(axis=1)
            moved = [(k, float(c)) for k, c in zip(picks, changes) if c > self.tol]
            if moved:
                hi, hi_change = moved[0]
            lo = max([k for k, c in zip(picks, changes) if c <= self.tol and (hi is None or k < hi)], default=lo)
            if hi is None:
                return None
            if hi == lo + 1:
                break
        return (candidates[hi - 1], hi_change) if hi is not None else None


def _finish(probe: _Probe, report_cls: type[ProbeReport], *, mode: str, fn: Any, model: nn.Module | None,
            candidates_for: Callable[[int], list[int]], blame_mask: Callable[[int], torch.Tensor],
            blame_observe: Callable[[int], torch.Tensor], splits: tuple[int, ...], max_bytes: int,
            gradient: np.ndarray | None = None) -> ProbeReport:
    """Shared tail of both probes: on a leak, rule out nondeterminism, pin down one pair, find the blame."""
    runner = probe.runner
    violations = probe.violations()
    extra: list[Violation] = []
    blame = blame_type = None
    if gradient is not None:
        T = runner.T
        seen = {(v.output_pos, v.input_pos) for v in violations}
        extra = [Violation(i, j, float(gradient[i, j])) for i in range(T) for j in range(i + 1, T)
                 if gradient[i, j] > probe.tol and (i, j) not in seen]
    leaking = probe.leaking()
    if leaking or violations:
        rerun = np.where(probe.observed.numpy(), runner.rerun_change(), 0.0)  # (B, T)
        change, where = float(rerun.max()), int(np.argmax(rerun.max(axis=0)))
        if change > probe.tol:
            raise ProbeError(
                f"{_subject(fn)} is not deterministic: running the same unperturbed input twice moved output "
                f"position {where} by {change:.3g} x the output scale (tolerance {probe.tol:.1e}), so changes "
                f"cannot be told from leaks. Pass model= (the probe then evaluates it in eval mode, without "
                f"dropout) or make the callable deterministic (no sampling)."
            )
        explained = {v.output_pos for v in violations}
        first = next((i for i in leaking if i not in explained), None)
        if first is not None:
            found = probe.locate(first, candidates_for(first))
            if found is not None:
                j, block_change = found
                probe.columns([j])
                violations = probe.violations()
                if not any(v.output_pos == first and v.input_pos == j for v in violations):
                    violations.append(Violation(first, j, block_change))  # moves only with its neighbours
                    violations.sort()
        leaking = probe.leaking()
        root = model if model is not None else (fn if isinstance(fn, nn.Module) else None)
        start = min([v.output_pos for v in violations] + leaking)
        observe = blame_observe(start)
        if root is not None and observe.numel():
            perturbed = runner.perturb(blame_mask(start)[None])
            blame, blame_type = find_blame(root, runner.call, runner.x.clone(), perturbed, T=runner.T,
                                           observe=observe, tol=probe.tol, max_bytes=max_bytes)
    violations = sorted(set(violations) | set(extra))
    ok = not violations and not leaking
    return report_cls(
        ok=ok, violations=tuple(violations), leaking_outputs=tuple(leaking), dependency=probe.dependency,
        gradient=gradient, blame=blame, blame_type=blame_type, mode=mode, tolerance=probe.tol,
        scale=runner.scale, splits=splits, forwards=runner.forwards, sequences=runner.sequences,
        subject=_subject(fn),
    )


def _gradient(runner: Runner, fn: Callable[[torch.Tensor], Any], seed: int) -> np.ndarray:
    """``[i, j]``: largest |∂(r·y_i)/∂x_j| for a random direction r, relative to the largest entry."""
    holder: list[torch.Tensor] = []
    handle = None
    if runner.is_ids:
        if runner.embedding is None:
            raise ProbeError(
                "grad_check needs float inputs, or token ids that an nn.Embedding of the model takes as they "
                "are (pass model=); none of the model's embeddings was called with x"
            )

        def leaf(module: nn.Module, args: tuple[Any, ...], output: torch.Tensor) -> torch.Tensor | None:
            # same values, cut from the graph as a leaf so its gradient can be read; first call only
            if holder:
                return None
            holder.append(output.detach().requires_grad_(True))
            return holder[0]

        handle = runner.embedding.register_forward_hook(leaf)
        xin = runner.to_user(runner.x)
    else:
        xin = runner.to_user(runner.x.clone()).requires_grad_(True)
        holder.append(xin)
    gen = torch.Generator().manual_seed(seed + 1)
    try:
        with torch.enable_grad():
            out = output_tensor(fn(xin))
            runner.forwards += 1
            runner.sequences += runner.B
            y = out.movedim((runner.batch_dim, runner.seq_dim), (0, 1))  # (B, T, ...)
            grads = np.zeros((runner.T, runner.T))
            for i in range(runner.T):
                r = torch.randn(y[:, i].shape, generator=gen, dtype=y.dtype).to(y.device)
                (g,) = torch.autograd.grad((y[:, i] * r).sum(), holder[0], retain_graph=i < runner.T - 1,
                                           allow_unused=True)
                if g is not None:
                    g = g.movedim((runner.batch_dim, runner.seq_dim), (0, 1)).abs()  # (B, T, ...)
                    grads[i] = g.reshape(g.shape[0], g.shape[1], -1).amax(dim=(0, 2)).double().cpu().numpy()
    finally:
        if handle is not None:
            handle.remove()
    top = grads.max()
    return grads / top if top > 0 else grads


# -- public functions ---------------------------------------------------------------------------------------


def check_causal(
    fn: Callable[[torch.Tensor], Any],
    x: torch.Tensor,
    *,
    seq_dim: int | None = None,
    mode: str = "screen",
    model: nn.Module | None = None,
    tol: float | None = None,
    trials: int | None = None,
    seed: int = 0,
    splits: int | Sequence[int] | None = None,
    vocab_size: int | None = None,
    noise: float = 1.0,
    batch_dim: int | None = None,
    rows_per_call: int = 16,
    max_bytes: int = DEFAULT_MAX_BYTES,
    grad_check: bool = False,
) -> CausalReport:
    """Check that output position ``i`` of ``fn(x)`` depends on no input position ``j > i``.

    >>> import torch
    >>> from torch import nn
    >>> conv = nn.Conv1d(4, 4, kernel_size=3, padding=1)           # symmetric padding: sees one step ahead
    >>> fn = lambda h: conv(h.transpose(1, 2)).transpose(1, 2)     # (B, T, D) -> (B, T, D)
    >>> report = check_causal(fn, torch.randn(1, 10, 4), model=conv, mode="exhaustive")
    >>> report.ok, [(v.output_pos, v.input_pos) for v in report.violations][:3], report.blame_type
    (False, [(0, 1), (1, 2), (2, 3)], 'Conv1d')

    Screen mode (the default) perturbs, for each split point ``s``, every input after ``s`` at once and
    compares outputs ``0..s``: one perturbed copy per split and trial, ⌈log2 T⌉ splits evenly spaced from
    0 to T − 2, stacked ``rows_per_call`` to a call (at T = 128: 7 copies, one call besides the baseline).
    A dependence of output ``i`` on input ``j > i`` is tested by every split ``s`` with ``i <= s < j``.
    With ``g`` the largest gap between neighbouring splits (5 at T = 16, 21 at T = 128), the screen tests:

    - every dependence of output 0 on any later input, and every dependence on the last input
      (the splits include 0 and T − 2);
    - every dependence on an input at least ``g`` positions ahead (``j − i >= g``), and one reaching
      ``2g`` or more ahead at least twice, with independent draws (it crosses two splits or more);
    - a leak that repeats along the sequence, output ``i`` depending on input ``i + k`` for every ``i``
      in a run of ``r`` consecutive outputs, whenever ``r + k − 1 >= g``; a leak present at every position
      (a convolution, a norm or pooling over the sequence, a shifted or missing mask) is tested by every
      split, so by ``trials × len(splits)`` independent draws.

    It does *not* guarantee to find a dependence confined to pairs that fall between two neighbouring
    splits, such as a single output peeking one step ahead in the middle of the sequence. Exhaustive mode
    tests every pair. "Tested" means found unless every draw happens to leave that output unchanged.

    On a leak, screen mode pins down the first leaking output and the nearest later input it depends on
    (a search over prefixes of the later inputs, ``O(log T)`` more copies) and measures that input's
    column of ``dependency``; other leaking outputs are listed in ``leaking_outputs``.

    Exhaustive mode perturbs every input position on its own (``trials`` draws each, default 1) to build
    the full ``(T, T)`` dependency matrix, legitimate entries included, and adds the screen's block
    perturbations as further independent draws for the pairs they cross: T + ⌈log2 T⌉ copies in batches.

    Args:
        fn: callable taking ``x`` and returning a tensor, an object with ``.logits`` or
            ``.last_hidden_state``, or a tuple whose first item is a tensor; the output's batch and
            sequence axes must sit where ``x``'s do. For a seq2seq decoder: ``lambda tgt: model(src, tgt)``.
        x: token ids ``(B, T)`` (any integer dtype) or float features ``(B, T, D)``.
        seq_dim: axis of ``x`` (and of the output) holding positions; None (default) infers it and refuses
            rather than guess (see :func:`resolve_axes`); the report states the axis and how it was chosen
            (``report.seq_dim``, ``report.axis_source``). A probe on the wrong axis would perturb batch
            items and could pass a leaky model.
        mode: ``"screen"`` or ``"exhaustive"``.
        model: the module behind ``fn``, for eval mode, the vocabulary and blame (defaults to ``fn`` when it
            is an ``nn.Module``).
        tol: relative change treated as noise (default by output dtype: 1e-4 for float32).
        trials: independent draws per perturbed set (default 1: the screen's speed comes from few copies,
            and its draws already repeat across splits and batch items; ``trials=2`` doubles both the
            copies and the draws for pairs that cross a single split).
        seed: seeds the draws and torch's generator during the probe's calls.
        splits: number of screen split points, or the split points themselves (ints in ``0..T-2``).
        vocab_size: ids are drawn from ``[0, vocab_size)``; default: the ``num_embeddings`` of the
            ``nn.Embedding`` the model calls with ``x``, else the only embedding big enough, else ``x.max()+1``.
        noise: standard deviation of the noise for float inputs, in units of ``x``'s standard deviation.
        batch_dim: axis of the batch (default 0, or 1 when ``seq_dim`` is 0).
        rows_per_call: most perturbed copies stacked into one call (fewer if outputs are large; one per call
            if ``fn`` fails on a stack, e.g. because it closes over batch-sized tensors).
        max_bytes: memory budget for stacked outputs and for the intermediate tensors kept for blame.
        grad_check: exhaustive mode only: also compute the Jacobian rows by autograd (``report.gradient``);
            pairs above ``tol`` there count as violations too (their magnitude is the relative gradient).

    Returns:
        A :class:`CausalReport`; ``.ok`` is True when nothing moved.

    Raises:
        ProbeError: ``fn`` fails on ``x``, is not deterministic, or ids cannot be perturbed.
        ShapeError: ``fn``'s output does not line up with ``x``.
        OptionError: a bad option.
    """
    trials = _check_options("causal", mode, model, trials, tol, noise, rows_per_call)
    _dims(x, 1 if seq_dim is None else seq_dim, batch_dim)
    if grad_check and mode != "exhaustive":
        raise OptionError("grad_check=True needs mode='exhaustive'")
    root = model if model is not None else (fn if isinstance(fn, nn.Module) else None)
    modules = [m for m in (fn, model) if isinstance(m, nn.Module)]
    with _steady(modules, seed, x.device):
        axes = resolve_axes(fn, x, model, seq_dim, batch_dim)
        seq_dim, batch_dim = _dims(x, axes.seq_dim, axes.batch_dim)
        runner = Runner(fn, x, seq_dim=seq_dim, batch_dim=batch_dim, vocab_size=vocab_size, noise=noise,
                        seed=seed, rows_per_call=rows_per_call, max_bytes=max_bytes, model=root, observed=None)
        T, B = runner.T, runner.B
        tol = default_tolerance(runner.dtype) if tol is None else tol
        everything = torch.ones(B, T, dtype=torch.bool)
        later = torch.ones(T, T, dtype=torch.bool).triu(1).expand(B, T, T)  # (B, T, T): j > i is forbidden
        probe = _Probe(runner, everything, everything, trials, tol, later)
        cuts = screen_splits(T, splits)
        blocks = [everything & (probe.pos > s)[None] for s in cuts]
        if mode == "exhaustive":
            probe.columns(list(range(T)))
        if blocks:
            probe.note_blocks(blocks, probe.rows(blocks))
        gradient = _gradient(runner, fn, seed) if grad_check else None
        report = _finish(
            probe, CausalReport, mode=mode, fn=fn, model=model, splits=cuts, max_bytes=max_bytes,
            candidates_for=lambda i: list(range(i + 1, T)),
            blame_mask=lambda i: everything & (probe.pos > i)[None],
            blame_observe=lambda i: torch.arange(i + 1),
            gradient=gradient,
        )
    return replace(report, seq_dim=seq_dim, batch_dim=batch_dim, axis_source=axes.source,  # type: ignore[return-value]
                   forwards=report.forwards + axes.forwards, sequences=report.sequences + axes.forwards * B)


def check_padding(
    fn: Callable[[torch.Tensor], Any],
    x: torch.Tensor,
    pad_mask: torch.Tensor,
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
) -> PaddingReport:
    """Check that outputs at real positions do not move when the content of padded positions changes.

    >>> import torch
    >>> from torch import nn
    >>> mha = nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(2, 6, 8)
    >>> pads = torch.tensor([[False] * 6, [False] * 4 + [True] * 2])   # item 1: last two positions padded
    >>> check_padding(lambda h: mha(h, h, h, key_padding_mask=pads)[0], x, pads, model=mha).ok
    True
    >>> check_padding(lambda h: mha(h, h, h)[0], x, pads, model=mha).ok   # the mask never reaches attention
    False

    Screen mode (the default) perturbs all padded positions at once, ``trials`` times (default 3: one
    stacked call), and compares every
    real output position: any dependence of a real output on padded content is tested (found unless
    every draw happens to leave it unchanged). On a leak it pins down the first padded input the first
    leaking output depends on and measures that column. Exhaustive mode perturbs each padded position on
    its own and fills every padded column of ``dependency``. Changes are maxed over the batch items in which
    the output position is real and the input position padded.

    ``fn`` is called with ``x`` only: close over the mask the model needs, e.g.
    ``lambda ids: model(input_ids=ids, attention_mask=attention_mask)``.

    Args:
        fn: as for :func:`check_causal`.
        x: token ids ``(B, T)`` or float features ``(B, T, D)``.
        pad_mask: ``(B, T)``, True (or non-zero) at padded positions; for a model's ``attention_mask``
            (1 = real token) pass ``attention_mask == 0``.
        seq_dim, mode, model, tol, trials, seed, vocab_size, noise, batch_dim, rows_per_call, max_bytes:
            as for :func:`check_causal`.

    Returns:
        A :class:`PaddingReport`; ``.splits`` is empty.

    Raises:
        OptionError: ``pad_mask`` marks no padded or no real position; other bad options.
        ShapeError: ``pad_mask`` is not ``(B, T)``, or ``fn``'s output does not line up with ``x``.
        ProbeError: ``fn`` fails on ``x``, is not deterministic, or ids cannot be perturbed.
    """
    trials = _check_options("padding", mode, model, trials, tol, noise, rows_per_call)
    _dims(x, 1 if seq_dim is None else seq_dim, batch_dim)
    with _steady([m for m in (fn, model) if isinstance(m, nn.Module)], seed, x.device):
        axes = resolve_axes(fn, x, model, seq_dim, batch_dim, pad_mask=pad_mask)
    seq_dim, batch_dim = _dims(x, axes.seq_dim, axes.batch_dim)
    B, T = x.shape[batch_dim], x.shape[seq_dim]
    pads = torch.as_tensor(pad_mask).detach().cpu()
    if tuple(pads.shape) != (B, T):
        raise ShapeError(f"expected pad_mask of shape (B, T) = ({B}, {T}) for x of shape {tuple(x.shape)}; "
                         f"got {tuple(pads.shape)}")
    pads = pads != 0
    if not bool(pads.any()):
        raise OptionError("pad_mask marks no position as padding, so there is nothing to probe")
    if bool(pads.all()):
        raise OptionError("pad_mask marks every position as padding, so no real output can be compared")
    real = ~pads
    root = model if model is not None else (fn if isinstance(fn, nn.Module) else None)
    modules = [m for m in (fn, model) if isinstance(m, nn.Module)]
    with _steady(modules, seed, x.device):
        runner = Runner(fn, x, seq_dim=seq_dim, batch_dim=batch_dim, vocab_size=vocab_size, noise=noise,
                        seed=seed, rows_per_call=rows_per_call, max_bytes=max_bytes, model=root, observed=real)
        tol = default_tolerance(runner.dtype) if tol is None else tol
        probe = _Probe(runner, pads, real, trials, tol, real[:, :, None] & pads[:, None, :])  # (B, T, T)
        padded = [int(j) for j in torch.nonzero(pads.any(0)).flatten()]
        if mode == "exhaustive":
            probe.columns(padded)
        else:
            probe.note_blocks([pads], probe.rows([pads]))
        common = torch.nonzero(real.all(0)).flatten()
        report = _finish(
            probe, PaddingReport, mode=mode, fn=fn, model=model, splits=(), max_bytes=max_bytes,
            candidates_for=lambda i: padded,
            blame_mask=lambda i: pads,
            blame_observe=lambda i: common,
        )
    return replace(report, seq_dim=seq_dim, batch_dim=batch_dim, axis_source=axes.source,  # type: ignore[return-value]
                   forwards=report.forwards + axes.forwards, sequences=report.sequences + axes.forwards * B)


def assert_causal(fn: Callable[[torch.Tensor], Any], x: torch.Tensor, *, seq_dim: int | None = None,
                  **options: Any) -> None:
    """Raise ``AssertionError`` naming the first violation, its magnitude and the blamed module, else None.

    >>> import torch, torch.nn.functional as F
    >>> assert_causal(lambda h: F.scaled_dot_product_attention(h, h, h, is_causal=True), torch.randn(1, 8, 4))

    Takes the options of :func:`check_causal`; the default mode is ``"screen"``.
    """
    report = check_causal(fn, x, seq_dim=seq_dim, **options)
    if not report.ok:
        raise AssertionError(report.summary())


def assert_padding(fn: Callable[[torch.Tensor], Any], x: torch.Tensor, pad_mask: torch.Tensor, *,
                   seq_dim: int | None = None, **options: Any) -> None:
    """Raise ``AssertionError`` naming the first real output moved by padding and by how much, else None.

    Takes the options of :func:`check_padding`.
    """
    report = check_padding(fn, x, pad_mask, seq_dim=seq_dim, **options)
    if not report.ok:
        raise AssertionError(report.summary())
