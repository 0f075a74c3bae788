"""The shipped demo models do what their files say, checked against the task itself and torch's own math.

These tests load the shipped checkpoints and never train, except the one marked slow. Fresh examples come
from seeds the training script does not use, from the held-out split (labels never seen in training).
"""

from __future__ import annotations

import copy
import dataclasses
import json
import math
import re
import struct
from itertools import combinations

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from scipy.spatial.distance import jensenshannon
from scipy.stats import entropy
from torch import nn

from attnscope import demo
from attnscope.demo import heads_specimen, seq2seq_post_ln, seq2seq_pre_ln, shipped, task, training
from attnscope.demo.heads_specimen import PLANTED
from attnscope.errors import OptionError

FRESH_SEED = 31337  # not a seed of training (data seeds 1_000_000+, report seed 777)


@pytest.fixture(autouse=True)
def one_thread():
    """Tiny models run fastest on one thread, and a shared CI machine stays usable; restored afterwards."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(before)


def fresh(n: int = 400, seed: int = FRESH_SEED) -> list[task.Example]:
    return task.make_examples(n, seed=seed, split="held_out")


def pick_path_by_hand(label_text: str) -> str:
    """The rewrite written independently of the task module: parse the label, reorder the fields."""
    m = re.fullmatch(r"R(\d+) S(\d+) B(\d+)", label_text)
    assert m, label_text
    row, shelf, bin_ = m.groups()
    return f"B{bin_}-S{shelf}-R{row}"


def no_hooks_left(model: nn.Module) -> bool:
    return all(
        not (m._forward_hooks or m._forward_pre_hooks or m._backward_hooks) for m in model.modules()
    )


def grab_inputs(modules: dict[str, nn.Module], run) -> dict[str, tuple[tuple, dict]]:
    """Run *run* with forward pre-hooks that only record each module's (args, kwargs); hooks removed after."""
    seen: dict[str, tuple[tuple, dict]] = {}
    handles = []
    try:
        for name, module in modules.items():
            def pre(mod, args, kwargs, name=name):
                seen[name] = (args, kwargs)

            handles.append(module.register_forward_pre_hook(pre, with_kwargs=True))
        with torch.no_grad():
            run()
    finally:
        for h in handles:
            h.remove()
    return seen


def greedy_seq2seq(model: nn.Module, src: torch.Tensor, steps: int) -> torch.Tensor:
    """Greedy decoding written in the test: recompute the whole prefix at each step, take the argmax."""
    tgt = torch.full((src.shape[0], 1), task.VOCAB.bos_id)
    with torch.no_grad():
        for _ in range(steps):
            tgt = torch.cat([tgt, model(src, tgt)[:, -1].argmax(-1, keepdim=True)], dim=1)
    return tgt[:, 1:]


def greedy_lm(model: nn.Module, examples: list[task.Example]) -> list[str]:
    """Greedy continuation of ``<bos> label ;`` written in the test, batched over equal prompt lengths."""
    out: dict[int, str] = {}
    groups: dict[int, list[int]] = {}
    for i, e in enumerate(examples):
        groups.setdefault(len(e.source), []).append(i)
    for members in groups.values():
        ids = torch.tensor([task.VOCAB.encode(task.lm_sequence(examples[i]))[: len(examples[i].source) + 1]
                            for i in members])  # (B, P): <bos>, the label's tokens, ';'
        prompt = ids.shape[1]
        with torch.no_grad():
            for _ in range(12):  # longest pick path: 11 tokens + <eos>
                ids = torch.cat([ids, model(ids)[:, -1].argmax(-1, keepdim=True)], dim=1)
        for i, row in zip(members, ids[:, prompt:]):
            out[i] = decoded_text(row)
    return [out[i] for i in range(len(examples))]


def decoded_text(ids: torch.Tensor) -> str:
    toks = task.VOCAB.decode(ids)
    return task.render(toks[: toks.index(task.EOS)] if task.EOS in toks else toks)


