"""Dead and duplicate heads, output norms and clustering, on models whose heads were planted by weight surgery.

References: the planted truth itself (each finding must be what was cut, and nothing else), brute-force
Jensen–Shannon distances with ``scipy.spatial.distance.jensenshannon``, ``scipy.stats.entropy`` for the
entropy ratio, per-head output norms recomputed in the test from the input the output projection really
received (a forward hook on it) or from the fused kernel's own output, and brute-force pair loops.
"""

from __future__ import annotations

import doctest
import importlib
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from scipy.spatial.distance import jensenshannon
from scipy.stats import entropy
from torch import nn

import attnscope
from attnscope.analyses.ablation import head_importance
from attnscope.analyses.heads import dead_heads, duplicate_heads, head_clusters, head_output_norms
from attnscope.errors import OptionError, ShapeError, UnsupportedModelError

D, H, DH = 32, 4, 8
SINK_SCALE = 4.0


class PlantNet(nn.Module):
    """Two causal nn.MultiheadAttention layers on a residual stream; position 0 holds a fixed vector."""

    def __init__(self, causal: bool = True):
        super().__init__()
        self.causal = causal
        self.layers = nn.ModuleList(nn.MultiheadAttention(D, H, batch_first=True) for _ in range(2))

    def forward(self, x):
        t = x.shape[1]
        mask = torch.ones(t, t, dtype=torch.bool).triu(1) if self.causal else None
        for layer in self.layers:
            x = x + layer(x, x, x, attn_mask=mask, need_weights=False)[0]
        return x


PLANTED = {("layers.0", 1, "uniform"), ("layers.0", 2, "sink"), ("layers.1", 0, "silent")}
TWINS = [("layers.1", 2, "layers.1", 3)]


def rows(head):
    return slice(head * DH, (head + 1) * DH)


@torch.no_grad()
def planted(seed=0, sink_at=0, causal=True):
    """PlantNet with the cuts of PLANTED and TWINS; returns (model, inputs)."""
    torch.manual_seed(seed)
    net = PlantNet(causal).eval()
    u = torch.randn(D)
    u /= u.norm()
    for layer in net.layers:
        layer.in_proj_weight[:D] *= 3.0  # sharper healthy heads than at initialisation
    a, b = net.layers
    w, bias = a.in_proj_weight, a.in_proj_bias  # rows: queries 0:D, keys D:2D, values 2D:3D
    w[rows(1)], bias[rows(1)] = 0.0, 0.0  # uniform: layers.0 head 1 has query 0, so every score is 0
    s = rows(2)  # sink: layers.0 head 2 has a constant query and a key reading the direction u
    w[s], bias[s] = 0.0, 0.0
    bias[s.start] = SINK_SCALE
    w[D + s.start:D + s.stop], bias[D + s.start:D + s.stop] = 0.0, 0.0
    w[D + s.start] = SINK_SCALE * u
    b.out_proj.weight[:, rows(0)] = 0.0  # silent: layers.1 head 0 writes nothing
    for off in (0, D):  # twins: layers.1 head 3 gets head 2's query and key
        b.in_proj_weight[off + 24:off + 32] = b.in_proj_weight[off + 16:off + 24]
        b.in_proj_bias[off + 24:off + 32] = b.in_proj_bias[off + 16:off + 24]
    x = torch.randn(16, 12, D)
    x[:, sink_at] = 5.0 * u  # the key the sink head finds: only this position lies along u
    return net, x


def keep_input(store, key):
    """A forward hook that stores the module's first input (and returns None: it changes nothing)."""
    def hook(module, args, output):
        store[key] = args[0].detach()
    return hook


def run(net, x, keep="maps"):
    with torch.no_grad(), attnscope.capture(net, keep=keep) as cap:
        net(x)
    return cap


def test_planted_heads_are_found_with_their_reasons_and_nothing_else():
    net, x = planted()
    cap = run(net, x)
    findings = dead_heads(cap, output_norms=head_output_norms(net, x))
    assert {(f.name, f.head, f.kind) for f in findings} == PLANTED  # reference: what the surgery planted
    assert all(f.reason.startswith(f.kind + ": ") for f in findings)
    twins = duplicate_heads(cap)
    assert [(p.name_a, p.head_a, p.name_b, p.head_b) for p in twins] == TWINS
    assert twins[0].distance < 1e-3


