"""What makes capture cheap stays exact: statistics in cache-sized pieces, eager weights kept without a copy, and
the opt-in ``sdpa="weights"`` (output computed from the weights capture builds) against the plain model."""

from __future__ import annotations

import gc
import importlib
import math
import weakref

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from scipy.special import entr
from torch import nn

import attnscope
import attnscope.stats
from attnscope.errors import AttnscopeWarning, OptionError
from attnscope.stats import head_sums


def brute_means(w: np.ndarray, allowed: np.ndarray | None, offset: int = 0) -> dict[str, np.ndarray]:
    """Per-head statistics row by row in float64 numpy and scipy (independent of attnscope.stats)."""
    b, h, tq, tk = w.shape
    out = {k: np.zeros(h) for k in ("entropy", "max_weight", "sink_mass", "mean_distance", "leak_mass")}
    rows = np.zeros(h)
    for hi in range(h):
        for bi in range(b):
            for i in range(tq):
                row = w[bi, hi, i].astype(np.float64)
                ok = np.ones(tk, bool) if allowed is None else np.broadcast_to(allowed, w.shape)[bi, hi, i]
                if not ok.any() or not np.isfinite(row).all():
                    continue
                rows[hi] += 1
                out["entropy"][hi] += entr(row).sum()  # scipy's -x ln x (no normalisation: a leaky row may not sum to 1)
                out["max_weight"][hi] += row.max()
                out["sink_mass"][hi] += row[np.argmax(ok)]
                out["mean_distance"][hi] += (row * np.abs(i + offset - np.arange(tk))).sum()  # brute force
                out["leak_mass"][hi] += row[~ok].sum()
    return {k: v / rows for k, v in out.items()}


@pytest.mark.parametrize("dtype", [torch.float32, torch.bfloat16])
def test_statistics_in_pieces_equal_brute_force_on_kept_maps(monkeypatch, dtype):
    monkeypatch.setattr(attnscope.stats, "PIECE_BYTES", 300)  # force many pieces, some of one row
    torch.manual_seed(0)
    b, h, tq, tk = 2, 3, 7, 10
    allowed = torch.ones(tq, tk, dtype=torch.bool).tril(diagonal=3)  # (Tq, Tk)
    allowed[4, :2] = False  # sink moves for one row
    scores = torch.randn(b, h, tq, tk) * 3
    w = scores.masked_fill(~allowed, float("-inf")).softmax(-1)
    w[0, 1, 2, 5] = 0.01  # a leak past the mask
    w[1, 2, 3, 0] = float("nan")  # a non-finite row is left out
    w = w.to(dtype)
    means = head_sums(w, allowed[None, None], 3).means()
    expect = brute_means(w.float().numpy(), allowed.numpy(), 3)
    for k, v in expect.items():
        np.testing.assert_allclose(means[k], v, rtol=1e-6, atol=1e-6, err_msg=k)


def gpt2(attn: str):
    import transformers

    cfg = transformers.GPT2Config(n_layer=2, n_head=4, n_embd=32, n_positions=64, vocab_size=50, bos_token_id=0,
                                  eos_token_id=0, resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
    torch.manual_seed(0)
    return transformers.GPT2Model._from_config(cfg, attn_implementation=attn).eval()


def test_stats_mode_equals_statistics_of_kept_maps_to_1e_6():
    model = gpt2("eager")
    ids = torch.randint(0, 50, (3, 40))
    with torch.no_grad(), attnscope.capture(model, keep="maps") as maps:
        model(ids)
    with torch.no_grad(), attnscope.capture(model, keep="stats") as stats:
        model(ids)
    for rec, srec in zip(maps.attention, stats.attention):
        expect = brute_means(rec.weights, rec.allowed, rec.query_offset)  # from the kept maps, brute force
        got = srec.stats.means()
        for k, v in expect.items():
            np.testing.assert_allclose(got[k], v, rtol=1e-6, atol=1e-6, err_msg=k)


def test_eager_weights_are_kept_without_a_copy_and_equal_output_attentions():
    model = gpt2("eager")
    ids = torch.randint(0, 50, (2, 12))
    with torch.no_grad(), attnscope.capture(model) as cap:
        out = model(ids, output_attentions=True)
    for rec, theirs in zip(cap.attention, out.attentions):
        assert np.array_equal(rec.weights, theirs.numpy())  # HF eager output_attentions
        assert np.shares_memory(rec.weights, theirs.numpy())  # the model's own tensor: no copy
    with torch.no_grad(), attnscope.capture(model, heads=[1, 3]) as some:
        out = model(ids, output_attentions=True)
    assert not np.shares_memory(some.attention[0].weights, out.attentions[0].numpy())  # only kept heads copied
    assert np.array_equal(some.attention[0].weights, out.attentions[0][:, [1, 3]].numpy())


class InPlaceAfterSoftmax(nn.Module):
    """A hand-written attention that scales its weights in place after the softmax (what capture must notice)."""

    def forward(self, x):  # (B, T, D)
        att = (x @ x.transpose(-2, -1)).unsqueeze(1).softmax(dim=-1)  # (B, 1, T, T)
        att.mul_(0.5)
        return (att @ x.unsqueeze(1)).squeeze(1)


def test_weights_changed_in_place_after_capture_took_them_warn():
    model = InPlaceAfterSoftmax()
    with pytest.warns(AttnscopeWarning, match="changed their attention weights in place"):
        with torch.no_grad(), attnscope.capture(model, residual=False) as cap:
            model(torch.randn(1, 4, 8))
    assert cap.attention[0].weights.sum(-1).max() == pytest.approx(0.5)  # the records say what happened


def test_sdpa_weights_mode_output_differs_from_the_plain_model_by_float_rounding_only(monkeypatch):
    monkeypatch.setattr(attnscope.stats, "ROW_BLOCK_MIN", 8)  # causal calls built in row blocks (masks.blocked_weights)
    plans, real_plan = [], attnscope.stats.score_plan
    monkeypatch.setattr(attnscope.stats, "score_plan", lambda *a: plans.append(a[1:]) or real_plan(*a))
    model = gpt2("sdpa")
    ids = torch.randint(0, 50, (3, 40))
    with torch.no_grad():
        plain = model(ids).last_hidden_state
        with attnscope.capture(model) as beside:
            same = model(ids).last_hidden_state
        # the layers share one causal mask: its row blocks are worked out once per forward, not once per layer
        assert len(beside.attention) > 1 and plans == [(3, model.config.n_head, 40, 40)]
        with attnscope.capture(model, sdpa="weights") as once:
            got = model(ids).last_hidden_state
        assert len(plans) == 2
        eager = gpt2("eager")
        theirs = eager(ids, output_attentions=True).attentions
    assert torch.equal(same, plain)  # the default leaves the fused kernel untouched
    diff = (got - plain).abs().max().item()
    scale = plain.abs().max().item()
    # measured on torch 2.13 CPU: about 1e-6 absolute on activations of size ~5 (float32 rounding of another
    # summation order); far below any difference a model's decision would notice
    assert diff / scale < 1e-5
    for a, b, ref in zip(beside.attention, once.attention, theirs):
        np.testing.assert_allclose(b.weights, ref.numpy(), atol=1e-5)  # HF eager output_attentions
        np.testing.assert_allclose(b.weights, a.weights, atol=1e-5)


def test_recomputed_maps_of_a_padded_batch_work_each_parts_blocks_out_once_per_forward(monkeypatch):
    """The default SDPA route builds kept maps a few batch items at a time; under a padding mask (another for
    each item) each part's row blocks are worked out once per forward, not once per layer. Maps against HF eager
    output_attentions of the same weights."""
    from attnscope.capture import recorder

    monkeypatch.setattr(attnscope.stats, "ROW_BLOCK_MIN", 8)  # row blocks that skip keys under the causal mask
    monkeypatch.setattr(recorder, "_STATS_CHUNK_BYTES", 4 * 40 * 40 * 4)  # one batch item of 4 heads at a time
    plans, real_plan = [], attnscope.stats.score_plan
    monkeypatch.setattr(attnscope.stats, "score_plan", lambda *a: plans.append(a[1:]) or real_plan(*a))
    model, eager = gpt2("sdpa"), gpt2("eager")
    ids = torch.randint(0, 50, (3, 40))
    pad = torch.ones(3, 40, dtype=torch.long)
    pad[0, -6:] = 0  # right padding: item 0 is 34 tokens long
    pad[2, -11:] = 0
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids, attention_mask=pad)
    assert len(cap.attention) == 2 and plans == [(1, 4, 40, 40)] * 3  # one per item, shared by both layers
    with torch.no_grad():
        theirs = eager(ids, attention_mask=pad, output_attentions=True).attentions
    for rec, ref in zip(cap.attention, theirs):
        np.testing.assert_allclose(rec.weights, ref.numpy(), atol=1e-5)


