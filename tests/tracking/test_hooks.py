"""Tracking inside real (tiny) training runs of transformers' Trainer and Lightning, written to TensorBoard.

References: the trainer's own ``state.log_history`` (which steps it logged), the event files TensorBoard's own
reader (``EventAccumulator``) reads back, and an untracked run of the same Trainer (bit for bit).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

import attnscope
from attnscope.tracking.hooks import lightning_callback, tensorboard_tag, to_tensorboard, trainer_callback
from track_runs import batches, loss_of, mha_stack

pytestmark = pytest.mark.slow


def _scalars(log_dir) -> dict[str, list[tuple[int, float]]]:
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    acc = EventAccumulator(str(log_dir), size_guidance={"scalars": 0})
    acc.Reload()
    return {tag: [(e.step, e.value) for e in acc.Scalars(tag)] for tag in acc.Tags()["scalars"]}


# ------------------------------------------------------------------------------------------------ transformers
def _hf_run(tmp_path, callbacks):
    from transformers import GPT2Config, GPT2LMHeadModel, Trainer, TrainingArguments

    torch.manual_seed(0)
    config = GPT2Config(vocab_size=32, n_positions=16, n_embd=16, n_layer=2, n_head=2, attn_pdrop=0.1,
                        resid_pdrop=0.1, embd_pdrop=0.1)
    model = GPT2LMHeadModel(config)
    g = torch.Generator().manual_seed(1)
    data = [{"input_ids": ids, "labels": ids} for ids in torch.randint(0, 32, (24, 10), generator=g)]
    args = TrainingArguments(output_dir=str(tmp_path / "out"), max_steps=6, logging_steps=2,
                             per_device_train_batch_size=4, gradient_accumulation_steps=2, learning_rate=1e-3,
                             report_to=[], save_strategy="no", use_cpu=True, disable_tqdm=True, seed=0,
                             dataloader_num_workers=0)
    trainer = Trainer(model=model, args=args, train_dataset=data, callbacks=callbacks)
    trainer.train()
    return trainer, model


def test_trainer_callback_records_the_logging_steps_and_changes_nothing(tmp_path):
    from torch.utils.tensorboard import SummaryWriter

    _, plain = _hf_run(tmp_path / "plain", [])
    writer = SummaryWriter(log_dir=str(tmp_path / "tb"))
    cb = trainer_callback(writer=writer, path=tmp_path / "run.jsonl")
    trainer, model = _hf_run(tmp_path / "tracked", [cb])
    writer.close()
    logged = [e["step"] for e in trainer.state.log_history if "loss" in e]  # the trainer's own record
    assert logged == [2, 4, 6]
    assert [s.step for s in cb.tracker.steps] == logged
    table = cb.tracker.table()
    assert set(table["name"]) == {"transformer.h.0.attn", "transformer.h.1.attn"}
    # two micro-batches of 4 sequences x 10 positions merged into each recorded step
    assert (table["rows"] == 2 * 4 * 10).all()
    assert attnscope.load(tmp_path / "run.jsonl").table().equals(table)
    for a, b in zip(plain.parameters(), model.parameters()):  # reference: the same Trainer run untracked
        assert torch.equal(a, b)
    got = _scalars(tmp_path / "tb")
    row = table.iloc[3]
    tag = tensorboard_tag("attention", "entropy_ratio", row["name"], row["head"])
    series = [v for s, v in got[tag] if s == row["step"]]
    assert series == [pytest.approx(row["entropy_ratio"], rel=1e-6)]  # event files store float32
    assert [s for s, _ in got[tag]] == [2, 4, 6]


# ------------------------------------------------------------------------------------------------ Lightning
# Lightning 2.6's own notes, not ours: torch's pytree deprecation inside Lightning, and its advice on loaders
@pytest.mark.filterwarnings("ignore:`isinstance\\(treespec, LeafSpec\\)` is deprecated:FutureWarning")
@pytest.mark.filterwarnings("ignore:The 'train_dataloader' does not have many workers")
def test_lightning_callback_records_every_nth_step_and_writes_tensorboard(tmp_path):
    import lightning.pytorch as pl
    from lightning.pytorch.loggers import TensorBoardLogger

    class Module(pl.LightningModule):
        def __init__(self):
            super().__init__()
            self.net = mha_stack()

        def training_step(self, batch, batch_idx):
            x, y = batch
            return loss_of(self.net, "mha", x, y)

        def configure_optimizers(self):
            return torch.optim.Adam(self.parameters(), lr=1e-3)

    data = batches("mha", 7)
    loader = torch.utils.data.DataLoader(data, batch_size=None)
    module = Module()
    cb = lightning_callback(every=2, tensorboard=True)
    trainer = pl.Trainer(max_steps=7, accelerator="cpu", devices=1, logger=TensorBoardLogger(str(tmp_path)),
                         callbacks=[cb], enable_checkpointing=False, enable_progress_bar=False,
                         enable_model_summary=False, log_every_n_steps=1)
    trainer.fit(module, loader)
    assert [s.step for s in cb.tracker.steps] == [0, 2, 4, 6]
    table = cb.tracker.table()
    assert set(table["name"]) == {"net.0.layers.0.self_attn", "net.0.layers.1.self_attn"}
    trainer.logger.experiment.flush()
    got = _scalars(trainer.logger.log_dir)
    res = cb.tracker.residual_table()
    for name, part in res.groupby("name"):
        series = got[tensorboard_tag("residual", "residual_norm", name)]
        assert [s for s, _ in series] == [0, 2, 4, 6]
        np.testing.assert_allclose([v for _, v in series], part["residual_norm"], rtol=1e-6)
    assert [s for s, _ in got["alerts/count"]] == [0, 2, 4, 6]


def test_tensorboard_options_fail_at_the_door():
    tr = attnscope.track(mha_stack())
    with pytest.raises(attnscope.OptionError, match="entropy_ratio"):
        to_tensorboard(tr, object(), statistics=("entropy_ration",))
    with pytest.raises(attnscope.OptionError, match="add_scalar"):
        to_tensorboard(tr, object())
    with pytest.raises(attnscope.OptionError, match="logging_steps"):
        trainer_callback(every=3)
