"""attnscope.track: statistics over training steps that change nothing, checked against outside references.

References: torch's own ``nn.MultiheadAttention(need_weights=True, average_attn_weights=False)`` weights,
``scipy.stats.entropy`` per row, brute-force numpy (head outputs through the output projection, medians and
maxima of block outputs), and an untracked run of the same training loop (bit for bit).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy.stats import entropy
from torch import nn

import attnscope
from attnscope.errors import CaptureStateError, OptionError
from attnscope.tracking import AlertRules
from track_runs import HEADS, WIDTH, mha_stack, plant_collapse, sdpa_decoder, train

MAKERS = {"mha": mha_stack, "sdpa": sdpa_decoder}


def _attached(model: nn.Module) -> int:
    return sum(len(m._forward_hooks) + len(m._forward_pre_hooks) for m in model.modules())


# ------------------------------------------------------------------------------------------------ changes nothing
@pytest.mark.parametrize("kind,dropout", [("mha", 0.1), ("sdpa", 0.1), ("mha", 0.0)])
def test_tracking_leaves_losses_gradients_parameters_and_dropout_stream_bit_identical(kind, dropout):
    plain = train(MAKERS[kind](dropout), kind, 9)
    after_plain = torch.rand(4)  # the next numbers of the global stream: dropout drew the same amount
    model = MAKERS[kind](dropout)
    tr = attnscope.track(model, every=2)
    tracked = train(model, kind, 9, tr)
    after_tracked = torch.rand(4)
    assert len(tr.steps) == 5  # steps 0, 2, 4, 6, 8 were recorded (the comparison is not vacuous)
    # reference: the same loop without tracking, compared bit for bit
    for a, b in zip(plain[0], tracked[0]):
        assert torch.equal(a, b)
    for ga, gb in zip(plain[1], tracked[1]):
        assert all(torch.equal(x, y) for x, y in zip(ga, gb))
    assert all(torch.equal(x, y) for x, y in zip(plain[2], tracked[2]))
    assert torch.equal(after_plain, after_tracked)


def test_no_hook_mode_or_state_outside_a_recorded_step():
    model = mha_stack()
    before = _attached(model)
    tr = attnscope.track(model, every=2)
    x = torch.randn(2, 5, WIDTH)
    with tr.step(1):  # not recorded: nothing attached
        assert _attached(model) == before and torch._C._len_torch_function_stack() == 0
        model(x)
    with tr.step(2):  # recorded: the tracker's hooks and modes are on (so the check below can fail)
        assert _attached(model) > before and torch._C._len_torch_function_stack() == 2
        model(x)
    assert _attached(model) == before
    assert torch._C._len_torch_function_stack() == 0
    assert len(tr.steps) == 1
    with pytest.raises(RuntimeError, match="boom"):
        with tr.step(4):
            model(x)
            raise RuntimeError("boom")
    assert _attached(model) == before and torch._C._len_torch_function_stack() == 0
    assert [s.step for s in tr.steps] == [2]  # a step that raised records nothing


def test_statistics_take_no_part_in_autograd():
    """The tracked forward saves exactly the tensors for backward that the plain forward saves."""
    model = sdpa_decoder(dropout=0.0)
    ids = torch.randint(0, 16, (2, 6), generator=torch.Generator().manual_seed(0))

    def saved(fn) -> int:
        count = [0]

        def pack(t):
            count[0] += 1
            return t
        with torch.autograd.graph.saved_tensors_hooks(pack, lambda t: t):
            fn()
        return count[0]

    plain = saved(lambda: model(ids).sum())
    tr = attnscope.track(model, every=1)

    def tracked():
        with tr.step(0):
            model(ids).sum()
    assert saved(tracked) == plain
    assert len(tr.steps) == 1


# ------------------------------------------------------------------------------------------------ statistics
def test_head_statistics_match_scipy_on_torch_weights_and_brute_force_output_norms():
    torch.manual_seed(3)
    mha = nn.MultiheadAttention(WIDTH, HEADS, dropout=0.3, batch_first=True)
    x = torch.randn(3, 7, WIDTH)
    causal = torch.ones(7, 7, dtype=torch.bool).triu(1)  # MHA convention: True = may not attend
    tr = attnscope.track(mha, every=1)
    mha.train()
    with tr.step(0):
        out, _ = mha(x, x, x, attn_mask=causal, need_weights=False)
    out.sum().backward()
    table = tr.table()
    # reference: torch's own per-head weights (dropout off: the tracker describes the dropout-free maps)
    mha.eval()
    with torch.no_grad():
        _, w = mha(x, x, x, attn_mask=causal, need_weights=True, average_attn_weights=False)  # (B, H, Tq, Tk)
    w = w.double().numpy()
    for h in range(HEADS):
        row = table[table["head"] == h].iloc[0]
        ent = [entropy(w[b, h, q, : q + 1]) for b in range(3) for q in range(7)]  # scipy.stats.entropy per row
        assert row["entropy"] == pytest.approx(np.mean(ent), rel=1e-5)
        ratio = [entropy(w[b, h, q, : q + 1]) / math.log(q + 1) for b in range(3) for q in range(1, 7)]
        assert row["entropy_ratio"] == pytest.approx(np.mean(ratio), rel=1e-5)
        assert row["sink_mass"] == pytest.approx(w[:, h, :, 0].mean(), rel=1e-5)  # weight on the first key
        assert row["max_weight"] == pytest.approx(w[:, h].max(axis=-1).mean(), rel=1e-5)
    # reference: brute force in numpy, each head's α·v through its slice of W_O
    with torch.no_grad():
        wv = mha.in_proj_weight[2 * WIDTH:].double().numpy()
        bv = mha.in_proj_bias[2 * WIDTH:].double().numpy()
        wo = mha.out_proj.weight.double().numpy()
    v = x.double().numpy() @ wv.T + bv  # (B, Tk, D)
    dh = WIDTH // HEADS
    norms = []
    for h in range(HEADS):
        head_out = w[:, h] @ v[..., h * dh:(h + 1) * dh]  # (B, Tq, Dh)
        contrib = head_out @ wo[:, h * dh:(h + 1) * dh].T  # (B, Tq, D)
        norms.append(np.linalg.norm(contrib, axis=-1).mean())
    got = table.sort_values("head")
    np.testing.assert_allclose(got["output_norm"], norms, rtol=1e-5)
    others = [np.mean(np.delete(norms, h)) for h in range(HEADS)]
    np.testing.assert_allclose(got["output_relative"], np.array(norms) / others, rtol=1e-5)


def test_uniform_attention_has_entropy_ln_n():
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(WIDTH, HEADS, batch_first=True)
    with torch.no_grad():
        mha.in_proj_weight[:WIDTH] = 0.0
        mha.in_proj_bias[:WIDTH] = 0.0  # every query 0: every score equal
    tr = attnscope.track(mha, every=1)
    x = torch.randn(2, 6, WIDTH)
    with tr.step(0):
        mha(x, x, x)
    table = tr.table()
    # entropy of uniform attention over n keys = ln n (common practice, no source)
    np.testing.assert_allclose(table["entropy"], math.log(6), rtol=1e-6)
    np.testing.assert_allclose(table["entropy_ratio"], 1.0, rtol=1e-6)


def test_residual_norm_and_massive_ratio_match_brute_force():
    model = sdpa_decoder(dropout=0.0).train()
    ids = torch.randint(0, 16, (3, 8), generator=torch.Generator().manual_seed(0))
    seen = {}

    def keep(i):
        def hook(module, args, output):
            seen[i] = output.detach().numpy().copy()
        return hook
    handles = [model.blocks[i].register_forward_hook(keep(i)) for i in range(2)]
    tr = attnscope.track(model, every=1)
    try:
        with tr.step(0):
            model(ids)
    finally:
        for h in handles:
            h.remove()
    res = tr.residual_table().set_index("name")
    for i in range(2):
        h = np.abs(seen[i].reshape(-1, WIDTH).astype(np.float64))  # brute force: numpy over each hidden state
        assert res.loc[f"blocks.{i}", "residual_norm"] == pytest.approx(np.linalg.norm(h, axis=-1).mean(), rel=1e-5)
        assert res.loc[f"blocks.{i}", "massive_ratio"] == pytest.approx((h.max(-1) / np.median(h, -1)).max(), rel=1e-5)


# ------------------------------------------------------------------------------------------------ alerts
def _heads_alerted(tr) -> set[tuple[str, int]]:
    return {(a.name, a.head) for a in tr.alerts()}


@pytest.mark.parametrize("kind", ["mha", "sdpa"])
def test_a_healthy_run_raises_no_alert(kind):
    model = MAKERS[kind]()
    tr = attnscope.track(model, every=2)
    train(model, kind, 40, tr)
    assert len(tr.steps) == 20
    assert tr.alerts() == []


def test_planted_collapse_is_alerted_on_that_head_only_from_that_step_on():
    model = mha_stack()
    tr = attnscope.track(model, every=2)
    train(model, "mha", 40, tr, before_step=plant_collapse(layer=0, head=2, at=20))
    alerts = tr.alerts()
    assert _heads_alerted(tr) == {("0.layers.0.self_attn", 2)}
    collapse = [a.step for a in alerts if a.kind == "collapse"]
    assert collapse == list(range(20, 40, 2))  # every recorded step from the planted one on, none before
    assert all(a.reason.startswith("collapse: entropy ratio") for a in alerts if a.kind == "collapse")


def test_planted_dying_head_is_alerted_on_that_head_only():
    def silence(step: int, model: nn.Module) -> None:
        if step >= 16:  # head 1 of the second layer writes nothing from step 16 on
            with torch.no_grad():
                model[0].layers[1].self_attn.out_proj.weight[:, 8:16] = 0.0

    model = mha_stack()
    tr = attnscope.track(model, every=2)
    train(model, "mha", 30, tr, before_step=silence)
    assert {(a.name, a.head, a.kind) for a in tr.alerts()} == {("0.layers.1.self_attn", 1, "dying")}
    assert [a.step for a in tr.alerts()] == list(range(16, 30, 2))


def test_planted_massive_activation_and_residual_growth_are_alerted_on_their_blocks():
    def plant(step: int, model: nn.Module) -> None:
        if step == 10:
            with torch.no_grad():
                model[0].layers[1].norm2.weight[5] = 5000.0  # one channel ~5000x the others (post-LN output)
                model[0].layers[0].norm2.weight.mul_(10.0)  # every channel 10x: the block's output norm grows 10x

    model = mha_stack()
    tr = attnscope.track(model, every=2)
    train(model, "mha", 16, tr, before_step=plant, lr=1e-4)
    got = {(a.name, a.kind) for a in tr.alerts() if a.head is None}
    # one channel at ~5000 also makes the second block's output norm hundreds of times larger: growth there too
    assert got == {("0.layers.0", "residual growth"), ("0.layers.1", "massive activation"),
                   ("0.layers.1", "residual growth")}
    # the 10x larger output of the first block enters the second block's attention unnormalised (post-LN): its
    # logits grow 100x and its heads collapse (the mechanism of Zhai et al. 2023); the first block's heads do not
    assert {a.name for a in tr.alerts() if a.head is not None} == {"0.layers.1.self_attn"}
    assert min(a.step for a in tr.alerts() if a.head is None) == 10
    massive = tr.residual_table().query("name == '0.layers.1'")["massive_ratio"].to_numpy()
    assert massive[:5].max() < 1000 <= massive[5:].min()


def test_rules_are_options_checked_at_the_door():
    with pytest.raises(OptionError, match="collapse_at"):
        attnscope.track(mha_stack(), rules={"colapse_at": 0.3})
    with pytest.raises(OptionError, match="positive"):
        AlertRules(sink_at=-1)
    with pytest.raises(OptionError, match="every"):
        attnscope.track(mha_stack(), every=0)
    with pytest.raises(OptionError, match="out_proj"):
        attnscope.track(mha_stack(), out_proj={"**": "0.layers.0.self_attn.out_prj"})
    model = mha_stack()
    tr = attnscope.track(model, every=1)
    train(model, "mha", 12, tr, before_step=plant_collapse(0, 2, 6))
    assert tr.alerts() and tr.alerts(collapse_at=0.05) == []  # stricter rule: the planted fall is not enough
    with pytest.raises(OptionError, match="collapse_at"):
        tr.alerts(colapse_at=0.05)
    with pytest.raises(OptionError, match="after step"):
        with tr.step(3):
            pass


# ------------------------------------------------------------------------------------------------ files
def test_save_load_round_trip_keeps_tables_and_alerts(tmp_path):
    model = mha_stack()
    tr = attnscope.track(model, every=2)
    train(model, "mha", 30, tr, before_step=plant_collapse(0, 2, 20))
    attnscope.save(tr, tmp_path / "run.attnscope")
    back = attnscope.load(tmp_path / "run.attnscope")
    assert type(back).__name__ == "Tracker"
    assert back.table().equals(tr.table())
    assert back.residual_table().equals(tr.residual_table())
    assert back.alerts() == tr.alerts() != []
    with pytest.raises(CaptureStateError, match="loaded"):
        back.step(0)


def test_path_appends_each_recorded_step_as_it_goes(tmp_path):
    from attnscope.tracking.store import read_run

    path = tmp_path / "live.jsonl"
    model = sdpa_decoder()
    tr = attnscope.track(model, every=3, path=path)
    train(model, "sdpa", 4, tr)  # steps 0 and 3 recorded
    assert [s.step for s in read_run(path)[1]] == [0, 3]
    train(model, "sdpa", 1, None)
    with pytest.raises(OptionError, match="exists"):
        attnscope.track(model, path=path)
    tr.close()
    loaded = attnscope.load(path)
    assert loaded.table().equals(tr.table())
    with open(path, "ab") as f:
        f.write(b'{"step": 6, "heads": [')  # a write cut short by a crash
    with pytest.warns(attnscope.AttnscopeWarning, match="cut short"):
        again = attnscope.load(path)
    assert [s.step for s in again.steps] == [0, 3]


def test_hf_eager_attention_statistics_and_output_norms_match_hf_and_brute_force():
    """The softmax path (HF eager): statistics vs HF's own output_attentions, norms through GPT-2's Conv1D."""
    from transformers import GPT2Config, GPT2Model

    torch.manual_seed(0)
    config = GPT2Config(vocab_size=32, n_positions=16, n_embd=16, n_layer=2, n_head=2, attn_pdrop=0.5,
                        resid_pdrop=0.0, embd_pdrop=0.0)  # attention dropout on: statistics are dropout-free
    model = GPT2Model._from_config(config, attn_implementation="eager").train()
    ids = torch.randint(0, 32, (2, 7), generator=torch.Generator().manual_seed(1))
    tr = attnscope.track(model, every=1)
    with tr.step(0):
        model(ids).last_hidden_state.sum().backward()
    table = tr.table()
    model.eval()  # reference: HF's eager output_attentions (dropout off) and the hidden states entering each block
    with torch.no_grad():
        out = model(ids, output_attentions=True, output_hidden_states=True)
    for layer in range(1):  # the second layer's input carried the first's attention dropout in the tracked forward
        w = out.attentions[layer].double().numpy()  # (B, H, T, T)
        block = model.h[layer]
        with torch.no_grad():
            h = block.ln_1(out.hidden_states[layer])
            v = block.attn.c_attn(h)[..., 32:].double().numpy()  # (B, T, D): the values
            wo = block.attn.c_proj.weight.double().numpy()  # Conv1D keeps (in, out)
        rows = table[table["name"] == f"h.{layer}.attn"].sort_values("head")
        for hd in range(2):
            ent = [entropy(w[b, hd, q, : q + 1]) for b in range(2) for q in range(7)]  # scipy.stats.entropy
            assert rows.iloc[hd]["entropy"] == pytest.approx(np.mean(ent), rel=1e-5)
            head_out = w[:, hd] @ v[..., hd * 8:(hd + 1) * 8]  # (B, T, Dh), brute force
            contrib = head_out @ wo[hd * 8:(hd + 1) * 8]  # (B, T, D)
            assert rows.iloc[hd]["output_norm"] == pytest.approx(np.linalg.norm(contrib, axis=-1).mean(), rel=1e-5)


def test_selected_heads_keep_their_indices_and_compare_with_every_other_head():
    model = mha_stack()
    tr = attnscope.track(model, every=1, heads=[1, 3], layers=["0.layers.0.self_attn"])
    everything = attnscope.track(model, every=1, layers=["0.layers.0.self_attn"])
    x = torch.randn(2, 5, WIDTH)
    model.eval()  # the same forward twice
    for t in (tr, everything):
        with t.step(0):
            model(x)
    part, full = tr.table(), everything.table()
    assert part["head"].tolist() == [1, 3]
    cols = ["entropy", "sink_mass", "output_norm", "output_relative"]
    np.testing.assert_allclose(part[cols].to_numpy(), full.set_index("head").loc[[1, 3], cols].to_numpy(), rtol=1e-6)


def test_a_run_file_is_validated_on_load(tmp_path):
    from attnscope.errors import CaptureFileError

    def write(name: str, *lines: str):
        path = tmp_path / name
        path.write_text("".join(line + "\n" for line in lines))
        return path

    header = '{"format": "attnscope-run", "version": 1, "every": 2, "rules": {}, "model": null}'
    with pytest.raises(CaptureFileError, match="not an attnscope run file"):
        attnscope.load(write("other.jsonl", '{"format": "something else"}'))
    with pytest.raises(CaptureFileError, match="version 7"):
        attnscope.load(write("future.jsonl", header.replace('"version": 1', '"version": 7')))
    with pytest.raises(CaptureFileError, match="line 2"):
        attnscope.load(write("text.jsonl", header, '{"step": 0, "heads": [{"name": "a", "head": 0, '
                                                   '"entropy": "__import__(\'os\')"}], "blocks": []}'))
    with pytest.raises(CaptureFileError, match="run header"):
        attnscope.load(write("rules.jsonl", header.replace('"rules": {}', '"rules": {"colapse_at": 0.2}')))
    ok = attnscope.load(write("ok.jsonl", header, '{"step": 4, "heads": [], "blocks": []}'))
    assert [s.step for s in ok.steps] == [4] and ok.every == 2
