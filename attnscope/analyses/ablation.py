"""Head ablation: remove one head or a set of heads from a running model and measure what changes.

A head's output is the weighted sum of its values, ``α·v`` (``(B, Tq, Dh)`` per head), before the module's
output projection mixes the heads. *Zero-ablation* replaces it by 0, *mean-ablation* by its mean over a
reference run (:func:`head_means`). Importance of a head is the change in a loss (or in the output) when it
is removed, as in P. Michel, O. Levy and G. Neubig, "Are Sixteen Heads Really Better than One?", NeurIPS 2019.

The intervention works like capture: a torch function mode sees every attention call while the block is
open, and module hooks tell it which module is calling. It never changes a parameter:

* ``F.scaled_dot_product_attention`` (hand-written blocks, HF ``sdpa``): the returned ``(B, H, Tq, Dh)``
  output gets the head's slice replaced.
* ``nn.MultiheadAttention`` (also inside ``nn.Transformer*``): ``F.multi_head_attention_forward`` is called
  with a copy of ``out_proj_weight`` whose head columns are zero; for mean-ablation the copy of
  ``out_proj_bias`` gets ``W_O[:, head] @ mean`` added, the constant the mean head would contribute.
* a softmax inside an attention module (HF ``eager``) or a weight-free helper of it: the next ``matmul`` (or
  ``einsum`` laid out ``(B, H, Tq, ·)``) of the weights with the values gets the head's slice of its result replaced.

Calls outside the named modules, and every run outside the block, are untouched (bit for bit).

>>> import torch, attnscope
>>> from attnscope.analyses.ablation import ablate
>>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, dropout=0.0, batch_first=True).eval()
>>> x = torch.randn(1, 5, 16)
>>> with ablate(layer, [("self_attn", 1)]):
...     y = layer(x)
>>> bool((y - layer(x)).abs().max() > 0)
True
"""

from __future__ import annotations

import inspect
import math
import threading
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import torch
import torch.nn.functional as F
from torch import nn

from attnscope.capture.discovery import map_model
from attnscope.capture.session import (RoutingMode, attention_routes, hold_fastpath_off, muted, release_fastpath,
                                      remove_mode)
from attnscope.errors import NoAttentionError, OptionError, UnsupportedModelError, suggest

__all__ = ["AttentionCall", "HeadAblation", "HeadIntervention", "ablate", "ablation_change", "head_importance",
           "head_means", "observe_heads"]

ABLATION_MODES = ("zero", "mean")

_MATMUL_FUNCS = {torch.matmul, torch.Tensor.matmul, torch.Tensor.__matmul__}
_MHA_SIGNATURE = inspect.signature(F.multi_head_attention_forward)

#: ``plan(name, heads) -> {head: None (zero) or (Dh,) tensor (mean)}``: what to replace in one call.
Plan = Callable[[str, int], Mapping[int, "torch.Tensor | None"]]
#: ``observe(call, per_head)`` with ``per_head`` the detached ``(B, H, Tq, Dh)`` head outputs of one call.
Observe = Callable[["AttentionCall", torch.Tensor], None]


@dataclass
class AttentionCall:
    """One attention call seen by a :class:`HeadIntervention`.

    Fields:
        name: dotted name of the innermost module running the call (the name capture gives its record).
        module: that module.
        source: ``"sdpa"``, ``"mha"`` or ``"softmax"``.
        index: position of the call among all attention calls seen (0, 1, ...).
        heads: number of heads of the call.
        out_weight: for ``"mha"`` calls the ``out_proj_weight`` the call was given ``(D, H·Dh)``, else None.
    """

    name: str
    module: nn.Module
    source: str
    index: int
    heads: int
    out_weight: torch.Tensor | None = None


@dataclass
class _Frame:
    name: str
    module: nn.Module
    pending: torch.Tensor | None = None  # the latest softmax output of an eager attention module
    owner: _Frame | None = None  # the attention module this call belongs to (capture's rules.owners)


