"""Bad and unusual inputs to capture: each gives a clear attnscope error, or a documented correct result,
and leaves the model as it was (the autouse fixture in conftest.py checks hooks, modes and settings)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import attnscope
from attnscope.errors import MemoryBudgetError, NoAttentionError, OptionError, UnsupportedModelError


class Sdpa(nn.Module):
    def __init__(self, d=8, h=2):
        super().__init__()
        self.h, self.proj = h, nn.Linear(d, 3 * d)

    def forward(self, x, **kw):
        b, t, d = x.shape
        q, k, v = self.proj(x).view(b, t, 3, self.h, -1).permute(2, 0, 3, 1, 4)
        return F.scaled_dot_product_attention(q, k, v, **kw).transpose(1, 2).reshape(b, t, d)


def one(model, *args, **kw):
    with attnscope.capture(model) as cap:
        out = model(*args, **kw)
    return cap, out


def test_nan_and_inf_inputs_are_reported_per_head():
    torch.manual_seed(0)
    m = Sdpa()
    x = torch.randn(2, 4, 8)
    x[1, 2] = float("nan")
    cap, _ = one(m, x)
    table = cap.head_table()
    assert (table["nonfinite_rows"] == 4).all()  # item 1's rows all see the NaN key: 4 queries per head
    assert (table["rows"] == 4).all() and np.isfinite(table["entropy"]).all()  # item 0 is still measured


def test_nan_in_weights_of_an_mha_module():
    mha = nn.MultiheadAttention(8, 2, batch_first=True)
    with torch.no_grad():
        mha.in_proj_weight[0, 0] = float("inf")
    x = torch.randn(1, 3, 8)
    cap, _ = one(mha, x, x, x)
    assert cap.head_table()["nonfinite_rows"].tolist() == [3, 0]  # head 0 reads the inf weight, head 1 does not


def test_batch_one_and_single_position():
    m = Sdpa()
    cap, _ = one(m, torch.randn(1, 1, 8))
    rec = cap.attention[0]
    assert rec.shape == (1, 2, 1, 1) and np.allclose(rec.weights, 1.0)
    t = cap.head_table()
    assert (t["entropy"] == 0).all() and t["entropy_ratio"].isna().all()  # one key: no choice, ratio undefined


def test_fully_masked_rows_mha_give_nan_rows_counted_as_nonfinite():
    mha = nn.MultiheadAttention(8, 2, batch_first=True)
    x = torch.randn(1, 3, 8)
    mask = torch.zeros(3, 3, dtype=torch.bool)
    mask[1] = True  # query 1 may see no key: torch's math path gives NaN for that row
    cap, _ = one(mha, x, x, x, attn_mask=mask)
    t = cap.head_table()
    assert (t["rows"] == 2).all() and (t["nonfinite_rows"] == 1).all()


@pytest.mark.parametrize("shape", [(6, 6), (1, 6), (2, 1, 6, 6), (2, 2, 6, 6), (1, 1, 1, 6), (2, 1, 1, 6)])
@pytest.mark.parametrize("dtype", [torch.bool, torch.float32])
def test_sdpa_masks_of_every_legal_shape_and_dtype(shape, dtype):
    torch.manual_seed(0)
    m = Sdpa()
    x = torch.randn(2, 6, 8)
    allowed = torch.rand(shape) > 0.3
    allowed[..., 0] = True  # every row keeps a key
    mask = allowed if dtype == torch.bool else torch.zeros(shape).masked_fill(~allowed, float("-inf"))
    cap, _ = one(m, x, attn_mask=mask)
    rec = cap.attention[0]
    want = np.broadcast_to(allowed.numpy(), (2, 2, 6, 6))
    np.testing.assert_array_equal(rec.allowed_full(), want)
    np.testing.assert_allclose((rec.weights * want).sum(-1), 1.0, atol=1e-6)


def test_illegal_mask_raises_torchs_own_error_and_restores():
    m = Sdpa()
    with pytest.raises(RuntimeError):
        with attnscope.capture(m):
            m(torch.randn(2, 6, 8), attn_mask=torch.ones(5, 5, dtype=torch.bool))
    assert not m._forward_pre_hooks


def test_mha_key_padding_mask_as_float_and_3d_attn_mask():
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(8, 2, batch_first=True)
    x = torch.randn(2, 4, 8)
    kpm = torch.zeros(2, 4)
    kpm[0, 3] = float("-inf")
    am = torch.zeros(4, 4, 4)  # (B*H, Tq, Tk)
    am[1, :, 0] = float("-inf")  # item 0, head 1 may not see key 0
    cap, _ = one(mha, x, x, x, key_padding_mask=kpm, attn_mask=am)
    a = cap.attention[0].allowed_full()
    assert not a[0, :, :, 3].any() and a[1, :, :, 3].all()
    assert not a[0, 1, :, 0].any() and a[0, 0, :, 0].all()
    with torch.no_grad():  # reference: torch's own per-head weights
        ref = mha(x, x, x, key_padding_mask=kpm, attn_mask=am, need_weights=True, average_attn_weights=False)[1]
    np.testing.assert_allclose(cap.attention[0].weights, ref.numpy(), atol=1e-6)


def test_long_sequence_hits_the_memory_guard_with_a_useful_message():
    m = Sdpa()
    with pytest.raises(MemoryBudgetError, match=r"1x2x2048x2048 float32 = 32.0 MiB.*keep='stats'"):
        with attnscope.capture(m, max_bytes=16 * 1024**2):
            m(torch.randn(1, 2048, 8))


def test_half_precision_model():
    torch.manual_seed(0)
    m32 = Sdpa()
    m16 = Sdpa().half()
    m16.load_state_dict({k: v.half() for k, v in m32.state_dict().items()})
    x = torch.randn(1, 5, 8)
    cap16, out16 = one(m16, x.half())
    cap32, _ = one(m32, x)
    assert cap16.attention[0].weights.dtype == np.float32  # weights are kept as float32 whatever the model's dtype
    np.testing.assert_allclose(cap16.attention[0].weights, cap32.attention[0].weights, atol=5e-3)
    assert out16.dtype == torch.float16


def test_meta_device_model_is_refused_at_enter():
    with torch.device("meta"):
        m = Sdpa()
    with pytest.raises(UnsupportedModelError, match="meta device"):
        with attnscope.capture(m):
            pass
    assert not m._forward_pre_hooks


@pytest.mark.filterwarnings("ignore:`torch.jit.script_method` is deprecated:DeprecationWarning")  # torch's own import
def test_compiled_module_is_refused_with_the_way_out():
    compiled = torch.compile(Sdpa())
    with pytest.raises(UnsupportedModelError, match=r"_orig_mod"):
        attnscope.capture(compiled)


def test_dataparallel_wrapper_on_cpu_names_through_the_wrapper():
    wrapped = nn.DataParallel(nn.TransformerEncoderLayer(8, 2, 16, batch_first=True))
    x = torch.randn(2, 3, 8)
    cap, _ = one(wrapped, x)
    assert [r.name for r in cap.attention] == ["module.self_attn"]


def test_nested_tuple_and_dict_outputs_of_blocks():
    class Block(nn.Module):
        def __init__(self):
            super().__init__()
            self.attn = Sdpa()

        def forward(self, x):
            y = self.attn(x)
            return {"hidden": (y, [x]), "aux": 1}

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.blocks = nn.ModuleList([Block(), Block()])

        def forward(self, x):
            for b in self.blocks:
                x = b(x)["hidden"][0]
            return x

    net = Net()
    cap, out = one(net, torch.randn(2, 3, 8))
    assert [r.name for r in cap.residual] == ["blocks.0", "blocks.1"]
    np.testing.assert_allclose(cap.residual[1].norms, out.detach().norm(dim=-1).numpy(), rtol=1e-6)


def test_heads_out_of_range_for_an_sdpa_module_is_an_option_error():
    with pytest.raises(OptionError, match="has 2 heads"):
        with attnscope.capture(Sdpa(), heads=[3]) as cap:
            cap._model(torch.randn(1, 3, 8))


def test_non_module_and_bad_option_types():
    with pytest.raises(OptionError):
        attnscope.capture(Sdpa(), max_bytes=0)
    with pytest.raises(OptionError):
        attnscope.capture(Sdpa(), heads=[])
    with pytest.raises(OptionError):
        attnscope.capture(Sdpa(), heads=[1, 1])
    with pytest.raises(OptionError):
        attnscope.capture(Sdpa(), layers=[True])
    with pytest.raises(OptionError, match="expected 'self' or 'cross'"):
        attnscope.capture(Sdpa(), kinds={"": "both"})
    with pytest.raises(OptionError, match="tap\\(kind=...\\)"):
        attnscope.tap(torch.rand(2, 2), kind="x")


def test_attention_module_that_never_runs():
    class Unused(nn.Module):
        def __init__(self):
            super().__init__()
            self.attn = nn.MultiheadAttention(8, 2)
            self.lin = nn.Linear(8, 8)

        def forward(self, x):
            return self.lin(x)

    m = Unused()
    with pytest.raises(NoAttentionError, match="ran no attention call"):
        with attnscope.capture(m):
            m(torch.randn(2, 8))


def test_uniform_entropy_reference_on_gqa_path():
    q = torch.zeros(1, 4, 3, 2)
    k = torch.randn(1, 2, 7, 2)

    class G(nn.Module):
        def forward(self, q, k):
            return F.scaled_dot_product_attention(q, k, k, enable_gqa=True)

    m = G()
    cap, _ = one(m, q, k)
    np.testing.assert_allclose(cap.head_table()["entropy"], math.log(7), atol=1e-6)  # uniform over 7 keys (common practice, no source)
