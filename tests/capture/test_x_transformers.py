"""Capture on the x-transformers library (PyPI, pinned in the test extra): code no one here wrote.

Its attention blocks keep q/k/v projections and compute scores + softmax in an ``Attend`` helper that calls a
softmax stored as a ``functools.partial`` (default) or ``F.scaled_dot_product_attention`` (``attn_flash``).

Reference: the library's own attention maps (``return_attn=True``, the post-softmax maps it multiplies the
values by), from the same model, or from a non-flash twin with the same weights for flash configurations; and
the model's own outputs, bit for bit with and without capture.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

import attnscope
from reference_stats import assert_means_match  # tests/capture/reference_stats.py

xt = pytest.importorskip("x_transformers")

V, DIM, HEADS = 50, 32, 4


def lm(flash: bool, layers_cls=None) -> torch.nn.Module:
    torch.manual_seed(0)
    layers = (layers_cls or xt.Decoder)(dim=DIM, depth=2, heads=HEADS, attn_flash=flash)
    return xt.TransformerWrapper(num_tokens=V, max_seq_len=16, attn_layers=layers).eval()


def twin_maps(model: torch.nn.Module, flash: bool, make, *args, **kwargs):
    """The library's own maps: from *model*, or from a non-flash twin carrying the same weights."""
    ref = model
    if flash:
        ref = make(False)
        ref.load_state_dict(model.state_dict())
    with torch.no_grad():
        return ref(*args, return_attn=True, **kwargs)


@pytest.mark.parametrize("flash", [False, True])
@pytest.mark.parametrize("kind", ["decoder", "encoder"])
def test_decoder_and_encoder_weights_equal_the_library_maps(flash, kind):
    make = (lambda f: lm(f)) if kind == "decoder" else (lambda f: lm(f, xt.Encoder))
    model = make(flash)
    ids = torch.randint(0, V, (2, 7))
    mask = torch.tensor([[True] * 7, [True] * 5 + [False] * 2])  # key padding on the second row
    logits, maps = twin_maps(model, flash, make, ids, mask=mask)  # reference: x-transformers' own maps
    with torch.no_grad():
        plain = model(ids, mask=mask)
        with pytest.warns(attnscope.AttnscopeWarning, match="found no transformer blocks"):
            cap = attnscope.capture(model)  # its layers sit in ModuleList([norms, block, residual]) groups
        with cap:
            out = model(ids, mask=mask)
    torch.testing.assert_close(out, plain, atol=0, rtol=0)  # capture leaves the computation alone
    torch.testing.assert_close(out, logits, atol=1e-5, rtol=1e-5)
    assert [r.name for r in cap.attention] == ["attn_layers.layers.0.1", "attn_layers.layers.2.1"]
    assert {r.helper for r in cap.attention} == {"attn_layers.layers.0.1.attend", "attn_layers.layers.2.1.attend"}
    assert {r.source for r in cap.attention} == {"sdpa" if flash else "softmax"}
    for rec, ref in zip(cap.attention, maps):
        assert rec.kind == "self"
        assert rec.causal == (kind == "decoder")  # the library's Decoder is causal, its Encoder is not
        np.testing.assert_allclose(rec.weights, ref.numpy(), atol=1e-5)  # reference: the library's own maps
        assert not rec.allowed_full()[1, :, :, 5:].any()  # padded keys are forbidden to every query


@pytest.mark.parametrize(("flash", "sdpa"), [(False, "beside"), (True, "beside"), (True, "weights")])
@pytest.mark.parametrize("kind", ["decoder", "encoder"])
def test_statistics_and_the_weights_option_against_the_library_maps(flash, sdpa, kind):
    """keep="stats" (and, on the flash path, sdpa="weights": attention computed from the weights capture builds)
    against float64 statistics of the library's own maps; the weights option's output against the plain model's."""
    make = (lambda f: lm(f)) if kind == "decoder" else (lambda f: lm(f, xt.Encoder))
    model = make(flash)
    ids = torch.randint(0, V, (2, 7))
    mask = torch.tensor([[True] * 7, [True] * 5 + [False] * 2])  # key padding on the second row
    _, maps = twin_maps(model, flash, make, ids, mask=mask)  # reference: x-transformers' own maps
    with torch.no_grad(), pytest.warns(attnscope.AttnscopeWarning, match="found no transformer blocks"):
        plain = model(ids, mask=mask)
        with attnscope.capture(model, keep="stats", sdpa=sdpa) as cap:
            out = model(ids, mask=mask)
    if sdpa == "beside":
        torch.testing.assert_close(out, plain, atol=0, rtol=0)  # the model's own computation is left alone
    else:  # another summation order than the fused kernel's: float32 rounding
        assert (out - plain).abs().max().item() <= 1e-5 * plain.abs().max().item()
        assert not torch.equal(out, plain)  # the output did come from capture's weights
    assert len(cap.attention) == len(maps) == 2
    for rec, ref in zip(cap.attention, maps):
        assert rec.weights is None and rec.source == ("sdpa" if flash else "softmax")
        assert_means_match(rec, ref, rec.name)


