"""What counts as attention, and how a call is labelled: the one place that decides.

Capture looks at a model twice: **statically** before anything is attached (which modules are attention
modules, which are blocks), and **per call** while the block runs (which attention path computed the weights,
whether keys came from another sequence). Every rule is in this module or in one module of
:mod:`attnscope.capture.paths`; nothing else in the package guesses.

Attention modules (static; a module that passes any row is one)

=======================================  ==========================================================================
rule                                     why
=======================================  ==========================================================================
``nn.MultiheadAttention``                torch's own attention (also inside ``nn.Transformer*`` layers)
class name says attention                HF and most hand-written code name their blocks ``...Attention``/``...Attn...``
(``attention``/``attn``, any case)
``forward`` source calls                 hand-written blocks of any name that compute attention themselves
``scaled_dot_product_attention``,
``flex_attention(`` or ``tap(``, or
calls ``softmax(`` and
multiplies two tensors (``@``,           a softmax with no product of activations is a router or a classifier
``matmul``, ``bmm``, ``einsum``)         (mixture-of-experts gates over experts); ``log_softmax(`` never counts
containers never count                   ``nn.ModuleList``/``nn.ModuleDict``/``nn.Sequential`` hold blocks, never compute
torch.nn's own classes are not read      their sources call softmax for other reasons
=======================================  ==========================================================================

Owners (static; :func:`owners`): every call is recorded under the attention module the user knows

=======================================  ==========================================================================
rule                                     why
=======================================  ==========================================================================
a call inside an attention module is     the helper that computes scores and softmax (``Attend``,
recorded under the innermost enclosing   ``ScaledDotProductAttention``, an ``nn.Softmax`` child, a softmax stored as
attention module that is not a helper    a ``functools.partial``) is an implementation detail; the block holding
                                         the q/k/v projections is what users name and what holds ``out_proj``
a *helper* is an attention module with   ``MultiHeadAttention`` holding a ``ScaledDotProductAttention`` (no weights)
no parameters inside another one         is one attention module, not two; the helper is noted on the record
only weight-free modules below a block   a child with weights (a router, an MLP inside the block) computes
speak for it                             something else; its softmax is not the block's attention
=======================================  ==========================================================================

Attention calls (per call; see :mod:`attnscope.capture.paths` for one module per path)

=======================================  ==========================================================================
path                                     seen as
=======================================  ==========================================================================
``mha``                                  ``F.multi_head_attention_forward``, run with per-head weights requested
``sdpa``                                 ``F.scaled_dot_product_attention``, weights recomputed beside the call
``softmax``                              a softmax over the last axis of a 4-D ``(B, H, Tq, Tk)`` or 3-D
                                         ``(B·H, Tq, Tk)`` tensor (``bmm`` style; heads recovered from the module's
                                         head count) while an attention module owns the call; never ``log_softmax``
``tap``                                  :func:`attnscope.tap` called by the user's own code
``flex``                                 ``flex_attention``, weights recomputed from q, k, score_mod, block mask
=======================================  ==========================================================================

Forbidden keys of a softmax call (per call; :func:`mask_argument`, :mod:`attnscope.capture.paths.softmax`)

=======================================  ==========================================================================
rule                                     why
=======================================  ==========================================================================
the floating ``attention_mask`` the      HF eager attention adds exactly this mask to its scores; one small tensor
attention module was called with, when   shared by every layer is read once per forward instead of every head's
it has the scores' last two sizes and    ``Tq x Tk`` scores. Trusted only when the scores of the first and the last
agrees with two (batch, head) slices     (batch item, head) forbid the same keys, so a module that masks more
of the scores                            inside (a causal buffer of its own) falls back to the next row
else the scores themselves               a key is forbidden where its score is at most ``masks.FORBID_AT``
=======================================  ==========================================================================

Self or cross (per call, first rule that applies; :func:`kind_hint`)

=======================================  ==========================================================================
rule                                     why
=======================================  ==========================================================================
the user's ``kinds=`` pattern            the user knows best
``module.is_cross_attention``            HF sets this flag on its cross-attention modules
a keyword argument that carries the      ``encoder_hidden_states``, ``key_value_states``, ``memory``, ``context``, ...
other sequence is given
a second floating tensor argument of     a block called as ``attn(x, context)`` that projects ``context``; a second
the same width that a child module of    tensor the block only adds back (BLOOM's ``residual``) is no other
the block consumes                       sequence, nor are the ``q, k, v`` a helper receives
the module's name says cross             ``cross``, ``encoder_attn``, ``encdec``, ``multihead_attn`` (torch's
                                         decoder layer names its cross-attention so)
``nn.MultiheadAttention`` with a         torch's own module: query and key are other tensors
``key`` other than its ``query``
=======================================  ==========================================================================

Blocks (static; their outputs are the residual stream)

=======================================  ==========================================================================
rule                                     why
=======================================  ==========================================================================
``nn.TransformerEncoderLayer`` /         torch's layers (sequence-first unless ``batch_first=True``)
``nn.TransformerDecoderLayer``
children of any container (``ModuleList``, the stack of blocks of HF and hand-written models; ``nn.Sequential``
``nn.Sequential``, ``ModuleDict``, and   in vision transformers; nested containers are looked through). A
nested ones) that hold an attention      candidate that holds another candidate is not a block: the innermost are
module below them                        the residual stream
=======================================  ==========================================================================
"""

