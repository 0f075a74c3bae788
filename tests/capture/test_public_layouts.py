"""Capture on small models written the way public code writes them: helper modules, stored softmaxes,
residuals passed along, routers, output heads with log_softmax, blocks in nn.Sequential, bmm-style heads.

References: an independent softmax(QKᵀ/√d + mask) recomputation written here from each model's own q and k,
torch's own ``nn.MultiheadAttention(need_weights=True, average_attn_weights=False)``, and the model's own
outputs (bit for bit with and without capture).
"""

from __future__ import annotations

import functools
import math
import warnings

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import attnscope
from attnscope.analyses.ablation import ablation_change, head_importance
from attnscope.analyses.aggregate import aggregate_heads
from attnscope.analyses.generation import stitch_steps
from attnscope.analyses.heads import head_output_norms
from attnscope.capture.discovery import map_model

D, H = 16, 2


def reference_weights(q, k, allowed=None):
    """softmax(QKᵀ/√d) with forbidden keys at -inf: an independent recomputation (the textbook formula)."""
    scores = (q.double() @ k.double().transpose(-1, -2)) / math.sqrt(q.shape[-1])  # (B, H, Tq, Tk)
    if allowed is not None:
        scores = scores.masked_fill(~allowed, float("-inf"))
    return torch.softmax(scores, dim=-1).float().numpy()


# ---------------------------------------------------------------- the helper layouts (issue items 2, 3)
class Attend(nn.Module):
    """Scores and softmax in a helper, the softmax stored as a partial (a common library layout)."""

    def __init__(self, how="partial"):
        super().__init__()
        self.how = how
        self.attn_fn = functools.partial(F.softmax, dim=-1)
        self.softmax = nn.Softmax(dim=-1)

    def forward(self, q, k, v, mask=None):
        if self.how == "sdpa":
            return F.scaled_dot_product_attention(q, k, v, attn_mask=mask)
        sim = q @ k.transpose(-1, -2) * q.shape[-1] ** -0.5  # (B, H, Tq, Tk)
        if mask is not None:
            sim = sim.masked_fill(~mask, float("-inf"))
        attn = {"partial": self.attn_fn, "module": self.softmax, "method": lambda s: s.softmax(-1)}[self.how](sim)
        return attn @ v