@pytest.mark.parametrize("flash", [False, True])
def test_encoder_decoder_kinds_and_weights(flash):
    def make(f):
        torch.manual_seed(0)
        return xt.XTransformer(dim=DIM, enc_num_tokens=V, enc_depth=1, enc_heads=HEADS, enc_max_seq_len=16,
                               dec_num_tokens=V, dec_depth=2, dec_heads=HEADS, dec_max_seq_len=16,
                               enc_attn_flash=f, dec_attn_flash=f).eval()

    model = make(flash)
    src, tgt = torch.randint(0, V, (2, 6)), torch.randint(0, V, (2, 5))
    src_mask = torch.tensor([[True] * 6, [True] * 4 + [False] * 2])
    ref_model = make(False)
    ref_model.load_state_dict(model.state_dict())
    with torch.no_grad():
        enc_ref, enc_maps = ref_model.encoder(src, mask=src_mask, return_attn=True)
        _, dec_maps = ref_model.decoder.net(tgt, context=ref_model.encoder(src, mask=src_mask, return_embeddings=True),
                                            context_mask=src_mask, return_attn=True)  # reference: library maps
        plain = model.decoder.net(tgt, context=model.encoder(src, mask=src_mask, return_embeddings=True),
                                  context_mask=src_mask)
        with attnscope.capture(model, residual=False) as cap:
            enc = model.encoder(src, mask=src_mask, return_embeddings=True)
            out = model.decoder.net(tgt, context=enc, context_mask=src_mask)
    torch.testing.assert_close(out, plain, atol=0, rtol=0)
    assert [(r.name, r.kind, r.causal) for r in cap.attention] == [
        ("encoder.attn_layers.layers.0.1", "self", False),
        ("decoder.net.attn_layers.layers.0.1", "self", True),
        ("decoder.net.attn_layers.layers.1.1", "cross", False),
        ("decoder.net.attn_layers.layers.3.1", "self", True),
        ("decoder.net.attn_layers.layers.4.1", "cross", False),
    ]
    for rec, ref in zip(cap.attention, [*enc_maps, *dec_maps]):
        np.testing.assert_allclose(rec.weights, ref.numpy(), atol=1e-5)  # reference: the library's own maps
    cross = cap.attention[2].allowed_full()
    assert not cross[1, :, :, 4:].any() and cross[1, :, :, :4].all()  # the source's padding reaches cross-attention


@pytest.mark.parametrize("flash", [False, True])
def test_check_causal_on_the_library_decoder_and_a_leaky_one(flash):
    ids = torch.randint(0, V, (2, 8))
    good = lm(flash)  # x-transformers' Decoder: causal by construction
    report = attnscope.check_causal(lambda t: good(t), ids, model=good, vocab_size=V)
    assert report.ok
    leaky = lm(flash, xt.Encoder)  # the same wrapper over a bidirectional stack: every position sees the future
    report = attnscope.check_causal(lambda t: leaky(t), ids, model=leaky, vocab_size=V)
    assert not report.ok


def test_residual_stream_where_the_warning_points_equals_the_library_hiddens():
    model = lm(False)
    ids = torch.randint(0, V, (2, 7))
    with torch.no_grad():
        _, inter = model(ids, return_intermediates=True)  # reference: the library's own per-sub-layer hiddens
        # each sub-layer group is ModuleList([norms, block, residual]); the residual module's output is the stream
        with attnscope.capture(model, blocks=["attn_layers.layers.*.2"]) as cap:
            model(ids)
    assert [r.name for r in cap.residual] == [f"attn_layers.layers.{i}.2" for i in range(4)]
    for rec, hidden in zip(cap.residual, inter.layer_hiddens[1:]):
        np.testing.assert_allclose(rec.norms, hidden.norm(dim=-1).numpy(), rtol=1e-5)


def test_head_output_norms_on_both_library_paths():
    from attnscope.analyses.heads import head_output_norms

    torch.manual_seed(5)
    ids = torch.randint(0, V, (2, 7))
    tables = {}
    for flash in (False, True):
        model = lm(flash)
        to_out = model.attn_layers.layers[0][1].to_out
        dh = to_out.weight.shape[1] // HEADS  # the library's own head width (dim_head)
        with torch.no_grad():
            to_out.weight[:, dh:2 * dh] = 0.0  # head 1 of layer 0 writes nothing
        tables[flash] = head_output_norms(model, ids)  # the block's to_out is found from the helper's call
        assert sorted(set(tables[flash]["name"])) == ["attn_layers.layers.0.1", "attn_layers.layers.2.1"]
        row = tables[flash][(tables[flash]["name"] == "attn_layers.layers.0.1") & (tables[flash]["head"] == 1)]
        assert float(row["norm"].iloc[0]) == 0.0  # reference: a zero slice of W_O contributes exactly nothing
    # the einsum path (weights meet values in einsum) and the fused path see the same head outputs
    np.testing.assert_allclose(tables[False]["norm"], tables[True]["norm"], rtol=1e-5)