@dataclass
class _Seen:
    calls: int = 0
    ran: set[str] = field(default_factory=set)
    attended: dict[str, int] = field(default_factory=dict)  # module name -> attention calls seen in it


class HeadIntervention:
    """Owns the hooks, the function mode and the fast-path switch of one run; sees and edits head outputs.

    The machinery under :func:`ablate` and :func:`~attnscope.analyses.heads.head_output_norms`. ``plan``
    says which heads of a call to replace, ``observe`` receives every call's head outputs (for
    ``nn.MultiheadAttention`` this costs one more call of the attention function with an identity output
    projection). Used once, as a context manager; undoes everything in ``__exit__``, also when the block raises.
    """

    def __init__(self, model: nn.Module, *, plan: Plan | None = None, observe: Observe | None = None) -> None:
        if not isinstance(model, nn.Module):
            raise OptionError(f"expected a torch.nn.Module; received {type(model).__name__}")
        self._model = model
        self._map = map_model(model)
        self._plan = plan
        self._observe = observe
        self._tls = threading.local()
        self._handles: list[Any] = []
        self._mode: RoutingMode | None = None
        self._fastpath = False  # whether this intervention holds the fast-path switch off
        self._used = False
        self.seen = _Seen()

    # ---------------------------------------------------------------- entering and leaving
    def __enter__(self) -> HeadIntervention:
        if self._used:
            raise OptionError("this intervention was already used; make a new one")
        self._used = True
        try:
            # the fused nn.MultiheadAttention / TransformerEncoderLayer paths run in C++ and would hide the heads
            hold_fastpath_off()
            self._fastpath = True
            for name, module in self._model.named_modules():
                self._handles.append(module.register_forward_pre_hook(self._pre_hook(name)))
                self._handles.append(module.register_forward_hook(self._post_hook(), always_call=True))
            routes = attention_routes(self)
            routes.update({f: self._on_matmul for f in _MATMUL_FUNCS})  # HF eager: weights @ values
            routes[torch.einsum] = self._on_einsum  # einsum("b h i j, b h j d -> b h i d", weights, values)
            self._mode = RoutingMode(routes)
            self._mode.__enter__()
        except BaseException:
            self._restore()
            raise
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        self._restore()
        return False

    def _restore(self) -> None:
        try:
            if self._mode is not None:
                mode, self._mode = self._mode, None
                remove_mode(mode)
        finally:
            for h in self._handles:
                h.remove()
            self._handles.clear()
            if self._fastpath:
                self._fastpath = False
                release_fastpath()

    # ---------------------------------------------------------------- who is calling
    def _stack(self) -> list[_Frame]:
        stack = getattr(self._tls, "stack", None)
        if stack is None:
            stack = self._tls.stack = []
        return stack

    def _pre_hook(self, name: str):
        def hook(module: nn.Module, args: tuple):
            stack = self._stack()
            frame = _Frame(name, module)
            owner = self._map.owner.get(name)
            if owner == name:
                frame.owner = frame
            elif owner is not None:
                frame.owner = next((f for f in reversed(stack) if f.name == owner), None) or (
                    stack[-1].owner if stack else None)
            stack.append(frame)
            self.seen.ran.add(name)
        return hook

    def _post_hook(self):
        def hook(module: nn.Module, args: tuple, output: Any):
            stack = self._stack()
            while stack:  # always_call=True: also runs when forward raised, so the stack stays balanced
                if stack.pop().module is module:
                    break
        return hook

    def _frame(self) -> _Frame | None:
        stack = getattr(self._tls, "stack", None)
        return stack[-1] if stack else None

    def _call(self, frame: _Frame, source: str, heads: int, out_weight: torch.Tensor | None = None) -> AttentionCall:
        frame = frame.owner or frame  # named as capture names it: the attention module, not its helper
        call = AttentionCall(frame.name, frame.module, source, self.seen.calls, heads, out_weight)
        self.seen.calls += 1
        self.seen.attended[frame.name] = self.seen.attended.get(frame.name, 0) + 1
        return call

    def _targets(self, call: AttentionCall) -> dict[int, torch.Tensor | None]:
        if self._plan is None:
            return {}
        targets = dict(self._plan(call.name, call.heads))
        bad = [h for h in targets if not 0 <= h < call.heads]
        if bad:
            raise OptionError(f"ablation asks for head {bad[0]} of '{call.name}', which has {call.heads} heads "
                              f"(0..{call.heads - 1})")
        return targets

    # ---------------------------------------------------------------- attention calls
    def _edit_heads(self, out: torch.Tensor, call: AttentionCall) -> torch.Tensor:
        """Observe and edit a ``(..., H, Tq, Dh)`` tensor of head outputs; returns it (a copy when edited)."""
        per_head = _as_4d(out)  # (B, H, Tq, Dh)
        if self._observe is not None:
            self._observe(call, per_head.detach())
        targets = self._targets(call)
        if not targets:
            return out
        edited = out.clone()
        view = _as_4d(edited)  # (B, H, Tq, Dh), a view of the copy
        for h, mean in targets.items():
            if mean is None:
                view[:, h] = 0.0
            else:
                view[:, h] = _check_mean(mean, view.shape[-1], call, h).to(view.dtype)
        return edited

    def _on_sdpa(self, func, args, kwargs):
        out = func(*args, **kwargs)
        frame = self._frame()
        if frame is None or not isinstance(out, torch.Tensor) or out.dim() < 3:
            return out
        return self._edit_heads(out, self._call(frame, "sdpa", _as_4d(out).shape[1]))

    def _on_mha(self, func, args, kwargs):
        frame = self._frame()
        if frame is None:
            return func(*args, **kwargs)
        bound = _MHA_SIGNATURE.bind(*args, **kwargs)
        bound.apply_defaults()
        a = bound.arguments
        heads, width = int(a["num_heads"]), int(a["embed_dim_to_check"])
        w_out, b_out = a["out_proj_weight"], a["out_proj_bias"]
        call = self._call(frame, "mha", heads, w_out.detach())
        if self._observe is not None:
            probe = bound.arguments.copy()
            probe.update(out_proj_weight=torch.eye(width, dtype=w_out.dtype, device=w_out.device),
                         out_proj_bias=None, need_weights=False)
            concat, _ = func(**probe)  # (Tq, B, H·Dh) or (Tq, H·Dh): the heads side by side, before mixing
            concat = concat.detach()
            if concat.dim() == 2:
                concat = concat.unsqueeze(1)
            tq, b, _ = concat.shape
            self._observe(call, concat.reshape(tq, b, heads, width // heads).permute(1, 2, 0, 3))  # (B, H, Tq, Dh)
        targets = self._targets(call)
        if not targets:
            return func(*bound.args, **bound.kwargs)
        dh = width // heads
        weight = w_out.clone()  # (D, H·Dh); a copy: the module's parameter is never touched
        bias = b_out.clone() if b_out is not None else None
        for h, mean in targets.items():
            cols = slice(h * dh, (h + 1) * dh)
            if mean is not None:
                shift = w_out[:, cols] @ _check_mean(mean, dh, call, h).to(w_out.dtype)  # (D,)
                bias = shift if bias is None else bias + shift
            weight[:, cols] = 0.0
        a["out_proj_weight"], a["out_proj_bias"] = weight, bias
        return func(*bound.args, **bound.kwargs)

    def _on_softmax(self, func, args, kwargs):
        out = func(*args, **kwargs)
        frame = self._frame()
        if frame is None or frame.owner is None:
            return out
        dim = args[1] if len(args) > 1 else kwargs.get("dim")
        if isinstance(out, torch.Tensor) and out.dim() == 4 and dim in (-1, 3):
            frame.owner.pending = out  # the product with the values may run in the helper or in its owner
        return out

    def _on_matmul(self, func, args, kwargs):
        out = func(*args, **kwargs)
        frame = self._frame()
        owner = None if frame is None else frame.owner
        if owner is None or owner.pending is None or len(args) < 2:
            return out
        weights, values = args[0], args[1]
        if not (isinstance(weights, torch.Tensor) and isinstance(values, torch.Tensor)
                and weights.shape == owner.pending.shape and values.dim() == 4
                and values.shape[-2] == weights.shape[-1]):
            return out
        owner.pending = None  # (B, H, Tq, Tk) @ (B, H, Tk, Dh): the weights meet the values
        return self._edit_heads(out, self._call(frame, "softmax", out.shape[1]))


    def _on_einsum(self, func, args, kwargs):
        out = func(*args, **kwargs)
        frame = self._frame()
        owner = None if frame is None else frame.owner
        if owner is None or owner.pending is None or not args or not isinstance(args[0], str):
            return out
        operands = list(args[1][0:]) if len(args) == 2 and isinstance(args[1], (list, tuple)) else list(args[1:])
        if len(operands) != 2 or "->" not in args[0] or not isinstance(out, torch.Tensor):
            return out
        weights, values = operands
        inputs, result = args[0].replace(" ", "").split("->")
        first = inputs.split(",")[0]
        if not (isinstance(weights, torch.Tensor) and isinstance(values, torch.Tensor) and len(first) == 4
                and weights.shape == owner.pending.shape and values.dim() == 4 and out.dim() == 4
                and result[:3] == first[:3] and out.shape[:3] == weights.shape[:3]):
            return out  # only an output laid out (B, H, Tq, Dh) like the weights' first three axes is edited
        owner.pending = None
        return self._edit_heads(out, self._call(frame, "softmax", out.shape[1]))


def _as_4d(t: torch.Tensor) -> torch.Tensor:
    if t.dim() == 4:
        return t
    if t.dim() > 4:
        return t.reshape(-1, *t.shape[-3:])
    return t.unsqueeze(0)


def _check_mean(mean: Any, dh: int, call: AttentionCall, head: int) -> torch.Tensor:
    m = torch.as_tensor(mean)
    if m.shape != (dh,):
        raise OptionError(f"mean-ablation of '{call.name}' head {head}: expected a mean of shape ({dh},), "
                          f"received {tuple(m.shape)}")
    return m


# -------------------------------------------------------------------- public: ablate
HeadSpec = Iterable[tuple[str, int]] | Mapping[str, Iterable[int] | int]


def _parse_heads(model: nn.Module, heads: HeadSpec) -> dict[str, set[int]]:
    names = [n for n, _ in model.named_modules()]
    attention = map_model(model).attention
    items = heads.items() if isinstance(heads, Mapping) else heads
    if isinstance(heads, tuple) and len(heads) == 2 and isinstance(heads[0], str):
        items = [heads]  # one (name, head) pair
    out: dict[str, set[int]] = {}
    for item in items:
        try:
            name, hs = item
        except (TypeError, ValueError):
            raise OptionError("heads= takes (module name, head) pairs or {name: [heads]}; "
                              f"received {item!r}") from None
        if not isinstance(name, str):
            raise OptionError(f"heads= takes (module name, head) pairs; received the name {name!r}")
        if name not in names:
            raise OptionError(f"heads= names '{name}', which is no module of {type(model).__name__}."
                              f"{suggest(name, attention or names)}")
        for h in [hs] if isinstance(hs, (int, np.integer)) else list(hs):
            if isinstance(h, bool) or not isinstance(h, (int, np.integer)) or h < 0:
                raise OptionError(f"heads= gives '{name}' the head {h!r}; expected an index >= 0")
            mha = model.get_submodule(name)
            if isinstance(mha, nn.MultiheadAttention) and h >= mha.num_heads:
                raise OptionError(f"heads= asks for head {h} of '{name}', which has {mha.num_heads} heads")
            out.setdefault(name, set()).add(int(h))
    if not out:
        raise OptionError("heads= is empty: name at least one (module name, head) to ablate")
    return out


class HeadAblation:
    """Context manager that ablates heads of a model while the block runs (see :func:`ablate`)."""

    def __init__(self, model: nn.Module, heads: HeadSpec, *, mode: str = "zero",
                 means: Mapping[tuple[str, int], Any] | None = None) -> None:
        if mode not in ABLATION_MODES:
            raise OptionError(f"mode must be 'zero' or 'mean'; received {mode!r}.{suggest(str(mode), ABLATION_MODES)}")
        self.targets = _parse_heads(model, heads)
        self.mode = mode
        self._means: dict[tuple[str, int], torch.Tensor] = {}
        if mode == "mean":
            if means is None:
                raise OptionError("mode='mean' needs means=: compute them with head_means(model, *inputs)")
            missing = [(n, h) for n, hs in self.targets.items() for h in sorted(hs) if (n, h) not in means]
            if missing:
                raise OptionError(f"means= has no mean for head {missing[0][1]} of '{missing[0][0]}'; "
                                  f"it holds {len(means)} heads")
            self._means = {(n, h): torch.as_tensor(means[(n, h)]) for n, hs in self.targets.items() for h in hs}
        self._model = model
        self._watch = HeadIntervention(model, plan=self._plan)
        self.edited: dict[str, int] = {}  # module name -> calls edited

    def _plan(self, name: str, heads: int) -> dict[int, torch.Tensor | None]:
        hs = self.targets.get(name)
        if not hs:
            return {}
        self.edited[name] = self.edited.get(name, 0) + 1
        return {h: self._means.get((name, h)) for h in hs}

    def __enter__(self) -> HeadAblation:
        self._watch.__enter__()
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        self._watch.__exit__(exc_type, exc, tb)
        if exc_type is None:
            for name in self.targets:
                if name in self.edited:
                    continue
                if name in self._watch.seen.ran:
                    raise UnsupportedModelError(
                        f"ablation of '{name}': the module ran, but no attention call was seen in it "
                        "(F.scaled_dot_product_attention, nn.MultiheadAttention, or a softmax followed by a "
                        "matmul with the values); nothing was ablated")
                raise NoAttentionError(f"ablation of '{name}': the block did not run that module; "
                                       "call the model inside the `with` block")
        return False

    def __repr__(self) -> str:
        heads = sum(len(h) for h in self.targets.values())
        return f"HeadAblation(mode={self.mode!r}, heads={heads}, modules={len(self.targets)})"


def ablate(model: nn.Module, heads: HeadSpec, *, mode: str = "zero",
           means: Mapping[tuple[str, int], Any] | None = None) -> HeadAblation:
    """Remove heads from *model* while the ``with`` block runs; parameters are never changed.

    >>> import torch
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 3, 8)
    >>> with ablate(mha, [("", 0), ("", 1)]):      # both heads gone: only out_proj's bias is left
    ...     y, _ = mha(x, x, x)
    >>> torch.allclose(y, mha.out_proj.bias.expand(1, 3, 8))
    True

    Args:
        model: the model; every call of it inside the block is ablated.
        heads: ``[(module name, head), ...]`` or ``{module name: [heads]}``, names as capture records them.
        mode: ``"zero"`` replaces each head's output ``α·v`` by 0, ``"mean"`` by ``means[(name, head)]``.
        means: per-head mean outputs ``(Dh,)``, from :func:`head_means`; needed for ``mode="mean"``.

    Returns:
        A :class:`HeadAblation` context manager. Leaving the block without error raises
        :class:`~attnscope.errors.NoAttentionError` if a named module did not run, or
        :class:`~attnscope.errors.UnsupportedModelError` if it ran an attention path ablation cannot see.
    """
    return HeadAblation(model, heads, mode=mode, means=means)


# -------------------------------------------------------------------- means, change, importance
def head_means(model: nn.Module, *args: Any, **kwargs: Any) -> dict[tuple[str, int], torch.Tensor]:
    """Mean output ``α·v`` of every head over all (batch, query) rows of ``model(*args, **kwargs)``.

    >>> import torch
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(2, 3, 8)
    >>> means = head_means(mha, x, x, x)
    >>> sorted(means), tuple(means[("", 0)].shape)
    ([('', 0), ('', 1)], (4,))

    Runs once in eval mode without gradients (the model's mode is restored). Returns
    ``{(module name, head): float32 tensor (Dh,)}``, the ``means=`` of :func:`ablate`.
    """
    sums: dict[tuple[str, int], tuple[torch.Tensor, int]] = {}

    def observe(call: AttentionCall, per_head: torch.Tensor) -> None:
        b, h, tq, dh = per_head.shape
        total = per_head.double().sum(dim=(0, 2))  # (H, Dh)
        for j in range(h):
            s, n = sums.get((call.name, j), (torch.zeros(dh, dtype=torch.float64), 0))
            sums[(call.name, j)] = (s + total[j], n + b * tq)

    observe_heads(model, observe, lambda: model(*args, **kwargs))
    return {key: (s / max(n, 1)).float() for key, (s, n) in sums.items()}


def observe_heads(model: nn.Module, observe: Observe, fn: Callable[[], Any]) -> Any:
    """Run ``fn()`` once in eval mode without gradients, handing every attention call's head outputs to *observe*.

    >>> import torch
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 3, 8)
    >>> shapes = []
    >>> _ = observe_heads(mha, lambda call, out: shapes.append(tuple(out.shape)), lambda: mha(x, x, x))
    >>> shapes                                         # (B, H, Tq, Dh)
    [(1, 2, 3, 4)]

    ``observe(call, per_head)`` gets an :class:`AttentionCall` and the detached ``(B, H, Tq, Dh)`` outputs.
    Returns what ``fn`` returned; the model's mode is restored. Raises
    :class:`~attnscope.errors.NoAttentionError` when ``fn`` ran no attention call.
    """
    training = model.training
    try:
        model.eval()
        with muted(), torch.no_grad(), HeadIntervention(model, observe=observe) as watch:
            out = fn()
        if watch.seen.calls == 0:
            raise NoAttentionError(f"running {type(model).__name__} showed no attention call "
                                   "(F.scaled_dot_product_attention, nn.MultiheadAttention or an eager softmax)")
        return out
    finally:
        model.train(training)


def _measure(out: Any) -> torch.Tensor:
    for key in ("loss", "logits", "last_hidden_state"):
        value = getattr(out, key, None)
        if isinstance(value, torch.Tensor):
            return value.detach().double()
    if isinstance(out, (tuple, list)) and out and isinstance(out[0], torch.Tensor):
        return out[0].detach().double()
    if isinstance(out, torch.Tensor):
        return out.detach().double()
    if isinstance(out, (int, float)):
        return torch.tensor(float(out), dtype=torch.float64)
    raise OptionError(f"fn must return a loss (a number or 1-element tensor) or an output tensor; "
                      f"received {type(out).__name__}")


def _change(base: torch.Tensor, out: torch.Tensor) -> float:
    if base.numel() == 1:
        return float(out.reshape(()) - base.reshape(()))
    if out.shape != base.shape:
        raise OptionError(f"fn returned outputs of different shapes: {tuple(base.shape)} without ablation, "
                          f"{tuple(out.shape)} with it")
    norm = float(torch.linalg.vector_norm(base))
    return float(torch.linalg.vector_norm(out - base)) / (norm if norm > 0 else 1.0)


def ablation_change(model: nn.Module, fn: Callable[[], Any], heads: HeadSpec, *, mode: str = "zero",
                    means: Mapping[tuple[str, int], Any] | None = None) -> float:
    """Change in ``fn()`` when *heads* are ablated together: loss difference, or relative output change.

    >>> import torch
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True).eval()
    >>> x = torch.randn(1, 3, 8)
    >>> ablation_change(mha, lambda: mha(x, x, x)[0], [("", 0), ("", 1)]) > 0
    True

    ``fn`` takes no argument and runs the model. When it returns a loss (a number, a 1-element tensor or an
    object with ``.loss``) the result is ``loss(ablated) - loss(intact)``; when it returns an output tensor
    (or ``.logits`` / ``.last_hidden_state`` / a tuple whose first item is one) the result is
    ``‖out(ablated) - out(intact)‖ / ‖out(intact)‖``. Both runs are in eval mode without gradients.
    """
    training = model.training
    try:
        model.eval()
        with muted(), torch.no_grad():  # a capture the user has open records none of these runs
            base = _measure(fn())
            with ablate(model, heads, mode=mode, means=means):
                out = _measure(fn())
    finally:
        model.train(training)
    return _change(base, out)


def head_importance(model: nn.Module, fn: Callable[[], Any], *, heads: HeadSpec | None = None,
                    mode: str = "zero", means: Mapping[tuple[str, int], Any] | None = None,
                    progress: bool = False) -> pd.DataFrame:
    """Per-head importance: the change in ``fn()`` when each head alone is ablated (Michel et al. 2019).

    >>> import torch
    >>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, dropout=0.0, batch_first=True)
    >>> x = torch.randn(2, 5, 16)
    >>> table = head_importance(layer, lambda: layer(x).pow(2).mean())
    >>> list(table.columns)
    ['name', 'head', 'base', 'ablated', 'change', 'importance']

    Args:
        model: the model (run in eval mode without gradients; its mode is restored).
        fn: no-argument callable that runs the model and returns a loss or an output (see :func:`ablation_change`).
        heads: heads to score, ``[(name, head), ...]``; default every head of every attention call ``fn`` runs.
        mode: ``"zero"`` or ``"mean"``. For ``"mean"`` without ``means=``, the means are taken from
            the intact run of ``fn`` itself.
        means: per-head means from :func:`head_means`.
        progress: show a ``tqdm.auto`` progress bar over the heads.

    Returns:
        DataFrame, one row per head in call order: ``name``, ``head``, ``base`` and ``ablated`` (the loss, NaN
        when ``fn`` returns an output tensor), ``change`` (``ablated - base``, or the relative output change)
        and ``importance`` (``|change|``).
    """
    if mode not in ABLATION_MODES:
        raise OptionError(f"mode must be 'zero' or 'mean'; received {mode!r}.{suggest(str(mode), ABLATION_MODES)}")
    order: dict[tuple[str, int], None] = {}
    sums: dict[tuple[str, int], tuple[torch.Tensor, int]] = {}
    want_means = mode == "mean" and means is None

    def observe(call: AttentionCall, per_head: torch.Tensor) -> None:
        b, h, tq, dh = per_head.shape
        total = per_head.double().sum(dim=(0, 2)) if want_means else None  # (H, Dh)
        for j in range(h):
            order.setdefault((call.name, j), None)
            if total is not None:
                s, n = sums.get((call.name, j), (torch.zeros(dh, dtype=torch.float64), 0))
                sums[(call.name, j)] = (s + total[j], n + b * tq)

    with muted():
        base = _measure(observe_heads(model, observe, fn))
    if want_means:
        means = {key: (s / max(n, 1)).float() for key, (s, n) in sums.items()}
    chosen = list(order) if heads is None else [(n, h) for n, hs in _parse_heads(model, heads).items()
                                                 for h in sorted(hs)]
    from tqdm.auto import tqdm

    scalar = base.numel() == 1
    rows = []
    training = model.training
    try:
        model.eval()
        with muted(), torch.no_grad():
            for name, h in tqdm(chosen, desc="ablating heads", disable=not progress, leave=False):
                with ablate(model, [(name, h)], mode=mode, means=means):
                    out = _measure(fn())
                change = _change(base, out)
                rows.append({"name": name, "head": h, "base": float(base) if scalar else math.nan,
                             "ablated": float(out.reshape(())) if scalar else math.nan,
                             "change": change, "importance": abs(change)})
    finally:
        model.train(training)
    return pd.DataFrame(rows, columns=["name", "head", "base", "ablated", "change", "importance"])

