"""Capture of HF transformers models built from tiny configs (random weights, no download).

Reference: HF's own eager attention with ``output_attentions=True`` on a model with the same weights.
"""

from __future__ import annotations

import copy
import importlib

import numpy as np
import pytest
import torch

import attnscope
from reference_stats import assert_means_match  # tests/capture/reference_stats.py

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


# ---------------------------------------------------------------- the families table
# Each family is built from a tiny config with random weights (2 layers, width 32, 4 heads, T=8) and checked
# against transformers' own eager ``output_attentions`` on a twin with the same weights: unpadded and padded,
# prefill and one cached decode step, with every attention implementation the family offers on CPU.
def _cfg(name, **kw):
    return getattr(transformers, name)(**kw)


SMALL = dict(vocab_size=64, hidden_size=32, intermediate_size=64, num_hidden_layers=2, num_attention_heads=4,
             max_position_embeddings=64)
DECODERS = {
    # name: (config factory, model class name)
    "llama-gqa": (lambda: _cfg("LlamaConfig", num_key_value_heads=2, **SMALL), "LlamaForCausalLM"),
    "mistral-sliding": (lambda: _cfg("MistralConfig", num_key_value_heads=2, sliding_window=4, **SMALL),
                        "MistralForCausalLM"),
    "gemma3-sliding": (lambda: _cfg("Gemma3TextConfig", num_key_value_heads=2, head_dim=8, sliding_window=4,
                                    layer_types=["sliding_attention", "full_attention"],
                                    attn_logit_softcapping=None, **SMALL), "Gemma3ForCausalLM"),
    "qwen2": (lambda: _cfg("Qwen2Config", num_key_value_heads=2, **SMALL), "Qwen2ForCausalLM"),
    "qwen3": (lambda: _cfg("Qwen3Config", num_key_value_heads=2, head_dim=8, **SMALL), "Qwen3ForCausalLM"),
    "mixtral": (lambda: _cfg("MixtralConfig", num_key_value_heads=2, num_local_experts=4, num_experts_per_tok=2,
                             **SMALL), "MixtralForCausalLM"),
    "gpt2": (lambda: _cfg("GPT2Config", n_layer=2, n_head=4, n_embd=32, vocab_size=64, n_positions=64,
                          bos_token_id=0, eos_token_id=0),
             "GPT2LMHeadModel"),
    "gpt-neox": (lambda: _cfg("GPTNeoXConfig", **SMALL), "GPTNeoXForCausalLM"),
    "phi": (lambda: _cfg("PhiConfig", **SMALL), "PhiForCausalLM"),
    "opt": (lambda: _cfg("OPTConfig", vocab_size=64, hidden_size=32, num_hidden_layers=2, ffn_dim=64,
                         num_attention_heads=4, max_position_embeddings=64, word_embed_proj_dim=32), "OPTForCausalLM"),
    "gemma": (lambda: _cfg("GemmaConfig", num_key_value_heads=2, head_dim=8, **SMALL), "GemmaForCausalLM"),
    "gemma2-sliding": (lambda: _cfg("Gemma2Config", num_key_value_heads=2, head_dim=8, sliding_window=4,
                                    attn_logit_softcapping=None, **SMALL), "Gemma2ForCausalLM"),
    "bloom": (lambda: _cfg("BloomConfig", vocab_size=64, hidden_size=32, n_layer=2, n_head=4), "BloomForCausalLM"),
    "xglm": (lambda: _cfg("XGLMConfig", vocab_size=64, d_model=32, ffn_dim=64, num_layers=2, attention_heads=4,
                          max_position_embeddings=64), "XGLMForCausalLM"),
    "falcon-mqa": (lambda: _cfg("FalconConfig", vocab_size=64, hidden_size=32, num_hidden_layers=2,
                                num_attention_heads=4), "FalconForCausalLM"),
}


EAGER_ONLY = {"bloom", "gemma2-sliding", "xglm"}  # transformers offers no sdpa path for these


