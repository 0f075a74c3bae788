"""Capture of nn.MultiheadAttention, alone and inside nn.Transformer*, against torch's own per-head weights.

Reference throughout: torch's ``nn.MultiheadAttention(need_weights=True, average_attn_weights=False)`` called on
the same module with the same layer input.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

import attnscope


def reference_weights(mha: nn.MultiheadAttention, q, k, v, **kw) -> np.ndarray:
    """torch's own per-head weights (the reference), with capture closed."""
    with torch.no_grad():
        _, w = mha(q, k, v, need_weights=True, average_attn_weights=False, **kw)
    return w.numpy()


@pytest.mark.parametrize("batch_first", [True, False])
@pytest.mark.parametrize("mask_kind", ["none", "bool", "float", "padding", "both", "causal"])
def test_direct_mha_matches_torch(batch_first, mask_kind, seeded):
    mha = nn.MultiheadAttention(16, 4, batch_first=batch_first).eval()
    b, t = 3, 6
    x = torch.randn(b, t, 16) if batch_first else torch.randn(t, b, 16)
    kw = {}
    causal_bool = torch.ones(t, t, dtype=torch.bool).triu(1)  # MHA convention: True = may NOT attend
    pad = torch.zeros(b, t, dtype=torch.bool)
    pad[0, -2:] = True
    if mask_kind == "bool":
        kw["attn_mask"] = causal_bool
    elif mask_kind == "float":
        kw["attn_mask"] = torch.zeros(t, t).masked_fill(causal_bool, float("-inf"))
    elif mask_kind == "padding":
        kw["key_padding_mask"] = pad
    elif mask_kind == "both":
        kw["attn_mask"], kw["key_padding_mask"] = causal_bool, pad
    elif mask_kind == "causal":
        kw["attn_mask"], kw["is_causal"] = causal_bool, True
    with torch.no_grad(), attnscope.capture(mha) as cap:
        out, w = mha(x, x, x, need_weights=False, **kw)
    assert w is None  # the caller gets what it asked for
    (rec,) = cap.attention
    ref = reference_weights(mha, x, x, x, **kw)  # reference: torch's need_weights=True, average=False
    np.testing.assert_allclose(rec.weights, ref, atol=1e-6)
    assert rec.kind == "self" and rec.source == "mha" and rec.name == ""
    allowed = rec.allowed_full()
    # rows sum to 1 over allowed keys; nothing on forbidden keys
    np.testing.assert_allclose((rec.weights * allowed).sum(-1), 1.0, atol=1e-6)
    assert np.all(rec.weights[~allowed] == 0)
    if mask_kind == "none":
        assert rec.allowed is None and not rec.causal
    if mask_kind in ("bool", "float", "causal", "both"):
        assert rec.causal
        assert not allowed[:, :, np.triu_indices(t, 1)[0], np.triu_indices(t, 1)[1]].any()
    if mask_kind in ("padding", "both"):
        assert not allowed[0, :, :, -2:].any() and allowed[1, :, -1, -2:].all()  # last query sees all of item 1
    if mask_kind == "padding":
        assert not rec.causal


def test_averaged_weights_returned_as_torch_would(seeded):
    mha = nn.MultiheadAttention(8, 2, batch_first=True)
    x = torch.randn(2, 5, 8)
    expected_out, expected_w = mha(x, x, x)  # torch's default: averaged over heads
    with attnscope.capture(mha) as cap:
        out, w = mha(x, x, x)
    torch.testing.assert_close(w, expected_w, atol=1e-6, rtol=0)
    torch.testing.assert_close(out, expected_out, atol=1e-6, rtol=0)
    np.testing.assert_allclose(cap.attention[0].weights.mean(1), expected_w.detach().numpy(), atol=1e-6)


def test_unbatched_and_bias_k_add_zero_attn(seeded):
    mha = nn.MultiheadAttention(8, 2, add_bias_kv=True, add_zero_attn=True)
    q = torch.randn(4, 8)  # unbatched (T, D)
    kpm = torch.tensor([False, False, True, False])
    with attnscope.capture(mha) as cap:
        mha(q, q, q, key_padding_mask=kpm)
    rec = cap.attention[0]
    ref = reference_weights(mha, q, q, q, key_padding_mask=kpm)  # (H, Tq, Tk + 2)
    np.testing.assert_allclose(rec.weights[0], ref, atol=1e-6)
    assert rec.shape == (1, 2, 4, 6)
    allowed = rec.allowed_full()[0, 0]
    assert allowed[:, 2].sum() == 0 and allowed[:, 4:].all()  # bias_k and the zero key are allowed, as torch does


