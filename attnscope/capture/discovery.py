"""Find, before any forward runs, where a model keeps its attention and its transformer blocks.

What counts as an attention module or a block is decided by :mod:`attnscope.capture.rules` (its docstring is
the table); this module walks the model once and applies those rules.
"""

from __future__ import annotations

from dataclasses import dataclass

from torch import nn

from attnscope.capture.rules import NN_LAYERS, is_attention_module

__all__ = ["ModelMap", "is_attention_module", "map_model"]


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
        if isinstance(module, NN_LAYERS):
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