# ---------------------------------------------------------------- the task


def test_worked_example_by_hand():
    ex = task.build_example((3, 12, 7))
    # hand-written: tokens of "R3 S12 B7" and of "B7-S12-R3", and which source index each output reads
    assert ex.source == ("R", "3", "␣", "S", "1", "2", "␣", "B", "7", "<eos>")
    assert ex.target == ("B", "7", "-", "S", "1", "2", "-", "R", "3", "<eos>")
    #   B  7  -(bin field closed by <eos>)  S  1  2  -(shelf closed by ␣@6)  R  3  <eos>(row closed by ␣@2)
    assert ex.alignment == (7, 8, 9, 3, 4, 5, 6, 0, 1, 2)


def test_examples_match_a_rewrite_written_by_hand():
    for split in task.SPLITS:
        for ex in task.make_examples(300, seed=5, split=split):
            assert task.render(ex.target) == pick_path_by_hand(task.render(ex.source))
            for t, s in enumerate(ex.alignment):
                out, src = ex.target[t], ex.source[s]
                if out in ("-", task.EOS):  # a field's end reads the token right after that field's digits
                    assert src in ("␣", task.EOS) and ex.source[s - 1].isdigit()
                else:  # letters and digits read their own copy
                    assert out == src


def test_generator_is_seeded_and_splits_are_disjoint():
    assert task.make_examples(50, seed=1) == task.make_examples(50, seed=1)
    assert task.make_examples(50, seed=1) != task.make_examples(50, seed=2)
    train = {e.label for e in task.make_examples(3000, seed=3, split="train")}
    held = {e.label for e in task.make_examples(3000, seed=3, split="held_out")}
    assert train and held and not (train & held)
    widths = [len(str(n)) for e in task.make_examples(3000, seed=3) for n in e.label]
    assert 0.45 < widths.count(1) / len(widths) < 0.55  # one- and two-digit numbers equally often


def test_vocab_round_trip_and_errors():
    toks = ["<bos>", "R", "4", "␣", "S", "-", ";", "<eos>", "<pad>"]
    assert task.VOCAB.decode(task.VOCAB.encode(toks)) == toks
    with pytest.raises(OptionError, match="Did you mean '<eos>'"):
        task.VOCAB.encode(["<eso>"])
    with pytest.raises(OptionError, match="split"):
        task.make_examples(1, seed=0, split="heldout")


def test_padding_helpers():
    exs = [task.build_example((3, 12, 7)), task.build_example((45, 6, 78))]
    src, tgt_in, tgt_out = task.seq2seq_batch(exs)
    assert src.shape == (2, 11) and tgt_in.shape == tgt_out.shape == (2, 11)
    assert src[0, 10] == task.VOCAB.pad_id and src[1, 10] == task.VOCAB.eos_id
    assert tgt_in[0, 0] == task.VOCAB.bos_id and torch.equal(tgt_in[:, 1:10], tgt_out[:, :9])
    ids, prompt_len = task.lm_batch(exs)
    assert prompt_len.tolist() == [11, 12]  # <bos>, 9 or 10 label tokens, ';'
    assert task.VOCAB.decode(ids[0, : prompt_len[0]])[-1] == ";"


# ---------------------------------------------------------------- files and loading


def test_checkpoints_are_small_safetensors_files():
    paths = [shipped.checkpoint_path(n) for n in demo.NAMES]
    assert sum(p.stat().st_size for p in paths) <= 2 * 1024 * 1024
    for p in paths:
        raw = p.read_bytes()
        # safetensors layout (its format spec): u64 little-endian header length, JSON header, raw tensor bytes
        (n,) = struct.unpack("<Q", raw[:8])
        header = json.loads(raw[8 : 8 + n])
        assert json.loads(header["__metadata__"]["attnscope"])["name"] == p.stem
        assert not raw.startswith(b"PK") and raw[:1] != b"\x80"  # neither a torch zip nor a pickle stream


