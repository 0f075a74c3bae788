"""What the attention paths write to: who is calling (a per-thread module call stack) and making records.

A :class:`Recorder` is the part of a capture that the attention paths (:mod:`attnscope.capture.paths`) see.
Module hooks push and pop :class:`Frame` objects; a path asks :meth:`Recorder.frame` which module is calling,
:meth:`Recorder.kept_heads` which heads to keep, and hands the call to :meth:`Recorder.record`, which enforces
the memory budget and keeps either the maps or their per-head statistics.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import nn

from attnscope.capture import masks, rules
from attnscope.capture.discovery import ModelMap
from attnscope.errors import MemoryBudgetError, OptionError
from attnscope.records import AttentionRecord, HeadSums, ResidualRecord
from attnscope import stats as reductions
from attnscope.stats import ScorePlan, head_sums

__all__ = ["LEAVES", "Frame", "Recorder", "as_4d", "is_leaf", "take"]

_STATS_CHUNK_BYTES = 4 * 1024**2  # keep="stats" never builds more than this much of a map at once

#: ``compute(batch_slice, heads) -> (b, len(heads), Tq, Tk)`` float32 weights that no one else holds.
Compute = Callable[[slice, list], torch.Tensor]


@dataclass
class Frame:
    """One module call on a capture's call stack.

    ``owner`` is the frame of the attention module this call's attention is recorded under (itself, the
    enclosing attention module for a helper or any child of it, or None outside every attention module).
    """

    name: str
    module: nn.Module
    kind_hint: str | None
    selected: bool
    last_softmax: Any = None  # (output tensor, record index) of the latest softmax seen in this frame
    owner: Frame | None = None
    others: tuple = ()  # floating tensor arguments that may carry another sequence (rules.other_sequences)
    consumed_other: bool = False  # a child module consumed one of ``others``: keys come from another sequence
    mask_arg: torch.Tensor | None = None  # the float ``attention_mask`` an attention module got (rules.mask_argument)

    def release(self) -> None:
        """Drop what the call held (its softmax output, mask, candidate sequences) when it returns.

        An attention module's frame is its own owner, a reference cycle: without this the model's weights and
        scores of every layer would live until Python's cycle collector runs, and memory would not be reused.
        """
        self.owner = None
        self.last_softmax = None
        self.mask_arg = None
        self.others = ()

    def target(self) -> Frame:
        """The frame a record of an attention call in this frame is named after."""
        return self.owner or self

    def kind(self) -> str:
        """``"self"``/``"cross"`` of an attention call in this frame, by the rules of :mod:`attnscope.capture.rules`."""
        t = self.target()
        return t.kind_hint or ("cross" if t.consumed_other else "self")

    def known_kind(self) -> str | None:
        """The kind when a rule decided it, else None (the path may decide, as MHA does from its arguments)."""
        t = self.target()
        return t.kind_hint or ("cross" if t.consumed_other else None)


@dataclass
class _Counters:
    calls: int = 0
    blocks: int = 0
    kept_bytes: int = 0
    foreign: int = 0
    ran: set[str] = field(default_factory=set)
    recorded_in: set[str] = field(default_factory=set)


class Recorder:
    """Call stack and record keeping of one capture (the lifecycle lives in :class:`~attnscope.capture.session.Capture`)."""

    def __init__(self, model_map: ModelMap, *, keep: str, max_bytes: int, selected: set[str] | None,
                 heads: tuple[int, ...] | None, kinds: list[tuple[str, str]], sdpa: str = "beside") -> None:
        self.map = model_map
        self.keep = keep
        self.max_bytes = max_bytes
        self.selected = selected
        self.heads = heads
        self.kinds = kinds
        self.sdpa = sdpa  # "beside": fused SDPA untouched, weights recomputed; "weights": output = weights @ V
        self.attention: list[AttentionRecord] = []
        self.residual: list[ResidualRecord] = []
        self.counters = _Counters()
        self.thread: int | None = None
        self.open = False
        self.muted = 0  # > 0 while an attnscope computation runs the model inside this capture (session.muted)
        #: (module name, kept tensor, its version counter when recorded): kept maps that may share memory with
        #: a tensor the model goes on using (eager paths keep the model's own weights, copying nothing)
        self.borrowed: list[tuple[str, torch.Tensor, int]] = []
        self._tls = threading.local()
        #: (what, id(tensor), its version, ...) -> (tensor, result): what every layer of a forward works out
        #: from the one mask tensor they share (see _remember)
        self._memo: dict[tuple, tuple[Any, Any]] = {}
        self._kinds_key = tuple(kinds)

    # ---------------------------------------------------------------- hooks: who is calling
    def _stack(self) -> list[Frame]:
        stack = getattr(self._tls, "stack", None)
        if stack is None:
            stack = self._tls.stack = []
        return stack

    def pre_hook(self, name: str):
        """A forward pre-hook (``with_kwargs=True``) that pushes the call of module *name*."""
        def hook(module: nn.Module, args: tuple, kwargs: dict):
            if threading.get_ident() != self.thread:
                self.counters.foreign += 1  # the torch function mode is per thread: this call cannot be seen
                return None
            stack = self._stack()
            parent = stack[-1] if stack else None
            # a module is selected when named, or when it runs inside a selected one
            selected = self.selected is None or name in self.selected or bool(parent and parent.selected)
            with _unrouted():  # the tensor queries below are the capture's own: the function mode need not see them
                key = (name, self._kinds_key)
                hints = self.map.hints.get(key)
                if hints is None:  # worked out once per module (and kinds=) while the model keeps its layout
                    hints = self.map.hints[key] = rules.static_kind_hints(name, module, self.kinds)
                frame = Frame(name, module, rules.kind_hint(name, module, args, kwargs, self.kinds, hints), selected,
                              others=rules.other_sequences(module, args))
                owner_name = self.map.owner.get(name)
                if owner_name == name:
                    frame.owner = frame
                    frame.mask_arg = rules.mask_argument(module, args, kwargs)
                elif owner_name is not None:
                    frame.owner = next((f for f in reversed(stack) if f.name == owner_name), None) or (
                        parent.owner if parent else None)
                if parent is not None:
                    _note_consumed(parent, args)
            stack.append(frame)
            if selected and name in self.map.attention and not self.muted:
                self.counters.ran.add(name)
            return None
        return hook

    def leaf_hook(self):
        """A forward pre-hook (no kwargs) for one of torch's own leaf modules (:data:`LEAVES`): such a module never
        calls attention and holds no module, so no frame is pushed for it (and it needs no post-hook); it only
        notes, for the calling frame, that it consumed a candidate second sequence (cross-attention evidence)."""
        def hook(module: nn.Module, args: tuple):
            if threading.get_ident() != self.thread:
                self.counters.foreign += 1
                return None
            stack = getattr(self._tls, "stack", None)
            if stack:
                parent = stack[-1]
                if parent.others or (parent.owner is not None and parent.owner.others):
                    with _unrouted():
                        _note_consumed(parent, args)
            return None
        return hook

    def post_hook(self, name: str, is_block: bool):
        """A forward hook (``always_call=True``) that pops the call and records a block's residual stream."""
        def hook(module: nn.Module, args: tuple, output: Any):
            if threading.get_ident() != self.thread:
                return None
            stack = self._stack()
            while stack:  # always_call=True: also runs when forward raised, so the stack stays balanced
                frame = stack.pop()
                frame.release()
                if frame.module is module:
                    break
            if is_block and self.open and not self.muted:
                with _unrouted():
                    self.record_residual(name, output)
            return None
        return hook

    def frame(self) -> Frame | None:
        """The innermost module call on this thread, or None outside the model (and while muted)."""
        if self.muted:
            return None
        stack = getattr(self._tls, "stack", None)
        return stack[-1] if stack else None

    # ---------------------------------------------------------------- making records
    def allowed_of_softmax(self, frame: Frame, scores: torch.Tensor) -> torch.Tensor | None:
        """The compact allowed mask of ``(B, H, Tq, Tk)`` *scores* a softmax in *frame* received.

        From the ``attention_mask`` the attention module was called with when it fits and agrees with the
        scores (worked out once per mask tensor, not once per layer), else from the scores themselves.
        """
        mask = frame.target().mask_arg
        if mask is not None:
            shape = tuple(scores.shape)
            allowed = self._remember(("added mask", shape), mask, lambda: masks.added_mask_allowed(mask, shape))
            if allowed is not masks.UNFIT and masks.agrees_with_scores(allowed, scores):
                return allowed
        return masks.allowed_from_scores(scores)

    def is_causal(self, allowed: torch.Tensor | None, tq: int, tk: int, offset: int) -> bool:
        """:func:`~attnscope.capture.masks.is_causal_mask`, worked out once per mask tensor (and version): the
        layers of one forward share one compact mask."""
        return self._remember(("causal", tq, tk, offset), allowed,
                              lambda: masks.is_causal_mask(allowed, tq, tk, offset))

    def sdpa_mask(self, mask: torch.Tensor | None, is_causal: bool, shape: tuple[int, int, int, int]):
        """``(compact allowed mask, whether the mask only allows or forbids keys)`` of a
        ``scaled_dot_product_attention`` call with *mask* and *is_causal* on ``(B, H, Tq, Tk)`` scores, worked
        out once per mask tensor (and version): the layers of one forward share one mask (or none)."""
        return self._remember(("sdpa", is_causal, shape), mask, lambda: (
            masks.compact(masks.sdpa_allowed(mask, is_causal, shape[2], shape[3]), shape), masks.only_forbids(mask)))

    def score_plan(self, allowed: torch.Tensor | None, shape: tuple[int, int, int, int],
                   batch: slice | None = None, heads: list[int] | None = None) -> ScorePlan:
        """:func:`~attnscope.stats.score_plan` of *allowed* for *shape* scores, worked out once per mask tensor
        (and version): the layers of one forward reduce their scores in the same blocks. *batch* and *heads*
        take a part of a compact ``(B or 1, H or 1, Tq, Tk)`` mask (the batch items and heads a recomputation
        builds at once), worked out once per part."""
        part = None if batch is None else (batch.start, batch.stop, batch.step)
        what = ("score plan", shape, reductions.ROW_BLOCK_MIN, reductions.SCORE_PIECE_BYTES, part,
                None if heads is None else tuple(heads))

        def make() -> ScorePlan:
            a = allowed
            if a is not None and batch is not None and a.shape[0] > 1:
                a = a[batch]
            if a is not None and heads is not None and a.shape[1] > 1:
                a = a[:, heads]
            return reductions.score_plan(a, *shape)
        return self._remember(what, allowed, make)

    def mha_allowed(self, attn_mask: torch.Tensor | None, key_padding_mask: torch.Tensor | None, is_causal: bool,
                    shape: tuple[int, int, int, int]) -> torch.Tensor | None:
        """The compact allowed mask of an ``nn.MultiheadAttention`` call (its ``attn_mask``, ``key_padding_mask``
        and ``is_causal`` on ``(B, H, Tq, Tk)`` scores), worked out once per pair of mask tensors (and versions):
        ``nn.TransformerEncoder`` hands every layer the same padding mask."""
        def make():
            b, h, tq, tk = shape
            mask = ~masks.causal_allowed(tq, tk) if is_causal and attn_mask is None else attn_mask
            return masks.compact(masks.mha_allowed(mask, key_padding_mask, b, h, tq, tk), shape)
        return self._remember(("mha", is_causal, shape), (attn_mask, key_padding_mask), make)

    def _remember(self, what: tuple, tensors: torch.Tensor | None | tuple, make: Callable[[], Any]) -> Any:
        """``make()``, worked out once per *what* and *tensors* (one tensor or a tuple; each by its identity and
        version, None counting as one tensor): the result is kept, with the tensors, until the capture closes or
        more than 16 are kept; then the entries of *what*'s kind (``what[0]``) go first, so the parts of a large
        padded batch (one score plan each) do not push out the masks every layer shares."""
        ts = tensors if isinstance(tensors, tuple) else (tensors,)
        key = (*what, *((None, None) if t is None else (id(t), t._version) for t in ts))
        hit = self._memo.get(key)
        if hit is None or any(x is not t for x, t in zip(hit[0], ts)):
            if len(self._memo) > 16:
                same = [k for k in self._memo if k[0] == what[0]]
                for k in same or list(self._memo):
                    del self._memo[k]
            hit = self._memo[key] = (ts, make())
        return hit[1]

    def release(self) -> None:
        """Drop every model tensor the capture still holds (when it closes): masks of :meth:`allowed_of_softmax`
        and the frames a forward that raised left on this thread's stack."""
        self._memo.clear()
        for frame in self._stack():
            frame.release()
        self._stack().clear()

    def kept_heads(self, h: int, name: str) -> tuple[int, ...]:
        """The head indices to keep of a call with *h* heads in module *name*."""
        if self.heads is None:
            return tuple(range(h))
        if max(self.heads) >= h:
            raise OptionError(f"heads= asks for head {max(self.heads)}, but '{name}' has {h} heads")
        return self.heads

    def record(self, frame: Frame, kind: str, shape: tuple[int, int, int, int], heads: tuple[int, ...],
               allowed: torch.Tensor | None, causal: bool, source: str, offset: int, compute: Compute | None,
               replace_at: int | None = None, builds: bool = False, scores: torch.Tensor | None = None,
               scored: Callable[[slice, list], tuple[torch.Tensor, torch.Tensor]] | None = None,
               sums: Callable[[list], HeadSums] | None = None) -> int:
        """Keep one call (maps or statistics) and return its index in :attr:`attention`.

        ``allowed`` is the compact ``(B or 1, H or 1, Tq, Tk)`` bool mask or None; ``replace_at`` refines an
        earlier record of the same call (a ``tap`` of a softmax's output). ``builds`` says that *compute* makes
        the weights anew (a recomputation): kept maps are then built piece by piece into one array, so no
        whole-map temporary (scores beside weights) exists at any time. ``scores`` are the ``(B, H, Tq, Tk)``
        softmax input of weights that exist already (the softmax path): ``keep="stats"`` then takes the entropy
        from them without a logarithm per weight (:func:`~attnscope.stats.head_sums`); ``scored`` is a *compute*
        that builds ``(weights, masked scores)`` for the same purpose (a recomputation). ``sums(heads)`` reduces
        the call to statistics without forming its map (:func:`~attnscope.stats.score_sums`); ``keep="stats"``
        uses it when given; *compute* may then be None (a call reduced only to statistics, never to maps).
        """
        b, _, tq, tk = shape
        target = frame.target()
        helper = frame.name if target is not frame else None
        if allowed is not None and allowed.shape[1] > 1:
            allowed = allowed[:, list(heads)]
        per_item = len(heads) * tq * tk * 4  # float32 bytes of one batch item's kept map
        if compute is None and (self.keep == "maps" or sums is None):  # a path's mistake, never the user's
            raise ValueError(f"record: the call of '{target.name}' came with neither a way to build its maps "
                             f"nor its statistics (keep={self.keep!r})")
        if self.keep == "maps":
            size = b * per_item
            if replace_at is None and self.counters.kept_bytes + size > self.max_bytes:
                raise MemoryBudgetError(
                    f"keeping the maps of '{target.name}' ({b}x{len(heads)}x{tq}x{tk} float32 = {_mb(size)}) would "
                    f"bring the capture to {_mb(self.counters.kept_bytes + size)}, over its budget of "
                    f"{_mb(self.max_bytes)}. Use keep='stats' (per-head statistics only), select fewer "
                    "layers=/heads=, a smaller batch, or raise max_bytes=.")
            step = max(1, _STATS_CHUNK_BYTES // max(per_item, 1))
            if builds and b > step:
                weights = torch.empty(b, len(heads), tq, tk)  # (B, h, Tq, Tk)  the kept maps, filled in pieces
                for start in range(0, b, step):
                    sl = slice(start, min(b, start + step))
                    weights[sl] = compute(sl, list(heads))
            else:
                weights = compute(slice(None), list(heads))
            stats = None
            kept = weights.numpy()  # shares memory with *weights*: no copy
            self.borrowed.append((target.name, weights, weights._version))
            if replace_at is None:
                self.counters.kept_bytes += size
        elif sums is not None:
            stats, kept = sums(list(heads)), None
        else:
            stats = _reduce(compute, b, shape[1], heads, allowed, offset, tq * tk * 4, builds, scores, scored)
            kept = None
        # keep="stats" keeps O(heads) numbers per call, so no (Tq, Tk) mask either: the statistics already hold
        # what the mask meant (leak_mass, rows), and ``causal`` says whether it was causal.
        allowed_np = None if allowed is None or self.keep == "stats" else allowed.numpy().copy()
        index = self.counters.calls if replace_at is None else self.attention[replace_at].call
        record = AttentionRecord(name=target.name, kind=kind, weights=kept, allowed=allowed_np, causal=causal,
                                 stats=stats, shape=shape, heads=heads, call=index, source=source,
                                 query_offset=offset, helper=helper)
        if replace_at is None:
            self.attention.append(record)
            self.counters.calls += 1
            self.counters.recorded_in.add(target.name)
            return len(self.attention) - 1
        self.attention[replace_at] = record
        return replace_at

    def check_borrowed(self) -> list[str]:
        """Names of modules whose kept weights were changed in place after they were recorded; forgets them all.

        A tensor's version counter goes up on every in-place operation (views share it), so a model that,
        say, applies an in-place dropout to its softmax output after capture took it is caught here.
        """
        changed = sorted({name for name, t, version in self.borrowed if t._version != version})
        self.borrowed.clear()
        return changed

    def record_residual(self, name: str, output: Any) -> None:
        """Keep the per-position norms of block *name*'s output."""
        out = _first_tensor(output)
        if out is None or out.dim() < 2 or not out.is_floating_point():
            return
        x = out.detach()
        if x.is_nested:
            return
        if name in self.map.seq_first and x.dim() == 3:
            x = x.transpose(0, 1)  # (T, B, D) -> (B, T, D)
        if x.dim() == 2:
            x = x.unsqueeze(0)
        norms = torch.linalg.vector_norm(x.float(), dim=-1).numpy().copy()  # (B, T)
        self.residual.append(ResidualRecord(name=name, norms=norms, call=self.counters.blocks))
        self.counters.blocks += 1


#: torch's own leaf modules whose forward calls no attention function and holds no module: capture gives them a
#: light pre-hook (:meth:`Recorder.leaf_hook`) instead of a frame. Exact types only (a subclass may override
#: forward), and only while the instance keeps the class's forward.
LEAVES = frozenset(getattr(nn, n) for n in (
    "Linear", "Bilinear", "LayerNorm", "RMSNorm", "GroupNorm", "BatchNorm1d", "BatchNorm2d", "Embedding", "Dropout",
    "Dropout1d", "Dropout2d", "Dropout3d", "AlphaDropout", "Identity", "Conv1d", "Conv2d", "GELU", "ReLU", "SiLU",
    "Tanh", "Sigmoid", "Mish", "LeakyReLU", "ELU", "Softplus") if hasattr(nn, n))


def is_leaf(module: nn.Module) -> bool:
    """Whether *module* is one of :data:`LEAVES`, with no child and its class's own forward."""
    return type(module) in LEAVES and not module._modules and "forward" not in module.__dict__


#: torch functions called inside it skip every torch function mode (capture's own, above all) and tensor subclass
#: override: the hooks' own queries of the model's tensors (dtype, shape, storage, norms) cost no dispatch
_unrouted = torch._C.DisableTorchFunction


def _note_consumed(parent: Frame, args: tuple) -> None:
    """Mark the calling frames whose candidate other sequence a child module takes as its input."""
    first = next((a for a in args if isinstance(a, torch.Tensor)), None)
    if first is None:
        return
    for frame in (parent, parent.owner):
        if frame is not None and frame.others and not frame.consumed_other:
            try:
                hit = any(first is o or (first.data_ptr() == o.data_ptr() and first.shape == o.shape)
                          for o in frame.others)
            except RuntimeError:  # tensors without plain storage (nested, sparse) are compared by identity only
                hit = any(first is o for o in frame.others)
            frame.consumed_other = hit


def _reduce(compute: Compute, b: int, h: int, heads: tuple[int, ...], allowed: torch.Tensor | None, offset: int,
            map_bytes: int, builds: bool = True, scores: torch.Tensor | None = None,
            scored: Callable[[slice, list], tuple[torch.Tensor, torch.Tensor]] | None = None) -> HeadSums:
    """keep="stats": reduce a call to per-head sums, building at most ``_STATS_CHUNK_BYTES`` of map at once.

    Weights that exist already (``builds`` False) are reduced in one call when every head is kept: *compute*
    then hands out a view, and :func:`~attnscope.stats.head_sums` walks it in cache-sized pieces itself.
    """
    if not builds and b and heads == tuple(range(h)):
        whole = compute(slice(None), list(heads))  # (B, H, Tq, Tk)  a view of the existing weights
        if whole.dtype == torch.float32 and whole.is_contiguous():
            return head_sums(whole, allowed, offset, scores)
    per_item = len(heads) * map_bytes
    b_step = max(1, _STATS_CHUNK_BYTES // max(per_item, 1))
    h_step = len(heads) if b_step > 1 else max(1, min(len(heads), _STATS_CHUNK_BYTES // max(map_bytes, 1)))
    groups = []
    for h0 in range(0, len(heads), h_step):
        positions = list(range(h0, min(len(heads), h0 + h_step)))
        hs = [heads[i] for i in positions]
        sums = HeadSums.zeros(len(hs))
        for start in range(0, b, b_step):
            sl = slice(start, min(b, start + b_step))
            a = allowed
            if a is not None:
                a = a if a.shape[0] == 1 else a[sl]
                a = a[:, positions] if a.shape[1] > 1 else a
            if scored is not None:
                w, part = scored(sl, hs)  # (b, h, Tq, Tk) each
            else:
                w = compute(sl, hs)
                part = None if scores is None else scores[sl][:, hs]  # (b, h, Tq, Tk)  a copy of the piece's scores
            sums = sums.merge(head_sums(w, a, offset, part))
        groups.append(sums)
    return groups[0] if len(groups) == 1 else HeadSums.concat(groups)


def take(w: torch.Tensor, sl: slice, hs: list[int], shared: bool = True) -> torch.Tensor:
    """Batch slice *sl*, heads *hs* of ``(B, H, Tq, Tk)`` weights as float32, copying only what is kept.

    The weights of eager paths exist already (the model's softmax output, MHA's per-head weights): when every
    head is kept and they are float32 and contiguous, the record takes them as they are, with no copy, as
    ``output_attentions`` hands them out. Picking heads (advanced indexing) or widening half precision copies
    just the kept part. ``shared`` says whether the model or its caller also holds *w*; such weights are
    watched for in-place changes until the capture closes (:meth:`Recorder.check_borrowed`).
    """
    if hs == list(range(w.shape[1])):
        part = w[sl]  # (b, H, Tq, Tk)  a view
    else:
        part = w[sl][:, hs]  # (b, h, Tq, Tk)  advanced indexing: a copy of the kept heads only
    return part.float().contiguous()


def needs_grad(*tensors: Any) -> bool:
    """Whether a call on *tensors* (non-tensors ignored) builds an autograd graph: capture must then leave the
    call's own computation in place."""
    return torch.is_grad_enabled() and any(isinstance(t, torch.Tensor) and t.requires_grad for t in tensors)


def as_4d(t: torch.Tensor) -> torch.Tensor:
    """*t* as ``(B, H, T, E)``: extra leading axes folded into B, missing ones added as size 1."""
    if t.dim() == 4:
        return t
    if t.dim() > 4:
        return t.reshape(-1, *t.shape[-3:])
    while t.dim() < 4:
        t = t.unsqueeze(0)
    return t


def _first_tensor(output: Any) -> torch.Tensor | None:
    """The hidden state in a block's output: the tensor itself, or the first one in nested tuples, lists, dicts."""
    if isinstance(output, torch.Tensor):
        return output
    if isinstance(output, Mapping):
        preferred = [output[k] for k in ("last_hidden_state", "hidden_states") if k in output]
        items = preferred + list(output.values())
    elif isinstance(output, (tuple, list)):
        items = list(output)
    else:
        return None
    for item in items:
        found = _first_tensor(item)
        if found is not None:
            return found
    return None


def _mb(n: int) -> str:
    return f"{n / 1024**2:.1f} MiB" if n >= 1024**2 else f"{n / 1024:.1f} KiB" if n >= 1024 else f"{n} bytes"
