"""Tracking inside the usual training frameworks, and TensorBoard output. Each framework is imported lazily.

* :func:`trainer_callback` — a transformers ``TrainerCallback`` that records only the trainer's logging steps
  (the model arrives as the ``model`` keyword of the callback events; recording opens in ``on_step_begin`` of
  a step that will log and closes in its ``on_step_end``, so gradient-accumulation micro-batches merge).
* :func:`lightning_callback` — a Lightning ``Callback`` recording from ``on_train_batch_start`` to
  ``on_train_batch_end`` on every *every*-th global step.
* :func:`to_tensorboard` — writes each recorded step through ``SummaryWriter.add_scalar``, one tag per head and
  statistic (``attention/entropy_ratio/blocks.3.attn/h5``) and per block (``residual/residual_norm/blocks.3``),
  plain Python floats; not ``add_scalars``, which makes one run directory per key.

Needs the ``train`` extra (``pip install "attnscope[train]"``) for Lightning and TensorBoard; transformers
comes with the ``examples``/``test`` extras.

>>> import torch, attnscope
>>> from attnscope.tracking.hooks import to_tensorboard
>>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
>>> tr = attnscope.track(layer, every=1)
>>> written = []
>>> class Writer:                                      # anything with add_scalar(tag, value, step)
...     def add_scalar(self, tag, value, step): written.append((tag, value, step))
>>> stop = to_tensorboard(tr, Writer(), statistics=("entropy_ratio",), residual=(), alerts=False)
>>> with tr.step(0):
...     _ = layer(torch.randn(1, 3, 16))
>>> sorted(tag for tag, _, _ in written)
['attention/entropy_ratio/self_attn/h0', 'attention/entropy_ratio/self_attn/h1']
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

from attnscope.errors import OptionError, suggest
from attnscope.tracking.session import BLOCK_COLUMNS, HEAD_COLUMNS, Tracker, track

__all__ = ["DEFAULT_SCALARS", "lightning_callback", "tensorboard_tag", "to_tensorboard", "trainer_callback"]

#: Head statistics written to TensorBoard by default.
DEFAULT_SCALARS = ("entropy_ratio", "max_weight", "sink_mass", "output_norm")
_DEFAULT_RESIDUAL = ("residual_norm", "massive_ratio")


def tensorboard_tag(prefix: str, statistic: str, name: str, head: int | None = None) -> str:
    """``prefix/statistic/name/hN`` (or ``.../name`` for a block); the root module ``""`` is written ``model``."""
    tag = f"{prefix}/{statistic}/{name or 'model'}"
    return tag if head is None else f"{tag}/h{head}"


def to_tensorboard(tracker: Tracker, writer: Any, *, statistics: Sequence[str] = DEFAULT_SCALARS,
                   residual: Sequence[str] = _DEFAULT_RESIDUAL, prefix: str = "attention",
                   alerts: bool = True) -> Callable[[], None]:
    """Write every step *tracker* records from now on to *writer* (a ``torch.utils.tensorboard.SummaryWriter``).

    Args:
        tracker: from :func:`attnscope.track`.
        writer: anything with ``add_scalar(tag, value, global_step)``.
        statistics: head-table columns to write, one tag per (statistic, module, head).
        residual: block columns to write under ``residual/``.
        prefix: first part of the head tags.
        alerts: also write ``alerts/count`` (alerts raised at this step).

    Returns:
        A function that stops writing. Under ``torch.distributed`` only rank 0 writes.
    """
    for s in statistics:
        if s not in HEAD_COLUMNS:
            raise OptionError(f"statistics= names {s!r}, not a head column.{suggest(s, HEAD_COLUMNS)}")
    for s in residual:
        if s not in BLOCK_COLUMNS:
            raise OptionError(f"residual= names {s!r}, not a block column.{suggest(s, BLOCK_COLUMNS)}")
    if not callable(getattr(writer, "add_scalar", None)):
        raise OptionError(f"writer must have add_scalar(tag, value, step); received {type(writer).__name__}")

    def write(tr: Tracker, stats: Any) -> None:
        if not tr._is_writer():
            return
        for row in stats.heads:
            for s in statistics:
                value = float(row[s])
                if math.isfinite(value):
                    writer.add_scalar(tensorboard_tag(prefix, s, row["name"], row["head"]), value, stats.step)
        for row in stats.blocks:
            for s in residual:
                value = float(row[s])
                if math.isfinite(value):
                    writer.add_scalar(tensorboard_tag("residual", s, row["name"]), value, stats.step)
        if alerts:
            count = sum(1 for a in tr.alerts() if a.step == stats.step)
            writer.add_scalar("alerts/count", float(count), stats.step)

    return tracker.listen(write)


# ------------------------------------------------------------------------------------------------ transformers
_trainer_class: Any = None


def trainer_callback(*, writer: Any = None, **options: Any) -> Any:
    """A transformers ``TrainerCallback`` that tracks the trained model on the trainer's logging steps.

    ``trainer = Trainer(..., callbacks=[attnscope.tracking.hooks.trainer_callback(path="run.jsonl")])``;
    after training, ``callback.tracker`` holds the run. A step is recorded when the trainer will log it
    (``logging_strategy="steps"``: every ``logging_steps``-th optimizer step, and step 1 with
    ``logging_first_step``), the rule of the trainer's own flow callback, decided before the step's forward.

    Args:
        writer: a ``SummaryWriter`` to write each recorded step to (see :func:`to_tensorboard`).
        options: passed to :func:`attnscope.track` (``path``, ``layers``, ``rules``, ...; not ``every``).
    """
    global _trainer_class
    if "every" in options:
        raise OptionError("trainer_callback records the trainer's logging steps; set logging_steps in "
                          "TrainingArguments instead of every=")
    if _trainer_class is None:
        from transformers import TrainerCallback

        class TrackingCallback(TrainerCallback):
            """Records the trainer's logging steps with :func:`attnscope.track` (see :func:`trainer_callback`)."""

            def __init__(self, writer: Any, options: dict[str, Any]) -> None:
                self.tracker: Tracker | None = None
                self._writer = writer
                self._options = options
                self._open: Any = None

            def on_train_begin(self, args, state, control, model=None, **kwargs):
                if self.tracker is None:
                    if model is None:
                        raise OptionError("the trainer passed no model to the callback")
                    self.tracker = track(model, every=1, **self._options)
                    if self._writer is not None:
                        to_tensorboard(self.tracker, self._writer)

            def on_step_begin(self, args, state, control, **kwargs):
                coming = state.global_step + 1
                logs = str(getattr(args.logging_strategy, "value", args.logging_strategy)) == "steps"
                every = state.logging_steps or args.logging_steps
                if logs and (coming % max(int(every), 1) == 0 or (coming == 1 and args.logging_first_step)):
                    self._open = self.tracker.step(coming)
                    self._open.__enter__()

            def on_step_end(self, args, state, control, **kwargs):
                self._close()

            def on_train_end(self, args, state, control, **kwargs):
                self._close()
                if self.tracker is not None:
                    self.tracker.close()

            def _close(self) -> None:
                ctx, self._open = self._open, None
                if ctx is not None:
                    ctx.__exit__(None, None, None)

        _trainer_class = TrackingCallback
    return _trainer_class(writer, options)