from __future__ import annotations

import functools
import inspect
import re
from typing import Any

import torch
from torch import nn

from attnscope.names import within

__all__ = ["CONTAINERS", "NN_LAYERS", "head_count", "is_attention_module", "kind_hint", "mask_argument",
           "module_label", "owners"]

_ATTN_CLASS = re.compile(r"attention|attn", re.IGNORECASE)
_ATTN_SOURCE = re.compile(r"scaled_dot_product_attention|flex_attention\(|\btap\(")
_SOFTMAX_SOURCE = re.compile(r"(?<!log_)softmax\(")
# a product of two activations: binary @ (not a decorator), matmul, bmm, baddbmm, einsum
_PRODUCT_SOURCE = re.compile(r"[\w)\]]\s*@\s*[\w(]|\bmatmul\(|\bbmm\(|baddbmm\(|\beinsum\(")
# attributes that hold a module's number of (query) heads, in the spellings common code uses
_HEAD_ATTRS = ("num_heads", "num_attention_heads", "n_heads", "n_head", "nhead", "heads", "n_heads_q")
#: torch's transformer layers: blocks by themselves.
NN_LAYERS = (nn.TransformerEncoderLayer, nn.TransformerDecoderLayer)
#: containers: hold modules, never compute attention.
CONTAINERS = (nn.ModuleList, nn.ModuleDict, nn.Sequential)
# forward keywords that carry the other sequence of a cross-attention call
_CROSS_KWARGS = ("key_value_states", "encoder_hidden_states", "memory", "context", "encoder_out",
                 "encoder_output", "cross_states", "kv")
_CROSS_NAME = ("cross", "encoder_attn", "encdec", "enc_dec", "multihead_attn")


@functools.lru_cache(maxsize=512)
def _forward_mentions_attention(cls: type) -> bool:
    forward = cls.__dict__.get("forward")
    if forward is None or cls.__module__.startswith("torch.nn"):
        return False
    try:
        source = inspect.getsource(forward)
    except (OSError, TypeError):
        return False
    if _ATTN_SOURCE.search(source):
        return True
    return bool(_SOFTMAX_SOURCE.search(source)) and bool(_PRODUCT_SOURCE.search(source))


def is_attention_module(module: nn.Module) -> bool:
    """Whether *module* is an attention module by the rules in this module's docstring."""
    if isinstance(module, nn.MultiheadAttention):
        return True
    cls = type(module)
    if isinstance(module, CONTAINERS):
        return False
    return bool(_ATTN_CLASS.search(cls.__name__)) or _forward_mentions_attention(cls)


def kind_hint(name: str, module: nn.Module, args: tuple, kwargs: dict[str, Any],
              kinds: list[tuple[str, str]],
              hints: tuple[str | None, str | None] | None = None) -> str | None:
    """``"self"``/``"cross"`` for a call of *module* (named *name*) when the rules say so before it runs, else None.

    ``kinds`` are the user's ``(pattern, kind)`` overrides; ``hints`` what :func:`static_kind_hints` gave for the
    module before (else worked out here). The rule on a projected second tensor is decided
    while the call runs (:func:`other_sequences`); None leaves the decision to that rule and the attention path.
    """
    before, after = static_kind_hints(name, module, kinds) if hints is None else hints
    if before is not None:
        return before
    if kwargs and any(kwargs.get(k) is not None for k in _CROSS_KWARGS):
        return "cross"
    return after


def static_kind_hints(name: str, module: nn.Module, kinds: list[tuple[str, str]]) -> tuple[str | None, str | None]:
    """The rules of :func:`kind_hint` that do not depend on the call: ``(before, after)``, the hint of the rules
    that come before the keyword-argument rule (the user's ``kinds``, ``is_cross_attention``) and of those after
    it (the module's name and class). Capture works them out once per module, not once per call."""
    for pattern, kind in kinds:
        if within(name, pattern):
            return kind, None
    if getattr(module, "is_cross_attention", False):
        return "cross", None
    last = name.rsplit(".", 1)[-1].lower()
    if any(key in last for key in _CROSS_NAME) or "EncDec" in type(module).__name__:
        return None, "cross"
    return None, None


