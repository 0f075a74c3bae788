"""Hygiene under faults: whatever happens inside a capture block, the model and torch come back as they were."""

from __future__ import annotations

import threading

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.overrides import TorchFunctionMode

import attnscope
from attnscope.errors import CaptureStateError


def encoder():
    torch.manual_seed(0)
    return nn.TransformerEncoder(nn.TransformerEncoderLayer(16, 2, 32, dropout=0.0, batch_first=True), 2,
                                 enable_nested_tensor=False).eval()


def state(model):
    return ([(n, m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for n, m in model.named_modules()],
            {k: v.clone() for k, v in model.state_dict().items()})


def same_state(model, before):
    mods, params = before
    now_mods, now_params = state(model)
    return mods == now_mods and all(torch.equal(params[k], now_params[k]) for k in params)


X = torch.randn(2, 5, 16)


def reference_output(model):
    with torch.no_grad():
        return model(X)


@pytest.mark.parametrize("fault", [KeyboardInterrupt, RuntimeError, SystemExit])
def test_base_exceptions_inside_the_block(fault):
    model = encoder()
    before, plain = state(model), reference_output(model)
    with pytest.raises(fault):
        with attnscope.capture(model):
            model(X)
            raise fault()
    assert same_state(model, before)
    assert torch._C._len_torch_function_stack() == 0 and torch.backends.mha.get_fastpath_enabled()
    torch.testing.assert_close(reference_output(model), plain, atol=0, rtol=0)


def test_generator_closed_inside_the_block():
    model = encoder()
    before = state(model)

    def steps():
        with attnscope.capture(model) as cap:
            for _ in range(3):
                yield model(X), cap

    gen = steps()
    out, cap = next(gen)
    gen.close()  # GeneratorExit raised at the yield, inside the with block
    assert same_state(model, before) and torch._C._len_torch_function_stack() == 0
    assert cap._state == "closed"


def test_out_of_order_exit_keeps_the_other_mode():
    class Counting(TorchFunctionMode):
        calls = 0

        def __torch_function__(self, func, types, args=(), kwargs=None):
            Counting.calls += 1
            return func(*args, **(kwargs or {}))

    model = encoder()
    cap = attnscope.capture(model)
    cap.__enter__()
    other = Counting()
    other.__enter__()  # someone else's mode, entered after ours
    model(X)
    cap.__exit__(None, None, None)  # ours leaves first: the other mode must stay on the stack
    assert torch._C._len_torch_function_stack() == 1
    n = Counting.calls
    torch.ones(1) + 1
    assert Counting.calls > n
    other.__exit__(None, None, None)
    assert torch._C._len_torch_function_stack() == 0 and len(cap.attention) == 2


def test_nested_captures_on_the_same_model_both_record_the_same_weights():
    model = encoder()
    with attnscope.capture(model) as outer:
        with attnscope.capture(model, keep="stats") as inner:
            model(X)
        model(X)  # only the outer one sees this
    assert len(inner.attention) == 2 and len(outer.attention) == 4
    a, b = outer.head_table().iloc[:4], inner.head_table()
    np.testing.assert_allclose(a["entropy"].to_numpy(), b["entropy"].to_numpy(), atol=1e-5)
    assert torch.backends.mha.get_fastpath_enabled()


def test_nested_captures_on_two_models():
    m1, m2 = encoder(), nn.MultiheadAttention(8, 2, batch_first=True)
    y = torch.randn(1, 3, 8)
    with attnscope.capture(m1) as c1, attnscope.capture(m2) as c2:
        m1(X)
        m2(y, y, y)
    assert [r.name for r in c1.attention] == ["layers.0.self_attn", "layers.1.self_attn"]
    assert [r.name for r in c2.attention] == [""]


def test_outer_exit_before_inner_keeps_the_fast_path_off_until_the_last_closes():
    model = encoder()
    a, b = attnscope.capture(model), attnscope.capture(model)
    a.__enter__()
    b.__enter__()
    model(X)
    a.__exit__(None, None, None)
    assert torch.backends.mha.get_fastpath_enabled() is False  # b is still open
    with torch.no_grad():
        model(X)  # eval + no_grad: would take the fused path if the switch were back on
    b.__exit__(None, None, None)
    assert torch.backends.mha.get_fastpath_enabled() is True
    assert len(b.attention) == 4 and len(a.attention) == 2


def test_forward_on_another_thread_is_reported_not_recorded():
    model = encoder()
    with pytest.warns(attnscope.AttnscopeWarning, match="ran on another thread"):
        with attnscope.capture(model) as cap:
            model(X)
            worker = threading.Thread(target=lambda: model(X))
            worker.start()
            worker.join()
    assert len(cap.attention) == 2  # the capturing thread's forward only


def test_reuse_after_exit_is_a_clear_error():
    model = encoder()
    cap = attnscope.capture(model)
    with cap:
        model(X)
    with pytest.raises(CaptureStateError, match="already used"):
        cap.__enter__()
    assert len(cap.attention) == 2


def test_tap_error_inside_forward_leaves_nothing_behind():
    class Bad(nn.Module):
        def forward(self, x):
            attnscope.tap(x[0, 0, 0])  # a 0-dim tensor: refused
            return F.scaled_dot_product_attention(x, x, x)

    m = Bad()
    with pytest.raises(attnscope.ShapeError):
        with attnscope.capture(m):
            m(torch.randn(1, 1, 3, 4))
    assert not m._forward_hooks and torch._C._len_torch_function_stack() == 0


def test_ablation_inside_a_capture_closed_out_of_order_restores_everything():
    from attnscope.analyses.ablation import ablate

    model = encoder()
    cap = attnscope.capture(model)
    cap.__enter__()
    block = ablate(model, [("layers.0.self_attn", 1)])
    block.__enter__()
    with torch.no_grad():
        model(X)
    cap.__exit__(None, None, None)  # the capture leaves first, the ablation is still on
    assert torch.backends.mha.get_fastpath_enabled() is False and torch._C._len_torch_function_stack() == 1
    block.__exit__(None, None, None)
    assert torch.backends.mha.get_fastpath_enabled() is True and torch._C._len_torch_function_stack() == 0
    assert len(cap.attention) == 2


def test_captures_on_two_threads_keep_seeing_their_own_attention_while_torch_mha_runs_in_stats_mode():
    """One thread captures nn.MultiheadAttention with keep="stats" (called with weights: F.softmax is noted
    through a wrapper for the call; without: F.scaled_dot_product_attention is) while another captures
    hand-written softmax and SDPA blocks again and again: the second never misses a layer, and both functions
    are torch's own again once both are done."""
    import torch.nn.functional as F

    softmax, sdpa = F.softmax, F.scaled_dot_product_attention
    torch.manual_seed(0)

    class Hand(torch.nn.Module):  # hand-written attention over (B, H, T, E), two ways
        num_heads = 2

        def forward(self, x):
            q = x.view(2, 5, 2, 4).transpose(1, 2)  # (B, H, T, E)
            return F.softmax(q @ q.transpose(-1, -2), dim=-1) @ q + F.scaled_dot_product_attention(q, q, q)

    hand = Hand()
    counts, errors = [], []

    def other():
        try:
            for _ in range(40):
                with torch.no_grad(), attnscope.capture(hand, layers=[""], residual=False) as cap:
                    hand(torch.randn(2, 5, 8))
                counts.append(sorted(r.source for r in cap.attention))
        except Exception as exc:  # noqa: BLE001  (reported below)
            errors.append(exc)

    mha = torch.nn.MultiheadAttention(8, 2, batch_first=True).eval()
    x = torch.randn(2, 5, 8)
    worker = threading.Thread(target=other)
    worker.start()
    for i in range(40):
        with torch.no_grad(), attnscope.capture(mha, layers=[""], residual=False, keep="stats") as cap:
            mha(x, x, x, need_weights=bool(i % 2))
        assert len(cap.attention) == 1 and cap.attention[0].stats is not None
    worker.join()
    assert not errors and counts == [["sdpa", "softmax"]] * 40
    assert F.softmax is softmax and F.scaled_dot_product_attention is sdpa