def test_uniform_head_entropy_ratio_is_one_by_scipy():
    net, x = planted()
    rec = run(net, x).attention[0]
    w = rec.weights[:, 1].astype(np.float64)  # (B, Tq, Tk) of the uniform head
    ratios = [entropy(w[b, i, :i + 1]) / math.log(i + 1) for b in range(w.shape[0]) for i in range(1, w.shape[1])]
    assert np.allclose(ratios, 1.0, atol=1e-6)  # reference: scipy.stats.entropy over the allowed keys


def test_sink_on_a_fixed_key_that_is_not_the_first():
    net, x = planted(sink_at=3, causal=False)
    cap = run(net, x)
    sinks = [f for f in dead_heads(cap) if f.kind == "sink"]
    assert [(f.name, f.head) for f in sinks] == [("layers.0", 2)] and "key 3" in sinks[0].reason
    share = cap.attention[0].weights[:, 2, :, 3].mean()  # brute force: mean weight on key 3 over all rows
    assert f"{share:.3f}" in sinks[0].reason


def test_stats_only_capture_finds_uniform_and_sink():
    net, x = planted()
    cap = run(net, x, keep="stats")
    found = {(f.name, f.head, f.kind) for f in dead_heads(cap)}
    assert found == {("layers.0", 1, "uniform"), ("layers.0", 2, "sink")}
    with pytest.raises(ShapeError, match="keep='maps'"):
        duplicate_heads(cap)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_random_heads_are_not_flagged(seed):
    torch.manual_seed(seed)
    net = PlantNet().eval()  # default initialisation, no surgery
    x = torch.randn(8, 12, D)
    cap = run(net, x)
    assert dead_heads(cap, output_norms=head_output_norms(net, x)) == []
    assert duplicate_heads(cap) == []


def brute_js(wa: np.ndarray, wb: np.ndarray) -> float:
    """Mean over (item, query) rows of scipy's Jensen–Shannon distance, base 2."""
    a, b = wa.reshape(-1, wa.shape[-1]).astype(np.float64), wb.reshape(-1, wb.shape[-1]).astype(np.float64)
    return float(np.mean([jensenshannon(p, q, base=2) for p, q in zip(a, b)]))


def test_distances_match_scipy_jensenshannon():
    net, x = planted()
    cap = run(net, x)
    tree = head_clusters(cap, exact=True)
    w0, w1 = cap.attention[0].weights, cap.attention[1].weights
    cases = {(0, 3): (w0[:, 0], w0[:, 3]), (0, 5): (w0[:, 0], w1[:, 1]), (6, 7): (w1[:, 2], w1[:, 3])}
    for (i, j), (wa, wb) in cases.items():
        assert tree.distances[i, j] == pytest.approx(brute_js(wa, wb), abs=1e-5)  # reference: scipy
    pair = duplicate_heads(cap, max_distance=1.0)
    assert len(pair) == 8 * 7 // 2  # every pair reported under the largest threshold, brute-force count
    assert [p.distance for p in pair] == sorted(p.distance for p in pair)


def test_distances_pair_the_same_forward_of_each_module():
    net, x = planted()
    with torch.no_grad(), attnscope.capture(net) as cap:
        net(x[:8])
        net(x[8:])
    one = head_clusters(cap).distances
    halves = [head_clusters(run(net, part)).distances for part in (x[:8], x[8:])]
    np.testing.assert_allclose(one, (halves[0] + halves[1]) / 2, atol=1e-9)  # mean over the matching calls
    assert [(p.name_a, p.head_a, p.name_b, p.head_b) for p in duplicate_heads(cap)] == TWINS


def test_clusters_group_the_twins_and_agree_with_brute_force():
    net, x = planted()
    cap = run(net, x)
    tree = head_clusters(cap, method="single")
    n = len(tree.labels)
    assert tree.labels == [(f"layers.{i}", h) for i in range(2) for h in range(H)]
    assert tree.groups(0.1) == [[("layers.1", 2), ("layers.1", 3)]]
    off = tree.distances[~np.eye(n, dtype=bool)]
    assert tree.linkage[0, 2] == pytest.approx(off.min())  # brute force: single linkage merges the closest pair
    assert tree.linkage[-1, 3] == n and sorted(tree.order) == list(range(n))
    drawn = tree.tree()
    assert len(drawn["x"]) == len(drawn["y"]) == n - 1 and all(len(s) == 4 for s in drawn["x"])
    assert sorted(drawn["leaves"]) == sorted(tree.labels)
    heights = sorted(max(s) for s in drawn["y"])
    np.testing.assert_allclose(heights, sorted(tree.linkage[:, 2]))


