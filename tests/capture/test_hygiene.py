"""Capture is invisible to the model and undoes everything it changed, also when the block raises."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import attnscope
from attnscope.errors import CaptureStateError, NoAttentionError, OptionError, UnsupportedModelError


class SdpaNet(nn.Module):
    def __init__(self, d=16, h=2, layers=2):
        super().__init__()
        self.h = h
        self.blocks = nn.ModuleList(nn.ModuleDict({"qkv": nn.Linear(d, 3 * d), "mlp": nn.Linear(d, d)})
                                    for _ in range(layers))
        self.drop = nn.Dropout(0.5)

    def forward(self, x):
        b, t, d = x.shape
        for blk in self.blocks:
            q, k, v = blk["qkv"](x).view(b, t, 3, self.h, -1).permute(2, 0, 3, 1, 4)
            x = x + F.scaled_dot_product_attention(q, k, v, is_causal=True).transpose(1, 2).reshape(b, t, d)
            x = x + self.drop(blk["mlp"](x))
        return x


def snapshot(model: nn.Module):
    return ({k: v.clone() for k, v in model.state_dict().items()},
            [(n, m.training, dict(m._forward_hooks), dict(m._forward_pre_hooks)) for n, m in model.named_modules()])


def assert_same(model, snap):
    state, mods = snap
    for k, v in model.state_dict().items():
        assert torch.equal(v, state[k]), k
    assert [(n, m.training, dict(m._forward_hooks), dict(m._forward_pre_hooks))
            for n, m in model.named_modules()] == mods


def test_sdpa_model_outputs_bit_identical_train_and_eval():
    torch.manual_seed(0)
    model = SdpaNet()
    x = torch.randn(2, 5, 16, requires_grad=True)
    for training in (True, False):
        model.train(training)
        torch.manual_seed(1)
        plain = model(x)
        torch.manual_seed(1)
        with attnscope.capture(model) as cap:
            seen = model(x)
        assert torch.equal(plain, seen)  # the math path is unchanged: bit for bit
        assert len(cap.attention) == 2 and model.training == training
        assert seen.requires_grad  # autograd graph of the user is intact
    seen.sum().backward()
    assert x.grad is not None


def test_mha_training_mode_output_within_tolerance_and_state_restored():
    torch.manual_seed(0)
    model = nn.TransformerEncoder(nn.TransformerEncoderLayer(16, 2, 32, dropout=0.0, batch_first=True), 2,
                                  enable_nested_tensor=False)
    x = torch.randn(2, 6, 16)
    plain = model(x)
    snap = snapshot(model)
    with attnscope.capture(model):
        seen = model(x)
    torch.testing.assert_close(seen, plain, atol=1e-6, rtol=0)  # math path instead of fused: within 1e-6
    assert_same(model, snap)


def test_block_that_raises_restores_everything():
    model = SdpaNet().eval()
    snap = snapshot(model)
    before = torch.backends.mha.get_fastpath_enabled()
    with pytest.raises(ZeroDivisionError):
        with attnscope.capture(model):
            model(torch.randn(1, 4, 16))
            1 / 0
    assert_same(model, snap)
    assert torch.backends.mha.get_fastpath_enabled() == before
    assert torch._C._len_torch_function_stack() == 0


def test_forward_that_raises_inside_attention_keeps_stack_balanced():
    class Boom(nn.Module):  # holds a weight, so it is an attention module of its own (not a helper of Wrap)
        def __init__(self):
            super().__init__()
            self.gain = nn.Parameter(torch.ones(()))

        def forward(self, x):
            F.scaled_dot_product_attention(x * self.gain, x, x)
            raise RuntimeError("half-finished model")

    class Wrap(nn.Module):
        def __init__(self):
            super().__init__()
            self.inner = Boom()

        def forward(self, x):
            try:
                return self.inner(x)
            except RuntimeError:
                return F.scaled_dot_product_attention(x, x, x)

    model = Wrap()
    with attnscope.capture(model) as cap:
        model(torch.randn(1, 1, 3, 4))
    assert [r.name for r in cap.attention] == ["inner", ""]  # the second call is attributed to the root again


def test_fastpath_switch_restored_when_user_had_it_off():
    torch.backends.mha.set_fastpath_enabled(False)
    try:
        mha = nn.MultiheadAttention(8, 2)
        with attnscope.capture(mha):
            mha(torch.randn(3, 1, 8), torch.randn(3, 1, 8), torch.randn(3, 1, 8))
        assert torch.backends.mha.get_fastpath_enabled() is False
    finally:
        torch.backends.mha.set_fastpath_enabled(True)


def test_model_without_attention_says_what_was_searched():
    model = nn.Sequential(nn.Linear(4, 4), nn.ReLU(), nn.Linear(4, 2))
    with pytest.raises(NoAttentionError, match=r"searched 4 modules.*MultiheadAttention.*layers="):
        attnscope.capture(model)
    assert not model[0]._forward_pre_hooks


def test_block_with_no_attention_call_is_an_error():
    mha = nn.MultiheadAttention(8, 2)
    with pytest.raises(NoAttentionError, match="ran no attention call"):
        with attnscope.capture(mha):
            pass


def test_capture_is_used_once_and_results_wait_for_the_end():
    mha = nn.MultiheadAttention(8, 2)
    x = torch.randn(3, 1, 8)
    cap = attnscope.capture(mha)
    with pytest.raises(CaptureStateError, match="after the capture block"):
        cap.head_table()
    with cap:
        mha(x, x, x)
        with pytest.raises(CaptureStateError):
            cap.head_table()
    with pytest.raises(CaptureStateError, match="already used"):
        with cap:
            pass
    assert len(cap.head_table()) == 2


def test_bad_options_fail_at_the_door_with_suggestions():
    model = nn.Transformer(d_model=8, nhead=2, num_encoder_layers=1, num_decoder_layers=1, dim_feedforward=16)
    with pytest.raises(OptionError, match="keep must be 'maps' or 'stats'.*Did you mean 'stats'"):
        attnscope.capture(model, keep="stat")
    with pytest.raises(OptionError, match="Did you mean 'encoder.layers.0.self_attn'"):
        attnscope.capture(model, layers=["encoder.layers.0.self_atn"])
    with pytest.raises(OptionError, match="has 2 heads"):
        attnscope.capture(model, heads=[5])
    with pytest.raises(OptionError, match="out of range"):
        attnscope.capture(model, layers=[7])
    with pytest.raises(OptionError, match="expects a torch.nn.Module"):
        attnscope.capture(lambda x: x)
    assert all(not m._forward_pre_hooks for m in model.modules())


@pytest.mark.filterwarnings("ignore:`torch.jit.script` is deprecated:DeprecationWarning")
def test_scripted_module_is_refused():
    scripted = torch.jit.script(nn.MultiheadAttention(8, 2))
    with pytest.raises(UnsupportedModelError, match="TorchScript"):
        attnscope.capture(scripted)


def test_missed_attention_module_warns():
    class HandAttention(nn.Module):  # computes attention without softmax on a 4-D tensor: nothing to see
        def forward(self, x):
            s = x @ x.transpose(-2, -1)
            return torch.exp(s - s.logsumexp(-1, keepdim=True)) @ x

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.a, self.b = HandAttention(), nn.MultiheadAttention(4, 1, batch_first=True)

        def forward(self, x):
            return self.b(self.a(x), x, x)[0]

    net = Net()
    with pytest.warns(attnscope.AttnscopeWarning, match="attention modules a ran but no attention weights"):
        with attnscope.capture(net):
            net(torch.randn(1, 3, 4))


def test_deepcopy_of_model_after_capture_works():
    mha = nn.MultiheadAttention(8, 2)
    x = torch.randn(3, 1, 8)
    with attnscope.capture(mha):
        mha(x, x, x)
    clone = copy.deepcopy(mha)
    np.testing.assert_array_equal(clone(x, x, x)[0].detach().numpy(), mha(x, x, x)[0].detach().numpy())


def test_mha_training_with_dropout_is_bit_identical_and_weights_are_pre_dropout():
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(16, 2, 32, dropout=0.3, batch_first=True).train()
    x = torch.randn(2, 6, 16)
    torch.manual_seed(5)
    plain = layer(x)
    torch.manual_seed(5)
    with attnscope.capture(layer) as cap:
        seen = layer(x)
    assert torch.equal(plain, seen)  # same random numbers drawn, same computation
    rec = cap.attention[0]
    np.testing.assert_allclose(rec.weights.sum(-1), 1.0, atol=1e-6)  # pre-dropout: rows still sum to 1
    layer.eval()  # reference: torch's own per-head weights without dropout
    with torch.no_grad():
        _, ref = layer.self_attn(x, x, x, need_weights=True, average_attn_weights=False)
    np.testing.assert_allclose(rec.weights, ref.numpy(), atol=1e-6)


def test_a_model_changed_between_captures_is_mapped_again():
    """capture keeps the model map of a layout (the rules are not applied again per forward); a module replaced,
    added or re-flagged between two captures must show in the next one."""

    class Attn(nn.Module):
        def __init__(self, d=8):
            super().__init__()
            self.qkv = nn.Linear(d, 3 * d)

        def forward(self, x, ctx=None):
            q, k, v = self.qkv(x).chunk(3, dim=-1)
            return F.scaled_dot_product_attention(q[:, None], k[:, None], v[:, None])[:, 0]

    model = nn.Sequential(Attn(), Attn())
    x = torch.randn(2, 5, 8)
    with torch.no_grad(), attnscope.capture(model, residual=False) as first:
        model(x)
    assert [r.name for r in first.attention] == ["0", "1"]
    assert [r.kind for r in first.attention] == ["self", "self"]
    model[1] = Attn()  # replaced: the old module's name now belongs to a new module
    model.append(Attn())  # added
    model[0].is_cross_attention = True  # a flag the rules read (transformers sets it on cross-attention blocks)
    with torch.no_grad(), attnscope.capture(model, residual=False) as second:
        model(x)
    assert [r.name for r in second.attention] == ["0", "1", "2"]
    assert [r.kind for r in second.attention] == ["cross", "self", "self"]
    model[1].is_cross_attention = True  # the only change: the kept map's per-module hints must not be reused
    with torch.no_grad(), attnscope.capture(model, residual=False) as third:
        model(x)
    assert [r.kind for r in third.attention] == ["cross", "cross", "self"]
    # the same layout twice: one map
    from attnscope.capture.discovery import map_model

    assert map_model(model) is map_model(model)
    del model[2]
    assert "2" not in map_model(model).attention


class _AttendingLinear(nn.Linear):
    """A subclass of one of torch's leaves whose forward computes attention itself."""

    def forward(self, x):
        q = super().forward(x).unsqueeze(1)  # (B, 1, T, D)
        return F.scaled_dot_product_attention(q, q, q, is_causal=True).squeeze(1)