def _cases(table):
    return [(f, impl) for f in sorted(table) for impl in ("sdpa", "eager") if impl == "eager" or f not in EAGER_ONLY]


def _twins(make_config, cls_name, impl):
    cfg = make_config()
    cls = getattr(transformers, cls_name)
    model = build(cfg, cls, impl)
    ref = build(cfg, cls, "eager")
    ref.load_state_dict(model.state_dict())
    return model, ref


def _close_on_allowed(rec, ref_w):
    """Compare where the query has an allowed key (rows with none are implementation-defined)."""
    ref_w = ref_w.float().numpy()
    assert rec.weights.shape == ref_w.shape, (rec.name, rec.weights.shape, ref_w.shape)
    rows = rec.allowed_full().any(axis=-1)  # (B, H, Tq)
    np.testing.assert_allclose(rec.weights[rows], ref_w[rows], atol=2e-5)  # reference: HF eager output_attentions


def _query_heads(model):
    cfg = model.config.get_text_config() if hasattr(model.config, "get_text_config") else model.config
    for attr in ("num_attention_heads", "n_head", "attention_heads"):
        if isinstance(getattr(cfg, attr, None), int):
            return getattr(cfg, attr)
    raise AssertionError("no head count in config")


@pytest.mark.parametrize(("family", "impl"), _cases(DECODERS))
def test_decoder_families_prefill_and_cached_step(family, impl):
    model, ref = _twins(*DECODERS[family], impl)
    heads = _query_heads(model)
    b, t = 2, 8
    torch.manual_seed(1)
    ids = torch.randint(3, 64, (b, t))
    padded = torch.ones(b, t, dtype=torch.long)
    padded[1, 6:] = 0  # right padding on the second row
    for mask in (None, padded):
        with torch.no_grad():
            ref_out = ref(ids, attention_mask=mask, output_attentions=True, use_cache=True)  # reference: HF eager
            plain = model(ids, attention_mask=mask, use_cache=True)
            with attnscope.capture(model) as cap:
                out = model(ids, attention_mask=mask, use_cache=True)
        torch.testing.assert_close(out.logits, plain.logits, atol=0, rtol=0)  # capture leaves it alone
        assert len(cap.attention) == len(ref_out.attentions) == 2
        for rec, ref_w in zip(cap.attention, ref_out.attentions):
            assert rec.kind == "self" and rec.causal, (family, rec)
            _close_on_allowed(rec, ref_w)
        assert len(cap.residual) == 2
        # one cached decode step: (B, H_q, 1, T+1), causal, the query after every cached key
        nxt = torch.randint(3, 64, (b, 1))
        step_mask = None if mask is None else torch.cat([mask, torch.ones(b, 1, dtype=torch.long)], dim=1)
        with torch.no_grad():
            ref_step = ref(nxt, attention_mask=step_mask, cache=ref_out.cache,
                           output_attentions=True, use_cache=True)  # reference: HF eager
            with attnscope.capture(model) as step:
                model(nxt, attention_mask=step_mask, cache=out.cache, use_cache=True)
        assert len(step.attention) == len(ref_step.attentions) == 2
        for rec, ref_w in zip(step.attention, ref_step.attentions):
            tk = ref_w.shape[-1]  # t + 1 keys, or the window a sliding-window cache keeps (HF's own count)
            assert tk == t + 1 or "sliding" in family
            assert rec.shape == (b, heads, 1, tk), (family, mask is not None, rec.shape)
            assert rec.kind == "self" and rec.causal and rec.query_offset == tk - 1, (family, rec)
            _close_on_allowed(rec, ref_w)


ENCODERS = {
    "bert": (lambda: _cfg("BertConfig", **SMALL), "BertModel"),
    "roberta": (lambda: _cfg("RobertaConfig", pad_token_id=1, **{**SMALL, "max_position_embeddings": 70}),
                "RobertaModel"),
    "distilbert": (lambda: _cfg("DistilBertConfig", vocab_size=64, dim=32, n_layers=2, n_heads=4, hidden_dim=64,
                                max_position_embeddings=64), "DistilBertModel"),
    "modernbert": (lambda: _cfg("ModernBertConfig", local_attention=4, global_attn_every_n_layers=2, pad_token_id=0,
                                eos_token_id=1, bos_token_id=2, cls_token_id=2, sep_token_id=1, **SMALL),
                   "ModernBertModel"),
}