@torch.no_grad()
def test_output_norms_of_mha_match_hand_computation():
    net, x = planted()
    norms = head_output_norms(net, x)
    assert list(norms.columns) == ["name", "call", "head", "norm", "relative"]
    captured = {}
    hooks = [layer.register_forward_hook(keep_input(captured, i)) for i, layer in enumerate(net.layers)]
    try:
        net(x)
    finally:
        for h in hooks:
            h.remove()
    for i, layer in enumerate(net.layers):
        inp = captured[i]  # (B, T, D): what the layer attended over
        e = D
        w, b = layer.in_proj_weight, layer.in_proj_bias
        q, k, v = ((inp @ w[j * e:(j + 1) * e].T + b[j * e:(j + 1) * e]).view(16, 12, H, DH).transpose(1, 2)
                   for j in range(3))
        scores = (q @ k.transpose(-2, -1) / math.sqrt(DH)).masked_fill(torch.ones(12, 12, dtype=torch.bool).triu(1),
                                                                        -math.inf)
        heads = torch.softmax(scores, -1) @ v  # (B, H, T, dh): an independent recomputation
        for h in range(H):
            ref = (heads[:, h] @ layer.out_proj.weight[:, rows(h)].T).norm(dim=-1).mean()
            got = norms[(norms["name"] == f"layers.{i}") & (norms["head"] == h)]["norm"].item()
            assert got == pytest.approx(float(ref), rel=1e-4, abs=1e-7)
    rel = norms.groupby("name")["relative"].mean()
    np.testing.assert_allclose(rel.to_numpy(), 1.0)  # relative is norm over the mean head: averages to 1


class SdpaAttention(nn.Module):
    def __init__(self):
        super().__init__()
        self.qkv = nn.Linear(D, 3 * D)
        self.o_proj = nn.Linear(D, D)

    def forward(self, x):
        b, t, _ = x.shape
        q, k, v = self.qkv(x).view(b, t, 3, H, DH).permute(2, 0, 3, 1, 4)
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True)  # (B, H, T, dh)
        self.heads = y.detach()
        return self.o_proj(y.transpose(1, 2).reshape(b, t, D))


@torch.no_grad()
def test_output_norms_of_an_sdpa_block_use_its_o_proj():
    torch.manual_seed(4)
    attn = SdpaAttention()
    with torch.no_grad():
        attn.o_proj.weight[:, rows(1)] *= 1e-4  # a nearly silent head
    x = torch.randn(3, 7, D)
    norms = head_output_norms(attn, x)
    for h in range(H):  # reference: the fused kernel's own per-head output through the head's o_proj columns
        ref = (attn.heads[:, h] @ attn.o_proj.weight[:, rows(h)].T).norm(dim=-1).mean()
        assert norms.loc[h, "norm"] == pytest.approx(float(ref), rel=1e-5)
    assert [(f.name, f.head, f.kind) for f in dead_heads([], output_norms=norms)] == [("", 1, "silent")]


transformers = pytest.importorskip("transformers")


def per_head_input_norms(module, weight_rows, inputs, hook_target, run_model):
    """Brute force: the projection's real input, split into heads, each through its slice of the weight."""
    seen = {}
    handle = hook_target.register_forward_hook(keep_input(seen, "x"))
    try:
        run_model()
    finally:
        handle.remove()
    x = seen["x"]
    return [float((x[..., rows(h)] @ weight_rows(h)).norm(dim=-1).mean()) for h in range(H)]


