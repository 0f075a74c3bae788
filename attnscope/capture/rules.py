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
``flex_attention(``, ``softmax(`` or
``tap(``
containers never count                   ``nn.ModuleList``/``nn.ModuleDict``/``nn.Sequential`` hold blocks, never compute
torch.nn's own classes are not read      their sources call softmax for other reasons
=======================================  ==========================================================================

Attention calls (per call; see :mod:`attnscope.capture.paths` for one module per path)

=======================================  ==========================================================================
path                                     seen as
=======================================  ==========================================================================
``mha``                                  ``F.multi_head_attention_forward``, run with per-head weights requested
``sdpa``                                 ``F.scaled_dot_product_attention``, weights recomputed beside the call
``softmax``                              a softmax over the last axis of a 4-D tensor inside an attention module
``tap``                                  :func:`attnscope.tap` called by the user's own code
``flex``                                 ``flex_attention``, weights recomputed from q, k, score_mod, block mask
=======================================  ==========================================================================

Self or cross (per call, first rule that applies; :func:`kind_hint`)

=======================================  ==========================================================================
rule                                     why
=======================================  ==========================================================================
the user's ``kinds=`` pattern            the user knows best
``module.is_cross_attention``            HF sets this flag on its cross-attention modules
a keyword argument that carries the      ``encoder_hidden_states``, ``key_value_states``, ``memory``, ``context``, ...
other sequence is given
a second floating tensor argument of     a block called as ``attn(x, context)``
the same width but other storage
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
elements of an ``nn.ModuleList`` whose   the stack of blocks of HF and most hand-written models
elements each hold an attention module
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

__all__ = ["CONTAINERS", "NN_LAYERS", "is_attention_module", "kind_hint"]

_ATTN_CLASS = re.compile(r"attention|attn", re.IGNORECASE)
_ATTN_SOURCE = re.compile(r"scaled_dot_product_attention|flex_attention\(|softmax\(|\btap\(")
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
    return bool(_ATTN_SOURCE.search(source))


def is_attention_module(module: nn.Module) -> bool:
    """Whether *module* is an attention module by the rules in this module's docstring."""
    if isinstance(module, nn.MultiheadAttention):
        return True
    cls = type(module)
    if isinstance(module, CONTAINERS):
        return False
    return bool(_ATTN_CLASS.search(cls.__name__)) or _forward_mentions_attention(cls)


def kind_hint(name: str, module: nn.Module, args: tuple, kwargs: dict[str, Any],
              kinds: list[tuple[str, str]]) -> str | None:
    """``"self"``/``"cross"`` for a call of *module* (named *name*) when the rules say so, else None.

    ``kinds`` are the user's ``(pattern, kind)`` overrides. None leaves the decision to the attention path.
    """
    for pattern, kind in kinds:
        if within(name, pattern):
            return kind
    if getattr(module, "is_cross_attention", False):
        return "cross"
    if any(kwargs.get(k) is not None for k in _CROSS_KWARGS):
        return "cross"
    tensors = [a for a in args if isinstance(a, torch.Tensor) and a.is_floating_point()]
    if len(tensors) >= 2 and not isinstance(module, nn.MultiheadAttention):
        first = tensors[0]
        for other in tensors[1:]:
            if (other is not first and other.dim() == first.dim() and other.dim() >= 3
                    and other.shape[-1] == first.shape[-1] and other.data_ptr() != first.data_ptr()):
                return "cross"
    last = name.rsplit(".", 1)[-1].lower()
    if any(key in last for key in _CROSS_NAME) or "EncDec" in type(module).__name__:
        return "cross"
    return None