@pytest.mark.parametrize(("family", "impl"), _cases(ENCODERS))
def test_encoder_families_padded_and_unpadded(family, impl):
    model, ref = _twins(*ENCODERS[family], impl)
    b, t = 2, 8
    torch.manual_seed(1)
    ids = torch.randint(3, 64, (b, t))
    padded = torch.ones(b, t, dtype=torch.long)
    padded[1, 5:] = 0
    for mask in (None, padded):
        with torch.no_grad():
            ref_out = ref(ids, attention_mask=mask, output_attentions=True)  # reference: HF eager
            with attnscope.capture(model) as cap:
                model(ids, attention_mask=mask)
        assert len(cap.attention) == len(ref_out.attentions) == 2
        for rec, ref_w in zip(cap.attention, ref_out.attentions):
            assert rec.kind == "self" and not rec.causal, (family, rec)
            _close_on_allowed(rec, ref_w)
            if mask is not None:
                assert not rec.allowed_full()[1, :, :, 5:].any()  # padded keys forbidden
        assert len(cap.residual) == 2


SEQ2SEQ = {
    "t5": (lambda: _cfg("T5Config", vocab_size=64, d_model=32, d_kv=8, d_ff=64, num_layers=2, num_decoder_layers=2,
                        num_heads=4), "T5Model"),
    "bart": (lambda: _cfg("BartConfig", vocab_size=64, d_model=32, encoder_layers=2, decoder_layers=2,
                          encoder_attention_heads=4, decoder_attention_heads=4, encoder_ffn_dim=64,
                          decoder_ffn_dim=64, max_position_embeddings=64), "BartModel"),
    "whisper": (lambda: _cfg("WhisperConfig", vocab_size=64, num_mel_bins=8, encoder_layers=2, decoder_layers=2,
                             encoder_attention_heads=4, decoder_attention_heads=4, d_model=32, encoder_ffn_dim=64,
                             decoder_ffn_dim=64, max_source_positions=8, max_target_positions=16, pad_token_id=0,
                             bos_token_id=1, eos_token_id=2, decoder_start_token_id=1), "WhisperModel"),
}


@pytest.mark.parametrize(("family", "impl"), _cases(SEQ2SEQ))
def test_encoder_decoder_families_prefill_and_cached_step(family, impl):
    model, ref = _twins(*SEQ2SEQ[family], impl)
    b, s, t = 2, 8, 5
    torch.manual_seed(1)
    if family == "whisper":
        src = {"input_features": torch.randn(b, 8, 16)}  # (B, mel bins, 2 * source positions)
    else:
        src_mask = torch.ones(b, s, dtype=torch.long)
        src_mask[1, 6:] = 0
        src = {"input_ids": torch.randint(3, 64, (b, s)), "attention_mask": src_mask}
    tgt = torch.randint(3, 64, (b, t))
    with torch.no_grad():
        ref_out = ref(**src, decoder_input_ids=tgt, output_attentions=True, use_cache=True)  # reference: HF eager
        with attnscope.capture(model) as cap:
            out = model(**src, decoder_input_ids=tgt, use_cache=True)
    expected = _eager_maps("seq2seq", ref_out)
    kinds = ["self"] * len(ref_out.encoder_attentions) + ["self", "cross"] * len(ref_out.decoder_attentions)
    assert [r.kind for r in cap.attention] == kinds
    for i, (rec, ref_w) in enumerate(zip(cap.attention, expected)):
        _close_on_allowed(rec, ref_w)
        assert rec.causal == (i >= len(ref_out.encoder_attentions) and rec.kind == "self"), (family, rec)
    nxt = torch.randint(3, 64, (b, 1))
    enc = (ref_out.encoder_last_hidden_state,)
    with torch.no_grad():
        ref_step = ref(encoder_outputs=enc, attention_mask=src.get("attention_mask"), decoder_input_ids=nxt,
                       cache=ref_out.cache, output_attentions=True, use_cache=True)
        with attnscope.capture(model) as step:
            model(encoder_outputs=(out.encoder_last_hidden_state,), attention_mask=src.get("attention_mask"),
                  decoder_input_ids=nxt, cache=out.cache, use_cache=True)
    expected = []
    for self_w, cross_w in zip(ref_step.decoder_attentions, ref_step.cross_attentions):
        expected += [self_w, cross_w]
    assert [r.kind for r in step.attention] == ["self", "cross"] * len(ref_step.decoder_attentions)
    for rec, ref_w in zip(step.attention, expected):
        _close_on_allowed(rec, ref_w)
        if rec.kind == "self":
            assert rec.shape[2:] == (1, t + 1) and rec.causal and rec.query_offset == t