# ------------------------------------------------------------------------------------------------ Lightning
_lightning_class: Any = None


def lightning_callback(*, every: int = 10, tensorboard: bool | Any = False, **options: Any) -> Any:
    """A Lightning ``Callback`` that tracks the LightningModule on every *every*-th global step.

    ``pl.Trainer(callbacks=[cb := attnscope.tracking.hooks.lightning_callback(every=50)])``; ``cb.tracker``
    holds the run. With gradient accumulation only the first batch of a recorded optimizer step is recorded.

    Args:
        every: record global steps with ``step % every == 0``.
        tensorboard: ``True`` writes through the trainer's TensorBoard logger (``trainer.logger.experiment``),
            or pass a ``SummaryWriter``.
        options: passed to :func:`attnscope.track`.
    """
    global _lightning_class
    if _lightning_class is None:
        try:
            from lightning.pytorch import Callback
        except ImportError:  # the standalone package name
            from pytorch_lightning import Callback

        class TrackingLightningCallback(Callback):
            """Records every *every*-th global step with :func:`attnscope.track` (see :func:`lightning_callback`)."""

            def __init__(self, every: int, tensorboard: Any, options: dict[str, Any]) -> None:
                super().__init__()
                self.every = every
                self.tracker: Tracker | None = None
                self._tensorboard = tensorboard
                self._options = options
                self._open: Any = None
                self._last: int | None = None

            def on_fit_start(self, trainer, pl_module):
                if self.tracker is None:
                    self.tracker = track(pl_module, every=self.every, **self._options)
                    writer = self._tensorboard
                    if writer is True:
                        writer = getattr(trainer.logger, "experiment", None)
                        if not callable(getattr(writer, "add_scalar", None)):
                            raise OptionError("tensorboard=True needs the trainer's logger to be a TensorBoardLogger")
                    if writer:
                        to_tensorboard(self.tracker, writer)

            def on_train_batch_start(self, trainer, pl_module, batch, batch_idx):
                step = int(trainer.global_step)
                if step % self.every == 0 and step != self._last:
                    self._last = step
                    self._open = self.tracker.step(step)
                    self._open.__enter__()

            def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx):
                ctx, self._open = self._open, None
                if ctx is not None:
                    ctx.__exit__(None, None, None)

            def on_exception(self, trainer, pl_module, exception):
                ctx, self._open = self._open, None
                if ctx is not None:
                    ctx.__exit__(type(exception), exception, None)

            def on_fit_end(self, trainer, pl_module):
                if self.tracker is not None:
                    self.tracker.close()

        _lightning_class = TrackingLightningCallback
    if isinstance(every, bool) or not isinstance(every, int) or every < 1:
        raise OptionError(f"every must be a positive int; received {every!r}")
    return _lightning_class(every, tensorboard, options)
