"""check_cache: cached decoding against one full forward, on HF models, our correct decoder and planted bugs."""

import pytest
import torch

import attnscope
from attnscope.analyses.cache import check_cache, default_schedules
from attnscope.cli import main
from attnscope.demo.cached_decoder import CachedDecoder, CachedDecoderConfig
from attnscope.errors import OptionError, ShapeError

WINDOW = 4


def decoder(bug="none", *, window=None, alibi=False, seed=0):
    torch.manual_seed(seed)
    return CachedDecoder(CachedDecoderConfig(cache_bug=bug, window=window, alibi=alibi)).eval()


def ids(T=13, B=2, seed=1):
    return torch.randint(0, 16, (B, T), generator=torch.Generator().manual_seed(seed))


def brute_first_difference(model, x, chunks):
    """Outside reference: our own loop over the chunks, compared per position with torch.allclose."""
    with torch.no_grad():
        ref, outs, cache, start = model(x), [], None, 0
        for size in chunks:
            out, cache = model.step(x[:, start:start + size], cache)
            outs.append(out)
            start += size
        got = torch.cat(outs, dim=1)
    bad = [t for t in range(x.size(1)) if not torch.allclose(got[:, t], ref[:, t], atol=1e-5, rtol=1e-4)]
    return bad[0] if bad else None


@pytest.mark.parametrize("window,alibi", [(None, False), (WINDOW, False), (None, True), (WINDOW, True)])
def test_correct_cache_agrees_with_full_forward(window, alibi):
    model, x = decoder(window=window, alibi=alibi), ids()
    report = check_cache(model.step, x, full=model, model=model)
    assert report.ok, report.summary()
    assert [s.name for s in report.schedules] == ["one at a time", "prefill then one at a time", "uneven chunks"]
    for s in report.schedules:  # brute force agrees: no position differs
        assert brute_first_difference(model, x, s.chunks) is None
        assert s.difference.max() < 1e-5  # float32 paths agree to ~1e-6 of the scale (common practice, no source)
    assert "agrees with the full forward" in report.summary()


# bug, window, alibi, schedules that must fail, first position under 'one at a time' worked out by hand
PLANTED = [
    # no mask once a cache exists: single-token steps have no future to see; a multi-token chunk after a
    # cache does. Uneven chunks (1, 3, ...): chunk 1 covers positions 1..3 and position 1 sees 2 and 3.
    ("mask_only_without_cache", None, False, {"uneven chunks"}, None),
    # top-left is_causal: the step at position 1 (query length 1, keys 2) sees key 0 only
    ("top_left_causal", None, False, {"one at a time", "prefill then one at a time", "uneven chunks"}, 1),
    # the band over the chunk lets every cached key in: position WINDOW is the first with a key out of reach
    ("window_over_query", WINDOW, False, {"one at a time", "prefill then one at a time", "uneven chunks"}, WINDOW),
    # ALiBi with chunk positions: the step at position 1 takes its distances to keys 0, 1 as 0, 1 (truly 1, 0)
    ("alibi_over_query", None, True, {"one at a time", "prefill then one at a time", "uneven chunks"}, 1),
]


@pytest.mark.parametrize("bug,window,alibi,failing,first", PLANTED)
def test_each_planted_cache_bug_is_caught_and_blamed_on_the_attention(bug, window, alibi, failing, first):
    model, x = decoder(bug, window=window, alibi=alibi), ids()
    report = check_cache(model.step, x, full=model, model=model)
    assert not report.ok
    assert {s.name for s in report.failing} == failing
    for s in report.schedules:
        assert s.first_position == brute_first_difference(model, x, s.chunks)  # brute force, our own loop
        if not s.ok:
            assert s.blame == "blocks.0.attn" and s.blame_type == "CachedSelfAttention"
            assert s.magnitude > 1e-2
    if first is not None:
        assert report.schedules[0].first_position == first
    text = report.summary()
    assert "disagrees with the full forward" in text and "'blocks.0.attn'" in text


def test_blame_names_the_one_block_that_carries_the_bug():
    model, bad = decoder(), decoder("top_left_causal")
    model.blocks[1].attn = bad.blocks[1].attn  # only the second block's attention is wrong
    report = check_cache(model.step, ids(), full=model, model=model)
    assert not report.ok and report.blame == "blocks.1.attn"