def _layer_inputs(module: nn.Module, attr: str):
    """Grab what a layer passes to its attention submodule (test-side hook, removed after use)."""
    seen = []

    def grab(mod, args, kwargs):
        seen.append((args, kwargs))

    handle = getattr(module, attr).register_forward_pre_hook(grab, with_kwargs=True)
    return seen, handle


@pytest.mark.parametrize("batch_first", [True, False])
def test_encoder_eval_fast_path_and_nested_tensor_padding(batch_first, seeded):
    layer = nn.TransformerEncoderLayer(32, 4, 64, dropout=0.1, batch_first=batch_first)
    enc = nn.TransformerEncoder(layer, 2, enable_nested_tensor=batch_first).eval()  # nested needs batch_first
    b, t = 3, 7
    x = torch.randn(b, t, 32) if batch_first else torch.randn(t, b, 32)
    pad = torch.zeros(b, t, dtype=torch.bool)
    pad[1, 4:] = True
    pad[2, 6:] = True
    with torch.no_grad():
        plain = enc(x, src_key_padding_mask=pad)  # fused fast path + nested tensors, no capture
    inputs, handles = [], []
    for lyr in enc.layers:
        seen, h = _layer_inputs(lyr, "self_attn")
        inputs.append(seen)
        handles.append(h)
    try:
        with torch.no_grad(), attnscope.capture(enc) as cap:
            captured = enc(x, src_key_padding_mask=pad)
    finally:
        for h in handles:
            h.remove()
    assert [r.name for r in cap.attention] == ["layers.0.self_attn", "layers.1.self_attn"]
    real = ~pad if batch_first else (~pad).T
    if batch_first:
        assert (plain[~real] == 0).all()  # proof that the plain run took the nested-tensor path
    # real positions agree with the fused path; padded ones are zeros there (nested tensors) and computed here
    torch.testing.assert_close(captured[real], plain[real], atol=1e-5, rtol=1e-5)
    for rec, lyr, seen in zip(cap.attention, enc.layers, inputs):
        (args, kwargs), = seen
        ref = reference_weights(lyr.self_attn, *args[:3], key_padding_mask=kwargs["key_padding_mask"],
                                attn_mask=kwargs.get("attn_mask"))  # torch reference on the layer's own input
        np.testing.assert_allclose(rec.weights, ref, atol=1e-5)
        allowed = rec.allowed_full()
        assert not allowed[1, :, :, 4:].any() and not allowed[2, :, :, 6:].any()  # the padding mask was applied
        assert allowed[0].all()
    assert [r.name for r in cap.residual] == ["layers.0", "layers.1"]
    assert cap.residual[0].norms.shape == (b, t)


def test_decoder_self_and_cross_with_causal_mask(seeded):
    layer = nn.TransformerDecoderLayer(16, 2, 32, dropout=0.0, batch_first=True)
    dec = nn.TransformerDecoder(layer, 2).eval()
    tgt, mem = torch.randn(2, 5, 16), torch.randn(2, 7, 16)
    mask = nn.Transformer.generate_square_subsequent_mask(5)
    with attnscope.capture(dec) as cap:
        out = dec(tgt, mem, tgt_mask=mask, tgt_is_causal=True)
    assert [(r.name, r.kind) for r in cap.attention] == [
        ("layers.0.self_attn", "self"), ("layers.0.multihead_attn", "cross"),
        ("layers.1.self_attn", "self"), ("layers.1.multihead_attn", "cross")]
    assert cap.attention[0].causal and not cap.attention[1].causal
    assert cap.attention[1].shape == (2, 2, 5, 7)
    # reference for layer 0's cross-attention: torch's MHA on (x after the self-attention block, memory)
    l0 = dec.layers[0]
    with torch.no_grad():
        x = l0.norm1(tgt + l0._sa_block(tgt, mask, None, is_causal=True))
    ref = reference_weights(l0.multihead_attn, x, mem, mem)
    np.testing.assert_allclose(cap.attention[1].weights, ref, atol=1e-6)
    assert out.shape == tgt.shape


