"""Capture of HF transformers models built from tiny configs (random weights, no download).

Reference: HF's own eager attention with ``output_attentions=True`` on a model with the same weights.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch

import attnscope

transformers = pytest.importorskip("transformers")


def build(config, cls, impl):
    torch.manual_seed(0)  # a copy: HF models read the attention implementation from their config at run time
    return cls._from_config(copy.deepcopy(config), attn_implementation=impl).eval()


def gpt2_config():
    return transformers.GPT2Config(n_layer=2, n_head=4, n_embd=32, vocab_size=64, n_positions=32,
                                   resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)


@pytest.mark.parametrize("impl", ["sdpa", "eager"])
def test_gpt2_matches_hf_eager_attentions(impl):
    cfg = gpt2_config()
    model = build(cfg, transformers.GPT2LMHeadModel, impl)
    ref_model = build(cfg, transformers.GPT2LMHeadModel, "eager")
    ref_model.load_state_dict(model.state_dict())
    ids = torch.randint(0, 64, (2, 9))
    with torch.no_grad():
        ref = ref_model(ids, output_attentions=True, output_hidden_states=True)  # reference: HF eager
        plain = model(ids).logits
        with attnscope.capture(model) as cap:
            out = model(ids).logits
    torch.testing.assert_close(out, plain, atol=0, rtol=0)  # capture does not touch the computation
    assert [r.name for r in cap.attention] == ["transformer.h.0.attn", "transformer.h.1.attn"]
    for rec, ref_w in zip(cap.attention, ref.attentions):
        np.testing.assert_allclose(rec.weights, ref_w.numpy(), atol=1e-5)
        assert rec.kind == "self" and rec.causal
        assert rec.source == ("sdpa" if impl == "sdpa" else "softmax")
    assert [r.name for r in cap.residual] == ["transformer.h.0", "transformer.h.1"]
    # hidden_states[1] is block 0's output (the last entry has ln_f applied, so only block 0 compares)
    np.testing.assert_allclose(cap.residual[0].norms, ref.hidden_states[1].norm(dim=-1).numpy(), rtol=1e-5)


@pytest.mark.parametrize("impl", ["sdpa", "eager"])
def test_bert_with_padding(impl):
    cfg = transformers.BertConfig(num_hidden_layers=2, num_attention_heads=2, hidden_size=32, intermediate_size=64,
                                  vocab_size=80, max_position_embeddings=32, hidden_dropout_prob=0.0,
                                  attention_probs_dropout_prob=0.0)
    model = build(cfg, transformers.BertModel, impl)
    ref_model = build(cfg, transformers.BertModel, "eager")
    ref_model.load_state_dict(model.state_dict())
    ids = torch.randint(1, 80, (2, 7))
    att = torch.tensor([[1, 1, 1, 1, 1, 1, 1], [1, 1, 1, 1, 0, 0, 0]])
    with torch.no_grad():
        ref = ref_model(ids, attention_mask=att, output_attentions=True)  # reference: HF eager
        with attnscope.capture(model) as cap:
            model(ids, attention_mask=att)
    assert len(cap.attention) == 2
    for rec, ref_w in zip(cap.attention, ref.attentions):
        np.testing.assert_allclose(rec.weights, ref_w.numpy(), atol=1e-5)
        allowed = rec.allowed_full()
        assert not allowed[1, :, :, 4:].any() and allowed[0].all() and allowed[1, :, :, :4].all()
        assert not rec.causal and rec.kind == "self"
    assert [r.name for r in cap.residual] == ["encoder.layer.0", "encoder.layer.1"]


@pytest.mark.parametrize("impl", ["sdpa", "eager"])
def test_bart_cross_attention_labelled_cross(impl):
    cfg = transformers.BartConfig(vocab_size=60, d_model=32, encoder_layers=1, decoder_layers=2,
                                  encoder_attention_heads=2, decoder_attention_heads=4, encoder_ffn_dim=64,
                                  decoder_ffn_dim=64, max_position_embeddings=32, dropout=0.0, attention_dropout=0.0)
    model = build(cfg, transformers.BartModel, impl)
    ref_model = build(cfg, transformers.BartModel, "eager")
    ref_model.load_state_dict(model.state_dict())
    src = torch.randint(3, 60, (2, 8))
    tgt = torch.randint(3, 60, (2, 5))
    with torch.no_grad():
        ref = ref_model(input_ids=src, decoder_input_ids=tgt, output_attentions=True)  # reference: HF eager
        with attnscope.capture(model) as cap:
            model(input_ids=src, decoder_input_ids=tgt)
    by_kind = {}
    for rec in cap.attention:
        by_kind.setdefault((rec.name.split(".")[0], rec.kind), []).append(rec)
    enc, dec_self, dec_cross = by_kind[("encoder", "self")], by_kind[("decoder", "self")], by_kind[("decoder", "cross")]
    assert [r.name for r in dec_cross] == ["decoder.layers.0.encoder_attn", "decoder.layers.1.encoder_attn"]
    for recs, refs in ((enc, ref.encoder_attentions), (dec_self, ref.decoder_attentions), (dec_cross, ref.cross_attentions)):
        assert len(recs) == len(refs)
        for rec, ref_w in zip(recs, refs):
            np.testing.assert_allclose(rec.weights, ref_w.numpy(), atol=1e-5)
    assert all(r.causal for r in dec_self) and not any(r.causal for r in dec_cross)
    assert dec_cross[0].shape == (2, 4, 5, 8)


@pytest.mark.parametrize("impl", ["sdpa", "eager"])
def test_t5_relative_bias_and_cross(impl):
    cfg = transformers.T5Config(vocab_size=50, d_model=32, d_kv=8, d_ff=64, num_layers=1, num_decoder_layers=2,
                                num_heads=4, dropout_rate=0.0)
    model = build(cfg, transformers.T5Model, impl)
    ref_model = build(cfg, transformers.T5Model, "eager")
    ref_model.load_state_dict(model.state_dict())
    src, tgt = torch.randint(0, 50, (2, 6)), torch.randint(0, 50, (2, 4))
    with torch.no_grad():
        ref = ref_model(input_ids=src, decoder_input_ids=tgt, output_attentions=True)  # reference: HF eager
        with attnscope.capture(model) as cap:
            model(input_ids=src, decoder_input_ids=tgt)
    cross = [r for r in cap.attention if r.kind == "cross"]
    dec_self = [r for r in cap.attention if r.name.startswith("decoder") and r.kind == "self"]
    assert [r.name for r in cross] == [f"decoder.block.{i}.layer.1.EncDecAttention" for i in range(2)]
    for rec, ref_w in zip(cross + dec_self, ref.cross_attentions + ref.decoder_attentions):
        np.testing.assert_allclose(rec.weights, ref_w.numpy(), atol=1e-5)
    assert all(r.causal for r in dec_self)