def test_many_parts_of_a_padded_batch_leave_the_shared_mask_worked_out_once(monkeypatch):
    """More batch parts than the recorder keeps score plans for: the plans give way to each other, not to the
    allowed mask every layer shares (worked out once per forward). Maps against HF eager output_attentions."""
    from attnscope.capture import masks, recorder

    monkeypatch.setattr(recorder, "_STATS_CHUNK_BYTES", 4 * 40 * 40 * 4)  # one batch item of 4 heads at a time
    derived, real_allowed = [], masks.sdpa_allowed
    monkeypatch.setattr(masks, "sdpa_allowed", lambda *a: derived.append(1) or real_allowed(*a))
    model, eager = gpt2("sdpa"), gpt2("eager")
    ids = torch.randint(0, 50, (20, 40))  # 20 parts: more than the 16 results the recorder keeps
    pad = torch.ones(20, 40, dtype=torch.long)
    for i in range(20):
        pad[i, 40 - i:] = 0  # right padding, another length for every item
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids, attention_mask=pad)
    assert len(cap.attention) == 2 and len(derived) == 1
    with torch.no_grad():
        theirs = eager(ids, attention_mask=pad, output_attentions=True).attentions
    for rec, ref in zip(cap.attention, theirs):
        np.testing.assert_allclose(rec.weights, ref.numpy(), atol=1e-5)


@pytest.mark.parametrize("keep", ["maps", "stats"])
def test_sdpa_weights_mode_with_gqa_and_a_padding_mask_against_math(keep, monkeypatch):
    """Output of sdpa="weights" against an independent softmax(QKᵀ/√d + mask) @ V and torch's own kernel; with
    keep="stats" output and statistics come from the same pieces (small pieces and row blocks forced here), the
    statistics equal float64 brute force on the independent weights, and a row with no allowed key gives 0."""
    monkeypatch.setattr(attnscope.stats, "SCORE_PIECE_BYTES", 256)
    monkeypatch.setattr(attnscope.stats, "ROW_BLOCK_MIN", 2)
    torch.manual_seed(0)
    q, k, v = torch.randn(2, 4, 5, 8), torch.randn(2, 2, 7, 8), torch.randn(2, 2, 7, 6)
    mask = torch.ones(2, 1, 5, 7, dtype=torch.bool)
    mask[1, :, :, 5:] = False
    mask[0, :, 3] = False  # query 3 of item 0 sees no key

    class Block(nn.Module):
        def forward(self, q, k, v):
            return F.scaled_dot_product_attention(q, k, v, attn_mask=mask, enable_gqa=True)

    block = Block()
    with attnscope.capture(block, sdpa="weights", layers=[""], residual=False, keep=keep) as cap:
        got = block(q, k, v)
    kk, vv = k.repeat_interleave(2, 1), v.repeat_interleave(2, 1)
    scores = (q @ kk.transpose(-2, -1) / math.sqrt(8)).masked_fill(~mask, float("-inf"))  # independent softmax
    w = scores.softmax(-1).nan_to_num(0.0)  # the row with no key: zeros, as torch's fused kernels give
    torch.testing.assert_close(got, w @ vv, rtol=1e-5, atol=1e-6)
    torch.testing.assert_close(got, F.scaled_dot_product_attention(q, k, v, attn_mask=mask, enable_gqa=True),
                               rtol=1e-5, atol=1e-6)
    assert torch.equal(got[0, :, 3], torch.zeros(4, 6))
    if keep == "maps":
        np.testing.assert_allclose(cap.attention[0].weights, w.numpy(), atol=1e-6)
    else:
        assert cap.attention[0].weights is None
        expect = brute_means(w.numpy(), mask.numpy(), offset=7 - 5)  # 5 queries are the last of 7 positions
        for key, val in expect.items():
            np.testing.assert_allclose(cap.attention[0].stats.means()[key], val, rtol=1e-6, atol=1e-6, err_msg=key)


