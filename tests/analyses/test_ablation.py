"""Head ablation: zero- and mean-ablation through MHA, SDPA and HF paths, importance, and restoration.

References: the layer's output recomputed by hand in the test with the head's slice of the output projection
removed (an independent softmax(QKᵀ/√d)·V per head for nn.MultiheadAttention), weight surgery on a copy of
the model (the head's columns of o_proj / rows of GPT-2's Conv1D c_proj zeroed), and brute-force loops.
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

from attnscope.analyses.ablation import HeadIntervention, ablate, ablation_change, head_importance, head_means
from attnscope.errors import NoAttentionError, OptionError, UnsupportedModelError

D, H = 16, 4
DH = D // H


@torch.no_grad()
def mha_head_outputs(mha: nn.MultiheadAttention, x: torch.Tensor, mask: torch.Tensor | None = None) -> torch.Tensor:
    """Independent reference: softmax(QKᵀ/√dh + mask)·V per head of a batch_first self-attention, (B, H, T, dh)."""
    b, t, e = x.shape
    w, bias = mha.in_proj_weight.double(), mha.in_proj_bias.double()
    q, k, v = (x.double() @ w[i * e:(i + 1) * e].T + bias[i * e:(i + 1) * e] for i in range(3))
    q, k, v = (z.view(b, t, H, DH).transpose(1, 2) for z in (q, k, v))  # (B, H, T, dh)
    scores = q @ k.transpose(-2, -1) / math.sqrt(DH)  # (B, H, T, T)
    if mask is not None:
        scores = scores.masked_fill(mask, float("-inf"))  # MHA's bool mask: True = forbidden
    return torch.softmax(scores, dim=-1) @ v


@torch.no_grad()
def mix(heads: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor) -> torch.Tensor:
    """Σ_h heads[:, h] · W_O[:, h]ᵀ + b: the output projection applied head by head, (B, T, D)."""
    out = bias.double().expand(heads.shape[0], heads.shape[2], -1).clone()
    for h in range(heads.shape[1]):
        out = out + heads[:, h] @ weight.double()[:, h * DH:(h + 1) * DH].T
    return out


def make_mha(seed=0):
    torch.manual_seed(seed)
    return nn.MultiheadAttention(D, H, batch_first=True).eval()


def test_reference_recomputation_matches_torch_mha():
    mha = make_mha()
    x = torch.randn(2, 6, D)
    heads = mha_head_outputs(mha, x)
    ref = mix(heads, mha.out_proj.weight, mha.out_proj.bias)
    out, _ = mha(x, x, x)  # reference of the reference: torch's own MHA
    torch.testing.assert_close(out.double(), ref, atol=1e-5, rtol=1e-5)


@pytest.mark.parametrize("ablated", [[1], [0, 3]])
def test_mha_zero_ablation_equals_output_without_the_heads(ablated):
    mha = make_mha()
    x = torch.randn(2, 6, D)
    causal = torch.ones(6, 6, dtype=torch.bool).triu(1)
    heads = mha_head_outputs(mha, x, causal)
    kept = heads.clone()
    kept[:, ablated] = 0.0
    ref = mix(kept, mha.out_proj.weight, mha.out_proj.bias)  # reference: hand recomputation without the heads
    with ablate(mha, [("", h) for h in ablated]):
        out, _ = mha(x, x, x, attn_mask=causal)
    torch.testing.assert_close(out.double(), ref, atol=1e-5, rtol=1e-5)
    surgery = copy.deepcopy(mha)  # reference: weight surgery on a copy
    with torch.no_grad():
        for h in ablated:
            surgery.out_proj.weight[:, h * DH:(h + 1) * DH] = 0.0
    torch.testing.assert_close(out, surgery(x, x, x, attn_mask=causal)[0], atol=1e-6, rtol=1e-6)


def test_mha_mean_ablation_equals_hand_recomputation():
    mha = make_mha()
    x = torch.randn(3, 5, D)
    heads = mha_head_outputs(mha, x)
    mean = heads[:, 2].mean(dim=(0, 1))  # brute force: the head's output averaged over batch and positions
    means = head_means(mha, x, x, x)
    torch.testing.assert_close(means[("", 2)].double(), mean, atol=1e-5, rtol=1e-5)
    y = torch.randn(2, 5, D)  # ablate on other inputs: the head's output there becomes the mean of x's
    replaced = mha_head_outputs(mha, y)
    replaced[:, 2] = mean
    ref = mix(replaced, mha.out_proj.weight, mha.out_proj.bias)
    with ablate(mha, {"": [2]}, mode="mean", means=means):
        out, _ = mha(y, y, y)
    torch.testing.assert_close(out.double(), ref, atol=1e-5, rtol=1e-5)


class SdpaAttention(nn.Module):
    """Hand-written self-attention calling the fused kernel, with an output projection o_proj."""

    def __init__(self):
        super().__init__()
        self.qkv = nn.Linear(D, 3 * D)
        self.o_proj = nn.Linear(D, D)

    def forward(self, x):
        b, t, _ = x.shape
        q, k, v = self.qkv(x).view(b, t, 3, H, DH).permute(2, 0, 3, 1, 4)  # (B, H, T, dh) each
        self.values = v.detach()
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True)  # (B, H, T, dh)
        return self.o_proj(y.transpose(1, 2).reshape(b, t, D))


class SdpaNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.layers = nn.ModuleList(SdpaAttention() for _ in range(2))

    def forward(self, x):
        for layer in self.layers:
            x = x + layer(x)
        return x


def test_sdpa_zero_and_mean_ablation_equal_weight_surgery():
    torch.manual_seed(1)
    net = SdpaNet().eval()
    x = torch.randn(2, 7, D)
    with ablate(net, [("layers.1", 3), ("layers.0", 0)]):
        zeroed = net(x)
    surgery = copy.deepcopy(net)  # reference: the heads' columns of o_proj removed on a copy
    with torch.no_grad():
        surgery.layers[1].o_proj.weight[:, 3 * DH:] = 0.0
        surgery.layers[0].o_proj.weight[:, :DH] = 0.0
    torch.testing.assert_close(zeroed, surgery(x), atol=1e-6, rtol=1e-6)

    means = head_means(net, x)
    # brute force: the head's output α·v of layer 0, head 1, from a recomputed causal softmax
    attn = net.layers[0]
    q, k, v = attn.qkv(x).view(2, 7, 3, H, DH).permute(2, 0, 3, 1, 4)
    future = torch.ones(7, 7, dtype=torch.bool).triu(1)
    scores = (q @ k.transpose(-2, -1) / math.sqrt(DH)).masked_fill(future, -math.inf)
    head1 = (torch.softmax(scores, -1) @ v)[:, 1]  # (B, T, dh)
    torch.testing.assert_close(means[("layers.0", 1)], head1.mean(dim=(0, 1)).detach(), atol=1e-5, rtol=1e-5)
    with ablate(net, [("layers.0", 1)], mode="mean", means=means):
        meaned = net(x)
    surgery = copy.deepcopy(net)  # reference: columns zeroed, the mean head's constant output moved into the bias
    with torch.no_grad():
        cols = slice(DH, 2 * DH)
        o = surgery.layers[0].o_proj
        o.bias += o.weight[:, cols] @ means[("layers.0", 1)]
        o.weight[:, cols] = 0.0
    torch.testing.assert_close(meaned, surgery(x), atol=1e-5, rtol=1e-5)


transformers = pytest.importorskip("transformers")


def gpt2(impl):
    torch.manual_seed(0)
    cfg = transformers.GPT2Config(n_layer=2, n_head=4, n_embd=32, vocab_size=64, n_positions=32,
                                  resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
    return transformers.GPT2LMHeadModel._from_config(cfg, attn_implementation=impl).eval()


@pytest.mark.parametrize("impl", ["sdpa", "eager"])
@pytest.mark.parametrize("mode", ["zero", "mean"])
def test_hf_gpt2_ablation_equals_weight_surgery(impl, mode):
    model = gpt2(impl)
    ids = torch.randint(0, 64, (2, 9))
    means = head_means(model, ids) if mode == "mean" else None
    with torch.no_grad(), ablate(model, [("transformer.h.1.attn", 2)], mode=mode, means=means):
        logits = model(ids).logits
    surgery = copy.deepcopy(model)  # reference: GPT-2's Conv1D c_proj keeps (in, out): the head's rows go
    with torch.no_grad():
        proj = surgery.transformer.h[1].attn.c_proj
        rows = slice(2 * 8, 3 * 8)
        if mode == "mean":
            proj.bias += means[("transformer.h.1.attn", 2)] @ proj.weight[rows]
        proj.weight[rows] = 0.0
        ref = surgery(ids).logits
    torch.testing.assert_close(logits, ref, atol=1e-5, rtol=1e-5)
    with torch.no_grad():
        assert (logits - model(ids).logits).abs().max() > 1e-4  # the ablation did something


def test_sdpa_and_eager_gpt2_give_the_same_means():
    a, b = gpt2("sdpa"), gpt2("eager")
    ids = torch.randint(0, 64, (2, 6))
    ma, mb = head_means(a, ids), head_means(b, ids)
    assert sorted(ma) == sorted(mb) == [(f"transformer.h.{i}.attn", h) for i in range(2) for h in range(4)]
    for key in ma:  # reference: the two HF attention implementations compute the same heads
        torch.testing.assert_close(ma[key], mb[key], atol=1e-5, rtol=1e-5)


def snapshot(model):
    return ({k: v.clone() for k, v in model.state_dict().items()},
            [(n, m.training, dict(m._forward_hooks), dict(m._forward_pre_hooks)) for n, m in model.named_modules()])


def test_model_restored_after_ablation_also_when_the_block_raises():
    torch.manual_seed(2)
    enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(D, H, 32, dropout=0.0, batch_first=True), 2,
                                enable_nested_tensor=False).eval()
    x = torch.randn(2, 5, D)
    with torch.no_grad():
        before = enc(x)  # the fused fast path (eval, no grad)
    snap = snapshot(enc)
    fastpath = torch.backends.mha.get_fastpath_enabled()
    with pytest.raises(RuntimeError, match="boom"):
        with ablate(enc, [("layers.0.self_attn", 1)]):
            enc(x)
            raise RuntimeError("boom")
    state, mods = snap
    assert all(torch.equal(v, state[k]) for k, v in enc.state_dict().items())
    assert [(n, m.training, dict(m._forward_hooks), dict(m._forward_pre_hooks)) for n, m in enc.named_modules()] == mods
    assert torch.backends.mha.get_fastpath_enabled() == fastpath
    assert torch._C._len_torch_function_stack() == 0
    with torch.no_grad():
        assert torch.equal(enc(x), before)  # un-ablated runs after the block: bit for bit


def test_observing_without_a_plan_changes_no_output():
    net = SdpaNet().eval()
    model = gpt2("eager")
    x, ids = torch.randn(2, 5, D), torch.randint(0, 64, (1, 7))
    seen = []
    with torch.no_grad():
        plain_net, plain_lm = net(x), model(ids).logits
        with HeadIntervention(net, observe=lambda call, out: seen.append(call.name)):
            watched_net = net(x)
        with HeadIntervention(model, observe=lambda call, out: seen.append(call.name)):
            watched_lm = model(ids).logits
    assert torch.equal(plain_net, watched_net) and torch.equal(plain_lm, watched_lm)  # bit for bit
    assert seen == ["layers.0", "layers.1", "transformer.h.0.attn", "transformer.h.1.attn"]


def test_only_the_named_heads_change():
    """Ablating layers.1 leaves layers.0's output untouched: checked on the residual after layer 0."""
    net = SdpaNet().eval()
    x = torch.randn(2, 5, D)
    got = {}

    def keep(module, args, out):  # returns None: the hook observes only
        got["l0"] = out.detach()

    handle = net.layers[0].register_forward_hook(keep)
    try:
        with ablate(net, [("layers.1", 0)]):
            net(x)
    finally:
        handle.remove()
    torch.testing.assert_close(got["l0"], net.layers[0](x), atol=0, rtol=0)


