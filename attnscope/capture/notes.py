"""Notes of the calls torch makes, by name, to a function of :mod:`torch.nn.functional` while one call runs.

``nn.MultiheadAttention`` reaches its softmax (math path) or its ``scaled_dot_product_attention`` (fused
path) from inside ``F.multi_head_attention_forward``. A torch function mode cannot see those inner calls: torch
leaves the mode that routed ``multi_head_attention_forward`` to capture for as long as that call runs. Both
are looked up by name in :mod:`torch.nn.functional`, so for the call's duration the name holds a thin wrapper
(:func:`noting`) that calls the original and notes its arguments and result in the calling thread.

The wrapper goes in with the first thread to open a :class:`CallNotes` of that name and out with the last; calls
from other threads meanwhile run the original unchanged and are not noted (:func:`noting` wrappers that a
torch function mode may be handed instead of the original are listed in the paths' ``FUNCS``).
"""

from __future__ import annotations

import threading
from typing import Any

import torch.nn.functional as F

__all__ = ["CallNotes", "noting"]

_lock = threading.Lock()
_users: dict[str, int] = {}
_originals: dict[str, Any] = {}
_wrappers: dict[str, Any] = {}
_local = threading.local()  # per thread: open = {name: (the open notes' list of calls, replace or None)}


def noting(name: str):
    """The wrapper of ``F.<name>`` (one per name): calls the original, notes ``(args, kwargs, result)``."""
    with _lock:
        if name not in _wrappers:
            original = getattr(F, name)
            _originals.setdefault(name, original)

            def wrapper(*args, **kwargs):
                entry = getattr(_local, "open", {}).get(name)  # (calls, replace) of this thread's open notes
                if entry is None:
                    return _originals[name](*args, **kwargs)
                calls, replace = entry
                out = (replace or _originals[name])(*args, **kwargs)
                calls.append((args, kwargs, out))
                return out

            wrapper.__name__ = wrapper.__qualname__ = f"noting_{name}"
            wrapper.__doc__ = f"``F.{name}`` while a :class:`CallNotes` of it is open (attnscope)."
            _wrappers[name] = wrapper
        return _wrappers[name]


class CallNotes:
    """While open, ``calls`` lists ``(args, kwargs, result)`` of every ``F.<name>`` call this thread makes.

    With *replace*, this thread's calls run ``replace(*args, **kwargs)`` instead of the original (capture computing
    an attention call itself).
    """

    def __init__(self, name: str, replace=None) -> None:
        self.name = name
        self.replace = replace
        self.calls: list[tuple[tuple, dict, Any]] = []
        self._outer: tuple | None = None

    def __enter__(self) -> "CallNotes":
        wrapper = noting(self.name)
        with _lock:
            if _users.get(self.name, 0) == 0:
                current = getattr(F, self.name)
                if current is not wrapper:
                    _originals[self.name] = current
                setattr(F, self.name, wrapper)
            _users[self.name] = _users.get(self.name, 0) + 1
        if not hasattr(_local, "open"):
            _local.open = {}
        self._outer = _local.open.get(self.name)
        _local.open[self.name] = (self.calls, self.replace)
        return self

    def __exit__(self, *exc) -> None:
        if self._outer is None:
            _local.open.pop(self.name, None)
        else:
            _local.open[self.name] = self._outer
        with _lock:
            _users[self.name] -= 1
            if _users[self.name] == 0:
                setattr(F, self.name, _originals[self.name])
