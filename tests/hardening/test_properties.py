"""Property tests over shapes, masks and dtypes of the SDPA path and the statistics.

References: the fused ``F.scaled_dot_product_attention`` output (recomputed weights @ V must equal it) and
the definitions themselves (rows sum to 1 over allowed keys, zero mass on forbidden keys, entropy in
[0, ln(number of allowed keys)] — common practice, no source).
"""

from __future__ import annotations

import math

import numpy as np
import torch
import torch.nn.functional as F
from hypothesis import given, settings
from hypothesis import strategies as st
from torch import nn

import attnscope


class Call(nn.Module):
    def forward(self, q, k, v, **kw):
        return F.scaled_dot_product_attention(q, k, v, **kw)


@st.composite
def sdpa_case(draw):
    b, hk = draw(st.integers(1, 3)), draw(st.integers(1, 3))
    group = draw(st.sampled_from([1, 2]))
    h = hk * group
    tq, tk, e = draw(st.integers(1, 7)), draw(st.integers(1, 7)), draw(st.sampled_from([2, 4, 8]))
    seed = draw(st.integers(0, 2**16))
    g = torch.Generator().manual_seed(seed)
    q = torch.randn(b, h, tq, e, generator=g)
    k = torch.randn(b, hk, tk, e, generator=g)
    v = torch.randn(b, hk, tk, e, generator=g)
    kw = {"enable_gqa": group > 1}
    kind = draw(st.sampled_from(["none", "causal", "bool", "float"]))
    if kind == "causal":
        kw["is_causal"] = True
    elif kind in ("bool", "float"):
        shape = draw(st.sampled_from([(tq, tk), (b, 1, tq, tk), (b, h, tq, tk), (1, 1, 1, tk)]))
        allowed = torch.rand(shape, generator=g) > draw(st.sampled_from([0.0, 0.3, 0.7]))
        kw["attn_mask"] = allowed if kind == "bool" else torch.zeros(shape).masked_fill(~allowed, float("-inf"))
    if draw(st.booleans()):
        kw["scale"] = draw(st.floats(0.05, 2.0))
    return q, k, v, kw


@settings(max_examples=60, deadline=None)
@given(sdpa_case())
def test_recomputed_weights_reproduce_the_fused_output(case):
    q, k, v, kw = case
    m = Call()
    with attnscope.capture(m) as cap:
        out = m(q, k, v, **kw)
    rec = cap.attention[0]
    w = torch.from_numpy(rec.weights)  # (B, H, Tq, Tk)
    vv = v.repeat_interleave(q.size(1) // v.size(1), dim=1)
    torch.testing.assert_close(w @ vv, out, atol=2e-5, rtol=1e-5)  # reference: the fused kernel's own output
    allowed = rec.allowed_full()
    has_key = allowed.any(-1)
    sums = (rec.weights * allowed).sum(-1)
    np.testing.assert_allclose(sums[has_key], 1.0, atol=1e-5)  # rows sum to 1 over allowed keys
    assert np.all(rec.weights[~allowed] == 0)  # zero mass on forbidden keys
    assert np.all(rec.weights[~has_key] == 0)  # a row with no key carries no weight (the fused output is 0 there)
    table = cap.head_table()
    assert (table["leak_mass"].fillna(0) <= 1e-6).all()


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 3), st.integers(1, 4), st.integers(1, 9), st.integers(1, 9), st.integers(0, 2**16),
       st.sampled_from([torch.float32, torch.float64, torch.float16, torch.bfloat16]))
def test_entropy_is_within_zero_and_ln_allowed(b, h, tq, tk, seed, dtype):
    from attnscope.stats import head_sums

    g = torch.Generator().manual_seed(seed)
    allowed = torch.rand(b, 1, tq, tk, generator=g) > 0.4
    scores = torch.randn(b, h, tq, tk, generator=g) * 4
    w = torch.softmax(scores.masked_fill(~allowed, float("-inf")), -1).nan_to_num(0.0).to(dtype)
    sums = head_sums(w, allowed)
    n = allowed.sum(-1).expand(b, h, tq)  # (B, H, Tq)
    # per-row bounds, checked on the sums: 0 <= Σ entropy <= Σ ln(n) over counted rows
    counted = (n >= 1).double().sum(dim=(0, 2)).numpy()
    bound = torch.where(n >= 1, torch.log(n.clamp_min(1).double()), torch.zeros(())).sum(dim=(0, 2)).numpy()
    np.testing.assert_array_equal(sums.rows, counted)
    assert np.all(sums.entropy >= -1e-6) and np.all(sums.entropy <= bound + 1e-3 * np.maximum(counted, 1))
    ratio = sums.means()["entropy_ratio"]
    assert np.all(np.isnan(ratio) | ((ratio >= -1e-6) & (ratio <= 1 + 1e-3)))
    assert math.isfinite(float(sums.max_weight.sum()))