@pytest.mark.parametrize("impl", ["sdpa", "eager"])
def test_padded_gqa_decoding_stitches_into_the_full_pass(impl):
    """Left-padded batched decoding on a GQA model: each step is (B, H_q, 1, Tk) and the steps stitch."""
    from attnscope.analyses.generation import stitch_steps

    model, _ = _twins(*DECODERS["llama-gqa"], impl)
    torch.manual_seed(2)
    ids = torch.randint(3, 64, (2, 8))
    mask = torch.ones(2, 8, dtype=torch.long)
    mask[1, :2] = 0  # left padding, as batched generation pads
    with torch.no_grad():
        with attnscope.capture(model) as cap:
            out = model(ids[:, :6], attention_mask=mask[:, :6], use_cache=True)
            out = model(ids[:, 6:7], attention_mask=mask[:, :7], cache=out.cache, use_cache=True)
            model(ids[:, 7:8], attention_mask=mask, cache=out.cache, use_cache=True)
        with attnscope.capture(model) as full:
            model(ids, attention_mask=mask)  # reference: one pass over the whole sequence
    assert [r.shape for r in cap.attention if r.name == "model.layers.0.self_attn"] == [
        (2, 4, 6, 6), (2, 4, 1, 7), (2, 4, 1, 8)]
    assert all(r.causal for r in cap.attention)
    stitched = stitch_steps(cap)
    for rec in full.attention:
        rows = rec.allowed_full().any(axis=-1)  # the padded row's first queries see no key
        np.testing.assert_allclose(stitched[rec.name].weights[rows], rec.weights[rows], atol=1e-5)


TABLES = {"decoder": DECODERS, "encoder": ENCODERS, "seq2seq": SEQ2SEQ}


def _stats_cases():
    return [(kind, f, impl) for kind, table in TABLES.items() for f, impl in _cases(table)]


def _weights_option_cases():
    return [(kind, f) for kind, f, impl in _stats_cases() if impl == "sdpa"]


def _padded_inputs(kind, family):
    """One right-padded batch for a model of *kind* (no query row is left without a key)."""
    b = 2
    torch.manual_seed(1)
    mask = torch.ones(b, 8, dtype=torch.long)
    mask[1, 6:] = 0
    if kind != "seq2seq":
        return {"input_ids": torch.randint(3, 64, (b, 8)), "attention_mask": mask}
    tgt = {"decoder_input_ids": torch.randint(3, 64, (b, 5))}
    if family == "whisper":
        return {"input_features": torch.randn(b, 8, 16), **tgt}  # (B, mel bins, 2 * source positions)
    return {"input_ids": torch.randint(3, 64, (b, 8)), "attention_mask": mask, **tgt}


def _eager_maps(kind, out):
    """HF eager output_attentions in capture's call order (encoder, then each decoder layer's self and cross)."""
    if kind != "seq2seq":
        return list(out.attentions)
    maps = list(out.encoder_attentions)
    for self_w, cross_w in zip(out.decoder_attentions, out.cross_attentions):
        maps += [self_w, cross_w]
    return maps


