"""Deterministic training of the demo models, and the measures their tests and reports use.

Every run is seeded (initial weights from ``torch.manual_seed``, each step's batch drawn by the task's own
``random.Random`` with a per-step seed), single-threaded, with ``torch.use_deterministic_algorithms(True)``.

How close a rerun comes: on the same torch build and CPU kind, ``python examples/train_demo_models.py``
reproduces the shipped checkpoints bit for bit, weights and files alike (checked on torch 2.13.0+cpu,
x86-64). On another torch build or CPU, kernels may round differently and the differences grow over
training, so the weights will not match exactly; the models should still pass their tests' thresholds
(not checked on other builds).

>>> from attnscope.demo import training
>>> report = training.train_all("/tmp/demo-checkpoints", names=["decoder_only"])  # doctest: +SKIP
>>> report["decoder_only"]["generation_accuracy"]  # doctest: +SKIP
1.0
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn

from attnscope.demo import heads_specimen, shipped, task
from attnscope.errors import OptionError, suggest

__all__ = [
    "Settings",
    "SETTINGS",
    "deterministic",
    "lm_generation_accuracy",
    "lm_loss",
    "seq2seq_exact_match",
    "seq2seq_loss",
    "train",
    "train_all",
]

#: Seeds of the evaluation examples in the training report; the tests use other seeds.
REPORT_SEED = 777


@dataclass(frozen=True)
class Settings:
    """How one demo model is trained."""

    seed: int  # seeds the model's initial weights
    steps: int  # optimiser steps
    batch: int = 64  # examples per step, freshly generated from the train split
    lr: float = 3e-3  # peak learning rate of AdamW
    warmup: int = 200  # linear warm-up steps, then cosine decay to a tenth of the peak
    data_seed: int = 1_000_000  # step s draws its batch with seed data_seed + s
    guide: float = 0.0  # seq2seq only: weight of the guided-alignment loss on the model's GUIDED_HEAD


#: The settings the shipped checkpoints were trained with (``heads_specimen`` is cut from ``decoder_only``
#: and healed for its own number of steps; see :mod:`attnscope.demo.heads_specimen`).
SETTINGS: dict[str, Settings] = {
    # post-LN wants a gentler peak and a longer warm-up than pre-LN (the point of Xiong et al. 2020)
    "seq2seq_post_ln": Settings(seed=11, steps=1500, lr=1e-3, warmup=400, guide=0.5),
    "seq2seq_pre_ln": Settings(seed=12, steps=1500, lr=3e-3, warmup=200, guide=0.5),
    # the same seed, data and steps for both: the twins differ in their mask alone
    "decoder_only": Settings(seed=13, steps=2000),
    "decoder_only_leaky": Settings(seed=13, steps=2000),
    "heads_specimen": Settings(seed=14, steps=600, lr=1e-3, warmup=50, data_seed=2_000_000),
}


@contextmanager
def deterministic(threads: int = 1) -> Iterator[None]:
    """Run a block single-threaded with deterministic kernels; restores both settings afterwards."""
    old_threads = torch.get_num_threads()
    old_det = torch.are_deterministic_algorithms_enabled()
    old_warn = torch.is_deterministic_algorithms_warn_only_enabled()
    torch.set_num_threads(threads)
    torch.use_deterministic_algorithms(True)
    try:
        yield
    finally:
        torch.use_deterministic_algorithms(old_det, warn_only=old_warn)
        torch.set_num_threads(old_threads)


def guided_head_weights(model: nn.Module, src: torch.Tensor, tgt_in: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Logits of a seq2seq demo model and the cross-attention weights of its last decoder layer.

    The weights are recomputed from the inputs the layer's ``multihead_attn`` received (seen by a forward
    pre-hook that is removed at once): ``nn.MultiheadAttention`` is called again with ``need_weights=True``;
    the pre-LN :class:`~attnscope.demo.seq2seq_pre_ln.SDPAttention` gets ``softmax(QKᵀ/√d)`` from its own
    projections. Both keep the autograd graph, for the guided-alignment loss.

    Returns:
        ``(logits, weights)``: ``(B, Tt, V)`` and ``(B, H, Tt, Ts)``.
    """
    attn = model.transformer.decoder.layers[-1].multihead_attn
    seen: dict[str, tuple] = {}

    def grab(module: nn.Module, args: tuple, kwargs: dict) -> None:
        seen["call"] = (args, kwargs)

    handle = attn.register_forward_pre_hook(grab, with_kwargs=True)
    try:
        logits = model(src, tgt_in)  # (B, Tt, V)
    finally:
        handle.remove()
    args, kwargs = seen["call"]
    if isinstance(attn, nn.MultiheadAttention):
        _, weights = attn(*args, **{**kwargs, "need_weights": True, "average_attn_weights": False})
    else:
        x, context, allowed = args
        q = attn.split_heads(attn.q_proj(x))  # (B, H, Tt, D/H)
        k = attn.split_heads(attn.k_proj(context))  # (B, H, Ts, D/H)
        scores = q @ k.transpose(-1, -2) / math.sqrt(q.shape[-1])  # (B, H, Tt, Ts)
        weights = scores.masked_fill(~allowed, float("-inf")).softmax(-1)
    return logits, weights  # (B, Tt, V), (B, H, Tt, Ts)