class Attention(nn.Module):
    """q/k/v projections in the block, attention in an ``Attend`` child; ``context`` makes it cross-attention."""

    def __init__(self, how="partial"):
        super().__init__()
        self.to_q, self.to_k, self.to_v = nn.Linear(D, D), nn.Linear(D, D), nn.Linear(D, D)
        self.attend = Attend(how)
        self.to_out = nn.Linear(D, D)
        self.seen = {}

    def forward(self, x, context=None, mask=None, cache=None):
        src = x if context is None else context
        b, t, _ = x.shape
        q = self.to_q(x).view(b, t, H, D // H).transpose(1, 2)  # (B, H, Tq, Dh)
        k = self.to_k(src).view(b, -1, H, D // H).transpose(1, 2)  # (B, H, Tk, Dh)
        v = self.to_v(src).view(b, -1, H, D // H).transpose(1, 2)
        if cache is not None:
            if "k" in cache:
                k, v = torch.cat([cache["k"], k], dim=2), torch.cat([cache["v"], v], dim=2)
            cache["k"], cache["v"] = k, v
        self.seen = {"q": q.detach(), "k": k.detach()}
        out = self.attend(q, k, v, mask)  # (B, H, Tq, Dh)
        return self.to_out(out.transpose(1, 2).reshape(b, t, D))


class Decoder(nn.Module):
    def __init__(self, how="partial", layers=2, cross=False):
        super().__init__()
        self.emb = nn.Embedding(40, D)
        self.layers = nn.ModuleList(Attention(how) for _ in range(layers))
        self.cross = nn.ModuleList(Attention(how) for _ in range(layers)) if cross else None
        self.head = nn.Linear(D, 40)

    def forward(self, ids, pad=None, context=None, caches=None):
        x = self.emb(ids)
        t = ids.shape[1]
        past = 0 if caches is None or "k" not in caches[0] else caches[0]["k"].shape[2]
        mask = torch.ones(t, past + t, dtype=torch.bool).tril(diagonal=past)  # (Tq, Tk)
        if pad is not None:
            mask = mask & pad[:, None, None, :]  # (B, 1, Tq, Tk): key padding on top of causality
        for i, layer in enumerate(self.layers):
            x = x + layer(x, mask=mask, cache=None if caches is None else caches[i])
            if self.cross is not None:
                x = x + self.cross[i](x, context=context)
        return F.log_softmax(self.head(x), dim=-1)  # a generator head: never attention


@pytest.mark.parametrize("how", ["partial", "module", "method", "sdpa"])
def test_attention_in_a_helper_module_is_captured_under_the_block(how):
    torch.manual_seed(0)
    model = Decoder(how).eval()
    ids = torch.randint(0, 40, (2, 6))
    pad = torch.tensor([[True] * 6, [True] * 4 + [False] * 2])
    with torch.no_grad():
        plain = model(ids, pad)
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # no spurious note about the log_softmax head or the root
            with attnscope.capture(model) as cap:
                out = model(ids, pad)
    torch.testing.assert_close(out, plain, atol=0, rtol=0)  # capture leaves the computation alone
    assert [r.name for r in cap.attention] == ["layers.0", "layers.1"]  # the block the user knows
    assert {r.helper for r in cap.attention} == {"layers.0.attend" if how != "module" else "layers.0.attend.softmax",
                                               "layers.1.attend" if how != "module" else "layers.1.attend.softmax"}
    allowed = torch.ones(6, 6, dtype=torch.bool).tril() & pad[:, None, None, :]  # (B, 1, T, T)
    for rec, layer in zip(cap.attention, model.layers):
        assert rec.kind == "self"  # the keys come from the block's own input, whatever the helper's signature
        assert rec.causal  # a causal mask with key padding on top is still causal
        ref = reference_weights(layer.seen["q"], layer.seen["k"], allowed)  # reference: independent recomputation
        np.testing.assert_allclose(rec.weights, ref, atol=1e-5)


def test_cross_attention_in_a_helper_follows_where_the_keys_come_from():
    torch.manual_seed(0)
    model = Decoder("sdpa", cross=True).eval()
    ids, context = torch.randint(0, 40, (2, 5)), torch.randn(2, 7, D)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids, context=context)
    kinds = {r.name: r.kind for r in cap.attention}
    assert kinds == {"layers.0": "self", "cross.0": "cross", "layers.1": "self", "cross.1": "cross"}
    assert [r.shape[2:] for r in cap.attention if r.kind == "cross"] == [(5, 7), (5, 7)]


class PositionalCrossAttention(Attention):
    """Called as ``attn(x, context)``: the second tensor is projected into keys and values."""

    def forward(self, x, context):
        return super().forward(x, context=context)


def test_cross_attention_through_a_positional_context_is_cross():
    class Block(nn.Module):
        def __init__(self):
            super().__init__()
            self.attn = PositionalCrossAttention("sdpa")

        def forward(self, x, context):
            return x + self.attn(x, context)

    torch.manual_seed(0)
    block = Block().eval()
    x, ctx = torch.randn(2, 4, D), torch.randn(2, 4, D)  # same length: only provenance can tell
    with torch.no_grad(), attnscope.capture(block) as cap:
        block(x, ctx)
    assert [(r.name, r.kind) for r in cap.attention] == [("attn", "cross")]


class ResidualPassing(nn.Module):
    """A block that receives the residual as a second tensor and only adds it back (a BLOOM-style layout)."""

    def __init__(self):
        super().__init__()
        self.qkv = nn.Linear(D, 3 * D)
        self.dense = nn.Linear(D, D)

    def forward(self, hidden, residual, mask):
        b, t, _ = hidden.shape
        q, k, v = self.qkv(hidden).view(b, t, 3, H, D // H).permute(2, 0, 3, 1, 4)  # (B, H, T, Dh)
        w = F.softmax((q @ k.transpose(-1, -2)) / math.sqrt(D // H) + mask, dim=-1)  # (B, H, T, T)
        return residual + self.dense((w @ v).transpose(1, 2).reshape(b, t, D))


def test_a_residual_passed_as_second_tensor_is_not_cross_attention():
    torch.manual_seed(0)
    attn = ResidualPassing().eval()
    x = torch.randn(2, 5, D)
    mask = torch.zeros(5, 5).masked_fill(torch.ones(5, 5, dtype=torch.bool).triu(1), torch.finfo(torch.float32).min)
    with torch.no_grad(), attnscope.capture(attn) as cap:
        attn(x, x.clone(), mask)
    (rec,) = cap.attention
    assert rec.kind == "self" and rec.causal


# ---------------------------------------------------------------- what is not attention (item 4)
class Router(nn.Module):
    """A mixture-of-experts gate: a softmax over experts, no product of activations."""

    def __init__(self, experts=4):
        super().__init__()
        self.weight = nn.Parameter(torch.randn(experts, D) * 0.1)

    def forward(self, x):
        probs = torch.nn.functional.softmax(F.linear(x, self.weight), dim=-1)  # (B, T, experts)
        return probs


class MoEBlock(nn.Module):
    def __init__(self):
        super().__init__()
        self.attn = nn.MultiheadAttention(D, H, batch_first=True)
        self.gate = Router()
        self.experts = nn.ModuleList(nn.Linear(D, D) for _ in range(4))

    def forward(self, x):
        x = x + self.attn(x, x, x, need_weights=False)[0]
        p = self.gate(x)  # (B, T, E)
        return x + sum(p[..., i:i + 1] * e(x) for i, e in enumerate(self.experts))


class MoELM(nn.Module):
    def __init__(self):
        super().__init__()
        self.layers = nn.ModuleList(MoEBlock() for _ in range(2))
        self.out = nn.Linear(D, 30)

    def forward(self, x):
        for layer in self.layers:
            x = layer(x)
        return self.out(x).log_softmax(dim=-1)  # log_softmax( in the root's source: not an attention module


def test_routers_and_log_softmax_heads_are_not_attention():
    torch.manual_seed(0)
    model = MoELM().eval()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # before the fix: "attention modules , layers.0.gate, ... ran but ..."
        with torch.no_grad(), attnscope.capture(model) as cap:
            model(torch.randn(2, 5, D))
    assert [r.name for r in cap.attention] == ["layers.0.attn", "layers.1.attn"]
    assert [r.name for r in cap.residual] == ["layers.0", "layers.1"]
    with pytest.raises(attnscope.OptionError, match=r"attention modules \(layers.0.attn, layers.1.attn\)"):
        attnscope.capture(model, layers=[5])


def test_the_root_is_named_readably_in_messages():
    class Scorer(nn.Module):  # the root computes attention by hand, but only over a 2-D score table here
        def __init__(self):
            super().__init__()
            self.w = nn.Linear(D, D)

        def forward(self, x):
            return F.softmax(self.w(x) @ x.T, dim=-1)  # (T, T) — no heads, no batch: nothing capture can read

    m = Scorer()
    with pytest.raises(attnscope.NoAttentionError, match=r"attention modules <root Scorer> ran"):
        with attnscope.capture(m):
            m(torch.randn(5, D))


def test_layers_that_select_only_non_attention_modules_say_so():
    torch.manual_seed(0)
    model = MoELM().eval()
    with pytest.raises(attnscope.NoAttentionError, match=r"layers= selects layers.0.gate, none of which is or holds "
                                                         r"an attention module"):
        with torch.no_grad(), attnscope.capture(model, layers=["layers.0.gate"]):
            model(torch.randn(1, 3, D))


# ---------------------------------------------------------------- blocks in any container (item 5)
class VitBlock(nn.Module):
    def __init__(self):
        super().__init__()
        self.norm = nn.LayerNorm(D)
        self.attn = Attention("sdpa")

    def forward(self, x):
        return x + self.attn(self.norm(x))


def test_blocks_held_in_sequential_and_nested_containers_are_found():
    torch.manual_seed(0)
    vit = nn.Sequential(nn.Linear(D, D), nn.Sequential(VitBlock(), VitBlock()), nn.LayerNorm(D)).eval()
    x = torch.randn(2, 5, D)
    with torch.no_grad(), attnscope.capture(vit) as cap:
        vit(x)
    assert [r.name for r in cap.residual] == ["1.0", "1.1"]
    with torch.no_grad():
        stream = vit[1][0](vit[0](x))  # reference: the block's own output
    np.testing.assert_allclose(cap.residual[0].norms, stream.norm(dim=-1).numpy(), rtol=1e-6)

    class Staged(nn.Module):  # stages of blocks: a ModuleList of nn.Sequential
        def __init__(self):
            super().__init__()
            self.stages = nn.ModuleList([nn.Sequential(VitBlock(), VitBlock()), nn.Sequential(VitBlock())])

        def forward(self, x):
            for stage in self.stages:
                x = stage(x)
            return x

    staged = Staged().eval()
    with torch.no_grad(), attnscope.capture(staged) as cap:
        staged(x)
    assert [r.name for r in cap.residual] == ["stages.0.0", "stages.0.1", "stages.1.0"]


# ---------------------------------------------------------------- nested captures (item 6)
def test_attnscope_computations_add_nothing_to_an_open_capture():
    torch.manual_seed(0)
    model = Decoder("sdpa").eval()
    ids = torch.randint(0, 40, (2, 6))
    with torch.no_grad():
        with attnscope.capture(model) as alone:
            model(ids)
        with attnscope.capture(model) as cap:
            report = attnscope.check_causal(lambda t: model(t), ids, model=model, vocab_size=40)
            head_output_norms(model, ids)
            ablation_change(model, lambda: model(ids), [("layers.0", 0)])
            head_importance(model, lambda: model(ids), heads=[("layers.1", 1)])
            aggregate_heads(model, [ids])
            model(ids)  # the user's own run
    assert report.ok
    assert [r.name for r in cap.attention] == [r.name for r in alone.attention]  # only the user's run
    assert len(cap.residual) == len(alone.residual)
    for a, b in zip(cap.attention, alone.attention):
        np.testing.assert_array_equal(a.weights, b.weights)


def test_head_output_norms_find_the_block_projection_of_a_helper_layout():
    torch.manual_seed(0)
    model = Decoder("sdpa").eval()
    with torch.no_grad():
        model.layers[0].to_out.weight[:, D // H:] = 0.0  # head 1 of layers.0 writes nothing
    norms = head_output_norms(model, torch.randint(0, 40, (2, 6)))
    assert sorted(set(norms["name"])) == ["layers.0", "layers.1"]
    row = norms[(norms["name"] == "layers.0") & (norms["head"] == 1)]
    assert float(row["norm"].iloc[0]) == 0.0  # reference: a zero slice of W_O contributes exactly nothing


def test_cached_decoding_in_a_helper_layout_stitches():
    torch.manual_seed(0)
    model = Decoder("partial").eval()
    ids = torch.randint(0, 40, (1, 5))
    caches = [{} for _ in model.layers]
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids[:, :3], caches=caches)
        model(ids[:, 3:4], caches=caches)
        model(ids[:, 4:5], caches=caches)
    steps = [r for r in cap.attention if r.name == "layers.0"]
    assert [(r.shape[2:], r.query_offset, r.kind, r.causal) for r in steps] == [
        ((3, 3), 0, "self", True), ((1, 4), 3, "self", True), ((1, 5), 4, "self", True)]
    with torch.no_grad(), attnscope.capture(model) as full:
        model(ids)
    stitched = stitch_steps(cap)["layers.0"]
    np.testing.assert_allclose(stitched.weights, full.attention[0].weights, atol=1e-6)  # reference: one full pass


def test_a_cached_step_without_a_mask_is_causal():
    torch.manual_seed(0)
    attn = Attention("sdpa").eval()
    cache = {}
    with torch.no_grad(), attnscope.capture(attn) as cap:
        attn(torch.randn(1, 3, D), mask=torch.ones(3, 3, dtype=torch.bool).tril(), cache=cache)
        attn(torch.randn(1, 1, D), cache=cache)  # one query, every key earlier or itself: no mask needed
    assert [r.causal for r in cap.attention] == [True, True]


# ---------------------------------------------------------------- bmm-style (B·H, Tq, Tk) softmax (item 9)
class BmmAttention(nn.Module):
    """Heads folded into the batch axis, ``torch.bmm`` for scores and values (older seq2seq code)."""

    def __init__(self, declare_heads=True):
        super().__init__()
        if declare_heads:
            self.num_heads = H
        self.q_proj, self.k_proj, self.v_proj = nn.Linear(D, D), nn.Linear(D, D), nn.Linear(D, D)
        self.out_proj = nn.Linear(D, D)
        self.seen = {}

    def forward(self, x, mask=None):
        b, t, _ = x.shape

        def fold(y):
            return y.view(b, t, H, D // H).transpose(1, 2).reshape(b * H, t, D // H)  # (B·H, T, Dh)

        q, k, v = fold(self.q_proj(x)), fold(self.k_proj(x)), fold(self.v_proj(x))
        self.seen = {"q": q.detach().view(b, H, t, -1), "k": k.detach().view(b, H, t, -1)}
        scores = torch.bmm(q, k.transpose(1, 2)) / math.sqrt(D // H)  # (B·H, T, T)
        if mask is not None:
            scores = scores + mask
        w = F.softmax(scores, dim=-1)
        out = torch.bmm(w, v).view(b, H, t, D // H).transpose(1, 2).reshape(b, t, D)
        return self.out_proj(out)


def test_bmm_style_softmax_is_captured_with_heads_recovered():
    torch.manual_seed(0)
    attn = BmmAttention().eval()
    x = torch.randn(3, 5, D)
    causal = torch.zeros(5, 5).masked_fill(torch.ones(5, 5, dtype=torch.bool).triu(1), float("-inf"))
    with torch.no_grad(), attnscope.capture(attn) as cap:
        attn(x, causal)
    (rec,) = cap.attention
    assert rec.shape == (3, H, 5, 5) and rec.source == "softmax" and rec.causal
    ref = reference_weights(attn.seen["q"], attn.seen["k"], torch.ones(5, 5, dtype=torch.bool).tril())
    np.testing.assert_allclose(rec.weights, ref, atol=1e-5)  # reference: independent recomputation

    anonymous = BmmAttention(declare_heads=False).eval()  # no head count to read: rows kept as batch items
    with torch.no_grad(), attnscope.capture(anonymous) as cap:
        anonymous(x)
    assert cap.attention[0].shape == (3 * H, 1, 5, 5)


def test_the_helper_survives_save_and_load_and_older_files_still_load(tmp_path):
    import json
    import zipfile

    torch.manual_seed(0)
    model = Decoder("partial").eval()
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(torch.randint(0, 40, (1, 4)))
    path = tmp_path / "run.zip"
    attnscope.save(cap, path)
    back = attnscope.load(path)
    assert [r.helper for r in back.attention] == ["layers.0.attend", "layers.1.attend"]
    old = tmp_path / "old.zip"  # a file written before records noted helpers: no "helper" key at all
    with zipfile.ZipFile(path) as src, zipfile.ZipFile(old, "w") as dst:
        for item in src.namelist():
            data = src.read(item)
            if item.endswith(".json"):
                manifest = json.loads(data)
                for entry in manifest["attention"]:
                    entry.pop("helper")
                data = json.dumps(manifest).encode()
            dst.writestr(item, data)
    assert [r.helper for r in attnscope.load(old).attention] == [None, None]


# ---------------------------------------------------------------- common public layouts, end to end
class OneFileAttention(nn.Module):
    """The one-file GPT layout: fused qkv, a causal buffer, a fused path and a manual path beside it."""

    def __init__(self, d=D, h=H, t=16, fused=True):
        super().__init__()
        self.n_head, self.fused = h, fused
        self.c_attn, self.c_proj = nn.Linear(d, 3 * d), nn.Linear(d, d)
        self.register_buffer("bias", torch.tril(torch.ones(t, t)).view(1, 1, t, t))

    def forward(self, x):
        b, t, c = x.shape
        q, k, v = self.c_attn(x).split(c, dim=2)
        q, k, v = (z.view(b, t, self.n_head, c // self.n_head).transpose(1, 2) for z in (q, k, v))  # (B, H, T, Dh)
        if self.fused:
            y = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        else:
            att = (q @ k.transpose(-2, -1)) * (1.0 / math.sqrt(k.size(-1)))
            att = att.masked_fill(self.bias[:, :, :t, :t] == 0, float("-inf"))
            att = F.softmax(att, dim=-1)
            y = att @ v
        return self.c_proj(y.transpose(1, 2).contiguous().view(b, t, c))


class OneFileBlock(nn.Module):
    def __init__(self, fused):
        super().__init__()
        self.ln_1, self.attn, self.ln_2 = nn.LayerNorm(D), OneFileAttention(fused=fused), nn.LayerNorm(D)
        self.mlp = nn.Sequential(nn.Linear(D, 4 * D), nn.GELU(), nn.Linear(4 * D, D))

    def forward(self, x):
        x = x + self.attn(self.ln_1(x))
        return x + self.mlp(self.ln_2(x))


class OneFileGPT(nn.Module):
    def __init__(self, fused=True):
        super().__init__()
        self.transformer = nn.ModuleDict(dict(wte=nn.Embedding(40, D), wpe=nn.Embedding(16, D),
                                              h=nn.ModuleList(OneFileBlock(fused) for _ in range(2)),
                                              ln_f=nn.LayerNorm(D)))
        self.lm_head = nn.Linear(D, 40, bias=False)

    def forward(self, idx):
        x = self.transformer.wte(idx) + self.transformer.wpe(torch.arange(idx.shape[1]))
        for block in self.transformer.h:
            x = block(x)
        return self.lm_head(self.transformer.ln_f(x))


def test_one_file_gpt_fused_and_manual_paths_agree():
    torch.manual_seed(0)
    fused = OneFileGPT(fused=True).eval()
    manual = OneFileGPT(fused=False).eval()
    manual.load_state_dict(fused.state_dict())
    idx = torch.randint(0, 40, (2, 9))
    caps = {}
    for label, model in (("fused", fused), ("manual", manual)):
        with torch.no_grad():
            plain = model(idx)
            with attnscope.capture(model) as caps[label]:
                out = model(idx)
        torch.testing.assert_close(out, plain, atol=0, rtol=0)
        assert [r.name for r in caps[label].attention] == ["transformer.h.0.attn", "transformer.h.1.attn"]
        assert [r.name for r in caps[label].residual] == ["transformer.h.0", "transformer.h.1"]
        assert all(r.kind == "self" and r.causal for r in caps[label].attention)
    assert [r.source for r in caps["fused"].attention] == ["sdpa", "sdpa"]
    assert [r.source for r in caps["manual"].attention] == ["softmax", "softmax"]
    for a, b in zip(caps["fused"].attention, caps["manual"].attention):
        np.testing.assert_allclose(a.weights, b.weights, atol=1e-6)  # reference: the model's own manual softmax
    assert attnscope.check_causal(fused, idx, model=fused, vocab_size=40).ok


def test_sequence_first_language_model():
    torch.manual_seed(0)
    emb = nn.Embedding(40, D)
    enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(D, H, 32, dropout=0.0), 2,
                                enable_nested_tensor=False).eval()  # batch_first=False: (T, B, D)
    src = torch.randint(0, 40, (7, 3))  # (T, B)
    causal = nn.Transformer.generate_square_subsequent_mask(7)
    with torch.no_grad():
        x = emb(src)
        plain = enc(x, mask=causal)
        with attnscope.capture(enc) as cap:
            out = enc(x, mask=causal)
        # reference: torch's own MHA weights of layer 0 on the same input
        _, ref_w = enc.layers[0].self_attn(x, x, x, attn_mask=causal, need_weights=True, average_attn_weights=False)
    # torch's fused fast path (used without capture in eval + no_grad) and its math path differ by rounding only
    torch.testing.assert_close(out, plain, atol=1e-5, rtol=1e-5)
    assert [r.shape for r in cap.attention] == [(3, H, 7, 7)] * 2 and all(r.causal for r in cap.attention)
    np.testing.assert_allclose(cap.attention[0].weights, ref_w.numpy(), atol=1e-6)
    np.testing.assert_allclose(cap.residual[1].norms, out.norm(dim=-1).T.numpy(), rtol=1e-5)  # (B, T) from (T, B, D)


class Generator(nn.Module):
    """The output head of classic encoder-decoder code: a projection and a log_softmax."""

    def __init__(self):
        super().__init__()
        self.proj = nn.Linear(D, 40)

    def forward(self, x):
        return F.log_softmax(self.proj(x), dim=-1)


class EncoderDecoder(nn.Module):
    def __init__(self):
        super().__init__()
        self.src_embed, self.tgt_embed = nn.Embedding(40, D), nn.Embedding(40, D)
        self.core = nn.Transformer(D, H, 1, 2, 32, dropout=0.0, batch_first=True)
        self.generator = Generator()

    def forward(self, src, tgt):
        mask = nn.Transformer.generate_square_subsequent_mask(tgt.shape[1])
        return self.generator(self.core(self.src_embed(src), self.tgt_embed(tgt), tgt_mask=mask))


def test_encoder_decoder_with_a_generator_head():
    torch.manual_seed(0)
    model = EncoderDecoder().eval()
    src, tgt = torch.randint(0, 40, (2, 6)), torch.randint(0, 40, (2, 4))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # before: the generator's log_softmax drew a warning
        with torch.no_grad(), attnscope.capture(model) as cap:
            model(src, tgt)
    assert [(r.name, r.kind, r.causal) for r in cap.attention] == [
        ("core.encoder.layers.0.self_attn", "self", False),
        ("core.decoder.layers.0.self_attn", "self", True),
        ("core.decoder.layers.0.multihead_attn", "cross", False),
        ("core.decoder.layers.1.self_attn", "self", True),
        ("core.decoder.layers.1.multihead_attn", "cross", False),
    ]
    assert "generator" not in map_model(model).attention  # a log_softmax head is no attention module


class ScaledDotProductAttention(nn.Module):
    """A weight-free helper whose name says attention (the tutorial layout), with an ``nn.Softmax`` child."""

    def __init__(self):
        super().__init__()
        self.softmax = nn.Softmax(dim=-1)

    def forward(self, q, k, v):
        return self.softmax(q @ k.transpose(-1, -2) / math.sqrt(q.shape[-1])) @ v


class MultiHeadAttention(nn.Module):
    def __init__(self):
        super().__init__()
        self.w_qs, self.w_ks, self.w_vs, self.fc = (nn.Linear(D, D) for _ in range(4))
        self.attention = ScaledDotProductAttention()
        self.seen = {}

    def forward(self, x):
        b, t, _ = x.shape
        q, k, v = (w(x).view(b, t, H, D // H).transpose(1, 2) for w in (self.w_qs, self.w_ks, self.w_vs))
        self.seen = {"q": q.detach(), "k": k.detach()}
        return self.fc(self.attention(q, k, v).transpose(1, 2).reshape(b, t, D))


def test_a_named_weight_free_helper_is_part_of_its_block():
    torch.manual_seed(0)
    model = nn.Sequential(MultiHeadAttention(), MultiHeadAttention()).eval()
    assert map_model(model).leaves == ("0", "1")  # the helpers are not attention modules of their own
    with torch.no_grad(), attnscope.capture(model, layers=[1]) as cap:  # indices count the blocks users know
        model(torch.randn(2, 5, D))
    (rec,) = cap.attention
    assert (rec.name, rec.helper, rec.kind) == ("1", "1.attention.softmax", "self")
    ref = reference_weights(model[1].seen["q"], model[1].seen["k"])  # reference: independent recomputation
    np.testing.assert_allclose(rec.weights, ref, atol=1e-5)


def test_a_router_inside_an_attention_module_is_not_its_attention():
    class RoutedAttention(nn.Module):  # attention by hand, and a router with weights of its own beside it
        def __init__(self):
            super().__init__()
            self.qk = nn.Linear(D, 2 * D)
            self.gate = Router()

        def forward(self, x):
            b, t, _ = x.shape
            q, k = self.qk(x).view(b, t, 2, H, D // H).permute(2, 0, 3, 1, 4)  # (B, H, T, Dh)
            w = torch.softmax(q @ k.transpose(-1, -2), dim=-1)  # (B, H, T, T)
            return (w @ x[:, None]).mean(1) * self.gate(x).sum(-1, keepdim=True)  # gate: (B, T, E) softmax

    torch.manual_seed(0)
    m = RoutedAttention().eval()
    with torch.no_grad(), attnscope.capture(m) as cap:
        m(torch.randn(2, 5, D))
    assert [(r.name, r.shape) for r in cap.attention] == [("", (2, H, 5, 5))]  # the (B, T, E) gate is left out


def test_a_model_wrapped_in_sequential_keeps_its_own_layers_as_blocks():
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(D, 2, 2 * D, dropout=0.0, batch_first=True)
    model = nn.Sequential(nn.TransformerEncoder(layer, 2, enable_nested_tensor=False), nn.Linear(D, 3)).eval()
    x = torch.randn(2, 5, D)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(x)
    assert [r.name for r in cap.residual] == ["0.layers.0", "0.layers.1"]  # not the wrapped encoder "0"
    with torch.no_grad():
        stream = model[0].layers[0](x)  # reference: torch's own layer output
    np.testing.assert_allclose(cap.residual[0].norms, stream.norm(dim=-1).numpy(), rtol=1e-5)
