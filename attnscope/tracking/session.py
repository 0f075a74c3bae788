"""Watch per-head statistics while a model trains: :func:`track` and the :class:`Tracker` it returns.

A recorded step opens, for the length of the user's ``with tr.step(step):`` block, :func:`attnscope.capture`
with ``keep="stats"`` (per-head attention statistics, residual-stream norms), forward hooks on the blocks (the
massive-activation ratio) and on the attention modules (which module is calling), and a thin torch function
mode on top of capture's that keeps the training computation exactly as it is without tracking:

* the model's own ``scaled_dot_product_attention`` and ``multi_head_attention_forward`` calls run with
  capture's mode lifted off the stack, so they take the very code path (and draw the very random numbers for
  attention dropout) they take untracked;
* each is followed by a *twin* call on the same inputs, under ``torch.no_grad()`` and with ``dropout_p=0`` (no
  random numbers drawn), which capture sees. Statistics therefore describe the dropout-free attention of the
  training forward and never enter autograd. The twin also returns each head's output ``α·v``, whose norm
  through the head's slice of the output projection (found as
  :func:`~attnscope.analyses.heads.head_output_norms` finds it) is the head's output norm. Capture keeps no
  head outputs, so this one measurement is made here, from the twin.

A softmax computed by hand inside an attention module is observed where it is (capture keeps no map and
detaches). Everything is undone when the block ends, also when it raises; other steps run no code of ours
beyond a modulo.

>>> import torch, attnscope
>>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
>>> opt = torch.optim.SGD(layer.parameters(), lr=0.01)
>>> tr = attnscope.track(layer, every=2)
>>> for step in range(4):
...     with tr.step(step):
...         loss = layer(torch.randn(3, 5, 16)).pow(2).mean()
...     loss.backward(); opt.step(); opt.zero_grad()
>>> tr.table()[["step", "name", "head"]].values.tolist()
[[0, 'self_attn', 0], [0, 'self_attn', 1], [2, 'self_attn', 0], [2, 'self_attn', 1]]
"""

from __future__ import annotations

import contextlib
import inspect
import os
import threading
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import torch
import torch.nn.functional as F
from torch import nn
from torch.overrides import TorchFunctionMode

from attnscope.capture import capture
from attnscope.capture.recorder import as_4d
from attnscope.capture.session import remove_mode
from attnscope.errors import CaptureStateError, OptionError, UnsupportedModelError, suggest
from attnscope.names import name_matches
from attnscope.records import STAT_COLUMNS, HeadSums
from attnscope.tracking.alerts import Alert, AlertRules, find_alerts

__all__ = ["HEAD_COLUMNS", "BLOCK_COLUMNS", "StepStats", "Tracker", "track"]

#: Columns of :meth:`Tracker.table` after ``step``, ``name``, ``head``.
HEAD_COLUMNS = ("rows", *STAT_COLUMNS, "output_norm", "output_relative")
#: Columns of :meth:`Tracker.residual_table` after ``step``, ``name``.
BLOCK_COLUMNS = ("positions", "residual_norm", "residual_max", "massive_ratio")

_SDPA_PARAMS = ("query", "key", "value", "attn_mask", "dropout_p", "is_causal", "scale", "enable_gqa")
_MHA_SIGNATURE = inspect.signature(F.multi_head_attention_forward)
_SOFTMAX_FUNCS = {F.softmax, torch.softmax, torch.Tensor.softmax, torch.special.softmax}
_MATMUL_FUNCS = {torch.matmul, torch.Tensor.matmul, torch.Tensor.__matmul__}


@dataclass
class StepStats:
    """Everything recorded at one step, as plain numbers (what the tables, the file and the views hold).

    Fields:
        step: the training step.
        heads: one dict per (attention module, head) with ``name``, ``head`` and :data:`HEAD_COLUMNS`.
        blocks: one dict per block with ``name`` and :data:`BLOCK_COLUMNS`.
    """

    step: int
    heads: list[dict[str, Any]] = field(default_factory=list)
    blocks: list[dict[str, Any]] = field(default_factory=list)

    def __repr__(self) -> str:
        return f"StepStats(step={self.step}, heads={len(self.heads)}, blocks={len(self.blocks)})"