def seq2seq_loss(model: nn.Module, examples: Sequence[task.Example], guide: float = 0.0) -> torch.Tensor:
    """Mean teacher-forced cross-entropy over the pick-path tokens (padding ignored).

    With ``guide > 0`` adds ``guide`` times the guided-alignment loss (Garg et al. 2019, "Jointly Learning to
    Align and Translate with Transformer Models"): the mean of ``-log w`` of the model's
    ``GUIDED_HEAD`` at each output token's aligned source token (:mod:`attnscope.demo.task`).
    """
    src, tgt_in, tgt_out = task.seq2seq_batch(examples)
    if guide <= 0:
        logits = model(src, tgt_in)  # (B, Tt, V)
        return F.cross_entropy(logits.transpose(1, 2), tgt_out, ignore_index=task.VOCAB.pad_id)
    logits, weights = guided_head_weights(model, src, tgt_in)  # (B, Tt, V), (B, H, Tt, Ts)
    loss = F.cross_entropy(logits.transpose(1, 2), tgt_out, ignore_index=task.VOCAB.pad_id)
    align = task.pad_batch([e.alignment for e in examples], pad_id=-1)  # (B, Tt), -1 past the <eos>
    valid = align >= 0  # (B, Tt)
    head = weights[:, model.GUIDED_HEAD[1]]  # (B, Tt, Ts)
    picked = head.gather(-1, align.clamp(min=0)[..., None])[..., 0]  # (B, Tt)
    return loss - guide * torch.log(picked[valid] + 1e-9).mean()


def lm_loss(model: nn.Module, examples: Sequence[task.Example]) -> torch.Tensor:
    """Mean teacher-forced next-token cross-entropy over the whole sequence, label included (padding ignored).

    The label's digits are random, so a model that cannot see the future has a floor well above zero here.
    """
    ids, _ = task.lm_batch(examples)
    logits = model(ids[:, :-1])  # (B, T-1, V)
    return F.cross_entropy(logits.transpose(1, 2), ids[:, 1:], ignore_index=task.VOCAB.pad_id)


@torch.no_grad()
def seq2seq_exact_match(model: nn.Module, examples: Sequence[task.Example]) -> float:
    """Share of examples whose greedy decoding equals the pick path exactly (up to its ``<eos>``)."""
    src, _, _ = task.seq2seq_batch(examples)
    out = model.generate(src)  # (B, N)
    hits = [task.VOCAB.decode(row[: len(e.target)]) == list(e.target) for row, e in zip(out, examples)]
    return sum(hits) / len(examples)


@torch.no_grad()
def lm_generation_accuracy(model: nn.Module, examples: Sequence[task.Example]) -> float:
    """Share of examples whose greedy continuation of ``<bos> label ;`` is the pick path exactly."""
    hits = 0
    by_len: dict[int, list[task.Example]] = {}
    for e in examples:
        by_len.setdefault(len(e.source), []).append(e)
    for group in by_len.values():  # equal prompt lengths, so no padding inside a prompt
        ids, prompt_len = task.lm_batch(group)
        out = model.generate(ids[:, : int(prompt_len[0])])  # (B, N)
        hits += sum(task.VOCAB.decode(row[: len(e.target)]) == list(e.target) for row, e in zip(out, group))
    return hits / len(examples)