def other_sequences(module: nn.Module, args: tuple) -> tuple[torch.Tensor, ...]:
    """Floating tensor arguments after the first with the first's width: candidates for another sequence.

    The call is cross-attention when a child module of *module* consumes one of them (a key/value projection
    of a context); a tensor only added back (a residual) or a helper's ``q, k, v`` never is.
    """
    if isinstance(module, nn.MultiheadAttention):
        return ()
    tensors = [a for a in args if isinstance(a, torch.Tensor) and a.is_floating_point()]
    if len(tensors) < 2:
        return ()
    first = tensors[0]
    if first.is_nested or first.layout != torch.strided:
        return ()
    return tuple(o for o in tensors[1:] if o is not first and not o.is_nested and o.layout == torch.strided
                 and o.dim() == first.dim() and o.dim() >= 2 and o.shape[-1] == first.shape[-1]
                 and o.data_ptr() != first.data_ptr())


#: the argument name of the mask an attention module adds to its scores (HF transformers' eager attention)
MASK_ARGUMENT = "attention_mask"


@functools.lru_cache(maxsize=256)
def _mask_position(cls: type) -> int | None:
    """Index of ``attention_mask`` among the positional arguments of ``cls.forward`` (after self), or None."""
    try:
        params = list(inspect.signature(cls.forward).parameters.values())[1:]
    except (TypeError, ValueError):
        return None
    for i, p in enumerate(params):
        if p.kind not in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD):
            return None
        if p.name == MASK_ARGUMENT:
            return i
    return None


def mask_argument(module: nn.Module, args: tuple, kwargs: dict[str, Any]) -> torch.Tensor | None:
    """The floating ``attention_mask`` an attention module is called with (keyword or positional), else None.

    HF eager attention adds it to the scores before its softmax; the softmax path reads the forbidden keys off
    it (one small ``(B or 1, 1, Tq, Tk)`` tensor shared by every layer) instead of off every head's scores. Bool
    and integer masks are left out: their conventions differ (True allows a key in HF, forbids it in torch's MHA).
    """
    mask = kwargs.get(MASK_ARGUMENT)
    if mask is None and args:
        i = _mask_position(type(module))
        mask = args[i] if i is not None and i < len(args) else None
    if isinstance(mask, torch.Tensor) and mask.is_floating_point() and mask.layout == torch.strided \
            and not mask.is_nested:
        return mask
    return None


def head_count(module: nn.Module) -> int | None:
    """The number of query heads *module* declares (``num_heads``, ``n_head``, ``config.num_attention_heads``, ...)."""
    for holder in (module, getattr(module, "config", None)):
        for attr in _HEAD_ATTRS:
            value = getattr(holder, attr, None)
            if isinstance(value, int) and not isinstance(value, bool) and value > 0:
                return value
    return None


def module_label(name: str, model: nn.Module | None = None) -> str:
    """A module's name for messages: its dotted path, or ``<root ClassName>`` for the model itself."""
    if name:
        return name
    return f"<root {type(model).__name__}>" if model is not None else "<root>"


def owners(named: list[tuple[str, nn.Module]], attention: set[str]) -> tuple[dict[str, str], frozenset[str]]:
    """Owner of every module's calls, and the helpers (see the table above).

    ``named`` is ``model.named_modules()`` (first name of each module), ``attention`` the attention modules.
    Returns ``({module name: owner name}, helpers)``; modules outside every attention module have no owner.
    """
    weighted: set[str] = set()  # modules that hold a parameter (their own or a child's), tied ones included
    for pname, _ in named[0][1].named_parameters(remove_duplicate=False):
        parts = pname.split(".")[:-1]
        weighted.update(".".join(parts[:i]) for i in range(len(parts) + 1))
    helpers = {a for a in attention if a not in weighted and _enclosing(a, attention) is not None}
    blocks = attention - helpers
    owner: dict[str, str] = {}
    for name, _ in named:
        best = name if name in blocks else _enclosing(name, blocks)
        if best is None:
            continue
        # only weight-free helpers speak for a block: a child with weights of its own (a router, an MLP)
        # computes something else, whatever it normalises
        child = (best + "." if best else "") + name[len(best) + 1 if best else 0:].split(".")[0]
        if name == best or child not in weighted:
            owner[name] = best
    return owner, frozenset(helpers)


def _enclosing(name: str, among: set[str]) -> str | None:
    """The innermost strict ancestor of *name* in *among* (the root ``""`` included), or None."""
    while name:
        name = name.rsplit(".", 1)[0] if "." in name else ""
        if name in among:
            return name
    return None
