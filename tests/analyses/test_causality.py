"""Causality and padding probes, checked against brute force and autograd computed here in the test.

References used below:
- brute force: perturb one input position at a time with plain torch (two different id shifts) and compare
  outputs directly; no attnscope code involved;
- torch.autograd.functional.jacobian for float inputs: the exact structural dependence pattern;
- hand reasoning on a planted single-pair leak, for the screen's stated detection rule.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import transformers
from leak_zoo import CORRECT, LEAKY, T_ZOO, Block, PairLeak, Seq2Seq, TinyDecoder, ZooConfig, build
from torch import nn

from attnscope.analyses.causality import (
    CausalReport,
    PaddingReport,
    assert_causal,
    assert_padding,
    check_causal,
    check_padding,
    screen_splits,
)
from attnscope.errors import OptionError, ProbeError, ShapeError

VOCAB = ZooConfig().vocab
REF_TOL = 1e-4  # same relative threshold as the probe's float32 default, applied by the reference


def ids(B: int = 2, T: int = T_ZOO, seed: int = 1) -> torch.Tensor:
    return torch.randint(0, VOCAB, (B, T), generator=torch.Generator().manual_seed(seed))


def brute_dependency(fn, x: torch.Tensor, vocab: int = VOCAB, shifts=(1, 7), stack: bool = True) -> np.ndarray:
    """Reference: [i, j] True when output i moves after replacing token j (by id + shift mod vocab).

    Plain torch: every bumped copy is built here and run in one batch per shift (``stack=False``: one
    copy per call), then compared with the unperturbed run.
    """
    with torch.no_grad():
        base = fn(x)  # (B, T, F)
        scale = base.square().mean().sqrt()
        B, T = x.shape
        dep = np.zeros((T, T), dtype=bool)
        for shift in shifts:
            bumped = x.repeat(T, 1).view(T, B, T)  # (copy j, B, T)
            j = torch.arange(T)
            bumped[j, :, j] = (bumped[j, :, j] + shift) % vocab
            if stack:
                out = fn(bumped.view(T * B, T)).view(T, B, T, -1)  # (copy j, B, T, F)
            else:
                out = torch.stack([fn(copy) for copy in bumped]).view(T, B, T, -1)
            moved = (out - base).abs().amax(dim=(1, 3)) / scale  # (copy j, output i)
            dep |= (moved.T > REF_TOL).numpy()
    return dep


def jacobian_dependency(fn, e: torch.Tensor) -> np.ndarray:
    """Reference: [i, j] True when d output_i / d input_j is non-zero (torch.autograd.functional.jacobian).

    The output features are first mixed down to 3 fixed random directions (a non-zero Jacobian block stays
    non-zero under a random projection, almost surely), which keeps the number of backward passes small.
    """
    with torch.no_grad():
        F = fn(e).shape[-1]
    R = torch.randn(F, 3, generator=torch.Generator().manual_seed(9), dtype=torch.float64).to(e.dtype)
    J = torch.autograd.functional.jacobian(lambda t: fn(t) @ R, e)  # (B, T, 3, B, T, D)
    per_pair = J.abs().amax(dim=(0, 2, 3, 5))  # (T, T)
    return (per_pair > 1e-6 * per_pair.max()).numpy()


def first_violation(dep: np.ndarray) -> tuple[int, int]:
    upper = np.triu(dep, k=1)
    i = int(np.flatnonzero(upper.any(axis=1))[0])
    return i, int(np.flatnonzero(upper[i])[0])


def tiny_gpt2(impl: str) -> nn.Module:
    torch.manual_seed(0)
    cfg = transformers.GPT2Config(n_layer=2, n_head=2, n_embd=32, vocab_size=50, n_positions=32,
                                  attn_implementation=impl, bos_token_id=0, eos_token_id=0)
    return transformers.GPT2LMHeadModel(cfg).eval()


def tiny_bert() -> nn.Module:
    torch.manual_seed(0)
    cfg = transformers.BertConfig(vocab_size=50, hidden_size=32, num_hidden_layers=2, num_attention_heads=2,
                                  intermediate_size=64, max_position_embeddings=32, pad_token_id=0)
    return transformers.BertModel(cfg).eval()


def hooks_left(model: nn.Module) -> int:
    return sum(len(m._forward_hooks) + len(m._forward_pre_hooks) for m in model.modules())


# -- the zoo ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", sorted(LEAKY))
def test_screen_finds_each_planted_leak_and_blames_its_module(name):
    builder, planted = LEAKY[name]
    model = build(builder)
    x = ids()
    report = check_causal(model, x)
    assert isinstance(report, CausalReport)
    assert not report.ok
    assert report.blame == planted, report.summary()
    # brute force: the reported first pair is the first real violation (smallest output, nearest input)
    ref = brute_dependency(model, x)
    assert report.violations[0][:2] == first_violation(ref)
    assert set(report.leaking_outputs) <= set(np.flatnonzero(np.triu(ref, 1).any(axis=1)))
    assert hooks_left(model) == 0 and not model.training


@pytest.mark.parametrize("name", sorted(LEAKY))
def test_exhaustive_matrix_equals_brute_force_on_leaky_models(name):
    builder, planted = LEAKY[name]
    model = build(builder)
    x = ids()
    report = check_causal(model, x, mode="exhaustive")
    ref = brute_dependency(model, x)  # brute force, every (i, j)
    np.testing.assert_array_equal(report.dependency > report.tolerance, ref)
    expected_pairs = {(int(i), int(j)) for i, j in zip(*np.nonzero(np.triu(ref, 1)))}
    assert {v[:2] for v in report.violations} == expected_pairs
    assert report.blame == planted


@pytest.mark.parametrize("name", sorted(CORRECT) + ["gpt2_sdpa", "gpt2_eager"])
@pytest.mark.parametrize("mode", ["screen", "exhaustive"])
def test_correct_models_pass(name, mode):
    model = tiny_gpt2(name.split("_")[1]) if name.startswith("gpt2") else build(CORRECT[name])
    x = ids()
    report = check_causal(model, x, mode=mode)
    assert report.ok, report.summary()
    assert report.violations == () and report.blame is None
    if mode == "exhaustive":
        # brute force: the full pattern, lower triangle included (every output sees itself and its past)
        fn = (lambda t: model(t).logits) if name.startswith("gpt2") else model
        np.testing.assert_array_equal(report.dependency > report.tolerance, brute_dependency(fn, x))
        assert not np.isnan(report.dependency).any()


@pytest.mark.parametrize("name", ["hand_written_causal", "symmetric_conv", "off_by_one_mask", "sdpa_not_causal",
                                  "layer_norm_over_seq"])
def test_float_inputs_and_grad_check_match_the_jacobian(name):
    builder = CORRECT.get(name) or LEAKY[name][0]
    model = build(builder).double()
    e = torch.randn(1, T_ZOO, ZooConfig().width, dtype=torch.float64, generator=torch.Generator().manual_seed(2))
    report = check_causal(model, e, mode="exhaustive", grad_check=True)
    ref = jacobian_dependency(model, e)  # torch.autograd.functional.jacobian
    np.testing.assert_array_equal(report.dependency > report.tolerance, ref)
    np.testing.assert_array_equal(report.gradient > report.tolerance, ref)
    assert report.ok == (not np.triu(ref, 1).any())


def test_grad_check_on_token_ids_reads_the_embedding_gradient():
    model = build(LEAKY["symmetric_conv"][0])
    x = ids(B=1)
    report = check_causal(model, x, mode="exhaustive", grad_check=True)
    # brute force over ids gives the same structural pattern as the gradient at the embedding output
    np.testing.assert_array_equal(report.gradient > report.tolerance, brute_dependency(model, x))


# -- the screen's stated guarantee --------------------------------------------------------------------------


@pytest.mark.parametrize("pair", [(0, 1), (1, 2), (5, 6), (6, 8), (10, 12), (2, 9), (14, 15), (3, 15)])
def test_screen_detects_a_single_pair_exactly_when_a_split_falls_between(pair):
    i, j = pair
    model = build(lambda c: TinyDecoder(c, front=PairLeak(i, j)))
    x = ids()
    ref = brute_dependency(model, x)
    assert ref[i, j] and first_violation(ref) == (i, j)  # brute force: the planted pair is there
    report = check_causal(model, x)
    crossed = any(i <= s < j for s in report.splits)  # the docstring's rule, by hand
    assert report.splits == (0, 5, 9, 14)
    assert report.ok is (not crossed)
    if crossed:
        assert report.violations[0][:2] == (i, j) and report.blame == "front"
    exhaustive = check_causal(model, x, mode="exhaustive")
    assert exhaustive.violations[0][:2] == (i, j) and exhaustive.blame == "front"


def test_screen_splits_follow_the_documented_layout():
    for T in range(2, 300):
        cuts = screen_splits(T)
        n = max(1, math.ceil(math.log2(T)))
        assert cuts[0] == 0 and cuts[-1] == T - 2 and len(cuts) <= n
        gap = max(np.diff(cuts), default=1)
        assert gap <= math.ceil((T - 2) / max(1, n - 1)) + 1
    assert screen_splits(128) == (0, 21, 42, 63, 84, 105, 126)
    assert screen_splits(1) == ()


def test_screen_uses_one_stacked_call_of_log_t_copies():
    model = build(CORRECT["hand_written_causal"])
    report = check_causal(model, ids(B=1, T=32))
    assert report.forwards == 2  # baseline + one stack
    assert report.sequences == 1 + len(report.splits) == 1 + 5
    twice = check_causal(model, ids(B=1, T=32), trials=2)
    assert twice.forwards == 2 and twice.sequences == 1 + 2 * 5


def test_repeating_leak_is_caught_by_every_split():
    model = build(LEAKY["roll_lookahead"][0])  # output i sees input i + 1, at every position
    x = ids()
    ref = brute_dependency(model, x)  # brute force
    for s in (3, 7, 12):  # one split anywhere suffices: it shows the pair (s, s + 1)
        report = check_causal(model, x, splits=[s])
        assert not report.ok and report.violations[0][:2] == (s, s + 1) and ref[s, s + 1]


# -- seq2seq, layouts, batching ---------------------------------------------------------------------------


def test_seq2seq_decoder_without_tgt_mask_is_blamed_on_its_self_attention():
    src = ids(T=12, seed=5)
    x = ids()
    good = build(lambda c: Seq2Seq(c, tgt_mask=True))
    bad = build(lambda c: Seq2Seq(c, tgt_mask=False))
    assert check_causal(lambda tgt: good(src, tgt), x, model=good).ok
    report = check_causal(lambda tgt: bad(src, tgt), x, model=bad)
    assert not report.ok and report.blame == "decoder.layers.0.self_attn"
    ref = brute_dependency(lambda t: bad(src, t), x, stack=False)  # brute force
    assert report.violations[0][:2] == first_violation(ref)


def test_sequence_first_layout():
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(32, 2, 64, dropout=0.0)  # batch_first=False: (T, B, D)
    enc = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False).eval()
    x = torch.randn(T_ZOO, 2, 32)
    mask = nn.Transformer.generate_square_subsequent_mask(T_ZOO)
    assert check_causal(lambda h: enc(h, mask=mask, is_causal=True), x, seq_dim=0, model=enc).ok
    report = check_causal(lambda h: enc(h), x, seq_dim=0, model=enc, mode="exhaustive")
    J = jacobian_dependency(lambda e: enc(e.transpose(0, 1)).transpose(0, 1), x.transpose(0, 1))  # reference
    assert not report.ok and np.array_equal(report.dependency > report.tolerance, J)
    assert report.blame == "layers.0.self_attn"


def test_callable_that_closes_over_batch_sized_tensors_still_works():
    model = build(LEAKY["off_by_one_mask"][0])
    weights = torch.tensor([1.0, 2.0])  # (B,): a stacked batch of copies cannot broadcast against it
    report = check_causal(lambda t: model(t) * weights[:, None, None], ids(), model=model)
    assert not report.ok and report.violations[0][:2] == (0, 1) and report.blame == "blocks.1.attn"
    assert check_causal(lambda t: build(CORRECT["sdpa_causal"])(t) * weights[:, None, None], ids()).ok


# -- determinism and restoration ----------------------------------------------------------------------------


def test_dropout_in_training_mode_gives_no_false_leak_and_modes_come_back():
    model = build(CORRECT["hand_written_causal"], dropout=0.5).train()
    model.blocks[0].attn.eval()  # a mixed state must come back exactly
    before = {name: m.training for name, m in model.named_modules()}
    rng = torch.get_rng_state()
    for mode in ("screen", "exhaustive"):
        assert check_causal(model, ids(), mode=mode).ok
    assert {name: m.training for name, m in model.named_modules()} == before
    assert torch.equal(torch.get_rng_state(), rng)
    with pytest.raises(AssertionError):  # the same model really is random in training mode
        torch.testing.assert_close(model(ids()), model(ids()))


def test_randomness_the_probe_cannot_switch_off_raises_probe_error():
    model = build(CORRECT["hand_written_causal"], dropout=0.5).train()
    with pytest.raises(ProbeError, match="not deterministic"):
        check_causal(lambda t: model(t), ids())  # model= not given: dropout stays on
    with pytest.raises(ProbeError, match="not deterministic"):
        check_causal(lambda t: model.eval()(t) + torch.randn(()), ids())  # a callable that samples


def test_hooks_and_modes_restored_when_fn_raises_during_blame():
    model = build(LEAKY["symmetric_conv"][0]).train()
    raised = []

    def flaky(t):
        if hooks_left(model) and not raised:  # the blame pass has its hooks on: fail there
            raised.append(True)
            raise RuntimeError("disk full")
        return model(t)

    with pytest.raises(ProbeError, match="disk full"):
        check_causal(flaky, ids(B=1), model=model)
    assert raised == [True]
    assert hooks_left(model) == 0 and all(m.training for m in model.modules())


# -- messages -----------------------------------------------------------------------------------------------


def test_assert_causal_names_positions_magnitude_and_module():
    model = build(LEAKY["symmetric_conv"][0])
    report = check_causal(model, ids())
    i, j, m = report.violations[0]
    with pytest.raises(AssertionError) as caught:
        assert_causal(model, ids())
    text = str(caught.value)
    assert f"output position {i} depends on later input position {j}" in text
    assert f"{m:.3g}" in text and "'blocks.1.mix.conv' (Conv1d)" in text
    assert assert_causal(build(CORRECT["causal_conv"]), ids()) is None


def test_report_repr_is_short_and_screen_leaves_unmeasured_columns_nan():
    report = check_causal(build(LEAKY["off_by_one_mask"][0]), ids())
    text = repr(report)
    assert text.startswith("CausalReport(ok=False, mode='screen'") and "array" not in text and len(text) < 200
    measured = ~np.isnan(report.dependency).all(axis=0)
    assert measured.sum() == 1 and measured[report.violations[0].input_pos]


# -- vocabulary ---------------------------------------------------------------------------------------------


class Spy(nn.Module):
    """Wraps a model and records the largest id it was called with."""

    def __init__(self, inner: nn.Module, offset: int = 0) -> None:
        super().__init__()
        self.inner, self.offset, self.top = inner, offset, -1

    def forward(self, t):
        self.top = max(self.top, int(t.max()))
        return self.inner(t + self.offset)


def test_vocabulary_comes_from_the_embedding_that_takes_the_ids():
    spy = Spy(build(CORRECT["hand_written_causal"]))  # tok: 50 ids, pos: 32 positions
    x = ids(B=4) % 20
    check_causal(spy, x, mode="exhaustive", trials=3)
    assert 32 <= spy.top < 50  # drew from the token table, not the position table


def test_vocabulary_ambiguity_and_fallbacks():
    inner = build(CORRECT["hand_written_causal"])
    shifted = Spy(inner, offset=1)  # no embedding is called with x itself; two could take it
    x = ids() % 20
    with pytest.raises(ProbeError, match="vocab_size="):
        check_causal(shifted, x)
    assert check_causal(shifted, x, vocab_size=49).ok and shifted.top < 49
    spy = Spy(inner)
    assert check_causal(lambda t: spy(t), x, mode="exhaustive").ok  # no model known: ids stay below x.max()+1
    assert spy.top <= int(x.max())
    with pytest.raises(ProbeError, match="vocab_size="):
        check_causal(lambda t: inner(t), torch.zeros(1, 8, dtype=torch.long))


# -- options ------------------------------------------------------------------------------------------------


def test_options_fail_at_the_door():
    model = build(CORRECT["hand_written_causal"])
    with pytest.raises(OptionError, match="Did you mean 'screen'"):
        check_causal(model, ids(), mode="screan")
    with pytest.raises(ShapeError, match=r"x\[None\]"):
        check_causal(model, ids()[0])
    with pytest.raises(ShapeError, match="T=16"):
        check_causal(lambda t: model(t)[:, :-1], ids())
    with pytest.raises(OptionError, match="exhaustive"):
        check_causal(model, ids(), grad_check=True)
    with pytest.raises(OptionError, match="0..14"):
        check_causal(model, ids(), splits=[3, 15])
    with pytest.raises(OptionError, match="model="):
        check_causal(model, ids(), model="gpt")


# -- padding ------------------------------------------------------------------------------------------------


def bert_batch() -> tuple[torch.Tensor, torch.Tensor]:
    x = ids(seed=3)
    attention_mask = torch.ones(2, T_ZOO, dtype=torch.long)
    attention_mask[0, 13:] = 0
    attention_mask[1, 9:] = 0
    return x, attention_mask


def brute_padding_change(fn, x, pads) -> float:
    """Reference: largest relative change at real positions after replacing every padded id by hand."""
    with torch.no_grad():
        base = fn(x)
        worst = 0.0
        for shift in (1, 7):
            bumped = torch.where(pads, (x + shift) % VOCAB, x)
            d = (fn(bumped) - base).abs().amax(dim=-1)  # (B, T)
            worst = max(worst, float(d[~pads].max() / base[~pads].square().mean().sqrt()))
    return worst


@pytest.mark.parametrize("mode", ["screen", "exhaustive"])
def test_bert_with_attention_mask_ignores_padding(mode):
    bert = tiny_bert()
    x, am = bert_batch()
    fn = lambda t: bert(input_ids=t, attention_mask=am).last_hidden_state  # noqa: E731
    assert brute_padding_change(fn, x, am == 0) <= REF_TOL  # brute force agrees there is nothing to find
    report = check_padding(fn, x, am == 0, model=bert, mode=mode)
    assert isinstance(report, PaddingReport) and report.ok, report.summary()
    if mode == "exhaustive":
        assert np.isfinite(report.dependency[:, 9:]).any(axis=0).all()  # every padded column measured


def test_bert_without_attention_mask_fails_and_matches_brute_force():
    bert = tiny_bert()
    x, am = bert_batch()
    pads = am == 0
    fn = lambda t: bert(input_ids=t).last_hidden_state  # noqa: E731  the mask never reaches the model
    assert brute_padding_change(fn, x, pads) > REF_TOL  # brute force: real outputs do move
    report = check_padding(fn, x, pads, model=bert, mode="exhaustive")
    assert not report.ok and report.blame == "encoder.layer.0.attention.self"
    # brute force, column by column: [i, j] for outputs real and inputs padded in the same item
    with torch.no_grad():
        base = fn(x)
        scale = base[~pads].square().mean().sqrt()
        for j in (9, 12, 15):
            bumped = x.clone()
            bumped[:, j] = torch.where(pads[:, j], (x[:, j] + 1) % VOCAB, x[:, j])
            d = (fn(bumped) - base).abs().amax(dim=-1) / scale  # (B, T)
            d = torch.where(~pads & pads[:, j:j + 1], d, torch.zeros_like(d)).amax(dim=0)
            np.testing.assert_array_equal(np.nan_to_num(report.dependency[:, j]) > report.tolerance,
                                          (d > REF_TOL).numpy())


class PadEncoder(nn.Module):
    """An MHA encoder over float features; ``use_mask`` decides whether the padding mask reaches attention,
    ``pool`` adds a mean over every position, pads included."""

    def __init__(self, pads: torch.Tensor, use_mask: bool = True, pool: bool = False) -> None:
        super().__init__()
        self.pads, self.use_mask, self.pool = pads, use_mask, pool
        self.attn = nn.MultiheadAttention(32, 2, batch_first=True)
        self.mix = nn.Linear(32, 32)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        mask = self.pads if self.use_mask else None
        h = h + self.attn(h, h, h, key_padding_mask=mask, need_weights=False)[0]
        if self.pool:
            h = h + h.mean(dim=1, keepdim=True)  # pads included: the bug
        return self.mix(h)


@pytest.mark.parametrize("kind", ["masked", "mask_never_applied", "mean_pool_with_pads"])
def test_padding_probe_on_float_features(kind):
    pads = torch.zeros(2, 12, dtype=torch.bool)
    pads[0, 10:] = True
    pads[1, 6:] = True
    torch.manual_seed(0)
    model = PadEncoder(pads, use_mask=kind != "mask_never_applied", pool=kind == "mean_pool_with_pads").eval()
    x = torch.randn(2, 12, 32, generator=torch.Generator().manual_seed(4))
    report = check_padding(model, x, pads, mode="exhaustive")
    # brute force: add noise to each padded position of each item in turn and compare with torch directly
    with torch.no_grad():
        base = model(x)
        scale = base[~pads].square().mean().sqrt()
        worst = 0.0
        for b, j in zip(*torch.nonzero(pads, as_tuple=True)):
            bumped = x.clone()
            bumped[b, j] += torch.randn(32, generator=torch.Generator().manual_seed(int(j)))
            worst = max(worst, float((model(bumped) - base).abs().amax(-1)[b][~pads[b]].max() / scale))
    assert report.ok is (worst <= REF_TOL)
    assert report.ok is (kind == "masked")
    if kind == "mean_pool_with_pads":
        assert report.blame == ""  # the mean is taken in the model's own forward code
        assert "the model's own forward (PadEncoder)" in report.summary()
    if kind == "mask_never_applied":
        assert report.blame == "attn"


def test_assert_padding_message_and_pad_mask_checks():
    bert = tiny_bert()
    x, am = bert_batch()
    fn = lambda t: bert(input_ids=t).last_hidden_state  # noqa: E731
    report = check_padding(fn, x, am == 0, model=bert)
    i, j, m = report.violations[0]
    assert (i, j) == (0, 9)  # first real output, first padded input (item 1 is padded from position 9)
    with pytest.raises(AssertionError) as caught:
        assert_padding(fn, x, am == 0, model=bert)
    text = str(caught.value)
    assert f"real output position {i} moved by {m:.3g}" in text and f"padded input position {j}" in text
    assert "'encoder.layer.0.attention.self'" in text
    assert assert_padding(lambda t: bert(input_ids=t, attention_mask=am).last_hidden_state, x, am == 0) is None
    with pytest.raises(ShapeError, match=r"\(2, 16\)"):
        check_padding(fn, x, am[:, :8] == 0)
    with pytest.raises(OptionError, match="no position as padding"):
        check_padding(fn, x, torch.zeros(2, T_ZOO, dtype=torch.bool))
    with pytest.raises(OptionError, match="every position"):
        check_padding(fn, x, torch.ones(2, T_ZOO, dtype=torch.bool))


def test_block_used_in_zoo_is_causal_by_brute_force():
    # sanity of the zoo itself: its correct block is causal by brute force, its off-by-one block is not
    cfg = ZooConfig()
    for attn, leaks in (("causal", False), ("off_by_one", True)):
        torch.manual_seed(0)
        block = Block(cfg, attn=attn).eval()
        e = torch.randn(1, T_ZOO, cfg.width, generator=torch.Generator().manual_seed(0))
        assert bool(np.triu(jacobian_dependency(block, e), 1).any()) is leaks


def test_padding_screen_summary_does_not_claim_it_may_miss_positions():
    """The padding screen perturbs every padded position at once, so it names no partial-coverage caveat."""
    import attnscope

    def pools_over_pads(t):  # every output reads the mean over all positions, pads included
        return t.float().mean(dim=1, keepdim=True).expand(-1, t.size(1)).unsqueeze(-1) + 0 * t.unsqueeze(-1)

    ids = torch.randint(1, 9, (2, 6))
    pad = torch.zeros(2, 6, dtype=torch.bool)
    pad[1, 4:] = True
    text = attnscope.check_padding(pools_over_pads, ids, pad, vocab_size=10).summary()
    assert "does not ignore padding" in text and "need not find all" not in text
