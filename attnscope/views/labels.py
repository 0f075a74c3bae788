"""Which token string names each query, key and residual position in the views.

The ``tokens=`` argument of :func:`attnscope.dashboard` and :func:`attnscope.export_html` takes one of:

* ``None``: positions are named ``0, 1, 2, ...``;
* a list of str: one sequence, used for every batch item;
* a list of lists of str: one sequence per batch item;
* a dict naming the sequences of an encoder–decoder model, ``{"source": [...], "target": [...]}``
  (each value again a list or a list of lists). Cross-attention takes its queries from ``"target"`` and its keys
  from ``"source"``. A self-attention record or residual block whose dotted name has a part starting with
  ``enc`` takes ``"source"``, one starting with ``dec`` takes ``"target"``; any other takes the one sequence whose
  length fits. Keys of the dict may also be record or block names; their value is a sequence, a role
  (``"source"``/``"target"``) or a pair ``(queries, keys)`` of those, and wins over the rules above;
* a tokenizer-like callable with ``ids=`` given: ``tokens(list_of_ids) -> list of str`` (an object with
  ``convert_ids_to_tokens`` is called through that method), applied to each batch item of ``ids`` ``(B, T)``.

A sequence given for every item must be as long as some axis of the capture (the keys of a record, its queries
counted from position 0, or a residual block's positions), and one given per item no longer than the longest
(a shorter one is a padded item), or :meth:`TokenLabels.check_lengths` raises a ShapeError
naming the lengths expected: labels of the wrong length would put the wrong token under a weight. A sequence
longer than an axis of another record is cut to that axis (a query axis from ``query_offset`` on, for a step
with a key/value cache); a missing name is shown as its position. Labels are user data: the views escape them.

>>> lab = TokenLabels(["<s>", "a", "b"])
>>> lab.axis(None, 3, item=0)
['<s>', 'a', 'b']
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from attnscope.errors import OptionError, ShapeError

__all__ = ["TokenLabels"]

ROLES = ("source", "target")


def _is_str_list(x: Any) -> bool:
    return isinstance(x, (list, tuple)) and all(isinstance(t, str) for t in x)


def _per_item(given: Any, what: str) -> list[list[str]] | list[str]:
    """A sequence given as list of str (all items) or list of lists of str (one per item)."""
    if _is_str_list(given):
        return list(given)
    if isinstance(given, (list, tuple)) and all(_is_str_list(s) for s in given):
        return [list(s) for s in given]
    raise OptionError(f"{what}: expected a list of str or a list of lists of str, received {type(given).__name__}"
                      f"{'' if not isinstance(given, (list, tuple)) or not given else ' of ' + type(given[0]).__name__}")


def _role_of(name: str) -> str | None:
    for part in name.split("."):
        p = part.lower()
        if p.startswith("enc"):
            return "source"
        if p.startswith("dec"):
            return "target"
    return None


class TokenLabels:
    """Resolves the ``tokens=`` argument into the labels of each axis (see the module docstring).

    Args:
        tokens: see the module docstring.
        ids: ``(B, T)`` token ids (tensor, array or nested list), needed when *tokens* is callable.
        names: record and block names of the capture, used to check dict keys.
    """

    def __init__(self, tokens: Any = None, ids: Any = None, names: Sequence[str] = ()) -> None:
        self._one: list[str] | list[list[str]] | None = None
        self._roles: dict[str, Any] = {}
        self._named: dict[str, Any] = {}
        if tokens is None:
            return
        if isinstance(tokens, Mapping):
            for key, value in tokens.items():
                if key in ROLES:
                    self._roles[key] = _per_item(value, f"tokens[{key!r}]")
                elif key in names:
                    self._named[key] = value
                else:
                    from attnscope.errors import suggest

                    raise OptionError(f"tokens: key {key!r} is neither 'source', 'target' nor a record or block name"
                                      f" of the capture.{suggest(key, [*ROLES, *names])}")
            return
        if isinstance(tokens, (list, tuple)):
            self._one = _per_item(tokens, "tokens")
            return
        to_str = getattr(tokens, "convert_ids_to_tokens", None) or (tokens if callable(tokens) else None)
        if to_str is None:
            raise OptionError(f"tokens: expected None, a list of str, a dict or a tokenizer-like callable, "
                              f"received {type(tokens).__name__}")
        if ids is None:
            raise OptionError("tokens: a tokenizer-like callable needs the token ids too: pass ids=<(B, T) ids>")
        self._one = self._from_ids(to_str, ids)

    def check_lengths(self, axes: Mapping[int, str]) -> None:
        """Raise a ShapeError unless every given sequence is as long as one of *axes* (length -> description).

        >>> TokenLabels(["a", "b"]).check_lengths({3: "keys of 'attn'"})
        Traceback (most recent call last):
        ...
        attnscope.errors.ShapeError: tokens: a sequence of 2 strings fits no axis of the capture; expected 3 (keys of 'attn')
        """
        given: list[tuple[str, Any]] = []
        if self._one is not None:
            given.append(("tokens", self._one))
        given += [(f"tokens[{k!r}]", v) for k, v in self._roles.items()]
        for k, v in self._named.items():
            parts = v if isinstance(v, tuple) and len(v) == 2 else (v,)
            given += [(f"tokens[{k!r}]", _per_item(p, f"tokens[{k!r}]")) for p in parts
                      if not (isinstance(p, str) and p in ROLES)]
        expected = "; ".join(f"{n} ({d})" for n, d in sorted(axes.items()))
        longest = max(axes, default=0)
        for what, value in given:
            if value and isinstance(value[0], list):  # one per batch item: shorter ones are padded items
                for i, s in enumerate(value):
                    if len(s) > longest:
                        raise ShapeError(f"{what}[{i}]: a sequence of {len(s)} strings is longer than every axis of "
                                         f"the capture; expected at most {longest}: {expected}")
            elif len(value) not in axes:
                raise ShapeError(f"{what}: a sequence of {len(value)} strings fits no axis of the capture; "
                                 f"expected {expected}")

    @staticmethod
    def _from_ids(to_str: Callable[[list[int]], Sequence[str]], ids: Any) -> list[list[str]]:
        arr = np.asarray(ids.detach().cpu().numpy() if hasattr(ids, "detach") else ids)
        if arr.ndim == 1:
            arr = arr[None, :]
        if arr.ndim != 2:
            raise ShapeError(f"ids: expected (B, T) token ids, received shape {tuple(arr.shape)}")
        out = []
        for row in arr.tolist():
            names = [str(t) for t in to_str(row)]
            if len(names) != len(row):
                raise ShapeError(f"tokens: the callable returned {len(names)} strings for {len(row)} ids")
            out.append(names)
        return out

    @staticmethod
    def _pick(seq: Any, item: int) -> list[str] | None:
        if seq is None:
            return None
        if seq and isinstance(seq[0], list):
            return seq[item] if item < len(seq) else None
        return seq

    def _resolve(self, value: Any, item: int) -> list[str] | None:
        if isinstance(value, str) and value in ROLES:
            return self._pick(self._roles.get(value), item)
        return self._pick(_per_item(value, "tokens entry"), item)

    def _by_length(self, n: int, item: int) -> list[str] | None:
        fits = [s for s in (self._pick(v, item) for v in self._roles.values()) if s is not None and len(s) >= n]
        exact = [s for s in fits if len(s) == n]
        return exact[0] if len(exact) == 1 else (fits[0] if len(fits) == 1 else None)

    def sequence(self, name: str | None, axis: str, kind: str, n: int, item: int) -> list[str] | None:
        """The token sequence for one axis (``"q"``, ``"k"`` or ``"t"`` for residual positions), or None."""
        if self._one is not None:
            return self._pick(self._one, item)
        if name is not None and name in self._named:
            value = self._named[name]
            if isinstance(value, tuple) and len(value) == 2 and axis in ("q", "k"):
                value = value[0] if axis == "q" else value[1]
            return self._resolve(value, item)
        if not self._roles:
            return None
        if kind == "cross" and axis in ("q", "k"):
            return self._pick(self._roles.get("target" if axis == "q" else "source"), item)
        role = _role_of(name or "")
        if role is not None and role in self._roles:
            return self._pick(self._roles[role], item)
        return self._by_length(n, item)

    def axis(self, name: str | None, n: int, item: int, *, axis: str = "q", kind: str = "self",
             offset: int = 0) -> list[str]:
        """Labels of an axis of length *n*: tokens where known, the position (as str) elsewhere.

        Args:
            name: record or block name (for dict lookups), or None.
            n: axis length.
            item: batch item.
            axis: ``"q"`` queries, ``"k"`` keys, ``"t"`` residual positions.
            kind: ``"self"`` or ``"cross"``.
            offset: position of the axis' first element in the sequence (``query_offset`` for queries).
        """
        seq = self.sequence(name, axis, kind, n, item)
        out = [str(i + offset) for i in range(n)]
        if seq is not None:
            part = seq[offset:offset + n]
            out[:len(part)] = part
        return out

    def __repr__(self) -> str:
        form = "positions" if self._one is None and not self._roles and not self._named else (
            "one sequence" if self._one is not None else f"roles={sorted(self._roles)}, named={len(self._named)}")
        return f"TokenLabels({form})"