def test_sdpa_weights_mode_leaves_calls_that_need_gradients_untouched():
    model = gpt2("sdpa")
    ids = torch.randint(0, 50, (1, 9))
    plain = model(ids).last_hidden_state
    with attnscope.capture(model, sdpa="weights") as cap:
        got = model(ids).last_hidden_state
    assert torch.equal(got, plain) and got.requires_grad
    assert len(cap.attention) == 2


def test_sdpa_option_fails_at_the_door():
    with pytest.raises(OptionError, match="'beside' or 'weights'"):
        attnscope.capture(gpt2("sdpa"), sdpa="weight")


def test_recomputed_maps_built_in_pieces_equal_an_independent_softmax(monkeypatch):
    recorder = importlib.import_module("attnscope.capture.recorder")

    monkeypatch.setattr(recorder, "_STATS_CHUNK_BYTES", 2 * 4 * 6 * 6 * 4)  # two batch items per piece
    torch.manual_seed(0)
    q, k, v = torch.randn(5, 4, 6, 8), torch.randn(5, 4, 6, 8), torch.randn(5, 4, 6, 8)

    class Block(nn.Module):
        def forward(self, q, k, v):
            return F.scaled_dot_product_attention(q, k, v, is_causal=True)

    block = Block()
    with attnscope.capture(block, layers=[""], residual=False) as cap:
        out = block(q, k, v)
    causal = torch.ones(6, 6, dtype=torch.bool).tril()
    w = (q @ k.transpose(-2, -1) / math.sqrt(8)).masked_fill(~causal, float("-inf")).softmax(-1)  # independent
    np.testing.assert_allclose(cap.attention[0].weights, w.numpy(), atol=1e-6)
    assert torch.equal(out, F.scaled_dot_product_attention(q, k, v, is_causal=True))  # untouched by default