def _module_outputs(model, names, run):
    """The output (its first tensor) of each module named in *names* while *run()* runs, and the model's own."""
    modules = dict(model.named_modules())
    outs = {}

    def keep(name):
        def hook(module, args, out):
            outs[name] = (out[0] if isinstance(out, tuple) else out).detach().clone()
        return hook

    handles = [modules[n].register_forward_hook(keep(n)) for n in names]
    try:
        outs[""] = run()[0].detach().clone()  # logits or the last hidden state
    finally:
        for h in handles:
            h.remove()
    return outs


@pytest.mark.parametrize(("kind", "family"), _weights_option_cases())
def test_sdpa_weights_option_on_every_family_with_an_sdpa_path(kind, family, monkeypatch):
    """capture(sdpa="weights") on transformers' own sdpa attention (padding masks, GQA, sliding windows, cross-
    attention): every call is computed from the weights (the fused kernel never runs), the model's output differs
    from the plain model's by float rounding only, the maps equal HF eager output_attentions of the same weights,
    and keep="stats" equals statistics of those eager maps."""
    sdpa_path = importlib.import_module("attnscope.capture.paths.sdpa")
    computed = []
    real = sdpa_path._from_weights
    monkeypatch.setattr(sdpa_path, "_from_weights", lambda *a: computed.append(1) or real(*a))
    model, ref = _twins(*TABLES[kind][family], "sdpa")
    inputs = _padded_inputs(kind, family)
    with torch.no_grad():
        ref_maps = _eager_maps(kind, ref(**inputs, output_attentions=True))  # reference: HF eager
        with attnscope.capture(model, sdpa="weights", keep="stats") as st:
            model(**inputs)
        names = sorted({r.name for r in st.attention})
        plain = _module_outputs(model, names, lambda: model(**inputs))  # each attention module's output
        with attnscope.capture(model, sdpa="weights") as cap:
            got = _module_outputs(model, names, lambda: model(**inputs))
    for name in ["", *names]:
        # another summation order than the fused kernel's: float32 rounding, far below what a decision would notice
        diff = (got[name] - plain[name]).abs().max().item()
        assert diff <= 1e-5 * plain[name].abs().max().item(), (family, name, diff)
    assert len(cap.attention) == len(st.attention) == len(ref_maps)
    assert all(r.source == "sdpa" for r in cap.attention), [r.source for r in cap.attention]
    assert len(computed) == 2 * len(ref_maps)  # both captures computed every call from its weights
    for rec, srec, ref_w in zip(cap.attention, st.attention, ref_maps):
        _close_on_allowed(rec, ref_w)
        assert srec.weights is None and (srec.name, srec.kind, srec.shape) == (rec.name, rec.kind, rec.shape)
        assert_means_match(srec, ref_w, f"{family} {rec.name}")


@pytest.mark.parametrize(("kind", "family", "impl"), _stats_cases())
def test_statistics_of_every_family_equal_scipy_on_hf_eager_maps(kind, family, impl):
    """keep="stats" (no map kept; on sdpa models the fused call runs untouched and the statistics are reduced from
    the scores beside it, on eager models from the model's own softmax and its scores) against float64 statistics
    of HF eager output_attentions of the same weights, call by call."""
    model, ref = _twins(*TABLES[kind][family], impl)
    inputs = _padded_inputs(kind, family)
    with torch.no_grad():
        ref_maps = _eager_maps(kind, ref(**inputs, output_attentions=True))  # reference: HF eager
        plain = model(**inputs)[0]
        with attnscope.capture(model, keep="stats") as st:
            got = model(**inputs)[0]
    assert torch.equal(got, plain)  # the model's own computation is left alone
    assert len(st.attention) == len(ref_maps)
    for rec, ref_w in zip(st.attention, ref_maps):
        assert rec.weights is None and rec.shape == tuple(ref_w.shape), (family, rec.name, rec.shape)
        assert_means_match(rec, ref_w, f"{family} {rec.name}")
