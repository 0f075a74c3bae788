"""check_mask / assert_mask on planted mask bugs written here, and the sequence axis of the probes.

References used below:
- brute force: perturb one input position at a time with plain torch (two id shifts) and compare outputs
  directly (``brute``), no attnscope code involved;
- the masks of the models under test are written out by hand in ``mask_zoo.hand_mask``, not with attnscope's
  pattern builders; torch's own ``nn.TransformerEncoderLayer(batch_first=False)`` for the sequence-first case.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from mask_zoo import VOCAB, ShiftMix, build, with_docs
from torch import nn

from attnscope.analyses.causality import check_causal, check_padding
from attnscope.analyses.contracts import MaskReport, assert_mask, check_mask
from attnscope.analyses.patterns import causal_pattern, documents_pattern, prefix_pattern, window_pattern
from attnscope.errors import OptionError, ShapeError

T = 24
REF_TOL = 1e-4
DOCS = torch.tensor([[0] * 7 + [1] * 9 + [2] * 8,          # item 0: three documents
                     [0] * 12 + [1] * 12])                  # item 1: packed differently


def ids(B: int = 2, seed: int = 1) -> torch.Tensor:
    return torch.randint(0, VOCAB, (B, T), generator=torch.Generator().manual_seed(seed))


def brute(fn, x: torch.Tensor) -> np.ndarray:
    """Reference: [b, i, j] True when output i of item b moves after replacing token j of item b alone."""
    with torch.no_grad():
        base = fn(x)  # (B, T, V)
        scale = base.square().mean().sqrt()
        B = x.shape[0]
        dep = np.zeros((B, T, T), dtype=bool)
        for shift in (1, 7):
            for j in range(T):
                bumped = x.clone()
                bumped[:, j] = (bumped[:, j] + shift) % VOCAB
                moved = (fn(bumped) - base).abs().amax(-1) / scale  # (B, T)
                dep[:, :, j] |= (moved > REF_TOL).numpy()
    return dep


def assert_real(report: MaskReport, dep: np.ndarray) -> None:
    """Every reported violation is a dependence brute force sees, in the item named, and forbidden there."""
    assert report.violations
    for i, j, _, b in report.violations:
        assert dep[b, i, j], (i, j, b)  # reference: brute force
        assert not report.allowed[b, i, j]


# -- planted bugs, each with its corrected twin ----------------------------------------------------------------


@pytest.mark.parametrize("mode", ["screen", "exhaustive"])
def test_packed_documents_leaking_across_are_caught_and_blamed(mode: str) -> None:
    x = ids()
    leaky = build("documents", "documents_leak")
    fn = with_docs(leaky, DOCS)
    report = check_mask(fn, x, documents_pattern(DOCS), model=leaky, mode=mode)
    dep = brute(fn, x)
    assert dep[~documents_pattern(DOCS).numpy()].any()  # reference: brute force sees the planted leak
    assert not report.ok and report.blame == "blocks.1.attn" and report.blame_type == "MaskedAttention"
    assert_real(report, dep)
    assert all(DOCS[b, i] != DOCS[b, j] for i, j, _, b in report.violations)
    if mode == "exhaustive":  # every forbidden pair brute force sees, and no other
        forbidden_seen = dep & ~documents_pattern(DOCS).numpy()
        assert {(i, j) for i, j in zip(*np.nonzero(forbidden_seen.any(0)))} == \
               {(v.output_pos, v.input_pos) for v in report.violations}
    twin = build("documents", "documents")
    good = check_mask(with_docs(twin, DOCS), x, documents_pattern(DOCS), model=twin, mode=mode)
    assert good.ok and not good.violations
    assert not (brute(with_docs(twin, DOCS), x) & ~documents_pattern(DOCS).numpy()).any()  # reference


@pytest.mark.parametrize("mode", ["screen", "exhaustive"])
def test_sliding_window_off_by_one_is_caught_and_reported_as_declared_vs_used(mode: str) -> None:
    x = ids()
    declared = window_pattern(T, 4, layers=2)  # 2 layers of 4 keys: 2·3 + 1 = 7 positions
    leaky = build("window", "window_off_by_one", param=4)
    report = check_mask(leaky, x, declared, mode=mode)
    dep = brute(leaky, x)
    assert not report.ok and report.blame == "blocks.1.attn"
    assert_real(report, dep)
    assert report.window_declared == 7
    used = max(i - j + 1 for b, i, j in zip(*np.nonzero(dep)))  # reference: brute force, 3 + 4 + 1 = 8
    assert used == 8
    if mode == "exhaustive":
        assert report.window_used == used
        assert "declared window 7, uses 8" in report.summary()
    else:
        assert 7 < report.window_used <= used and "declared window 7, uses at least" in report.summary()
    twin = build("window", "window", param=4)
    good = check_mask(twin, x, declared, mode=mode)
    assert good.ok
    if mode == "exhaustive":
        assert good.window_used == max(i - j + 1 for b, i, j in zip(*np.nonzero(brute(twin, x)))) == 7


def test_one_block_on_hidden_states_checks_the_per_layer_window() -> None:
    leaky = build("window", "window_off_by_one", param=4)
    h = torch.randn(1, T, 24, generator=torch.Generator().manual_seed(3))
    block = leaky.blocks[1]
    report = check_mask(block, h, window_pattern(T, 4), mode="exhaustive")
    assert not report.ok and report.window_used == 5 and report.blame == "attn"
    assert check_mask(leaky.blocks[0], h, window_pattern(T, 4)).ok


def test_prefix_too_long_is_caught_and_the_twin_passes() -> None:
    x = ids()
    leaky = build("prefix", "prefix_long", param=6)
    report = check_mask(leaky, x, prefix_pattern(T, 6))
    assert not report.ok and report.blame == "blocks.1.attn"
    assert_real(report, brute(leaky, x))
    assert any(v.input_pos == 6 and v.output_pos < 6 for v in report.violations)
    assert check_mask(build("prefix", "prefix", param=6), x, prefix_pattern(T, 6)).ok


def test_a_leak_outside_attention_is_blamed_on_the_mixing_module() -> None:
    x = ids()
    leaky = build("documents", "documents", mix1=ShiftMix(per_document=False))
    fn = with_docs(leaky, DOCS)
    report = check_mask(fn, x, documents_pattern(DOCS), model=leaky)
    assert not report.ok and report.blame == "blocks.1.mix" and report.blame_type == "ShiftMix"
    assert_real(report, brute(fn, x))
    twin = build("documents", "documents", mix1=ShiftMix(per_document=True))
    assert check_mask(with_docs(twin, DOCS), x, documents_pattern(DOCS), model=twin).ok


def test_allowed_but_unused_dependence_is_not_a_violation() -> None:
    x = ids()
    windowed = build("window", "window", param=3)
    for loose in (causal_pattern(T), prefix_pattern(T, 10), torch.ones(T, T, dtype=torch.bool)):
        report = check_mask(windowed, x, loose, mode="exhaustive")
        assert report.ok and not report.violations
    assert report.window_used == 5  # two layers of 3 keys: 2·2 + 1, brute force agrees below
    assert max(i - j + 1 for b, i, j in zip(*np.nonzero(brute(windowed, x)))) == 5  # reference: brute force
    assert (report.reach_ahead == 0).all()


def test_a_flexattention_style_predicate_is_the_same_contract() -> None:
    x = ids()
    leaky = build("documents", "documents_leak")
    fn = with_docs(leaky, DOCS)

    def mask_mod(b, h, q_idx, kv_idx):  # FlexAttention's convention
        return (DOCS[b, q_idx] == DOCS[b, kv_idx]) & (q_idx >= kv_idx)

    a = check_mask(fn, x, mask_mod, model=leaky, mode="exhaustive")
    b = check_mask(fn, x, documents_pattern(DOCS), model=leaky, mode="exhaustive")
    assert not a.ok and [v[:2] for v in a.violations] == [v[:2] for v in b.violations]


def test_the_screen_costs_far_fewer_forwards_than_positions() -> None:
    x = ids(B=1)
    docs = DOCS[:1]
    twin = build("documents", "documents")
    report = check_mask(with_docs(twin, docs), x, documents_pattern(docs), model=twin)
    assert report.ok and report.forwards <= 5 < T


def test_assert_mask_names_the_violation() -> None:
    x = ids()
    leaky = build("window", "window_off_by_one", param=4)
    with pytest.raises(AssertionError, match="breaks the declared pattern.*blocks.1.attn"):
        assert_mask(leaky, x, window_pattern(T, 4, layers=2))
    assert_mask(build("window", "window", param=4), x, window_pattern(T, 4, layers=2))


def test_bad_patterns_fail_at_the_door() -> None:
    model = build("causal", "causal")
    with pytest.raises(ShapeError, match=r"\(T, T\) = \(24, 24\)"):
        check_mask(model, ids(), causal_pattern(T + 1))
    with pytest.raises(OptionError, match="mode"):
        check_mask(model, ids(), causal_pattern(T), mode="fast")


# -- the sequence axis (issue: a probe must never pass because it perturbed the wrong axis) -------------------


def _seq_first_encoder(diagonal: int):
    torch.manual_seed(0)
    enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(32, 4, 64, dropout=0.0), 2,
                                enable_nested_tensor=False).eval()  # torch's own layers, (T, B, D)
    emb = nn.Embedding(50, 32)
    fn = lambda s: enc(emb(s), mask=torch.triu(torch.full((len(s), len(s)), float("-inf")), diagonal=diagonal))  # noqa: E731
    return fn, enc


def test_sequence_first_repro_is_caught_on_the_right_axis() -> None:
    leaky, enc = _seq_first_encoder(diagonal=2)  # lets each position see one step ahead
    x = torch.randint(0, 50, (12, 2), generator=torch.Generator().manual_seed(0))  # (T, B)
    report = check_causal(leaky, x, model=enc)
    assert not report.ok and report.seq_dim == 0 and report.batch_dim == 1
    assert "axis 0" in report.summary()
    good, enc2 = _seq_first_encoder(diagonal=1)
    exhaustive = check_causal(good, x, model=enc2, mode="exhaustive")
    assert exhaustive.ok and exhaustive.seq_dim == 0
    assert "sequence-first" in exhaustive.axis_source or "probing" in exhaustive.axis_source
    assert not check_causal(leaky, x[:, :1], model=enc).ok  # a batch of one, (T, 1): from the layers' layout


def test_layout_of_the_layers_decides_a_batch_of_one_and_a_probe_decides_wrappers() -> None:
    leaky, enc = _seq_first_encoder(diagonal=2)
    x = torch.randint(0, 50, (12, 1))
    report = check_causal(leaky, x, model=enc)
    assert report.seq_dim == 0 and "sequence-first" in report.axis_source and not report.ok
    wrapped = lambda ids: leaky(ids.T).transpose(0, 1)  # noqa: E731 - (B, T) outside, (T, B) inside
    r = check_causal(wrapped, x.T.repeat(3, 1), model=enc)
    assert r.seq_dim == 1 and "probing" in r.axis_source and not r.ok


def test_an_undecidable_axis_is_refused_naming_the_axes() -> None:
    fn = lambda h: h.cumsum(0).cumsum(1)  # noqa: E731 - mixes along both axes, no layer to ask
    with pytest.raises(OptionError, match=r"axis 0 \(6\) or axis 1 \(5\).*seq_dim=0"):
        check_causal(fn, torch.randn(6, 5, 3))
    assert check_causal(fn, torch.randn(6, 5, 3), seq_dim=1).seq_dim == 1  # given: used as given


def test_padding_probe_takes_the_axis_from_the_pad_mask() -> None:
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(8, 2)  # (T, B, D)
    pads = torch.tensor([[False] * 6, [False] * 4 + [True] * 2])  # (B, T)
    x = torch.randn(6, 2, 8)  # (T, B, D)
    ok = check_padding(lambda h: mha(h, h, h, key_padding_mask=pads)[0], x, pads, model=mha)
    bad = check_padding(lambda h: mha(h, h, h)[0], x, pads, model=mha)
    assert ok.ok and not bad.ok and ok.seq_dim == bad.seq_dim == 0


def test_a_model_returning_only_the_last_position_gets_a_hint() -> None:
    model = build("causal", "causal")
    for x in (ids(B=1), ids(B=2)):
        with pytest.raises(ShapeError, match=r"one position only.*lambda ids: model\(ids, targets=ids\)"):
            check_causal(lambda s: model(s)[:, -1:], x, model=model)


# -- the command line -------------------------------------------------------------------------------------------

CLI_ZOO = '''
import torch
import torch.nn.functional as F
from torch import nn

class Win(nn.Module):
    def __init__(self, keys):
        super().__init__()
        torch.manual_seed(0)
        self.keys, self.emb, self.qkv = keys, nn.Embedding(30, 16), nn.Linear(16, 48)

    def forward(self, ids):
        x = self.emb(ids)
        q, k, v = self.qkv(x).view(*ids.shape, 3, 2, 8).permute(2, 0, 3, 1, 4)
        i, j = torch.arange(ids.size(1))[:, None], torch.arange(ids.size(1))[None]
        return F.scaled_dot_product_attention(q, k, v, attn_mask=(j <= i) & (i - j < self.keys)).transpose(1, 2).flatten(2)

def good():
    return Win(4)

def wide():
    return Win(5)

def packed():
    m = Win(100)
    docs = torch.tensor([[0] * 5 + [1] * 7])
    allowed = (docs[:, :, None] == docs[:, None, :]) & torch.ones(12, 12, dtype=torch.bool).tril()
    return m, torch.randint(0, 30, (1, 12)), allowed, m
'''


def test_check_mask_command_exits_1_on_a_violation(tmp_path, monkeypatch, capsys) -> None:
    from attnscope.cli import main

    (tmp_path / "maskzoo.py").write_text(CLI_ZOO)
    monkeypatch.chdir(tmp_path)
    assert main(["check-mask", "maskzoo:good", "--window", "4", "--seq", "16"]) == 0
    assert "keeps to the declared pattern" in capsys.readouterr().out
    assert main(["check-mask", "maskzoo:wide", "--window", "4", "--seq", "16", "--mode", "exhaustive"]) == 1
    assert "declared window 4, uses 5" in capsys.readouterr().out
    assert main(["check-mask", "maskzoo:packed"]) == 1  # a plain causal model over two packed documents
    assert "breaks the declared pattern" in capsys.readouterr().out
    assert main(["check-mask", "maskzoo:good"]) == 2  # no pattern at all
    assert "needs the pattern" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["check-mask", "--help"])
    assert "--window" in capsys.readouterr().out