def _schedule(settings: Settings) -> Callable[[int], float]:
    def factor(step: int) -> float:
        if step < settings.warmup:
            return (step + 1) / settings.warmup
        progress = (step - settings.warmup) / max(1, settings.steps - settings.warmup)
        return 0.1 + 0.45 * (1 + math.cos(math.pi * min(1.0, progress)))

    return factor


def train(
    model: nn.Module,
    loss_fn: Callable[[nn.Module, Sequence[task.Example]], torch.Tensor],
    settings: Settings,
    after_step: Callable[[nn.Module], None] | None = None,
) -> list[float]:
    """Train *model* in place with AdamW on freshly generated batches; returns the loss of every step.

    The model is left in eval mode. Run it inside :func:`deterministic` for repeatable results.

    Args:
        model: a demo model, already initialised.
        loss_fn: :func:`seq2seq_loss` or :func:`lm_loss`.
        settings: steps, batch, learning rate, data seeds.
        after_step: called with the model after each optimiser step (the heads specimen re-applies its cuts).
    """
    opt = torch.optim.AdamW(model.parameters(), lr=settings.lr, weight_decay=0.0)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, _schedule(settings))
    losses = []
    model.train()
    for step in range(settings.steps):
        loss = loss_fn(model, task.make_examples(settings.batch, seed=settings.data_seed + step))
        opt.zero_grad(set_to_none=True)
        loss.backward()
        nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        opt.step()
        sched.step()
        if after_step is not None:
            with torch.no_grad():
                after_step(model)
        losses.append(loss.item())
    model.eval()
    return losses


def _report(name: str, model: nn.Module, losses: list[float], seconds: float) -> dict[str, float]:
    examples = task.make_examples(1000, seed=REPORT_SEED, split="held_out")
    out = {"seconds": round(seconds, 1), "final_train_loss": round(sum(losses[-50:]) / 50, 4)}
    with torch.no_grad():
        if name.startswith("seq2seq"):
            out["exact_match"] = seq2seq_exact_match(model, examples)
            out["teacher_forced_loss"] = round(float(seq2seq_loss(model, examples)), 4)
        else:
            out["generation_accuracy"] = lm_generation_accuracy(model, examples)
            out["teacher_forced_loss"] = round(float(lm_loss(model, examples)), 4)
    return out


def train_one(name: str, base: nn.Module | None = None) -> tuple[nn.Module, dict[str, float]]:
    """Train the demo model *name* with :data:`SETTINGS`; returns it (eval mode) and a report.

    Args:
        name: one of :data:`SETTINGS`.
        base: for ``"heads_specimen"`` only, the trained ``decoder_only`` model to cut (trained here if None).
    """
    if name not in SETTINGS:
        raise OptionError(f"expected a demo model name, one of {sorted(SETTINGS)}; received {name!r}."
                          + suggest(name, SETTINGS))
    settings = SETTINGS[name]
    if name == "heads_specimen" and base is None:
        base, _ = train_one("decoder_only")
    start = time.perf_counter()
    with deterministic():
        torch.manual_seed(settings.seed)
        if name == "heads_specimen":
            model = heads_specimen.cut(base)
            losses = train(model, lm_loss, settings, after_step=heads_specimen.recut)
        elif name.startswith("seq2seq"):
            model = shipped.build(name)
            losses = train(model, lambda m, ex: seq2seq_loss(m, ex, settings.guide), settings)
        else:
            model = shipped.build(name)
            losses = train(model, lm_loss, settings)
        report = _report(name, model, losses, time.perf_counter() - start)
    return model, report


def train_all(out_dir: str | Path | None = None, names: Sequence[str] | None = None) -> dict[str, dict[str, float]]:
    """Retrain the demo models and write their checkpoints; returns each model's report.

    Args:
        out_dir: where to write ``<name>.safetensors``; default the package's own ``checkpoints/`` folder.
        names: which models; default all of :data:`SETTINGS` (``heads_specimen`` reuses ``decoder_only`` when
            both are asked for).
    """
    reports = {}
    trained: dict[str, nn.Module] = {}
    for name in names or list(SETTINGS):
        model, report = train_one(name, base=trained.get("decoder_only"))
        trained[name] = model
        # no timings in the file, so a rerun on the same build writes byte-identical checkpoints
        measured = {k: v for k, v in report.items() if k != "seconds"}
        meta = {"settings": asdict(SETTINGS[name]), "report": measured, "torch": torch.__version__}
        shipped.save(model, name, out_dir, meta)
        reports[name] = report
    return reports
