"""Calls a user's callable on perturbed copies of its input and measures how far each output position moved.

A *row* is one perturbed copy of the whole input ``x``: a boolean mask ``(B, T)`` says which positions of
which batch items get new content. :meth:`Runner.measure` evaluates many rows, several per call of ``fn``
(stacked along the batch axis) when ``fn`` accepts that, and keeps only a ``(B, T)`` array of changes per
row, so the probe's own memory is ``O(rows · B · T)`` whatever the model.

>>> import torch
>>> lin = torch.nn.Linear(4, 4)
>>> runner = Runner(lin, torch.randn(1, 3, 4), seq_dim=1, batch_dim=0, vocab_size=None, noise=1.0,
...                 seed=0, rows_per_call=8, max_bytes=2**20, model=lin, observed=None)
>>> rows = torch.tensor([[[False, False, True]]])      # (R, B, T): perturb position 2 only
>>> (runner.measure(rows)[0, 0] > 1e-4).tolist()        # a per-position map: only position 2 moves
[False, False, True]
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import torch
from torch import nn

from attnscope.errors import AttnscopeError, ProbeError, ShapeError

__all__ = ["Runner", "default_tolerance", "one_position_hint", "output_tensor"]

# Relative change below which two outputs count as equal. float32 sums over a few thousand terms in a
# different order differ by ~1e-6 of their scale; 1e-4 leaves a wide margin, yet any leak that carries
# information is far above it (a leak of the size of ordinary signal moves outputs by ~1e-1..1e0).
_TOLERANCE = {torch.float64: 1e-8, torch.float32: 1e-4, torch.float16: 2e-2, torch.bfloat16: 2e-2}


def default_tolerance(dtype: torch.dtype) -> float:
    """Relative change treated as numerical noise for outputs of *dtype* (1e-4 for float32)."""
    return _TOLERANCE.get(dtype, 1e-4)


def output_tensor(out: Any, what: str = "fn") -> torch.Tensor:
    """The tensor a probe compares: *out* itself, its ``.logits`` / ``.last_hidden_state``, or a tuple's first item.

    >>> output_tensor((torch.zeros(2), None)).shape
    torch.Size([2])
    """
    if isinstance(out, torch.Tensor):
        return out
    for attr in ("logits", "last_hidden_state"):
        value = out.get(attr) if isinstance(out, dict) else getattr(out, attr, None)
        if isinstance(value, torch.Tensor):
            return value
    if isinstance(out, (tuple, list)) and out and isinstance(out[0], torch.Tensor):
        return out[0]
    raise ProbeError(
        f"expected {what} to return a tensor, an object with .logits or .last_hidden_state, or a tuple "
        f"whose first item is a tensor; it returned {type(out).__name__}"
    )


def one_position_hint(shape: tuple[int, ...], T: int) -> str:
    """The message for a callable that returns only the last position, with a one-line fix."""
    return (f"fn returned one position only (shape {shape}) for an input of T={T} positions; the probe needs "
            f"the output at every position. Pass a callable that returns them all, e.g. "
            f"check_causal(lambda ids: model(ids, targets=ids)[0], ids) for a model that keeps every position "
            f"only when given targets")


class Runner:
    """Owns one probe's input, baseline output, random stream and call counters.

    The input is kept in canonical layout ``(B, T, ...)``; calls to ``fn`` get the user's own layout back.

    Args:
        fn: the callable under test.
        x: its input, token ids (integer dtype) or float features, with positions on *seq_dim*.
        seq_dim, batch_dim: where positions and batch items sit, in ``x`` and in ``fn``'s output alike.
        vocab_size: ids are replaced by other ids in ``[0, vocab_size)``; ``None`` finds it (see :meth:`_vocab`).
        noise: float inputs get Gaussian noise of ``noise`` times ``x``'s standard deviation.
        seed: seeds the perturbations (a private generator; the global torch RNG is not touched here).
        rows_per_call: most perturbed copies stacked into one call of ``fn``.
        max_bytes: fewer copies per call if their outputs alone would exceed this.
        model: the module behind ``fn``, or ``None``; used to find the vocabulary.
        observed: ``(B, T)`` bool of the output positions compared (``None``: all); sets the output scale.
    """

    def __init__(
        self,
        fn: Callable[[torch.Tensor], Any],
        x: torch.Tensor,
        *,
        seq_dim: int,
        batch_dim: int,
        vocab_size: int | None,
        noise: float,
        seed: int,
        rows_per_call: int,
        max_bytes: int,
        model: nn.Module | None,
        observed: torch.Tensor | None,
    ) -> None:
        self.fn = fn
        self.seq_dim, self.batch_dim = seq_dim, batch_dim
        self.x = x.detach().movedim((batch_dim, seq_dim), (0, 1))  # (B, T, ...)
        self.B, self.T = self.x.shape[0], self.x.shape[1]
        self.is_ids = not (x.is_floating_point() or x.is_complex())
        self.generator = torch.Generator().manual_seed(seed)
        self.forwards = 0
        self.sequences = 0
        self.batched = rows_per_call > 1
        self.embedding: nn.Embedding | None = None  # the nn.Embedding that consumes the ids, if found
        self.embedding_name: str | None = None

        self.y0 = self._baseline(model)  # (B, T, F)
        self.dtype = self.y0.dtype
        obs = torch.ones(self.B, self.T, dtype=torch.bool) if observed is None else observed
        finite = self.y0[obs.to(self.y0.device)].double()
        finite = finite[torch.isfinite(finite)]
        rms = float(finite.square().mean().sqrt()) if finite.numel() else 0.0
        self.scale = rms if rms > 0 else 1.0

        if self.is_ids:
            self.vocab = self._vocab(vocab_size, model)
        else:
            std = float(self.x.double().std()) if self.x.numel() > 1 else 0.0
            self.sigma = noise * (std if np.isfinite(std) and std > 0 else 1.0)
        row_bytes = self.y0.element_size() * self.y0.numel()
        self.rows_per_call = max(1, min(rows_per_call, max_bytes // max(1, 2 * row_bytes)))

    # -- calling fn --------------------------------------------------------------------------------------

    def to_user(self, xc: torch.Tensor) -> torch.Tensor:
        """Canonical ``(N, T, ...)`` back to the user's layout."""
        return xc.movedim((0, 1), (self.batch_dim, self.seq_dim))

    def call(self, xc: torch.Tensor, what: str = "a perturbed copy of x") -> torch.Tensor:
        """``fn`` on canonical input ``(N, T, ...)``; returns its output as ``(N, T, F)``."""
        n = xc.shape[0]
        self.forwards += 1
        self.sequences += n
        try:
            raw = self.fn(self.to_user(xc))
        except AttnscopeError:
            raise
        except Exception as err:
            raise ProbeError(f"fn raised on {what}: {type(err).__name__}: {err}") from err
        out = output_tensor(raw)
        if out.dim() > max(self.seq_dim, self.batch_dim) and out.shape[self.seq_dim] == 1 < self.T \
                and out.shape[self.batch_dim] == n:
            raise ShapeError(one_position_hint(tuple(out.shape), self.T))
        if out.dim() <= max(self.seq_dim, self.batch_dim) or out.shape[self.seq_dim] != self.T \
                or out.shape[self.batch_dim] != n:
            raise ShapeError(
                f"expected fn's output to have {n} batch items on dim {self.batch_dim} and T={self.T} "
                f"positions on seq_dim={self.seq_dim}, like its input; it returned shape {tuple(out.shape)}"
            )
        out = out.detach().movedim((self.batch_dim, self.seq_dim), (0, 1))
        return out.reshape(n, self.T, -1)  # (N, T, F)

    def _baseline(self, model: nn.Module | None) -> torch.Tensor:
        handles = []
        if self.is_ids and model is not None:
            def spot(module: nn.Module, args: tuple[Any, ...]) -> None:
                if self.embedding is None and args and isinstance(args[0], torch.Tensor) \
                        and args[0].shape == self.x_user_shape and torch.equal(args[0], self.x_user):
                    self.embedding = module  # type: ignore[assignment]

            self.x_user = self.to_user(self.x)
            self.x_user_shape = self.x_user.shape
            handles = [m.register_forward_pre_hook(spot) for m in model.modules() if isinstance(m, nn.Embedding)]
        try:
            y0 = self.call(self.x.clone(), "the unperturbed input x")
        finally:
            for h in handles:
                h.remove()
        if model is not None and self.embedding is not None:
            self.embedding_name = next(n for n, m in model.named_modules() if m is self.embedding)
        return y0

    def _vocab(self, vocab_size: int | None, model: nn.Module | None) -> int:
        """The number of ids to draw replacements from.

        In order: ``vocab_size``; the ``num_embeddings`` of the ``nn.Embedding`` that was called with ``x``
        itself during the baseline forward; the only ``nn.Embedding`` large enough for ``x``; ``x.max() + 1``
        when the model has no embedding at all.
        """
        top = int(self.x.max()) if self.x.numel() else 0
        if int(self.x.min()) < 0:
            raise ProbeError(f"expected token ids >= 0 in x; it holds {int(self.x.min())}")
        if vocab_size is not None:
            if vocab_size <= top:
                raise ProbeError(f"vocab_size={vocab_size} is too small for x, which holds id {top}")
            vocab = vocab_size
        elif self.embedding is not None:
            vocab = self.embedding.num_embeddings
        else:
            found = [] if model is None else [
                (n, m.num_embeddings) for n, m in model.named_modules()
                if isinstance(m, nn.Embedding) and m.num_embeddings > top
            ]
            if len({size for _, size in found}) > 1:
                listed = ", ".join(f"'{n}' ({size})" for n, size in found)
                raise ProbeError(
                    f"cannot tell the vocabulary size: x is integer, none of the model's embeddings was called "
                    f"with x itself, and several could take it: {listed}; pass vocab_size="
                )
            vocab = found[0][1] if found else top + 1
        if vocab < 2:
            raise ProbeError(
                f"cannot perturb token ids: x holds only id {top} and no vocabulary size is known; "
                f"pass vocab_size="
            )
        return vocab

    # -- perturbed rows ----------------------------------------------------------------------------------

    def perturb(self, masks: torch.Tensor) -> torch.Tensor:
        """Perturbed copies of x: *masks* ``(R, B, T)`` bool → canonical input ``(R·B, T, ...)``."""
        R = masks.shape[0]
        xs = self.x.unsqueeze(0).expand(R, *self.x.shape).clone()  # (R, B, T, ...)
        where = masks.reshape(*masks.shape, *([1] * (self.x.dim() - 2))).to(xs.device)  # (R, B, T, 1...)
        if self.is_ids:
            step = torch.randint(1, self.vocab, xs.shape, generator=self.generator).to(xs.device)
            xs = torch.where(where, (xs + step) % self.vocab, xs)
        else:
            kick = torch.randn(xs.shape, generator=self.generator, dtype=torch.float64) * self.sigma
            xs = torch.where(where, xs + kick.to(xs.dtype).to(xs.device), xs)
        return xs.reshape(R * self.B, *self.x.shape[1:])

    def change(self, y: torch.Tensor) -> np.ndarray:
        """Largest relative change per (batch item, position) of one copy's output ``(B, T, F)`` → ``(B, T)``."""
        base = self.y0
        d = (y - base).abs()
        same = (y == base) | (torch.isnan(y) & torch.isnan(base))
        d = torch.where(same, torch.zeros_like(d), d)
        d = torch.nan_to_num(d, nan=float("inf"))
        return (d.amax(dim=-1).double() / self.scale).cpu().numpy()  # (B, T)

    def measure(self, masks: torch.Tensor) -> np.ndarray:
        """Relative output change for each perturbed copy: *masks* ``(R, B, T)`` → ``(R, B, T)`` float64."""
        R = masks.shape[0]
        result = np.zeros((R, self.B, self.T))
        start = 0
        while start < R:
            stop = min(R, start + (self.rows_per_call if self.batched else 1))
            xs = self.perturb(masks[start:stop])
            for r, y in enumerate(self._outputs(xs, stop - start)):
                result[start + r] = self.change(y)
            start = stop
        return result

    def _outputs(self, xs: torch.Tensor, rows: int) -> list[torch.Tensor]:
        """Outputs ``(B, T, F)`` of each copy in *xs*; falls back to one copy per call if fn refuses a stack."""
        if rows > 1 and self.batched:
            try:
                y = self.call(xs)
                return list(y.reshape(rows, self.B, self.T, -1).unbind(0))
            except (ProbeError, ShapeError):  # fn closes over batch-sized tensors, or checks its batch
                self.batched = False
        return [self.call(xs[r * self.B:(r + 1) * self.B]) for r in range(rows)]

    def rerun_change(self) -> np.ndarray:
        """Run the unperturbed input again: relative change from the first run, ``(B, T)``."""
        return self.change(self.call(self.x.clone(), "the unperturbed input x"))