def test_head_importance_matches_brute_force_surgery():
    torch.manual_seed(3)
    net = SdpaNet().eval()
    with torch.no_grad():
        net.layers[0].o_proj.weight[:, 2 * DH:3 * DH] = 0.0  # a planted silent head: importance exactly 0
    x, target = torch.randn(3, 6, D), torch.randn(3, 6, D)

    def loss():
        return F.mse_loss(net(x), target)

    table = head_importance(net, loss)
    assert list(zip(table["name"], table["head"])) == [(f"layers.{i}", h) for i in range(2) for h in range(H)]
    with torch.no_grad():
        base = float(loss())
    for row in table.itertuples():
        surgery = copy.deepcopy(net)  # brute force: one copy per head, its o_proj columns zeroed
        with torch.no_grad():
            surgery.get_submodule(row.name).o_proj.weight[:, row.head * DH:(row.head + 1) * DH] = 0.0
            ref = float(F.mse_loss(surgery(x), target))
        assert row.base == pytest.approx(base, rel=1e-6)
        assert row.change == pytest.approx(ref - base, rel=1e-4, abs=1e-7)
    silent = table[(table["name"] == "layers.0") & (table["head"] == 2)]
    assert float(silent["importance"].iloc[0]) == pytest.approx(0.0, abs=1e-7)


