"""Dependency patterns: which input positions each output position may depend on, as bool tensors.

A *pattern* is a bool tensor ``(T, T)`` (one for every batch item) or ``(B, T, T)`` (one per item, e.g.
packed rows whose documents differ); ``pattern[..., i, j]`` is True when output position ``i`` may depend
on input position ``j``. The builders here are plain functions returning such tensors; combine them with
:func:`all_of` (intersection) and :func:`any_of` (union). :func:`pattern_from_predicate` evaluates a
predicate in torch FlexAttention's ``mask_mod`` convention, ``(b, h, q_idx, kv_idx) -> bool``.

Patterns describe a function's outputs against its inputs, so they compose across layers: causal,
document and prefix patterns are closed under stacking (two causal layers are causal), a window is not:
``L`` layers of a window of ``w`` keys reach ``L·(w − 1) + 1`` positions (the ``layers=`` of
:func:`window_pattern`). To check the per-layer window itself, probe one block on hidden states.

>>> window_pattern(5, 2).int()                       # the query itself and 1 key before it
tensor([[1, 0, 0, 0, 0],
        [1, 1, 0, 0, 0],
        [0, 1, 1, 0, 0],
        [0, 0, 1, 1, 0],
        [0, 0, 0, 1, 1]], dtype=torch.int32)
>>> documents_pattern(torch.tensor([0, 0, 1, 1])).int()[3]   # position 3 sees its own document only
tensor([0, 0, 1, 1], dtype=torch.int32)
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import torch

from attnscope.errors import OptionError, ShapeError

__all__ = [
    "all_of",
    "any_of",
    "as_pattern",
    "causal_pattern",
    "documents_pattern",
    "pattern_from_predicate",
    "prefix_pattern",
    "window_pattern",
]


def _length(T: Any, what: str = "T") -> int:
    if isinstance(T, bool) or not isinstance(T, int) or T < 1:
        raise OptionError(f"expected {what} to be a positive int (number of positions); got {T!r}")
    return T


def causal_pattern(T: int) -> torch.Tensor:
    """``(T, T)``: output ``i`` may depend on inputs ``j <= i``.

    >>> causal_pattern(3).int().tolist()
    [[1, 0, 0], [1, 1, 0], [1, 1, 1]]
    """
    T = _length(T)
    return torch.ones(T, T, dtype=torch.bool).tril()


def window_pattern(T: int, window: int, *, layers: int = 1) -> torch.Tensor:
    """``(T, T)``: a causal sliding window of ``window`` keys, the query itself plus the ``window − 1`` before it.

    With ``layers=L`` the pattern is what ``L`` stacked layers of that window reach:
    ``0 <= i − j <= L·(window − 1)``, i.e. ``L·(window − 1) + 1`` positions. ``window=1`` is the diagonal.

    >>> window_pattern(6, 3, layers=2)[5].int().tolist()   # 2 layers of 3 keys reach 2·2 + 1 = 5 positions
    [0, 1, 1, 1, 1, 1]
    """
    T = _length(T)
    if isinstance(window, bool) or not isinstance(window, int) or window < 1:
        raise OptionError(f"expected window to be a positive int (keys per query, the query included); "
                          f"got {window!r}")
    if isinstance(layers, bool) or not isinstance(layers, int) or layers < 1:
        raise OptionError(f"expected layers to be a positive int; got {layers!r}")
    pos = torch.arange(T)
    gap = pos[:, None] - pos[None, :]  # (T, T): i − j
    return (gap >= 0) & (gap <= layers * (window - 1))


def documents_pattern(doc_ids: Any, *, causal: bool = True) -> torch.Tensor:
    """Packed documents from per-position document ids: causal inside each document, nothing across.

    ``doc_ids`` of shape ``(T,)`` gives ``(T, T)``; ``(B, T)`` gives ``(B, T, T)`` (rows packed differently).
    With ``causal=False`` every position sees its whole document (an encoder over packed rows).

    >>> documents_pattern([[0, 0, 1]]).int().tolist()
    [[[1, 0, 0], [1, 1, 0], [0, 0, 1]]]
    """
    ids = torch.as_tensor(doc_ids)
    if ids.dim() not in (1, 2) or ids.shape[-1] < 1 or ids.is_floating_point() or ids.dtype == torch.bool:
        raise ShapeError(f"expected integer document ids of shape (T,) or (B, T); got {ids.dtype} "
                         f"{tuple(ids.shape)}")
    same = ids[..., :, None] == ids[..., None, :]  # (..., T, T)
    return same & causal_pattern(ids.shape[-1]) if causal else same


def prefix_pattern(T: int, prefix: int | Sequence[int]) -> torch.Tensor:
    """Prefix-LM: every output may depend on the first ``prefix`` inputs (bidirectional there), causal after.

    ``prefix`` may be one int, giving ``(T, T)``, or one length per batch item, giving ``(B, T, T)``.

    >>> prefix_pattern(4, 2).int().tolist()
    [[1, 1, 0, 0], [1, 1, 0, 0], [1, 1, 1, 0], [1, 1, 1, 1]]
    """
    T = _length(T)
    lengths = torch.as_tensor(prefix)
    if lengths.dim() > 1 or lengths.is_floating_point() or lengths.dtype == torch.bool \
            or bool((lengths < 0).any()) or bool((lengths > T).any()):
        raise OptionError(f"expected prefix to be an int in 0..{T} or one such int per batch item; got {prefix!r}")
    pos = torch.arange(T)
    seen = pos[None, :] < lengths.reshape(-1, 1, 1)  # (N, 1, T)
    out = seen | causal_pattern(T)  # (N, T, T)
    return out[0] if lengths.dim() == 0 else out


def _combine(patterns: tuple[Any, ...], op: Callable[[torch.Tensor, torch.Tensor], torch.Tensor],
             what: str) -> torch.Tensor:
    if not patterns:
        raise OptionError(f"{what}() needs at least one pattern")
    tensors = [torch.as_tensor(p) for p in patterns]
    for k, t in enumerate(tensors):
        if t.dtype != torch.bool or t.dim() not in (2, 3) or t.shape[-1] != t.shape[-2]:
            raise ShapeError(f"expected each pattern as a bool (T, T) or (B, T, T) tensor; pattern {k} is "
                             f"{t.dtype} {tuple(t.shape)}")
    sizes = {t.shape[-1] for t in tensors}
    if len(sizes) > 1:
        raise ShapeError(f"expected patterns over the same number of positions; got T = {sorted(sizes)}")
    out = tensors[0]
    try:
        for t in tensors[1:]:
            out = op(out, t)
    except RuntimeError as err:
        raise ShapeError(f"patterns of different batch sizes: {[tuple(t.shape) for t in tensors]}") from err
    return out


def all_of(*patterns: Any) -> torch.Tensor:
    """Intersection: a dependence is allowed only where every pattern allows it (batch axes broadcast).

    >>> all_of(causal_pattern(3), window_pattern(3, 2)).int().tolist()
    [[1, 0, 0], [1, 1, 0], [0, 1, 1]]
    """
    return _combine(patterns, torch.logical_and, "all_of")


def any_of(*patterns: Any) -> torch.Tensor:
    """Union: a dependence is allowed where any pattern allows it (batch axes broadcast).

    >>> any_of(window_pattern(4, 2), documents_pattern([0, 0, 0, 1])).int()[2].tolist()   # window or same doc
    [1, 1, 1, 0]
    """
    return _combine(patterns, torch.logical_or, "any_of")


def pattern_from_predicate(mask_mod: Callable[..., Any], T: int, B: int = 1) -> torch.Tensor:
    """Evaluate a FlexAttention-convention predicate ``(b, h, q_idx, kv_idx) -> bool`` into ``(B, T, T)``.

    ``h`` is passed as 0 (a dependency pattern has no heads). The predicate is first called once on
    broadcast index tensors ``b (B, 1, 1)``, ``q_idx (1, T, 1)``, ``kv_idx (1, 1, T)``; if that fails or
    gives the wrong shape, it is mapped over scalar index tensors with ``torch.vmap`` as FlexAttention does.

    >>> pattern_from_predicate(lambda b, h, q, kv: q >= kv, 3)[0].int().tolist()
    [[1, 0, 0], [1, 1, 0], [1, 1, 1]]
    """
    T, B = _length(T), _length(B, "B")
    if not callable(mask_mod):
        raise OptionError(f"expected a predicate (b, h, q_idx, kv_idx) -> bool; got {type(mask_mod).__name__}")
    b = torch.arange(B).view(B, 1, 1)
    q = torch.arange(T).view(1, T, 1)
    kv = torch.arange(T).view(1, 1, T)
    h = torch.zeros((), dtype=torch.long)
    try:
        out = torch.as_tensor(mask_mod(b, h, q, kv))
        if out.dtype == torch.bool:
            return out.expand(B, T, T).clone()
    except Exception:  # noqa: BLE001 - a predicate written for scalar indices: fall back to vmap below
        pass
    try:
        f = torch.vmap(torch.vmap(torch.vmap(lambda bi, qi, ki: mask_mod(bi, h, qi, ki), (None, None, 0)),
                                  (None, 0, None)), (0, None, None))
        out = f(torch.arange(B), torch.arange(T), torch.arange(T))  # (B, T, T)
    except Exception as err:
        raise OptionError(f"the predicate could not be evaluated on index tensors: {type(err).__name__}: "
                          f"{err}") from err
    if out.dtype != torch.bool or tuple(out.shape) != (B, T, T):
        raise ShapeError(f"expected the predicate to return bools; it gave {out.dtype} {tuple(out.shape)}")
    return out


def as_pattern(allowed: Any, T: int, B: int) -> torch.Tensor:
    """Normalise a pattern (bool ``(T, T)`` / ``(B, T, T)`` tensor, or a predicate) to a bool ``(B, T, T)`` tensor.

    >>> as_pattern(causal_pattern(4), T=4, B=2).shape
    torch.Size([2, 4, 4])
    """
    if callable(allowed) and not isinstance(allowed, torch.Tensor):
        return pattern_from_predicate(allowed, T, B)
    if not isinstance(allowed, torch.Tensor):
        try:
            allowed = torch.as_tensor(allowed)
        except (TypeError, ValueError, RuntimeError) as err:
            raise OptionError(f"expected allowed as a bool tensor (T, T) or (B, T, T), or a predicate "
                              f"(b, h, q_idx, kv_idx) -> bool; got {type(allowed).__name__}") from err
    if allowed.dtype != torch.bool:
        raise ShapeError(f"expected allowed as a bool tensor (True: output i may depend on input j); got dtype "
                         f"{allowed.dtype} (compare with a value to make one, e.g. mask == 0)")
    allowed = allowed.detach().cpu()
    if allowed.dim() == 2 and tuple(allowed.shape) == (T, T):
        return allowed.expand(B, T, T).clone()
    if allowed.dim() == 3 and tuple(allowed.shape) == (B, T, T):
        return allowed.clone()
    if allowed.dim() == 3 and tuple(allowed.shape) == (1, T, T):
        return allowed.expand(B, T, T).clone()
    raise ShapeError(f"expected allowed of shape (T, T) = ({T}, {T}) or (B, T, T) = ({B}, {T}, {T}) for x with "
                     f"B={B}, T={T}; got {tuple(allowed.shape)}")