def test_load_reads_no_pickle(monkeypatch):
    def refuse(*args, **kwargs):
        raise AssertionError("demo.load must not unpickle")

    monkeypatch.setattr(torch, "load", refuse)
    monkeypatch.setattr("pickle.load", refuse)
    monkeypatch.setattr("pickle.loads", refuse)
    for name in demo.NAMES:
        model = demo.load(name)
        assert not model.training
        assert shipped.metadata(name)["config"] == dataclasses.asdict(model.config)
    assert [demo.load(n).config.leaky_mask for n in ("decoder_only", "decoder_only_leaky", "heads_specimen")] == [
        False, True, False]


def test_unknown_name_suggests():
    with pytest.raises(OptionError, match="Did you mean 'seq2seq_pre_ln'"):
        demo.load("seq2seq_preln")


def test_save_load_round_trip(tmp_path):
    model = demo.load("decoder_only")
    shipped.save(model, "decoder_only", tmp_path, {"note": "copy"})
    again = demo.load("decoder_only", tmp_path)
    for (k, a), (_, b) in zip(model.state_dict().items(), again.state_dict().items()):
        assert torch.equal(a, b), k
    assert shipped.metadata("decoder_only", tmp_path)["note"] == "copy"


def test_every_sdpa_call_has_explicit_heads(monkeypatch):
    # capture reads per-head maps at the SDPA call, so q and k must be (B, H, T, D/H) there
    seen = []
    real = F.scaled_dot_product_attention

    def spy(q, k, v, *args, **kwargs):
        seen.append((tuple(q.shape), tuple(k.shape)))
        return real(q, k, v, *args, **kwargs)

    monkeypatch.setattr(torch.nn.functional, "scaled_dot_product_attention", spy)
    exs = fresh(3)
    src, tgt_in, _ = task.seq2seq_batch(exs)
    with torch.no_grad():
        demo.load("seq2seq_pre_ln")(src, tgt_in)
    assert len(seen) == 2 + 2 * 2  # encoder self-attention, decoder self- and cross-attention
    assert all(q[:2] == (3, 4) and k[:2] == (3, 4) and q[3] == 8 for q, k in seen)
    seen.clear()
    ids, _ = task.lm_batch(exs)
    for name in ("decoder_only", "decoder_only_leaky", "heads_specimen"):
        with torch.no_grad():
            demo.load(name)(ids)
    assert len(seen) == 3 * 2 and all(q[:2] == (3, 4) for q, _ in seen)


# ---------------------------------------------------------------- seq2seq: accuracy and alignment


@pytest.mark.parametrize("name", ["seq2seq_post_ln", "seq2seq_pre_ln"])
def test_seq2seq_exact_match_on_fresh_labels(name):
    model = demo.load(name)
    exs = fresh(300)
    src, _, _ = task.seq2seq_batch(exs)
    out = greedy_seq2seq(model, src, steps=12)  # (B, 12): longest pick path is 11 tokens + <eos>
    hits = [decoded_text(row) == pick_path_by_hand(task.render(e.source)) for row, e in zip(out, exs)]
    assert sum(hits) / len(hits) >= 0.95
    # the model's own generate() agrees with the test's decoding loop
    own = model.generate(src[:50])
    assert [decoded_text(r) for r in own] == [decoded_text(r) for r in out[:50]]


def alignment_grid(exs: list[task.Example], width: int) -> torch.Tensor:
    grid = torch.full((len(exs), width), -1)  # (B, Tt), -1 where there is no output token
    for b, e in enumerate(exs):
        grid[b, : len(e.alignment)] = torch.tensor(e.alignment)
    return grid