@pytest.mark.slow
def test_hf_models_pass_with_their_own_cache():
    transformers = pytest.importorskip("transformers")
    torch.manual_seed(0)
    gpt2 = transformers.GPT2LMHeadModel(transformers.GPT2Config(
        vocab_size=50, n_positions=32, n_embd=32, n_layer=2, n_head=4, bos_token_id=0, eos_token_id=0))
    llama = transformers.LlamaForCausalLM(transformers.LlamaConfig(
        vocab_size=50, hidden_size=32, intermediate_size=64, num_hidden_layers=2, num_attention_heads=4,
        num_key_value_heads=2, max_position_embeddings=32, bos_token_id=0, eos_token_id=0))
    x = torch.randint(0, 50, (2, 11), generator=torch.Generator().manual_seed(0))
    for model in (gpt2, llama):
        report = check_cache(model, x)  # HF's own cache is the reference behaviour
        assert report.ok, report.summary()
        assert max(s.difference.max() for s in report.schedules) < 1e-5
        assert model.training is True  # a fresh HF model is in training mode; the check restores it


def test_schedules_and_bad_inputs():
    assert default_schedules(7)["uneven chunks"] == (1, 3, 2, 1)
    assert all(sum(c) == 20 for c in default_schedules(20).values())
    model = decoder()
    report = check_cache(model.step, ids(T=6), full=model, schedules={"halves": (3, 3)})
    assert [s.name for s in report.schedules] == ["halves"] and report.ok
    with pytest.raises(OptionError, match="summing to T=6"):
        check_cache(model.step, ids(T=6), full=model, schedules=[(2, 2)])
    with pytest.raises(OptionError, match="full="):
        check_cache(model.step, ids(T=6))
    with pytest.raises(ShapeError, match="integer tensor"):
        check_cache(model.step, torch.randn(1, 6), full=model)


def test_assert_cache_raises_with_the_summary():
    bad = decoder("top_left_causal")
    with pytest.raises(AssertionError, match="first difference at position 1"):
        attnscope.assert_cache(bad.step, ids(), full=bad, model=bad)


CLI_ZOO = """
from attnscope.demo.cached_decoder import CachedDecoder, CachedDecoderConfig
import torch

def _pair(bug):
    torch.manual_seed(0)
    m = CachedDecoder(CachedDecoderConfig(cache_bug=bug, window=4)).eval()
    return m.step, torch.randint(0, 16, (1, 10)), m, m

def good():
    return _pair("none")

def bad():
    return _pair("window_over_query")
"""


def test_check_cache_command_exit_codes(tmp_path, monkeypatch, capsys):
    (tmp_path / "cachezoo.py").write_text(CLI_ZOO)
    monkeypatch.chdir(tmp_path)
    assert main(["check-cache", "cachezoo:good"]) == 0
    assert "agrees with the full forward" in capsys.readouterr().out
    assert main(["check-cache", "cachezoo:bad"]) == 1
    assert "first difference at position 4" in capsys.readouterr().out
    assert main(["check-cache", "cachezoo:nothing"]) == 2


def test_step_that_breaks_the_contract_fails_at_the_door():
    model = decoder()
    with pytest.raises(attnscope.ProbeError, match=r"\(out_chunk, state\)"):
        check_cache(lambda chunk, state: model.step(chunk, state)[0], ids(T=4), full=model)
    with pytest.raises(ShapeError, match="chunk's 1 positions"):
        check_cache(lambda chunk, state: (model(chunk)[:, :0], state), ids(T=4), full=model)
    with pytest.raises(ShapeError, match="full"):
        check_cache(model.step, ids(T=4), full=lambda x: model(x)[:, :2])


def test_modes_are_restored_and_float64_uses_its_own_tolerance():
    model = decoder().double().train()
    report = check_cache(model.step, ids(T=6), full=model, model=model)
    assert report.ok and report.tolerance == 1e-8  # float64 outputs: 1e-8, as check_causal
    assert all(m.training for m in model.modules())  # train mode given back
