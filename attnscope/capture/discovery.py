"""Find, before any forward runs, where a model keeps its attention and its transformer blocks.

Attention is found three ways, and a module found any way is an *attention module*:

* instances of ``nn.MultiheadAttention``;
* modules whose class name says attention (``...Attention``, ``...Attn...``), as HF and most hand-written code name them;
* modules whose ``forward`` source calls ``scaled_dot_product_attention``, ``softmax`` or :func:`attnscope.tap`.

Blocks (whose outputs are the residual stream) are ``nn.TransformerEncoderLayer`` / ``nn.TransformerDecoderLayer``
and the elements of any ``nn.ModuleList`` whose elements each hold an attention module below them.
"""

from __future__ import annotations

import functools
import inspect
import re
from dataclasses import dataclass

from torch import nn

__all__ = ["ModelMap", "map_model"]

_ATTN_CLASS = re.compile(r"attention|attn", re.IGNORECASE)
_ATTN_SOURCE = re.compile(r"scaled_dot_product_attention|softmax\(|\btap\(")
_NN_LAYERS = (nn.TransformerEncoderLayer, nn.TransformerDecoderLayer)


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
    if isinstance(module, (nn.ModuleList, nn.ModuleDict, nn.Sequential)):
        return False
    return bool(_ATTN_CLASS.search(cls.__name__)) or _forward_mentions_attention(cls)


@dataclass(frozen=True)
class ModelMap:
    """Names of a model's modules, its attention modules and its blocks, found statically.

    Fields:
        names: module id -> dotted name ("" for the root).
        attention: dotted names of attention modules, in registration order.
        leaves: the attention modules that hold no other attention module (what ``layers=[0, 1]`` indexes).
        blocks: dotted names of transformer blocks.
        seq_first: names of blocks whose outputs are ``(T, B, D)`` (``batch_first=False`` torch layers).
    """

    names: dict[int, str]
    attention: tuple[str, ...]
    leaves: tuple[str, ...]
    blocks: tuple[str, ...]
    seq_first: frozenset[str]


def map_model(model: nn.Module) -> ModelMap:
    """Walk *model* once and return its :class:`ModelMap`."""
    named = list(model.named_modules(remove_duplicate=False))
    names: dict[int, str] = {}
    for name, module in named:
        names.setdefault(id(module), name)
    attention = [name for name, m in named if names[id(m)] == name and is_attention_module(m)]
    attn_set = set(attention)

    def holds_attention_below(prefix: str) -> bool:
        lead = prefix + "." if prefix else ""
        return any(a.startswith(lead) and a != prefix for a in attn_set)

    leaves = tuple(a for a in attention if not holds_attention_below(a))
    blocks: list[str] = []
    seq_first: set[str] = set()
    for name, module in named:
        if names[id(module)] != name:
            continue
        if isinstance(module, _NN_LAYERS):
            blocks.append(name)
            if not module.self_attn.batch_first:
                seq_first.add(name)
        elif isinstance(module, nn.ModuleList) and len(module) > 0:
            children = [f"{name}.{i}" if name else str(i) for i in range(len(module))]
            if all(holds_attention_below(c) for c in children):
                blocks.extend(c for c in children if c not in blocks)
    order = {name: i for i, (name, _) in enumerate(named)}
    blocks = sorted(set(blocks), key=order.__getitem__)
    return ModelMap(names=names, attention=tuple(attention), leaves=leaves, blocks=tuple(blocks),
                    seq_first=frozenset(seq_first))
