"""The one error family of attnscope.

Every error the toolkit raises on purpose derives from :class:`AttnscopeError`, so a caller can catch
them all at once. Messages say what was expected, what was received, and use the caller's own names::

    AttnscopeError
    ├── OptionError          a bad argument or option (also a ValueError); unknown names get suggestions
    ├── ShapeError           a tensor, mask or token list of the wrong shape (also a ValueError)
    ├── CaptureError         capture could not do what was asked
    │   ├── NoAttentionError     the model has no attention, or the block ran none
    │   ├── CaptureStateError    a capture used outside its block, entered twice, or re-used
    │   ├── MemoryBudgetError    keeping the maps would exceed the memory budget
    │   └── UnsupportedModelError  a model kind capture cannot see into (scripted, meta device, ...)
    ├── ProbeError           a behavioural probe could not run on the given callable
    └── CaptureFileError     a file that is not a valid attnscope capture

Warnings use :class:`AttnscopeWarning`.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable

__all__ = [
    "AttnscopeError",
    "AttnscopeWarning",
    "CaptureError",
    "CaptureFileError",
    "CaptureStateError",
    "MemoryBudgetError",
    "NoAttentionError",
    "OptionError",
    "ProbeError",
    "ShapeError",
    "UnsupportedModelError",
    "suggest",
]


class AttnscopeError(Exception):
    """Base class of every error attnscope raises on purpose."""


class OptionError(AttnscopeError, ValueError):
    """A bad argument or option, found before anything was attached to a model."""


class ShapeError(AttnscopeError, ValueError):
    """A tensor, mask or label list whose shape does not fit what it is used with."""


class CaptureError(AttnscopeError):
    """Capture could not do what was asked."""


class NoAttentionError(CaptureError):
    """The model has no attention capture can find, or the block ran no attention call."""


class CaptureStateError(CaptureError):
    """A capture object used in a state that does not allow it (outside its block, re-used, ...)."""


class MemoryBudgetError(CaptureError, MemoryError):
    """Keeping the attention maps would go over the capture's memory budget."""


class UnsupportedModelError(CaptureError):
    """A model capture cannot see into: TorchScript, meta tensors, or a path that hides its attention."""


class ProbeError(AttnscopeError):
    """A behavioural probe (causality, padding) could not run on the callable it was given."""


class CaptureFileError(AttnscopeError):
    """A file that is not a valid attnscope capture: wrong format, version, truncated or tampered."""


class AttnscopeWarning(UserWarning):
    """Something worth knowing that did not stop the work (a missed module, a downsampled view)."""


def suggest(word: str, choices: Iterable[str], n: int = 3) -> str:
    """Return ``" Did you mean 'a' or 'b'?"`` for close matches of *word*, or ``""``.

    >>> suggest("layers.0.atn", ["layers.0.attn", "layers.1.attn"])
    " Did you mean 'layers.0.attn' or 'layers.1.attn'?"
    """
    close = difflib.get_close_matches(word, list(choices), n=n, cutoff=0.6)
    if not close:
        return ""
    quoted = [f"'{c}'" for c in close]
    joined = quoted[0] if len(quoted) == 1 else ", ".join(quoted[:-1]) + " or " + quoted[-1]
    return f" Did you mean {joined}?"