def test_full_transformer_names_and_counts(seeded):
    model = nn.Transformer(d_model=16, nhead=2, num_encoder_layers=2, num_decoder_layers=3, dim_feedforward=32,
                           dropout=0.0, batch_first=True).eval()
    src, tgt = torch.randn(2, 6, 16), torch.randn(2, 4, 16)
    tgt_mask = model.generate_square_subsequent_mask(4)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(src, tgt, tgt_mask=tgt_mask)
    names = [r.name for r in cap.attention]
    assert names[:2] == ["encoder.layers.0.self_attn", "encoder.layers.1.self_attn"]
    assert names[2:] == [f"decoder.layers.{i}.{a}" for i in range(3) for a in ("self_attn", "multihead_attn")]
    kinds = {r.name: r.kind for r in cap.attention}
    assert kinds["decoder.layers.2.multihead_attn"] == "cross" and kinds["decoder.layers.2.self_attn"] == "self"
    assert [r.name for r in cap.residual] == ["encoder.layers.0", "encoder.layers.1", "decoder.layers.0",
                                             "decoder.layers.1", "decoder.layers.2"]


def test_residual_norms_match_block_outputs(seeded):
    """Reference: the L2 norm of each block's output, computed by the test from a test-side forward hook."""
    enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(16, 2, 32, dropout=0.0), 2, enable_nested_tensor=False)
    x = torch.randn(5, 2, 16)  # (T, B, D): batch_first=False
    outs = []
    handle = enc.layers[1].register_forward_hook(lambda m, a, o: outs.append(o.detach().clone()))
    try:
        with attnscope.capture(enc) as cap:
            enc(x)
    finally:
        handle.remove()
    expected = outs[0].norm(dim=-1).T.numpy()  # (B, T)
    np.testing.assert_allclose(cap.residual[1].norms, expected, rtol=1e-6)


@pytest.mark.parametrize("keep", ["maps", "stats"])
def test_a_padding_mask_edited_in_place_between_forwards_is_read_again(keep, seeded):
    """Capture works a call's allowed mask out once per pair of mask tensors (every layer of nn.TransformerEncoder
    gets the same padding mask); an in-place edit between two forwards of one capture must be read again.
    Reference: torch's own need_weights=True, average_attn_weights=False for each forward's mask."""
    layer = nn.TransformerEncoderLayer(16, 4, 32, dropout=0.0, batch_first=True)
    model = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False).eval()
    b, t = 3, 7
    x = torch.randn(b, t, 16)
    pad = torch.zeros(b, t)  # a float padding mask reaches every layer as the same tensor (a bool one is
    pad[0, -2:] = float("-inf")  # converted to float anew by each forward)
    masks_seen = []
    with torch.no_grad(), attnscope.capture(model, keep=keep, residual=False) as cap:
        for _ in range(2):
            model(x, src_key_padding_mask=pad)
            masks_seen.append(pad.clone())
            pad[1, -3:] = float("-inf")  # in place: the second forward pads three more keys of item 1
    assert len(cap.attention) == 4
    with torch.no_grad():
        for i, rec in enumerate(cap.attention):
            mask, li = masks_seen[i // 2], i % 2
            h_in = x if li == 0 else model.layers[0](x, src_key_padding_mask=mask)
            ref = reference_weights(model.layers[li].self_attn, h_in, h_in, h_in, key_padding_mask=mask)
            allowed = np.broadcast_to(np.isfinite(mask.numpy())[:, None, None, :], ref.shape)
            if keep == "maps":
                np.testing.assert_array_equal(rec.allowed_full(), allowed)
                np.testing.assert_allclose(rec.weights, ref, atol=1e-5)
            else:  # statistics are computed from the scores under the mask capture read: a stale mask gives
                # weight to padded keys. Entropy per head of torch's weights, scipy's entropy row by row
                from scipy.stats import entropy
                want = np.array([np.mean([entropy(row[ok]) for row, ok in zip(ref[:, hh].reshape(-1, t),
                                                                             allowed[:, hh].reshape(-1, t))])
                                 for hh in range(4)])
                np.testing.assert_allclose(rec.stats.means()["entropy"], want, rtol=1e-5, atol=1e-6)