# ------------------------------------------------------------------------------------------------ sums
@dataclass
class _Sums:
    """Mergeable sums of one recorded step (sum-and-count form, so ranks and calls add up)."""

    attention: Any  # HeadTotals
    norms: dict[str, list[np.ndarray]]  # name -> [sum of per-row norms (H,), rows (H,)]
    blocks: dict[str, list[float]]  # name -> [norm sum, positions, norm max, massive ratio max]

    def stats(self, step: int) -> StepStats:
        out = StepStats(step)
        for name in self.attention.names:
            sums: HeadSums = self.attention.sums[name]
            means = sums.means()
            heads = self.attention.heads[name]
            norm = self._norms(name, heads)  # (H,) every head of the module, NaN where unknown
            for i, h in enumerate(heads):
                others = np.delete(norm, h) if len(norm) > h else np.array([])
                other_mean = float(np.mean(others)) if len(others) else float("nan")
                own = float(norm[h]) if len(norm) > h else float("nan")
                row = {"name": name, "head": int(h), "rows": int(sums.rows[i])}
                row.update({c: float(means[c][i]) for c in STAT_COLUMNS})
                row["output_norm"] = own
                row["output_relative"] = (own / other_mean if np.isfinite(other_mean) and other_mean > 0
                                          else float("nan"))
                out.heads.append(row)
        for name, (total, count, biggest, ratio) in self.blocks.items():
            out.blocks.append({"name": name, "positions": int(count),
                               "residual_norm": total / count if count else float("nan"),
                               "residual_max": biggest if count else float("nan"),
                               "massive_ratio": ratio if ratio >= 0 else float("nan")})
        return out

    def _norms(self, name: str, heads: tuple[int, ...]) -> np.ndarray:
        """Mean output norm of every head of module *name* (all of them, kept or not); empty when unknown."""
        if name not in self.norms:
            return np.array([])
        total, rows = self.norms[name]
        if len(total) <= max(heads):
            return np.array([])
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(rows > 0, total / np.where(rows > 0, rows, 1), np.nan)

    def all_reduce(self) -> _Sums:
        """Sum (and max) every rank's sums of this step; a collective, every rank must call it."""
        import torch.distributed as dist

        attention = self.attention.all_reduce()
        mine = ([(n, len(v[0])) for n, v in self.norms.items()], list(self.blocks))
        everyone: list[Any] = [None] * dist.get_world_size()
        dist.all_gather_object(everyone, mine)
        widths: dict[str, int] = {}
        blocks: list[str] = []
        for listing, names in everyone:
            for n, h in listing:
                widths.setdefault(n, h)
            blocks.extend(b for b in names if b not in blocks)
        add = []
        for n, h in widths.items():
            total, rows = self.norms.get(n, (np.zeros(h), np.zeros(h)))
            add.extend([total, rows])
        for b in blocks:
            total, count, _, _ = self.blocks.get(b, (0.0, 0, -1.0, -1.0))
            add.append(np.array([total, count], dtype=np.float64))
        flat = torch.from_numpy(np.concatenate(add) if add else np.zeros(0))  # float64
        biggest = torch.tensor([v for b in blocks for v in self.blocks.get(b, (0, 0, -1.0, -1.0))[2:]],
                               dtype=torch.float64)
        dist.all_reduce(flat, op=dist.ReduceOp.SUM)
        dist.all_reduce(biggest, op=dist.ReduceOp.MAX)
        values, at = flat.numpy(), 0
        norms = {}
        for n, h in widths.items():
            norms[n] = [values[at: at + h].copy(), values[at + h: at + 2 * h].copy()]
            at += 2 * h
        merged = {}
        for i, b in enumerate(blocks):
            merged[b] = [float(values[at]), int(round(values[at + 1])), float(biggest[2 * i]), float(biggest[2 * i + 1])]
            at += 2
        return _Sums(attention, norms, merged)