@torch.no_grad()
def test_output_norms_of_hf_gpt2_conv1d_and_bert_parent_dense():
    torch.manual_seed(0)
    gpt = transformers.GPT2LMHeadModel._from_config(
        transformers.GPT2Config(n_layer=1, n_head=H, n_embd=D, vocab_size=40, n_positions=16, resid_pdrop=0.0,
                                embd_pdrop=0.0, attn_pdrop=0.0), attn_implementation="sdpa").eval()
    ids = torch.randint(0, 40, (2, 6))
    norms = head_output_norms(gpt, ids)
    proj = gpt.transformer.h[0].attn.c_proj  # Conv1D: weight (in, out)
    ref = per_head_input_norms(gpt, lambda h: proj.weight[rows(h)], ids, proj, lambda: gpt(ids))
    np.testing.assert_allclose(norms["norm"].to_numpy(), ref, rtol=1e-4)

    bert = transformers.BertModel._from_config(
        transformers.BertConfig(num_hidden_layers=1, num_attention_heads=H, hidden_size=D, intermediate_size=64,
                                vocab_size=40, max_position_embeddings=16, hidden_dropout_prob=0.0,
                                attention_probs_dropout_prob=0.0), attn_implementation="eager").eval()
    norms = head_output_norms(bert, ids)
    assert set(norms["name"]) == {"encoder.layer.0.attention.self"}
    dense = bert.encoder.layer[0].attention.output.dense  # in the parent of the module that runs the softmax
    ref = per_head_input_norms(bert, lambda h: dense.weight[:, rows(h)].T, ids, dense, lambda: bert(ids))
    np.testing.assert_allclose(norms["norm"].to_numpy(), ref, rtol=1e-4)


def test_output_norms_say_when_no_projection_is_found_and_take_one_named():
    class Bare(nn.Module):
        def __init__(self):
            super().__init__()
            self.qkv = nn.Linear(D, 3 * D)
            self.mix = nn.Linear(D, D)

        def forward(self, x):
            b, t, _ = x.shape
            q, k, v = self.qkv(x).view(b, t, 3, H, DH).permute(2, 0, 3, 1, 4)
            return self.mix(F.scaled_dot_product_attention(q, k, v).transpose(1, 2).reshape(b, t, D))

    bare = Bare()
    x = torch.randn(1, 4, D)
    with pytest.raises(UnsupportedModelError, match="out_proj="):
        head_output_norms(bare, x)
    assert len(head_output_norms(bare, x, out_proj={"": "mix"})) == H
    with pytest.raises(OptionError, match="Did you mean 'mix'"):
        head_output_norms(bare, x, out_proj={"": "mx"})


def test_insensitive_heads_from_the_importance_table():
    net, x = planted()
    target = torch.randn_like(x)
    table = head_importance(net, lambda: F.mse_loss(net(x), target))
    findings = dead_heads([], importance=table)
    top = table["importance"].max()
    expected = {(n, h) for n, h, v in zip(table["name"], table["head"], table["importance"]) if v <= 0.01 * top}
    assert {(f.name, f.head) for f in findings} == expected  # brute force over the table
    assert ("layers.1", 0) in expected  # the silent head changes nothing when removed


def test_thresholds_are_checked():
    with pytest.raises(OptionError, match="uniform_at"):
        dead_heads([], uniform_at=1.5)
    with pytest.raises(OptionError, match="max_distance"):
        duplicate_heads([], max_distance=-0.1)
    with pytest.raises(OptionError, match="output_norms= expects"):
        dead_heads([], output_norms=[1, 2])
    net, x = planted()
    with pytest.raises(OptionError, match="Did you mean 'average'"):
        head_clusters(run(net, x), method="averge")


def test_planted_demo_specimen_if_present():
    specimen = pytest.importorskip("attnscope.demo.heads_specimen")
    from attnscope.demo import load, task

    model = load("heads_specimen").eval()
    ids, _ = task.lm_batch(task.make_examples(16, seed=3))
    cap = run(model, ids)
    found = {(f.name, f.head, f.kind) for f in dead_heads(cap, output_norms=head_output_norms(model, ids))}
    expected = {(n, h, kind) for kind in ("uniform", "sink", "silent") for n, h in specimen.PLANTED[kind]}
    assert found == expected  # reference: the specimen's own record of what it planted
    twins = {((p.name_a, p.head_a), (p.name_b, p.head_b)) for p in duplicate_heads(cap)}
    assert twins == set(specimen.PLANTED["duplicate"])


MODULES = ["heads", "leaks", "ablation", "rollout", "aggregate", "generation", "compare"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name):
    module = importlib.import_module(f"attnscope.analyses.{name}")
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0
