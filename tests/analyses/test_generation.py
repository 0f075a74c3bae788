"""Incremental decoding with a key/value cache, stitched into one map per module.

Reference: the map a single full forward over the whole generated sequence gives (captured from the same
HF GPT-2, built from a tiny config), row for row; a hand-built example for cross-attention rows.
"""

from __future__ import annotations

import inspect

import numpy as np
import pytest
import torch

import attnscope
from attnscope.analyses.generation import stitch_steps
from attnscope.errors import OptionError, ShapeError
from attnscope.records import AttentionRecord, HeadSums

transformers = pytest.importorskip("transformers")

PROMPT, STEPS = 5, 6


def gpt2(impl):
    torch.manual_seed(0)
    cfg = transformers.GPT2Config(n_layer=2, n_head=4, n_embd=32, vocab_size=50, n_positions=32,
                                  resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
    return transformers.GPT2LMHeadModel._from_config(cfg, attn_implementation=impl).eval()


def decode(model, prompt, steps):
    """Greedy decoding by hand: the prompt once, then one token per step through the key/value cache."""
    # recent transformers call the cache `cache`, older ones `past_key_values`
    key = "cache" if "cache" in inspect.signature(type(model).forward).parameters else "past_key_values"
    fed = [prompt]
    out = model(prompt, use_cache=True)
    for _ in range(steps):
        tok = out.logits[:, -1:].argmax(-1)  # (B, 1)
        fed.append(tok)
        out = model(tok, use_cache=True, **{key: getattr(out, key)})
    return torch.cat(fed, dim=1)  # (B, P + steps): every token the model was fed


@pytest.mark.parametrize("impl", ["sdpa", "eager"])
def test_cached_steps_stitch_into_the_full_forward_map(impl):
    model = gpt2(impl)
    prompt = torch.randint(0, 50, (2, PROMPT))
    with torch.no_grad(), attnscope.capture(model) as steps:
        fed = decode(model, prompt, STEPS)
    assert [r.queries for r in steps.attention[::2]] == [PROMPT] + [1] * STEPS  # query length 1 per step
    with torch.no_grad(), attnscope.capture(model) as full:
        model(fed)  # reference: one forward over the whole sequence
    stitched = stitch_steps(steps)
    assert list(stitched) == ["transformer.h.0.attn", "transformer.h.1.attn"]
    total = PROMPT + STEPS
    for rec in full.attention:
        got = stitched[rec.name]
        assert got.weights.shape == (2, 4, total, total) and got.prompt == PROMPT
        np.testing.assert_array_equal(got.positions, np.arange(total))
        np.testing.assert_allclose(got.weights, rec.weights, atol=1e-5)  # every row equals the full forward's
        assert got.generated.shape == (2, 4, STEPS, total)
        np.testing.assert_allclose(got.generated, rec.weights[:, :, PROMPT:], atol=1e-5)
        np.testing.assert_array_equal(got.allowed, rec.allowed_full())  # the keys each step could see
        assert len(got.calls) == 1 + STEPS


def test_hf_generate_is_stitched_too():
    model = gpt2("sdpa")
    prompt = torch.randint(1, 50, (1, 4))
    config = transformers.GenerationConfig(max_new_tokens=5, do_sample=False, pad_token_id=0, eos_token_id=None)
    with torch.no_grad(), attnscope.capture(model) as cap:
        out = model.generate(prompt, attention_mask=torch.ones_like(prompt), generation_config=config)
    with torch.no_grad(), attnscope.capture(model) as full:
        model(out[:, :-1])  # the last token is produced, never fed
    stitched = stitch_steps(cap, layers="transformer.h.1.*")
    assert list(stitched) == ["transformer.h.1.attn"]
    np.testing.assert_allclose(stitched["transformer.h.1.attn"].weights, full.attention[1].weights, atol=1e-5)


def test_two_runs_in_one_capture_and_stats_only_are_refused():
    model = gpt2("sdpa")
    prompt = torch.randint(0, 50, (1, 3))
    with torch.no_grad(), attnscope.capture(model) as cap:
        decode(model, prompt, 2)
        decode(model, prompt, 2)
    with pytest.raises(ShapeError, match="more than one decoding run"):
        stitch_steps(cap)
    with torch.no_grad(), attnscope.capture(model, keep="stats") as stats:
        decode(model, prompt, 1)
    with pytest.raises(ShapeError, match="keep='maps'"):
        stitch_steps(stats)
    with pytest.raises(OptionError, match="Did you mean"):
        stitch_steps(cap, layers="transformer.h.0.atn")


def test_cross_attention_rows_stack_in_step_order():
    def rec(w, call):
        w = np.asarray(w, dtype=np.float32)[None, None]  # (1, 1, Tq, Tk)
        return AttentionRecord("dec.cross", "cross", w, None, False, HeadSums.zeros(1), w.shape, (0,), call=call)

    # worked by hand: a 2-query first call, then one query per step, over the same 3 source keys
    steps = [rec([[0.2, 0.3, 0.5], [0.1, 0.1, 0.8]], 0), rec([[1.0, 0.0, 0.0]], 1), rec([[0.0, 0.5, 0.5]], 2)]
    got = stitch_steps(steps)["dec.cross"]
    np.testing.assert_allclose(got.weights[0, 0], [[0.2, 0.3, 0.5], [0.1, 0.1, 0.8], [1, 0, 0], [0, 0.5, 0.5]])
    assert got.positions.tolist() == [0, 1, 2, 3] and got.prompt == 2
    bad = steps + [rec([[0.5, 0.5]], 3)]
    with pytest.raises(ShapeError, match="sources of different lengths"):
        stitch_steps(bad)