# ------------------------------------------------------------------------------------------------ the step
class _TwinMode(TorchFunctionMode):
    """Runs the model's attention calls untouched, then a grad-free, dropout-free twin that capture sees.

    The twin also gives each head's output ``α·v`` before the output projection: SDPA returns it as
    ``(B, H, Tq, Dh)``; the MHA twin runs with an identity output projection, so it returns the heads side by
    side (the way :class:`~attnscope.analyses.ablation.HeadIntervention` probes MHA); for a softmax computed by
    hand, the next matmul of those weights with 4-d values gives it. *observe(name, heads, out_weight)*
    receives them with the calling attention module's name.
    """

    def __init__(self, base: int, step: _RecordedStep) -> None:
        super().__init__()
        self.base = base  # stack depth below the tracker's modes
        self.step = step

    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if func is F.scaled_dot_product_attention:
            out = self._untouched(func, args, kwargs)
            twin = dict(zip(_SDPA_PARAMS, args))
            twin.update(kwargs)
            twin["dropout_p"] = 0.0
            with torch.no_grad():
                heads = func(**{k: v.detach() if isinstance(v, torch.Tensor) else v for k, v in twin.items()})
            self.step._observe(as_4d(heads), None)  # (B, H, Tq, Dh)
            return out
        if func is F.multi_head_attention_forward:
            out = self._untouched(func, args, kwargs)
            bound = _MHA_SIGNATURE.bind(*args, **kwargs)
            bound.apply_defaults()
            a = bound.arguments
            heads, width = int(a["num_heads"]), int(a["embed_dim_to_check"])
            w_out = a["out_proj_weight"]
            a.update(dropout_p=0.0, need_weights=False, out_proj_bias=None,
                     out_proj_weight=torch.eye(width, dtype=w_out.dtype, device=w_out.device))
            with torch.no_grad():
                concat = func(*bound.args, **bound.kwargs)[0]  # (Tq, B, H·Dh) or (Tq, H·Dh): heads side by side
            if concat.dim() == 2:
                concat = concat.unsqueeze(1)
            tq, b, _ = concat.shape
            per_head = concat.reshape(tq, b, heads, width // heads).permute(1, 2, 0, 3)  # (B, H, Tq, Dh)
            self.step._observe(per_head, w_out.detach())
            return out
        out = func(*args, **kwargs)
        if func in _SOFTMAX_FUNCS:
            dim = args[1] if len(args) > 1 else kwargs.get("dim")
            if isinstance(out, torch.Tensor) and out.dim() == 4 and dim in (-1, 3) and self.step._frames:
                self.step._pending = out
        elif func in _MATMUL_FUNCS and self.step._pending is not None and len(args) >= 2:
            weights, values = args[0], args[1]
            if (isinstance(weights, torch.Tensor) and isinstance(values, torch.Tensor) and values.dim() == 4
                    and weights.shape == self.step._pending.shape and values.shape[-2] == weights.shape[-1]):
                pending, self.step._pending = self.step._pending, None  # (B, H, Tq, Tk) @ (B, H, Tk, Dh)
                if weights is pending:
                    self.step._observe(out.detach(), None)
                else:  # attention dropout came in between: the heads' dropout-free outputs, as for the twins
                    with torch.no_grad():
                        self.step._observe(pending.detach() @ values.detach(), None)  # (B, H, Tq, Dh)
        return out

    def _untouched(self, func, args, kwargs):
        """Call *func* with the modes of this step (capture's) lifted off the stack: the call runs as untracked."""
        lifted = []
        try:
            while torch._C._len_torch_function_stack() > self.base:
                lifted.append(torch._C._pop_torch_function_stack())
            return func(*args, **kwargs)
        finally:
            for mode in reversed(lifted):
                torch._C._push_on_torch_function_stack(mode)


class _RecordedStep:
    """The context of one recorded step; undoes everything it set up on exit, also when the block raises."""

    def __init__(self, tracker: Tracker, step: int) -> None:
        self._tracker = tracker
        self._step = step
        self._exit: contextlib.ExitStack | None = None
        self._cap: Any = None
        self._norms: dict[str, list[np.ndarray]] = {}
        self._ratio: dict[str, float] = {}
        self._frames: list[str] = []  # attention modules running, innermost last
        self._pending: torch.Tensor | None = None  # the latest hand-computed softmax weights

    def __enter__(self) -> _RecordedStep:
        tr = self._tracker
        if self._exit is not None:
            raise CaptureStateError("this step was already entered; use `with tr.step(step):` once per step")
        tr._check_step(self._step)
        model = tr._model
        stack = contextlib.ExitStack()
        self._exit = stack
        try:
            base = torch._C._len_torch_function_stack()
            self._cap = stack.enter_context(capture(model, keep="stats", layers=tr._layers, heads=tr._heads,
                                                    blocks=tr._blocks, residual=bool(tr._block_names)))
            for name in tr._block_names:
                handle = model.get_submodule(name).register_forward_hook(self._block_hook(name))
                stack.callback(handle.remove)
            if tr._norms:
                for name in tr._attention_names:
                    module = model.get_submodule(name)
                    enter = module.register_forward_pre_hook(self._enter_hook(name))
                    leave = module.register_forward_hook(self._leave_hook(), always_call=True)
                    stack.callback(enter.remove)
                    stack.callback(leave.remove)
            mode = _TwinMode(base, self)
            mode.__enter__()
            stack.callback(remove_mode, mode)
        except BaseException:
            self._exit = None
            stack.close()
            raise
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        stack, self._exit = self._exit, None
        if stack is None:
            return False
        self._pending = None
        if exc_type is not None:
            with contextlib.suppress(Exception):
                stack.close()
            return False
        stack.close()  # closes capture (its checks may raise), the hooks and the mode
        self._tracker._finish_step(self._step, self._sums())
        return False

    # ---------------------------------------------------------------- observers
    def _enter_hook(self, name: str):
        def hook(module: nn.Module, args: tuple) -> None:
            self._frames.append(name)
        return hook

    def _leave_hook(self):
        def hook(module: nn.Module, args: tuple, output: Any) -> None:
            if self._frames:
                self._frames.pop()
        return hook

    def _observe(self, per_head: torch.Tensor, out_weight: torch.Tensor | None) -> None:
        """Head outputs ``(B, H, Tq, Dh)`` of one call: per-head ‖α·v·W_O‖ summed over rows."""
        if not self._tracker._norms or not self._frames:
            return
        name = self._frames[-1]
        b, h, tq, dh = per_head.shape
        weights = self._tracker._projection(name, out_weight, h, dh)
        if weights is None:
            return
        with torch.no_grad():
            contrib = torch.einsum("bhqd,hde->bhqe", per_head.float(), weights)  # (B, H, Tq, D)
            norm = torch.linalg.vector_norm(contrib, dim=-1).double().sum(dim=(0, 2)).numpy()  # (H,)
        total = self._norms.get(name)
        if total is None or len(total[0]) != h:
            self._norms[name] = [norm, np.full(h, float(b * tq))]
        else:
            total[0] = total[0] + norm
            total[1] = total[1] + b * tq

    def _block_hook(self, name: str):
        def hook(module: nn.Module, args: tuple, output: Any) -> None:
            x = _first_tensor(output)
            if x is None or not x.is_floating_point() or x.dim() < 2 or x.is_nested:
                return
            with torch.no_grad():
                a = x.detach().abs().float().reshape(-1, x.shape[-1])  # (positions, D)
                d = a.shape[-1]
                low = a.kthvalue((d + 1) // 2, dim=-1).values  # (positions,); kthvalue beats a full sort 2.5x
                med = low if d % 2 else (low + a.kthvalue(d // 2 + 1, dim=-1).values) / 2  # numpy's median
                ratio = float((a.amax(dim=-1) / med.clamp_min(torch.finfo(torch.float32).tiny)).max())
            self._ratio[name] = max(ratio, self._ratio.get(name, -1.0))
        return hook

    def _sums(self) -> _Sums:
        from attnscope.analyses.aggregate import HeadTotals

        attention = HeadTotals.from_records(self._cap.attention)
        blocks: dict[str, list[float]] = {}
        for rec in self._cap.residual:
            entry = blocks.setdefault(rec.name, [0.0, 0, 0.0, -1.0])
            entry[0] += float(rec.norms.astype(np.float64).sum())
            entry[1] += int(rec.norms.size)
            entry[2] = max(entry[2], float(rec.norms.max())) if rec.norms.size else entry[2]
        for name, ratio in self._ratio.items():
            blocks.setdefault(name, [0.0, 0, 0.0, -1.0])[3] = ratio
        return _Sums(attention, self._norms, blocks)


def _first_tensor(output: Any) -> torch.Tensor | None:
    if isinstance(output, torch.Tensor):
        return output
    items = list(output.values()) if isinstance(output, Mapping) else list(output) if isinstance(output, (tuple, list)) else []
    for item in items:
        found = _first_tensor(item)
        if found is not None:
            return found
    return None


# ------------------------------------------------------------------------------------------------ the tracker
class Tracker:
    """Per-head statistics of a model over training steps; make one with :func:`track`.

    Read it with :meth:`table`, :meth:`residual_table` and :meth:`alerts`; show it with
    :func:`attnscope.dashboard` or :func:`attnscope.export_html`; keep it with :func:`attnscope.save`.
    """

    def __init__(self, model: nn.Module | None, *, every: int, path: str | os.PathLike | None = None,
                 layers: Sequence[str | int] | None = None, heads: Iterable[int] | None = None,
                 blocks: Sequence[str] | None = None, out_proj: Mapping[str, str] | None = None,
                 norms: bool = True, rules: AlertRules | Mapping[str, float] | None = None,
                 distributed: bool | None = None, overwrite: bool = False) -> None:
        if isinstance(every, bool) or not isinstance(every, (int, np.integer)) or every < 1:
            raise OptionError(f"every must be a positive int (record steps where step % every == 0); "
                              f"received {every!r}")
        self.every = int(every)
        self.rules = AlertRules.from_options(rules)
        self.steps: list[StepStats] = []
        self._model = model
        self._listeners: list[Callable[[Tracker, StepStats], None]] = []
        self._lock = threading.Lock()
        self._writer: Any = None
        self._alerts: list[Alert] | None = None
        self._layers, self._heads, self._blocks = layers, heads, blocks
        self._norms = bool(norms)
        self._distributed = distributed
        self._proj_cache: dict[str, Any] = {}
        self._block_names: tuple[str, ...] = ()
        self._attention_names: tuple[str, ...] = ()
        self._out_proj: list[tuple[str, str]] = []
        if model is None:
            return
        if not isinstance(model, nn.Module):
            raise OptionError(f"track() expects a torch.nn.Module; received {type(model).__name__}")
        # capture checks its options (and that the model has attention) at the door, before any step runs
        probe = capture(model, keep="stats", layers=layers, heads=heads, blocks=blocks)
        del probe
        self._block_names = self._resolve_blocks(model, blocks)
        from attnscope.capture.discovery import map_model

        self._attention_names = map_model(model).attention
        names = [n for n, _ in model.named_modules()]
        for pattern, target in (out_proj or {}).items():
            if target not in names:
                raise OptionError(f"out_proj= names '{target}', which is no module of {type(model).__name__}."
                                  f"{suggest(target, names)}")
            self._out_proj.append((pattern, target))
        if path is not None:
            from attnscope.tracking.store import RunWriter

            if self._is_writer():
                self._writer = RunWriter(path, self._header(), overwrite=overwrite)

    # ---------------------------------------------------------------- options
    @staticmethod
    def _resolve_blocks(model: nn.Module, blocks: Sequence[str] | None) -> tuple[str, ...]:
        if blocks is None:
            from attnscope.capture.discovery import map_model

            return map_model(model).blocks
        out: list[str] = []
        for b in [blocks] if isinstance(blocks, str) else blocks:
            out.extend(n for n, _ in model.named_modules() if name_matches(n, b) and n not in out)
        return tuple(out)

    def _header(self) -> dict[str, Any]:
        return {"every": self.every, "rules": self.rules.as_dict(),
                "model": type(self._model).__name__ if self._model is not None else None}

    def _is_writer(self) -> bool:
        return not self._dist_on() or torch.distributed.get_rank() == 0

    def _dist_on(self) -> bool:
        if self._distributed is False:
            return False
        import torch.distributed as dist

        on = dist.is_available() and dist.is_initialized()
        if self._distributed and not on:
            raise OptionError("track(distributed=True) needs an initialised torch.distributed process group")
        return on

    # ---------------------------------------------------------------- recording
    def step(self, step: int) -> contextlib.AbstractContextManager:
        """Context for the forward (and, if you like, backward and optimizer) of training step *step*.

        Steps with ``step % every == 0`` are recorded; on every other step this returns a context that does
        nothing. Under ``torch.distributed`` every rank must enter the same recorded steps (their statistics
        are merged when the block ends).
        """
        if isinstance(step, bool) or not isinstance(step, (int, np.integer)):
            raise OptionError(f"step must be an int; received {step!r}")
        if step % self.every:
            return contextlib.nullcontext()
        if self._model is None:
            raise CaptureStateError("this run was loaded from a file; it can be read and shown, not recorded into")
        return _RecordedStep(self, int(step))

    def _check_step(self, step: int) -> None:
        if self.steps and step <= self.steps[-1].step:
            raise OptionError(f"step {step} comes after step {self.steps[-1].step} was recorded; recorded steps must "
                              "increase (make a new tracker for a new run)")

    def _finish_step(self, step: int, sums: _Sums) -> None:
        if self._dist_on():
            sums = sums.all_reduce()
        stats = sums.stats(step)
        self._add(stats)

    def _add(self, stats: StepStats) -> None:
        with self._lock:
            self.steps.append(stats)
            self._alerts = None
        if self._writer is not None:
            self._writer.append(stats)
        for listener in list(self._listeners):
            listener(self, stats)

    def _projection(self, name: str, out_weight: torch.Tensor | None, heads: int,
                    dh: int) -> torch.Tensor | None:
        """``(H, Dh, D)`` slices of the output projection of module *name* (None when it cannot be found)."""
        from attnscope.analyses.heads import _find_projection, _head_weights

        if out_weight is not None:
            return out_weight.float().T.reshape(heads, dh, -1)  # (H, Dh, D)
        found = self._proj_cache.get(name)
        if found is None:
            try:
                found = _find_projection(self._model, name, self._out_proj)
            except UnsupportedModelError:
                found = False
            self._proj_cache[name] = found
        if found is False:
            return None
        where, module = found
        try:
            return _head_weights(module, heads, dh, name, where)
        except Exception:  # a projection of another width: no norm rather than a wrong one
            return None

    def listen(self, callback: Callable[[Tracker, StepStats], None]) -> Callable[[], None]:
        """Call ``callback(tracker, step_stats)`` after every recorded step; returns a function that stops it."""
        self._listeners.append(callback)

        def stop() -> None:
            if callback in self._listeners:
                self._listeners.remove(callback)
        return stop

    # ---------------------------------------------------------------- reading
    def table(self) -> pd.DataFrame:
        """One row per (recorded step, attention module, head): ``step``, ``name``, ``head`` and
        :data:`HEAD_COLUMNS` (the head-table statistics; ``output_norm`` = mean ‖α·v·W_O‖ over rows,
        ``output_relative`` = that over the mean of the module's other heads; NaN where no projection was found)."""
        rows = [{"step": s.step, **r} for s in list(self.steps) for r in s.heads]
        return pd.DataFrame(rows, columns=["step", "name", "head", *HEAD_COLUMNS])

    def residual_table(self) -> pd.DataFrame:
        """One row per (recorded step, block): ``step``, ``name``, ``positions`` (rows counted),
        ``residual_norm`` (mean L2 norm of the block's output over positions), ``residual_max`` and
        ``massive_ratio`` (largest over positions of max |h| / median |h| of that position's hidden state)."""
        rows = [{"step": s.step, **r} for s in list(self.steps) for r in s.blocks]
        return pd.DataFrame(rows, columns=["step", "name", *BLOCK_COLUMNS])

    def alerts(self, **rules: float) -> list[Alert]:
        """Alerts of the run, ``(step, name, head, kind, reason)``; keyword arguments override :class:`AlertRules`."""
        if rules:
            return find_alerts(self.table(), self.residual_table(), self.rules.replace(**rules))
        if self._alerts is None:
            self._alerts = find_alerts(self.table(), self.residual_table(), self.rules)
        return list(self._alerts)

    def close(self) -> None:
        """Close the run file (every recorded step is on disk already)."""
        if self._writer is not None:
            self._writer.close()
            self._writer = None

    @property
    def path(self) -> str | None:
        return None if self._writer is None else self._writer.path

    def __repr__(self) -> str:
        last = self.steps[-1].step if self.steps else None
        model = type(self._model).__name__ if self._model is not None else "loaded"
        return f"Tracker(model={model}, every={self.every}, recorded={len(self.steps)}, last_step={last})"

    @classmethod
    def _from_steps(cls, steps: list[StepStats], every: int, rules: Mapping[str, float]) -> Tracker:
        self = cls(None, every=every, rules=AlertRules.from_options(dict(rules)))
        self.steps = list(steps)
        return self


def track(model: nn.Module, *, every: int = 10, path: str | os.PathLike | None = None,
          layers: Sequence[str | int] | None = None, heads: Iterable[int] | None = None,
          blocks: Sequence[str] | None = None, out_proj: Mapping[str, str] | None = None, norms: bool = True,
          rules: AlertRules | Mapping[str, float] | None = None, distributed: bool | None = None,
          overwrite: bool = False) -> Tracker:
    """Watch *model*'s heads while it trains: per-head statistics on every *every*-th step, and alerts.

    >>> import torch, attnscope
    >>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
    >>> tr = attnscope.track(layer, every=1)
    >>> with tr.step(0):
    ...     loss = layer(torch.randn(2, 4, 16)).sum()
    >>> sorted(tr.table().columns)[:4]
    ['entropy', 'entropy_ratio', 'head', 'leak_mass']

    In your own loop, wrap the forward of each step (backward and optimizer may go inside or after)::

        with tr.step(step):
            loss = loss_fn(model(batch))
        loss.backward(); opt.step(); opt.zero_grad()

    Tracking changes nothing: losses, gradients, parameters and the dropout random stream stay bit-identical
    to the run without it; outside a recorded block the model carries no hook, mode or state of ours.

    Args:
        model: the model being trained.
        every: record steps with ``step % every == 0``.
        path: append each recorded step to this file as it ends (JSON lines, flushed and fsynced), so a crash
            keeps every step recorded before it; read it with :func:`attnscope.load`.
        layers, heads, blocks: as for :func:`attnscope.capture`.
        out_proj: ``{"attention module pattern": "dotted name of its output projection"}`` where the usual names
            (see :func:`~attnscope.analyses.heads.head_output_norms`) do not find it.
        norms: measure each head's output norm (for dying heads); costs one observer on recorded steps.
        rules: thresholds of :meth:`Tracker.alerts`, an :class:`~attnscope.tracking.AlertRules` or a dict of its fields.
        distributed: merge the statistics of every ``torch.distributed`` rank at each recorded step (default: when
            a process group is initialised); rank 0 writes *path*.
        overwrite: replace an existing file at *path* (default: refuse).
    """
    return Tracker(model, every=every, path=path, layers=layers, heads=heads, blocks=blocks, out_proj=out_proj,
                   norms=norms, rules=rules, distributed=distributed, overwrite=overwrite)