def test_ablation_change_of_an_output_is_relative_norm():
    mha = make_mha()
    x = torch.randn(2, 4, D)
    change = ablation_change(mha, lambda: mha(x, x, x)[0], [("", 0), ("", 1)])
    heads = mha_head_outputs(mha, x)
    full = mix(heads, mha.out_proj.weight, mha.out_proj.bias)
    heads[:, :2] = 0.0
    cut = mix(heads, mha.out_proj.weight, mha.out_proj.bias)  # reference: hand recomputation
    assert change == pytest.approx(float((cut - full).norm() / full.norm()), rel=1e-4)


def test_bad_requests_fail_at_the_door_or_say_what_went_wrong():
    net = SdpaNet()
    x = torch.randn(1, 4, D)
    with pytest.raises(OptionError, match="Did you mean 'layers.1'"):
        ablate(net, [("layers.l", 0)])
    with pytest.raises(OptionError, match="has 4 heads"):
        ablate(make_mha(), [("", 4)])
    with pytest.raises(OptionError, match="needs means="):
        ablate(net, [("layers.0", 0)], mode="mean")
    with pytest.raises(OptionError, match="'zero' or 'mean'"):
        ablate(net, [("layers.0", 0)], mode="zeros")
    with pytest.raises(OptionError, match="head 9 of 'layers.0', which has 4 heads"):
        with ablate(net, [("layers.0", 9)]):
            net(x)
    with pytest.raises(NoAttentionError, match="did not run"):
        with ablate(net, [("layers.0", 0)]):
            pass
    with pytest.raises(UnsupportedModelError, match="no attention call was seen"):
        with ablate(net, [("layers.0.qkv", 0)]):
            net(x)
    assert torch._C._len_torch_function_stack() == 0


def test_means_have_one_vector_per_head():
    means = head_means(gpt2("sdpa"), torch.randint(0, 64, (1, 5)))
    assert all(tuple(m.shape) == (8,) and m.dtype == torch.float32 for m in means.values())
    assert np.isfinite(np.stack([m.numpy() for m in means.values()])).all()


def test_ablation_inside_a_capture_changes_outputs_not_maps():
    """The maps are the same with and without the ablation (the head still attends; only its output goes)."""
    import attnscope

    net = SdpaNet().eval()
    x = torch.randn(2, 5, D)
    with torch.no_grad():
        with attnscope.capture(net) as plain:
            y = net(x)
        with attnscope.capture(net) as cap, ablate(net, [("layers.0", 2)]):
            z = net(x)
    assert (y - z).abs().max() > 1e-4
    np.testing.assert_array_equal(cap.attention[0].weights, plain.attention[0].weights)
    assert not np.array_equal(cap.attention[1].weights, plain.attention[1].weights)  # layer 1 sees the change
