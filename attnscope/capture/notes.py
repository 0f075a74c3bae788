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
_local = threading.local()  # per thread: {name: the open notes' list of calls}


def noting(name: str):
    """The wrapper of ``F.<name>`` (one per name): calls the original, notes ``(args, kwargs, result)``."""
    with _lock:
        if name not in _wrappers:
            original = getattr(F, name)
            _originals.setdefault(name, original)

            def wrapper(*args, **kwargs):
                out = _originals[name](*args, **kwargs)
                calls = getattr(_local, "calls", {}).get(name)
                if calls is not None:
                    calls.append((args, kwargs, out))
                return out

            wrapper.__name__ = wrapper.__qualname__ = f"noting_{name}"
            wrapper.__doc__ = f"``F.{name}`` while a :class:`CallNotes` of it is open (attnscope)."
            _wrappers[name] = wrapper
        return _wrappers[name]


class CallNotes:
    """While open, ``calls`` lists ``(args, kwargs, result)`` of every ``F.<name>`` call this thread makes."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.calls: list[tuple[tuple, dict, Any]] = []
        self._outer: list | None = None

    def __enter__(self) -> "CallNotes":
        wrapper = noting(self.name)
        with _lock:
            if _users.get(self.name, 0) == 0:
                current = getattr(F, self.name)
                if current is not wrapper:
                    _originals[self.name] = current
                setattr(F, self.name, wrapper)
            _users[self.name] = _users.get(self.name, 0) + 1
        if not hasattr(_local, "calls"):
            _local.calls = {}
        self._outer = _local.calls.get(self.name)
        _local.calls[self.name] = self.calls
        return self

    def __exit__(self, *exc) -> None:
        _local.calls[self.name] = self._outer
        with _lock:
            _users[self.name] -= 1
            if _users[self.name] == 0:
                setattr(F, self.name, _originals[self.name])