def post_ln_cross_weights(model, src, tgt_in) -> list[torch.Tensor]:
    """Per-layer (B, H, Tt, Ts) cross-attention from torch's own nn.MultiheadAttention(need_weights=True)."""
    layers = model.transformer.decoder.layers
    seen = grab_inputs({str(i): l.multihead_attn for i, l in enumerate(layers)}, lambda: model(src, tgt_in))
    maps = []
    for i, layer in enumerate(layers):
        args, kwargs = seen[str(i)]
        with torch.no_grad():
            # reference: torch's nn.MultiheadAttention, need_weights=True, average_attn_weights=False
            out, w = layer.multihead_attn(*args, **{**kwargs, "need_weights": True, "average_attn_weights": False})
        maps.append(w)
    return maps


def pre_ln_cross_weights(model, src, tgt_in) -> list[torch.Tensor]:
    """Per-layer (B, H, Tt, Ts) cross-attention recomputed in the test: softmax(QKᵀ/√d + mask)."""
    layers = model.transformer.decoder.layers
    seen = grab_inputs({str(i): l.multihead_attn for i, l in enumerate(layers)}, lambda: model(src, tgt_in))
    maps = []
    for i, layer in enumerate(layers):
        (x, memory, allowed), _ = seen[str(i)]
        a = layer.multihead_attn
        b, tq, d = x.shape
        h = a.heads
        with torch.no_grad():
            q = a.q_proj(x).view(b, tq, h, d // h).transpose(1, 2)  # (B, H, Tq, dh)
            k = a.k_proj(memory).view(b, memory.shape[1], h, d // h).transpose(1, 2)  # (B, H, Tk, dh)
            v = a.v_proj(memory).view(b, memory.shape[1], h, d // h).transpose(1, 2)
            # reference: independent softmax(QKᵀ/√d + mask) recomputation
            scores = (q @ k.transpose(-1, -2)) / math.sqrt(d // h)  # (B, H, Tq, Tk)
            w = torch.softmax(scores.masked_fill(~allowed, float("-inf")), dim=-1)
            # the recomputation is what the module did: same output when carried through values and out_proj
            mine = a.out_proj((w @ v).transpose(1, 2).reshape(b, tq, d))
            torch.testing.assert_close(mine, a(x, memory, allowed), rtol=1e-5, atol=1e-5)
        maps.append(w)
    return maps


@pytest.mark.parametrize(
    "name, weights_of, module",
    [("seq2seq_post_ln", post_ln_cross_weights, seq2seq_post_ln), ("seq2seq_pre_ln", pre_ln_cross_weights, seq2seq_pre_ln)],
)
def test_cross_attention_follows_the_task_alignment(name, weights_of, module):
    model = demo.load(name)
    exs = fresh(300)
    src, tgt_in, tgt_out = task.seq2seq_batch(exs)
    maps = weights_of(model, src, tgt_in)
    assert no_hooks_left(model)
    align = alignment_grid(exs, tgt_out.shape[1])  # (B, Tt) source index each output token reads
    valid = align >= 0
    digit = torch.tensor([[t.isdigit() for t in e.target] + [False] * (tgt_out.shape[1] - len(e.target)) for e in exs])

    def share(w: torch.Tensor, rows: torch.Tensor) -> float:  # w (B, Tt, Ts)
        return float(((w.argmax(-1) == align) & rows).sum() / rows.sum())

    guided_name, guided_head = module.GUIDED_HEAD
    assert guided_name == f"transformer.decoder.layers.{len(maps) - 1}.multihead_attn"
    last = maps[-1]  # (B, H, Tt, Ts)
    # the guided head of the last layer follows the alignment on >= 90% of all output tokens
    assert share(last[:, guided_head], valid) >= 0.90
    # and copying emerges untaught: some other head puts its argmax on the digit it copies
    free = [share(m[:, h], digit) for m in maps for h in range(m.shape[1]) if not (m is last and h == guided_head)]
    assert max(free) >= 0.90
    # a wrong alignment (the label read left to right) is not what the heads follow
    shifted = torch.where(valid, torch.arange(align.shape[1]).expand_as(align), -1)
    assert float(((last[:, guided_head].argmax(-1) == shifted) & valid).sum() / valid.sum()) < 0.5


def residual_norms(model, layers, run) -> list[float]:
    """Mean L2 norm over positions of each block's output, read with forward hooks (removed after)."""
    out: list[float] = []
    handles = [l.register_forward_hook(lambda m, i, o: out.append(float(o.norm(dim=-1).mean()))) for l in layers]
    try:
        with torch.no_grad():
            run()
    finally:
        for h in handles:
            h.remove()
    return out


def test_residual_norm_grows_with_depth_in_pre_ln_only():
    exs = fresh(200)
    src, tgt_in, _ = task.seq2seq_batch(exs)
    post, pre = demo.load("seq2seq_post_ln"), demo.load("seq2seq_pre_ln")
    post_enc = residual_norms(post, post.transformer.encoder.layers, lambda: post(src, tgt_in))
    pre_enc = residual_norms(pre, pre.transformer.encoder.layers, lambda: pre(src, tgt_in))
    pre_dec = residual_norms(pre, pre.transformer.decoder.layers, lambda: pre(src, tgt_in))
    assert len(post_enc) == len(pre_enc) == len(pre_dec) == 2
    assert no_hooks_left(post) and no_hooks_left(pre)
    # post-LN: every block ends in a LayerNorm, so the stream's norm is set by that norm's gain and stays put;
    # pre-LN: sub-layer outputs pile up on an unnormalised stream (Xiong et al. 2020)
    assert pre_enc[-1] > 1.2 * pre_enc[0] and pre_dec[-1] > 1.2 * pre_dec[0]
    assert abs(post_enc[-1] / post_enc[0] - 1) < abs(pre_enc[-1] / pre_enc[0] - 1)


# ---------------------------------------------------------------- decoder-only: the planted causal bug


def bayes_floor(exs: list[task.Example]) -> float:
    """The lowest mean next-token loss any model that cannot see the future can expect, by hand.

    Each field's number: its first digit is uniform over 1-9 (ln 9); the next token ends the field with
    probability 1/2 (ln 2) or is one of ten second digits, 1/20 each (ln 20). Every other token is determined.
    """
    nats = sum(math.log(9) + (math.log(2) if n < 10 else math.log(20)) for e in exs for n in e.label)
    predictions = sum(len(task.lm_sequence(e)) - 1 for e in exs)
    return nats / predictions


def teacher_forced_loss(model: nn.Module, exs: list[task.Example]) -> float:
    ids, _ = task.lm_batch(exs)
    with torch.no_grad():
        logits = model(ids[:, :-1])  # (B, T-1, V)
    return float(F.cross_entropy(logits.transpose(1, 2), ids[:, 1:], ignore_index=task.VOCAB.pad_id))


def test_correct_and_leaky_decoders_show_the_classic_symptom():
    exs = fresh(300)
    good, leaky = demo.load("decoder_only"), demo.load("decoder_only_leaky")
    floor = bayes_floor(exs)
    good_loss, leaky_loss = teacher_forced_loss(good, exs), teacher_forced_loss(leaky, exs)
    truth = [pick_path_by_hand(task.render(e.source)) for e in exs]
    good_acc = np.mean([a == b for a, b in zip(greedy_lm(good, exs), truth)])
    leaky_acc = np.mean([a == b for a, b in zip(greedy_lm(leaky, exs), truth)])
    assert good_loss >= 0.97 * floor  # an honest model cannot beat the label's own randomness
    assert leaky_loss < 0.1 * floor  # far below what the task allows: it reads the answers
    assert good_acc >= 0.95
    assert leaky_acc <= 0.2 and good_acc - leaky_acc >= 0.75


def test_masks_are_the_documented_ones():
    good, leaky = demo.load("decoder_only"), demo.load("decoder_only_leaky")
    t = good.config.max_len
    for block in good.blocks:
        assert torch.equal(block.attn.mask, torch.ones(t, t, dtype=torch.bool).tril())
    for block in leaky.blocks:
        assert torch.equal(block.attn.mask, torch.ones(t, t, dtype=torch.bool).tril(diagonal=1))


def test_brute_force_future_probe():
    # change the token at position j and see which earlier positions' logits move (brute force)
    ids, _ = task.lm_batch(fresh(8))
    j = 8
    changed = ids.clone()
    changed[:, j] = torch.where(ids[:, j] == task.VOCAB.id("5"), task.VOCAB.id("6"), task.VOCAB.id("5"))
    good, leaky = demo.load("decoder_only"), demo.load("decoder_only_leaky")
    with torch.no_grad():
        good_delta = (good(ids) - good(changed)).abs().amax(dim=(0, 2))  # (T,)
        leaky_delta = (leaky(ids) - leaky(changed)).abs().amax(dim=(0, 2))  # (T,)
    assert float(good_delta[:j].max()) < 1e-5  # causal: no earlier position moves
    # off by one: each block lets the future in one more step back, so with 2 blocks j-1 and j-2 move ...
    assert leaky.config.layers == 2
    assert float(leaky_delta[j - 1]) > 1e-3 and float(leaky_delta[j - 2]) > 1e-3
    # ... and nothing before them
    assert float(leaky_delta[: j - 2].max()) < 1e-5


# ---------------------------------------------------------------- heads specimen


def self_attention_maps(model) -> dict[tuple[str, int], tuple[np.ndarray, np.ndarray]]:
    """Every head's rows, recomputed in the test as softmax(QKᵀ/√d) under a torch.tril causal mask.

    Returns (name, head) -> (weights (R, T) over all keys, zeros where masked; query position (R,)) for the
    R real (non-padding) query rows of 200 fresh sequences.
    """
    ids, _ = task.lm_batch(fresh(200))
    names = {f"blocks.{i}.attn": b.attn for i, b in enumerate(model.blocks)}
    seen = grab_inputs(names, lambda: model(ids))
    real = (ids != task.VOCAB.pad_id).numpy()  # (B, T)
    qpos = np.broadcast_to(np.arange(ids.shape[1]), ids.shape)[real]  # (R,)
    out = {}
    for name, attn in names.items():
        (x,), _ = seen[name]
        b, t, d = x.shape
        h = attn.heads
        with torch.no_grad():
            q = attn.q_proj(x).view(b, t, h, d // h).transpose(1, 2)  # (B, H, T, dh)
            k = attn.k_proj(x).view(b, t, h, d // h).transpose(1, 2)  # (B, H, T, dh)
            scores = q @ k.transpose(-1, -2) / math.sqrt(d // h)  # (B, H, T, T)
            allowed = torch.ones(t, t, dtype=torch.bool).tril()  # reference causal mask
            w = torch.softmax(scores.masked_fill(~allowed, float("-inf")), dim=-1).numpy()
        for head in range(h):
            out[(name, head)] = (w[:, head][real], qpos)  # (R, T), (R,)
    return out


def test_planted_names_exist():
    model = demo.load("heads_specimen")
    flat = [p for kind in ("uniform", "silent", "sink") for p in PLANTED[kind]]
    flat += [p for pair in PLANTED["duplicate"] for p in pair]
    assert len(flat) == len(set(flat)) == 5
    for name, head in flat:
        assert isinstance(model.get_submodule(name), nn.Module) and 0 <= head < model.config.heads


def test_planted_heads_are_what_was_planted_and_no_others():
    model = demo.load("heads_specimen")
    heads = self_attention_maps(model)

    def entropy_ratio(key) -> float:
        # entropy of a row over n allowed keys divided by ln n, its value for uniform weights
        # (common practice, no source); row entropies by scipy.stats.entropy
        w, qpos = heads[key]
        keep = qpos >= 1  # query 0 has one key only
        return float(np.mean(entropy(w[keep], axis=-1) / np.log(qpos[keep] + 1)))

    def sink_mass(key) -> float:
        w, qpos = heads[key]
        return float(w[qpos >= 1, 0].mean())

    for key in heads:
        if key in PLANTED["uniform"]:
            w, qpos = heads[key]
            expected = np.tril(np.ones((w.shape[1], w.shape[1])))[qpos] / (qpos[:, None] + 1)  # 1/(i+1) by hand
            np.testing.assert_allclose(w, expected, atol=1e-6)
            assert entropy_ratio(key) == pytest.approx(1.0, abs=1e-5)
        else:
            assert entropy_ratio(key) < 0.9, key
        if key in PLANTED["sink"]:
            assert sink_mass(key) >= 0.95
        else:
            assert sink_mass(key) < 0.5, key

    # duplicate: the same map on every row (scipy's Jensen-Shannon distance ~ 0); no other pair comes close
    planted_pairs = {frozenset(p) for p in PLANTED["duplicate"]}
    for a, b in combinations(heads, 2):
        if a[0] != b[0]:
            continue
        js = float(np.mean(jensenshannon(heads[a][0], heads[b][0], axis=-1)))
        if frozenset((a, b)) in planted_pairs:
            assert js < 1e-3
        else:
            assert js > 0.1, (a, b)


def test_silent_head_changes_nothing_when_ablated():
    model = demo.load("heads_specimen")
    ids, _ = task.lm_batch(fresh(100))
    with torch.no_grad():
        base = model(ids)
    for i in range(model.config.layers):
        for head in range(model.config.heads):
            ablated = copy.deepcopy(model)
            v = ablated.blocks[i].attn.v_proj
            dh = model.config.d_model // model.config.heads
            with torch.no_grad():  # ablation by brute force: the head's values are zero, so is its output
                v.weight[head * dh : (head + 1) * dh] = 0
                v.bias[head * dh : (head + 1) * dh] = 0
                moved = float((ablated(ids) - base).abs().max())
            if (f"blocks.{i}.attn", head) in PLANTED["silent"]:
                assert moved == 0.0
            else:
                assert moved > 0.1


def test_specimen_still_does_the_task():
    model = demo.load("heads_specimen")
    exs = fresh(300)
    acc = np.mean([a == pick_path_by_hand(task.render(e.source)) for a, e in zip(greedy_lm(model, exs), exs)])
    assert acc >= 0.95


def test_recut_is_idempotent_on_the_shipped_specimen():
    model = demo.load("heads_specimen")
    before = {k: v.clone() for k, v in model.state_dict().items()}
    heads_specimen.recut(model)
    for k, v in model.state_dict().items():
        torch.testing.assert_close(v, before[k], rtol=1e-6, atol=1e-6)


# ---------------------------------------------------------------- retraining


def test_deterministic_restores_settings():
    before = (torch.get_num_threads(), torch.are_deterministic_algorithms_enabled())
    with pytest.raises(RuntimeError, match="boom"):
        with training.deterministic(threads=2):
            assert torch.get_num_threads() == 2 and torch.are_deterministic_algorithms_enabled()
            raise RuntimeError("boom")
    assert (torch.get_num_threads(), torch.are_deterministic_algorithms_enabled()) == before == (1, False)


@pytest.mark.slow
def test_short_retraining_is_bitwise_repeatable():
    settings = training.Settings(seed=3, steps=25, batch=16)

    def run(name, loss_fn):
        with training.deterministic():
            torch.manual_seed(settings.seed)
            model = shipped.build(name)
            losses = training.train(model, loss_fn, settings)
        return model.state_dict(), losses

    for name, loss_fn in (
        ("decoder_only_leaky", training.lm_loss),
        ("seq2seq_post_ln", lambda m, ex: training.seq2seq_loss(m, ex, guide=0.5)),
        ("seq2seq_pre_ln", lambda m, ex: training.seq2seq_loss(m, ex, guide=0.5)),
    ):
        (a, la), (b, lb) = run(name, loss_fn), run(name, loss_fn)
        assert la == lb and la[-1] < la[0]
        for k in a:
            assert torch.equal(a[k], b[k]), (name, k)
