"""Dotted module-name patterns: one meaning in every ``layers=``, ``blocks=``, ``kinds=``, ``causal=`` option.

``*`` and ``?`` stay within one dotted part, ``**`` crosses dots; anything else matches itself. Options that
*select* (``layers=``, ``kinds=``, ``causal=``) take a module and everything inside it, as the module's
attention is inside it: ``"decoder.*"`` selects ``decoder.layers.1.self_attn`` through ``decoder.layers``.
``blocks=`` names modules exactly.

>>> name_matches("decoder.layers.1.self_attn", "decoder.layers.*.self_attn")
True
>>> name_matches("decoder.layers.1.self_attn", "decoder.*")
False
>>> within("decoder.layers.1.self_attn", "decoder.*")
True
>>> name_matches("decoder.layers.1.self_attn", "decoder.**")
True
"""

from __future__ import annotations

import functools
import re
from collections.abc import Iterable, Sequence
from typing import TypeVar

from attnscope.errors import OptionError, suggest

__all__ = ["matching", "name_matches", "select_by_name", "within"]

T = TypeVar("T")


@functools.lru_cache(maxsize=256)
def _pattern(pattern: str) -> re.Pattern:
    out = []
    for part in re.split(r"(\*\*|\*|\?)", pattern):
        out.append({"**": ".*", "*": "[^.]*", "?": "[^.]"}.get(part, re.escape(part)))
    return re.compile("".join(out) + r"\Z")


def name_matches(name: str, pattern: str) -> bool:
    """Whether dotted module *name* matches *pattern*."""
    return _pattern(pattern).match(name) is not None


def within(name: str, pattern: str) -> bool:
    """Whether *pattern* matches *name* or one of its enclosing modules (a dotted prefix of it)."""
    parts = name.split(".") if name else [""]
    return any(name_matches(".".join(parts[:i]), pattern) for i in range(len(parts), 0, -1))


def matching(names: Iterable[str], pattern: str) -> list[str]:
    """The *names* that *pattern* matches, in their order."""
    return [n for n in names if name_matches(n, pattern)]


def select_by_name(items: Sequence[T], patterns: str | Sequence[str] | None, option: str = "layers=",
                   what: str = "recorded attention module") -> list[T]:
    """The items (anything with a ``.name``) inside a module matching one of *patterns*; None keeps all.

    A pattern that matches nothing is an :class:`~attnscope.errors.OptionError` with close-match suggestions.
    """
    if patterns is None:
        return list(items)
    patterns = [patterns] if isinstance(patterns, str) else list(patterns)
    names = sorted({getattr(i, "name") for i in items})
    for p in patterns:
        if not isinstance(p, str):
            raise OptionError(f"{option} takes module-name patterns; received {p!r}")
        if not any(within(n, p) for n in names):
            raise OptionError(f"{option} names {p!r}, which matches no {what}.{suggest(p, names)}")
    return [i for i in items if any(within(getattr(i, "name"), p) for p in patterns)]
