"""Find, before any forward runs, where a model keeps its attention and its transformer blocks.

What counts as an attention module or a block is decided by :mod:`attnscope.capture.rules` (its docstring is
the table); this module walks the model once and applies those rules.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass, field
from typing import Any

from torch import nn

from attnscope.capture.rules import CONTAINERS, NN_LAYERS, is_attention_module, owners

__all__ = ["ModelMap", "is_attention_module", "map_model", "walk"]


@dataclass(frozen=True)
class ModelMap:
    """Names of a model's modules, its attention modules and its blocks, found statically.

    Fields:
        names: module id -> dotted name ("" for the root).
        attention: dotted names of attention modules, in registration order.
        leaves: the attention modules that hold no other attention module (what ``layers=[0, 1]`` indexes).
        blocks: dotted names of transformer blocks.
        seq_first: names of blocks whose outputs are ``(T, B, D)`` (``batch_first=False`` torch layers).
        owner: module name -> the attention module its calls are recorded under (modules inside attention
            modules only; see :func:`attnscope.capture.rules.owners`).
        helpers: parameter-free attention modules inside another one; their calls go to their owner.
        hints: (module name, the capture's ``kinds``) -> :func:`attnscope.capture.rules.static_kind_hints`,
            filled in by captures as modules run (the map is kept while the model's layout is unchanged).
    """

    names: dict[int, str]
    attention: tuple[str, ...]
    leaves: tuple[str, ...]
    blocks: tuple[str, ...]
    seq_first: frozenset[str]
    owner: dict[str, str] = field(default_factory=dict)
    helpers: frozenset[str] = frozenset()
    hints: dict[tuple, tuple[str | None, str | None]] = field(default_factory=dict, compare=False, repr=False)


#: model -> (its layout when mapped, its map): a capture per forward walks the model once, not the rules per module
_maps: weakref.WeakKeyDictionary[nn.Module, tuple[tuple, ModelMap]] = weakref.WeakKeyDictionary()


def walk(model: nn.Module) -> tuple[list[tuple[str, nn.Module]], tuple]:
    """*model*'s modules and its layout, in one walk of the module tree.

    Returns ``(named, layout)``: ``named`` is what ``model.named_modules()`` gives (each module once, under its
    first name, depth first in registration order); ``layout`` is everything :func:`map_model` reads off the
    model, per module: its identity, class, child names, names of the parameters it holds itself, the
    ``batch_first`` flag an ``nn.MultiheadAttention`` carries and an ``is_cross_attention`` flag. Equal layouts
    give equal maps; a module added, removed, replaced or given a parameter changes the layout.
    """
    named: list[tuple[str, nn.Module]] = []
    key: list[Any] = []
    seen: set[int] = set()
    stack: list[tuple[str, nn.Module]] = [("", model)]
    while stack:
        name, m = stack.pop()
        if id(m) in seen:
            continue
        seen.add(id(m))
        named.append((name, m))
        children = m._modules
        attrs = m.__dict__
        key.append((id(m), type(m), tuple(children), tuple(k for k, p in m._parameters.items() if p is not None),
                    attrs.get("batch_first"), attrs.get("is_cross_attention")))
        lead = name + "." if name else ""
        stack.extend((lead + k, c) for k, c in reversed(children.items()) if c is not None)
    return named, tuple(key)


def map_model(model: nn.Module, layout: tuple | None = None) -> ModelMap:
    """The :class:`ModelMap` of *model*: worked out once per layout (see :func:`walk`; a caller that walked the
    model already passes its *layout*), then looked up."""
    key = walk(model)[1] if layout is None else layout
    hit = _maps.get(model)
    if hit is not None and hit[0] == key:
        return hit[1]
    found = _map_model(model)
    _maps[model] = (key, found)
    return found


def _map_model(model: nn.Module) -> ModelMap:
    """Walk *model* once and return its :class:`ModelMap`."""
    named = list(model.named_modules(remove_duplicate=False))
    names: dict[int, str] = {}
    for name, module in named:
        names.setdefault(id(module), name)
    first = [(name, m) for name, m in named if names[id(m)] == name]
    found = [name for name, m in first if is_attention_module(m)]
    owner, helpers = owners(first, set(found))
    attention = [a for a in found if a not in helpers]
    attn_set = set(attention)

    def holds_attention_below(prefix: str) -> bool:
        lead = prefix + "." if prefix else ""
        return any(a.startswith(lead) and a != prefix for a in attn_set)

    leaves = tuple(a for a in attention if not holds_attention_below(a))
    candidates: set[str] = set()
    seq_first: set[str] = set()
    for name, module in first:
        if isinstance(module, NN_LAYERS):
            candidates.add(name)
            if not module.self_attn.batch_first:
                seq_first.add(name)
        elif isinstance(module, CONTAINERS):
            for child_name, child in module.named_children():
                full = f"{name}.{child_name}" if name else child_name
                if not isinstance(child, CONTAINERS) and holds_attention_below(full):
                    candidates.add(full)
    # A candidate that holds a stack of blocks (torch's layers, or two or more sibling candidates that are not
    # attention modules themselves) is a model or a wrapper around one, not a block: Sequential(encoder, head).
    # Otherwise a block inside another block is part of it (T5's attention sub-layers): the outermost count.
    def stacked(d: str) -> bool:
        if d in attn_set or d in helpers:
            return False
        if isinstance(modules[d], NN_LAYERS):
            return True
        parent = d.rsplit(".", 1)[0] if "." in d else ""
        return any(s != d and s not in attn_set and s not in helpers
                   and (s.rsplit(".", 1)[0] if "." in s else "") == parent for s in candidates)

    modules = dict(first)
    wrappers = {c for c in candidates if any(d.startswith(c + ".") and stacked(d) for d in candidates)}
    kept = candidates - wrappers
    blocks = [c for c in kept if not any(o != c and (o == "" or c.startswith(o + ".")) for o in kept)]
    order = {name: i for i, (name, _) in enumerate(named)}
    blocks = sorted(set(blocks), key=order.__getitem__)
    return ModelMap(names=names, attention=tuple(attention), leaves=leaves, blocks=tuple(blocks),
                    seq_first=frozenset(seq_first), owner=owner, helpers=helpers)