class MaskedBlockAttention(nn.Module):
    """Hand-written attention that adds the ``attention_mask`` it is given and, optionally, masks more inside."""

    def __init__(self, inner_causal: bool) -> None:
        super().__init__()
        self.inner_causal = inner_causal
        self.n_head = 2

    def forward(self, x, attention_mask=None):  # x (B, T, D); attention_mask (B or 1, 1, Tq or 1, Tk) float
        b, t, d = x.shape
        q = x.view(b, t, 2, d // 2).transpose(1, 2)  # (B, H, T, E)
        scores = q @ q.transpose(-2, -1)  # (B, H, T, T)
        if self.inner_causal:
            scores = scores.masked_fill(~torch.ones(t, t, dtype=torch.bool).tril(), torch.finfo(x.dtype).min)
        if attention_mask is not None:
            scores = scores + attention_mask
        w = F.softmax(scores, dim=-1)
        return (w @ q).transpose(1, 2).reshape(b, t, d)


def _padding(b: int, t: int, full: bool) -> torch.Tensor:
    keep = torch.ones(b, t, dtype=torch.bool)
    keep[1, 4:] = False  # the second item is padded after 4 tokens
    allowed = keep[:, None, None, :] & (torch.ones(t, t, dtype=torch.bool).tril() if full else True)
    return torch.zeros(allowed.shape).masked_fill(~allowed, torch.finfo(torch.float32).min)


@pytest.mark.parametrize(("inner_causal", "full"), [(False, True), (True, False), (True, True)])
def test_softmax_masks_from_the_mask_argument_or_the_scores_equal_an_independent_recomputation(inner_causal, full):
    torch.manual_seed(0)
    b, t = 3, 6
    block = MaskedBlockAttention(inner_causal)
    x = torch.randn(b, t, 8)
    mask = _padding(b, t, full)  # (B, 1, T, T) full mask, or (B, 1, 1, T) padding only
    with torch.no_grad(), attnscope.capture(block, residual=False) as cap:
        block(x, attention_mask=mask)
    # independent: a key is allowed where the causal rule (when the block applies one) and the mask allow it
    expect = ~(mask <= -1e4).expand(b, 1, t, t)
    if inner_causal:
        expect = expect & torch.ones(t, t, dtype=torch.bool).tril()
    rec = cap.attention[0]
    np.testing.assert_array_equal(rec.allowed_full(), np.broadcast_to(expect.numpy(), rec.weights.shape))
    assert rec.causal == (inner_causal or full)


def test_a_mask_argument_that_disagrees_with_the_scores_is_not_trusted():
    """A mask argument the block does not apply (it masks causally on its own) must not be taken for the mask."""

    class IgnoringMaskAttention(MaskedBlockAttention):
        def forward(self, x, attention_mask=None):
            return super().forward(x, None)

    torch.manual_seed(0)
    block = IgnoringMaskAttention(inner_causal=True)
    unrelated = torch.zeros(2, 1, 5, 5)  # allows every key: contradicts the scores of every map
    with torch.no_grad(), attnscope.capture(block, residual=False) as cap:
        block(torch.randn(2, 5, 8), attention_mask=unrelated)
    causal = torch.ones(5, 5, dtype=torch.bool).tril()  # common practice, no source: the causal rule j <= i
    np.testing.assert_array_equal(cap.attention[0].allowed_full()[0, 0], causal.numpy())
    assert cap.attention[0].causal


@pytest.mark.parametrize("scale", [1.0, 40.0])
def test_entropy_from_scores_equals_brute_force_with_minus_inf_masks_and_large_scores(monkeypatch, scale):
    monkeypatch.setattr(attnscope.stats, "PIECE_BYTES", 400)  # many pieces, some of one row
    torch.manual_seed(0)
    b, h, tq, tk = 2, 3, 7, 9
    allowed = torch.ones(tq, tk, dtype=torch.bool).tril(diagonal=2)  # (Tq, Tk)
    scores = (torch.randn(b, h, tq, tk) * scale).masked_fill(~allowed, float("-inf"))  # -inf, as hand-written code
    scores[1, 0, 5] = float("-inf")  # a row with no allowed key: NaN weights, left out
    w = scores.softmax(-1)  # (B, H, Tq, Tk)
    got = head_sums(w, allowed[None, None], 2, scores=scores).means()
    expect = brute_means(w.numpy(), allowed.numpy(), 2)  # scipy's entr on the weights, row by row
    for k, v in expect.items():
        np.testing.assert_allclose(got[k], v, rtol=1e-6, atol=1e-6, err_msg=k)
    assert list(head_sums(w, allowed[None, None], 2, scores=scores).nonfinite) == [1, 0, 0]  # the all -inf row


@pytest.mark.parametrize("heads", [None, [1, 3]])
def test_stats_of_a_softmax_call_equal_brute_force_on_its_maps_with_chosen_heads(monkeypatch, heads):
    recorder = importlib.import_module("attnscope.capture.recorder")
    monkeypatch.setattr(recorder, "_STATS_CHUNK_BYTES", 2 * 4 * 40 * 40 * 4)  # pieces of two batch items
    model = gpt2("eager")
    ids = torch.randint(0, 50, (5, 40))
    with torch.no_grad(), attnscope.capture(model, keep="maps", heads=heads) as maps:
        model(ids)
    with torch.no_grad(), attnscope.capture(model, keep="stats", heads=heads) as stats:
        model(ids)
    for rec, srec in zip(maps.attention, stats.attention):
        expect = brute_means(rec.weights, rec.allowed, rec.query_offset)  # from the kept maps, brute force
        for k, v in expect.items():
            np.testing.assert_allclose(srec.stats.means()[k], v, rtol=1e-6, atol=1e-6, err_msg=k)


class WatchedAttention(nn.Module):
    """Hand-written attention that keeps a weak reference to its softmax output, to see when it is freed."""

    def forward(self, x):  # (B, T, D)
        w = (x @ x.transpose(-2, -1)).unsqueeze(1).softmax(dim=-1)  # (B, 1, T, T)
        self.seen = weakref.ref(w)
        return (w @ x.unsqueeze(1)).squeeze(1)


def test_keep_stats_frees_the_model_weights_as_the_forward_goes_without_the_cycle_collector():
    model = WatchedAttention()
    gc.collect()
    gc.disable()  # memory must be reused layer by layer, not when Python's cycle collector happens to run
    try:
        with torch.no_grad(), attnscope.capture(model, keep="stats", residual=False) as cap:
            model(torch.randn(2, 5, 8))
            assert model.seen() is None  # freed as soon as the module returned
        assert cap.attention[0].weights is None and cap.attention[0].stats is not None
    finally:
        gc.enable()


@pytest.mark.parametrize("sdpa", ["beside", "weights"])
@pytest.mark.parametrize("mask_kind", ["causal", "bool with an empty row", "float -inf"])
def test_stats_of_recomputed_sdpa_calls_equal_brute_force_on_their_maps(mask_kind, sdpa):
    torch.manual_seed(0)
    q, k, v = torch.randn(3, 4, 6, 8) * 3, torch.randn(3, 4, 6, 8) * 3, torch.randn(3, 4, 6, 8)
    allowed = torch.ones(3, 1, 6, 6, dtype=torch.bool)
    allowed[1, :, :, 4:] = False
    allowed[2, :, 3] = False  # query 3 of item 2 sees no key: a zero row
    mask = {"causal": None, "bool with an empty row": allowed,
            "float -inf": torch.zeros(allowed.shape).masked_fill(~allowed, float("-inf"))}[mask_kind]

    class Block(nn.Module):
        def forward(self, q, k, v):
            return F.scaled_dot_product_attention(q, k, v, attn_mask=mask, is_causal=mask is None)

    block = Block()
    with attnscope.capture(block, layers=[""], residual=False) as maps:
        block(q, k, v)
    with attnscope.capture(block, layers=[""], residual=False, keep="stats", sdpa=sdpa) as stats:
        block(q, k, v)
    rec = maps.attention[0]
    expect = brute_means(rec.weights, rec.allowed, rec.query_offset)  # from the kept maps, brute force
    for key, val in expect.items():
        np.testing.assert_allclose(stats.attention[0].stats.means()[key], val, rtol=1e-6, atol=1e-6, err_msg=key)


def _independent_weights(q, k, allowed, scale):
    """softmax(Q Kᵀ·scale) with forbidden keys at -inf, in float64; rows with no allowed key all zero."""
    s = (q.double() @ k.double().transpose(-2, -1)) * scale
    s = s.masked_fill(~allowed, float("-inf"))
    w = torch.softmax(s, dim=-1)
    return torch.nan_to_num(w, nan=0.0).numpy()


@pytest.mark.parametrize("case", ["causal", "window", "decode step", "per-item bool with an empty row", "none"])
def test_statistics_from_scores_without_a_map_equal_brute_force(monkeypatch, case):
    # small pieces and row blocks: many blocks, each with its own cut of keys, several pieces per block
    monkeypatch.setattr(attnscope.stats, "SCORE_PIECE_BYTES", 512)
    monkeypatch.setattr(attnscope.stats, "ROW_BLOCK_MIN", 3)
    torch.manual_seed(1)
    b, h, tq, tk, e = 2, 3, 13, 13, 4
    offset = 0
    if case == "decode step":
        tq, offset = 4, 9  # 4 new queries after 9 cached keys
    q, k = torch.randn(b, h, tq, e) * 3, torch.randn(b, h, tk, e) * 3
    i = torch.arange(tq)[:, None] + offset
    j = torch.arange(tk)[None, :]
    allowed = {"causal": j <= i, "window": (j <= i) & (j > i - 4), "decode step": j <= i,
               "per-item bool with an empty row": torch.rand(b, 1, tq, tk) > 0.4,
               "none": torch.ones(tq, tk, dtype=torch.bool)}[case]
    allowed = allowed.expand(b, h, tq, tk).clone() if allowed.dim() == 4 else allowed[None, None]
    if case.startswith("per-item"):
        allowed[1, :, 5] = False  # a query that sees no key
    scale = 0.37
    w = _independent_weights(q, k, allowed.expand(b, h, tq, tk), scale)
    expect = brute_means(w, allowed.numpy(), offset)  # float64 numpy and scipy, row by row
    got = attnscope.stats.score_sums(q, k, None if case == "none" else allowed, scale, offset).means()
    for key, val in expect.items():
        np.testing.assert_allclose(got[key], val, rtol=1e-6, atol=1e-6, err_msg=key)
    assert got["leak_mass"].tolist() == [0.0] * h


def test_inputs_in_the_transposed_layout_of_hf_projections_give_the_same_statistics_and_weights(monkeypatch):
    """Queries, keys and values as HF transformers hands them to attention: ``(B, T, H, E)`` projections
    transposed to ``(B, H, T, E)``, whose batch and head axes cannot be merged without a copy. score_sums and
    blocked_weights, two calls in a row with different inputs, each against the independent float64
    softmax(Q Kᵀ·scale + causal mask)."""
    from attnscope.capture import masks

    monkeypatch.setattr(attnscope.stats, "ROW_BLOCK_MIN", 3)  # row blocks, so blocked_weights skips some keys
    b, h, t, e = 2, 3, 11, 4
    allowed = torch.ones(t, t, dtype=torch.bool).tril()[None, None]
    for seed in (4, 5):
        torch.manual_seed(seed)
        qkv = torch.randn(b, t, 3 * h * e) * 2  # one projection of every head, as GPT-2's c_attn makes it
        q, k, v = (x.view(b, t, h, e).transpose(1, 2) for x in qkv.split(h * e, dim=2))  # (B, H, T, E) views
        with pytest.raises(RuntimeError):
            q.view(b * h, t, e)  # the layout this test is about: no view merges batch and heads
        w = _independent_weights(q, k, allowed.expand(b, h, t, t), 0.5)
        got, out = attnscope.stats.score_sums(q, k, allowed, 0.5, v=v)
        for key, val in brute_means(w, allowed.numpy()).items():
            np.testing.assert_allclose(got.means()[key], val, rtol=1e-6, atol=1e-6, err_msg=key)
        np.testing.assert_allclose(out.numpy(), w @ v.double().numpy(), rtol=1e-5, atol=1e-6)  # weights @ V
        bw, bout = masks.blocked_weights(q, k, allowed, False, 0.5, v=v)
        np.testing.assert_allclose(bw.numpy(), w, rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(bout.numpy(), w @ v.double().numpy(), rtol=1e-5, atol=1e-6)


def test_a_mask_edited_in_place_between_calls_is_worked_out_again():
    """The recorder keeps what score_sums works out from a mask per mask tensor, for every layer of a forward:
    an in-place edit between two calls (a new version) must not reuse it. Each call's statistics against the
    independent float64 softmax(Q Kᵀ·scale + mask), brute force."""
    torch.manual_seed(3)
    b, h, t, e = 2, 3, 9, 4
    q, k, v = torch.randn(b, h, t, e) * 2, torch.randn(b, h, t, e) * 2, torch.randn(b, h, t, e)
    allowed = torch.ones(t, t, dtype=torch.bool).tril()[None, None].clone()  # (1, 1, T, T) shared by every map

    class Block(nn.Module):
        def forward(self, q, k, v):
            return F.scaled_dot_product_attention(q, k, v, attn_mask=allowed, scale=0.5)

    block, seen = Block(), []
    with attnscope.capture(block, layers=[""], residual=False, keep="stats") as cap:
        for _ in range(2):
            block(q, k, v)
            seen.append(allowed.clone())
            allowed[..., 4:, :2] = False  # in place: the second call must see keys 0, 1 forbidden to queries 4+
    assert len(cap.attention) == 2
    for rec, mask in zip(cap.attention, seen):
        expect = brute_means(_independent_weights(q, k, mask.expand(b, h, t, t), 0.5), mask.numpy())
        for key, val in expect.items():
            np.testing.assert_allclose(rec.stats.means()[key], val, rtol=1e-6, atol=1e-6, err_msg=key)


@pytest.mark.parametrize("shape", [(1, 1, 1, 1), (2, 3, 1, 5), (1, 2, 5, 1), (2, 2, 0, 4), (2, 2, 4, 0)])
@pytest.mark.parametrize("mask", ["none", "all forbidden", "per item"])
def test_statistics_and_output_of_edge_shapes_equal_brute_force(shape, mask):
    """One query, one key, no query, no key, a mask that forbids everything: score_sums' statistics against
    brute force on the independent float64 softmax(Q Kᵀ·scale + mask), its output against weights @ V; a call
    with no row that sees a key counts no row."""
    torch.manual_seed(5)
    b, h, tq, tk = shape
    q, k, v = torch.randn(b, h, tq, 4), torch.randn(b, h, tk, 4), torch.randn(b, h, tk, 4)
    allowed = {"none": None, "all forbidden": torch.zeros(tq, tk, dtype=torch.bool),
               "per item": torch.rand(b, 1, tq, tk) > 0.5}[mask]
    full = torch.ones(b, h, tq, tk, dtype=torch.bool) if allowed is None else allowed.expand(b, h, tq, tk)
    w = _independent_weights(q, k, full, 0.5)
    sums, out = attnscope.stats.score_sums(q, k, allowed, 0.5, v=v)
    np.testing.assert_allclose(out.numpy(), w @ v.double().numpy(), atol=1e-6)
    counted = full.any(dim=-1).sum(dim=(0, 2)).numpy()  # rows with an allowed key, per head
    np.testing.assert_array_equal(sums.rows, counted)
    if counted.all():
        for key, val in brute_means(w, full.numpy()).items():
            np.testing.assert_allclose(sums.means()[key], val, rtol=1e-6, atol=1e-6, err_msg=key)


def test_statistics_on_two_threads_at_once_equal_one_thread():
    """Each thread keeps its own scratch between calls: two threads reducing different maps at once get what
    each gets alone (float64 brute force beside it)."""
    import threading

    torch.manual_seed(4)
    jobs = []
    for t in (40, 64):
        q, k = torch.randn(2, 4, t, 8), torch.randn(2, 4, t, 8)
        allowed = torch.ones(t, t, dtype=torch.bool).tril()
        jobs.append((q, k, allowed))
    alone = [attnscope.stats.score_sums(q, k, a).means() for q, k, a in jobs]
    got: dict[int, list] = {0: [], 1: []}

    def run(i):
        q, k, a = jobs[i]
        for _ in range(20):
            got[i].append(attnscope.stats.score_sums(q, k, a).means())

    threads = [threading.Thread(target=run, args=(i,)) for i in (0, 1)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    for i, (q, k, a) in enumerate(jobs):
        brute = brute_means(_independent_weights(q, k, a.expand(2, 4, *a.shape), 1 / math.sqrt(8)), a.numpy())
        for key, val in brute.items():
            np.testing.assert_allclose(alone[i][key], val, rtol=1e-6, atol=1e-6, err_msg=key)
        for means in got[i]:
            for key in brute:
                np.testing.assert_array_equal(means[key], alone[i][key], err_msg=key)  # same computation, same bits


@pytest.mark.parametrize("case", ["causal", "window", "decode step", "per-item bool with an empty row"])
def test_weights_in_row_blocks_equal_an_independent_softmax_and_skip_forbidden_blocks(monkeypatch, case):
    monkeypatch.setattr(attnscope.stats, "ROW_BLOCK_MIN", 4)  # many blocks, each with its own cut of keys
    from attnscope.capture import masks

    products = []
    real_bmm, real_baddbmm = torch.bmm, torch.baddbmm

    def watch(a, b_, *args, **kw):
        out = real_bmm(a, b_, *args, **kw)
        if b_.shape[-2] == 6:  # Q Kᵀ (E = 6), not weights @ V (Ev = 5)
            products.append(out.numel())
        return out

    def watch_add(c, a, b_, *args, **kw):
        out = real_baddbmm(c, a, b_, *args, **kw)
        if b_.shape[-2] == 6:
            products.append(out.numel())
        return out

    monkeypatch.setattr(masks.torch, "bmm", watch)
    monkeypatch.setattr(masks.torch, "baddbmm", watch_add)
    torch.manual_seed(2)
    b, h, tq, tk = 2, 3, 40, 40
    if case == "decode step":
        tq = 12  # 12 new queries after 28 cached keys, bool mask aligned to the end
    q, k, v = torch.randn(b, h, tq, 6) * 2, torch.randn(b, h, tk, 6) * 2, torch.randn(b, h, tk, 5)
    i = torch.arange(tq)[:, None] + (tk - tq)
    j = torch.arange(tk)[None, :]
    mask, is_causal = None, False
    if case == "causal":
        is_causal = True
    elif case == "window":
        mask = (j <= i) & (j > i - 8)
    elif case == "decode step":
        mask = j <= i
    else:
        mask = (j <= i) & (torch.rand(b, 1, 1, tk) > 0.3)
        mask = mask.clone()
        mask[1, 0, 7] = False  # a query that sees no key
    allowed = masks.sdpa_allowed(mask, is_causal, tq, tk)
    scale = 1 / math.sqrt(6)
    want = _independent_weights(q, k, allowed.expand(b, h, tq, tk), scale)  # float64, forbidden keys at -inf
    w, out = masks.blocked_weights(q, k, mask, is_causal, v=v)
    np.testing.assert_allclose(w.numpy(), want, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(out.numpy(), want @ v.double().numpy(), rtol=1e-5, atol=1e-5)  # weights @ V
    # the keys no query of a block may see are never multiplied (a decode step forbids only a few: 10 % here)
    assert products and sum(products) < (0.95 if case == "decode step" else 0.8) * b * h * tq * tk
    # the same blocks from a plan the caller keeps (capture's recorder keeps one per mask tensor): the mask then
    # comes from the plan alone, none is passed
    plan = attnscope.stats.score_plan(masks.compact(allowed, (b, h, tq, tk)), b, h, tq, tk)
    w2, out2 = masks.blocked_weights(q, k, None, False, v=v, plan=plan)
    np.testing.assert_allclose(w2.numpy(), want, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(out2.numpy(), want @ v.double().numpy(), rtol=1e-5, atol=1e-5)
    with pytest.raises(ValueError, match="plan is for"):
        masks.blocked_weights(q[:1], k[:1], None, False, plan=plan)  # a plan made for other shapes
    # no mask, or a mask that forbids too little to skip a tenth of the map: the plain computation is kept
    assert masks.blocked_weights(q, k, None, False) is None
    assert masks.blocked_weights(q, k, torch.rand(b, 1, 1, tk) > 0.05, False) is None


@pytest.mark.parametrize("sdpa", ["beside", "weights"])
def test_stats_of_a_fused_call_form_no_map(monkeypatch, sdpa):
    """keep="stats" of an SDPA call with a bool mask reduces scores piece by piece; the whole map never exists
    (with sdpa="weights" the output is built from the same pieces)."""
    largest = []

    def watching(real):
        def watch(*args, **kw):
            out = real(*args, **kw)
            largest.append(out.numel())
            return out
        return watch

    for product in ("bmm", "baddbmm"):  # QKᵀ (baddbmm adds a shared mask's bias with it) and weights @ V
        monkeypatch.setattr(attnscope.stats.torch, product, watching(getattr(torch, product)))
    q = k = v = torch.randn(2, 4, 256, 8)

    class Block(nn.Module):
        def forward(self, q, k, v):
            return F.scaled_dot_product_attention(q, k, v, is_causal=True)

    block = Block()
    with attnscope.capture(block, layers=[""], residual=False, keep="stats", sdpa=sdpa) as cap:
        got = block(q, k, v)
    torch.testing.assert_close(got, F.scaled_dot_product_attention(q, k, v, is_causal=True), rtol=1e-5, atol=1e-6)
    assert cap.attention[0].stats is not None and largest
    whole = 2 * 4 * 256 * 256
    assert max(largest) < whole  # piece by piece
    assert sum(largest) < 0.7 * whole  # causal: the key blocks above the diagonal are never multiplied


@pytest.mark.parametrize("batch_first", [True, False])
@pytest.mark.parametrize("mask_kind", ["bool", "float -inf"])
@pytest.mark.parametrize("call", ["no weights", "no weights, with grad", "weights"])
def test_stats_of_torch_multihead_attention_equal_brute_force_on_its_own_weights(monkeypatch, batch_first, mask_kind,
                                                                                  call):
    """keep="stats" of nn.MultiheadAttention with a causal and a padding mask equals float64 brute force on torch's
    own per-head weights (``need_weights=True, average_attn_weights=False``, asked outside capture) to 1e-6.

    Called without weights and no gradient needed, capture computes the inner attention call itself: output and
    statistics from the same pieces (score_sums with values, no map), the output equal to torch's fused call to
    float rounding. With a gradient needed the call runs as the caller made it (bit-identical, graph intact) and
    the statistics come from its queries and keys. Called with weights, from the scores torch's softmax took."""
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(16, 4, batch_first=batch_first).eval()
    x = torch.randn(3, 9, 16)  # (B, T, E)
    xin = x if batch_first else x.transpose(0, 1)
    causal = torch.ones(9, 9, dtype=torch.bool).triu(1)  # True = masked (torch's convention)
    if mask_kind == "float -inf":  # as nn.Transformer.generate_square_subsequent_mask builds it
        causal = torch.zeros(9, 9).masked_fill(causal, float("-inf"))
    pad = torch.zeros(3, 9, dtype=torch.bool)
    pad[1, 6:] = True  # item 1 ends at 6
    allowed = (~pad)[:, None, None, :] & torch.ones(9, 9, dtype=torch.bool).tril()  # (B, 1, Tq, Tk)
    if mask_kind == "float -inf":
        pad = torch.zeros(3, 9).masked_fill(pad, float("-inf"))  # the same type as the attention mask
    was = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(False)  # as under capture: the Python path, not the native kernel
    try:
        with torch.no_grad():
            plain, w = mha(xin, xin, xin, attn_mask=causal, key_padding_mask=pad, need_weights=True,
                           average_attn_weights=False)  # torch's own weights, outside capture
            plain_fused, _ = mha(xin, xin, xin, attn_mask=causal, key_padding_mask=pad, need_weights=False)
    finally:
        torch.backends.mha.set_fastpath_enabled(was)
    used = {"head_sums": [], "score_sums": 0}
    recorder = importlib.import_module("attnscope.capture.recorder")
    paths = [importlib.import_module(f"attnscope.capture.paths.{m}") for m in ("sdpa", "mha")]
    real_head, real_score = recorder.head_sums, attnscope.stats.score_sums

    def watch_head(weights, allowed, offset=0, scores=None):
        used["head_sums"].append(scores is not None)
        return real_head(weights, allowed, offset, scores)

    def watch_score(*args, **kw):
        used["score_sums"] += 1
        return real_score(*args, **kw)

    monkeypatch.setattr(recorder, "head_sums", watch_head)
    for path in paths:
        monkeypatch.setattr(path, "score_sums", watch_score)
    grad = call == "no weights, with grad"
    inp = xin.clone().requires_grad_(True) if grad else xin
    with torch.set_grad_enabled(grad), attnscope.capture(mha, layers=[""], residual=False, keep="stats") as cap:
        out, got_w = mha(inp, inp, inp, attn_mask=causal, key_padding_mask=pad, need_weights=call == "weights",
                         average_attn_weights=False)
    if call == "weights":
        assert used == {"head_sums": [True], "score_sums": 0}  # the entropy from torch's own scores
        torch.testing.assert_close(got_w, w, rtol=0, atol=0)  # the caller still gets torch's weights
        torch.testing.assert_close(out, plain, rtol=0, atol=0)
    elif grad:
        assert used == {"head_sums": [], "score_sums": 1} and got_w is None  # no map formed
        torch.testing.assert_close(out.detach(), plain_fused, rtol=0, atol=0)  # the call ran as the caller made it
        out.sum().backward()
        assert inp.grad is not None and inp.grad.abs().sum() > 0  # the graph is intact
    else:
        assert used == {"head_sums": [], "score_sums": 1} and got_w is None  # no map, computed once
        torch.testing.assert_close(out, plain_fused, rtol=1e-5, atol=1e-6)  # torch's fused kernel, to rounding
    expect = brute_means(w.numpy(), allowed.numpy())
    got = cap.attention[0].stats.means()
    assert cap.attention[0].causal
    for k, v in expect.items():
        np.testing.assert_allclose(got[k], v, rtol=1e-6, atol=1e-6, err_msg=k)


@pytest.mark.parametrize("mask_kind", ["bias", "zero attention"])
def test_stats_of_torch_multihead_attention_with_a_score_bias_or_added_keys_take_the_math_path(mask_kind):
    """A float mask that adds a bias to the scores (not only 0 / -inf) or keys torch adds itself
    (``add_zero_attn``) are not for the fused statistics: they come from torch's own weights, to 1e-6."""
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(16, 4, batch_first=True, add_zero_attn=mask_kind == "zero attention").eval()
    x = torch.randn(2, 7, 16)
    mask = -0.3 * (torch.arange(7)[:, None] - torch.arange(7)[None]).abs().float() if mask_kind == "bias" else None
    with torch.no_grad():
        _, w = mha(x, x, x, attn_mask=mask, need_weights=True, average_attn_weights=False)  # torch's weights
    with torch.no_grad(), attnscope.capture(mha, layers=[""], residual=False, keep="stats") as cap:
        mha(x, x, x, attn_mask=mask, need_weights=False)
    expect = brute_means(w.numpy(), None)
    got = cap.attention[0].stats.means()
    for k, v in expect.items():
        np.testing.assert_allclose(got[k], v, rtol=1e-6, atol=1e-6, err_msg=k)


@pytest.mark.parametrize("batch_first", [True, False])
def test_stats_of_a_torch_seq2seq_with_padding_equal_its_math_path_maps(monkeypatch, batch_first):
    """nn.Transformer with a padded source, a causal target and a padded memory: every self- and cross-attention
    call under keep="stats" (MHA's fused route: capture computes each inner attention call once) equals float64
    brute force on the maps keep="maps" takes from torch's own math path, to 1e-6; the model's output equals the
    uncaptured model's (torch's fused kernels) to float rounding."""
    torch.manual_seed(0)
    model = nn.Transformer(d_model=16, nhead=4, num_encoder_layers=2, num_decoder_layers=2, dim_feedforward=32,
                           dropout=0.0, batch_first=batch_first).eval()
    src, tgt = torch.randn(3, 7, 16), torch.randn(3, 5, 16)  # (B, T, E)
    if not batch_first:
        src, tgt = src.transpose(0, 1), tgt.transpose(0, 1)
    pad = torch.zeros(3, 7, dtype=torch.bool)
    pad[1, 4:] = True  # item 1's source ends at 4
    causal = nn.Transformer.generate_square_subsequent_mask(5)  # float, -inf above the diagonal

    def run():
        return model(src, tgt, tgt_mask=causal, src_key_padding_mask=pad, memory_key_padding_mask=pad,
                     tgt_is_causal=True)

    mha_path = importlib.import_module("attnscope.capture.paths.mha")
    computed = []

    def watch(*args, v=None, **kw):
        computed.append(v is not None)
        return attnscope.stats.score_sums(*args, v=v, **kw)

    monkeypatch.setattr(mha_path, "score_sums", watch)
    with torch.no_grad():
        plain = run()
        with attnscope.capture(model, keep="maps") as maps:
            run()
        with attnscope.capture(model, keep="stats") as stats:
            got = run()
    assert computed == [True] * 6  # 2 encoder self, 2 decoder self, 2 cross: each computed once by capture
    torch.testing.assert_close(got, plain, rtol=1e-5, atol=1e-5)
    assert [r.name for r in maps.attention] == [r.name for r in stats.attention]
    assert {r.kind for r in stats.attention} == {"self", "cross"}
    for rec, srec in zip(maps.attention, stats.attention):
        assert srec.causal == rec.causal
        expect = brute_means(rec.weights, rec.allowed, rec.query_offset)  # from torch's math-path maps
        for k, v in expect.items():
            np.testing.assert_allclose(srec.stats.means()[k], v, rtol=1e-6, atol=1e-6, err_msg=f"{rec.name} {k}")


@pytest.mark.parametrize("tk", [8, 13, 256])
@pytest.mark.parametrize("per_item", [False, True])
def test_mask_agreement_check_equals_a_numpy_comparison(tk, per_item):
    """The per-layer check that a softmax's scores forbid exactly the keys its mask argument forbids (first and
    last map, compared eight keys to a word where the layout allows) against a plain numpy comparison of the same
    two maps, over random masks, one flipped key, and a NaN score."""
    from attnscope.capture import masks

    rng = np.random.default_rng(tk)
    b, h, tq = 3, 2, 5
    outcomes = set()
    for trial in range(12):
        allowed = torch.from_numpy(rng.random((b if per_item else 1, 1, tq, tk)) > 0.3)
        scores = torch.randn(b, h, tq, tk).masked_fill(~allowed, torch.finfo(torch.float32).min)
        if trial % 3 == 1:  # one key of one end map disagrees with the mask
            bi, hi = (0, 0) if trial % 2 else (b - 1, h - 1)
            i, j = rng.integers(tq), rng.integers(tk)
            scores[bi, hi, i, j] = 0.5 if not allowed[min(bi, allowed.shape[0] - 1), 0, i, j] else -1e30
        if trial % 3 == 2:
            scores[b - 1, h - 1, 0, 0] = float("nan")
        s, a = scores.numpy(), np.broadcast_to(allowed.numpy(), (b, h, tq, tk))
        want = all(np.array_equal(s[bi, hi] > masks.FORBID_AT, a[bi, hi]) for bi, hi in ((0, 0), (b - 1, h - 1)))
        assert masks.agrees_with_scores(allowed, scores) == want, trial
        outcomes.add(want)
    assert outcomes == {True, False}  # both answers were put to the check