class _LeafNet(nn.Module):
    def __init__(self, d=8):
        super().__init__()
        self.norm = nn.LayerNorm(d)
        self.sub = _AttendingLinear(d, d)
        self.patched = nn.Linear(d, d)
        lin = self.patched
        # an instance of a torch leaf whose forward was replaced by attention (as a hot patch would)
        lin.forward = lambda x: F.scaled_dot_product_attention(*(F.linear(x, lin.weight, lin.bias).unsqueeze(1),) * 3,
                                                               is_causal=True).squeeze(1)

    def forward(self, x):
        return self.patched(self.sub(self.norm(x)))


def test_torch_leaves_get_a_light_hook_only_where_their_forward_is_torchs_own():
    """torch's own leaf modules (LayerNorm, Linear, ...) get no frame of their own; a subclass, or an instance
    whose forward was replaced, keeps one, so attention computed there is recorded under its name; a leaf named
    in blocks= keeps its residual-stream norms. References: torch's own SDPA math (softmax(QKᵀ/√d) with the
    causal mask) and the layer's output norm."""
    torch.manual_seed(0)
    net = _LeafNet().eval()
    x = torch.randn(2, 5, 8)
    with torch.no_grad(), attnscope.capture(net, blocks=["norm"]) as cap:
        net(x)
    assert [r.name for r in cap.attention] == ["sub", "patched"]
    with torch.no_grad():
        q = F.linear(net.norm(x), net.sub.weight, net.sub.bias).unsqueeze(1)  # (B, 1, T, D)
        scores = (q @ q.transpose(-2, -1)) / np.sqrt(8)
        want = scores.masked_fill(~torch.ones(5, 5, dtype=torch.bool).tril(), float("-inf")).softmax(-1)
    np.testing.assert_allclose(cap.attention[0].weights, want.numpy(), atol=1e-6)
    assert [r.name for r in cap.residual] == ["norm"]
    np.testing.assert_allclose(cap.residual[0].norms, net.norm(x).detach().norm(dim=-1).numpy(), rtol=1e-6)
