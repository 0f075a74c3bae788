"""Static view of a declared pattern: weight outside it per head, from captured maps; the veil shows it.

References: torch FlexAttention's ``create_mask`` evaluates the same ``mask_mod`` (outside reference for the
pattern), brute-force loops over (item, head, query, key) written here for the masses, and the fact that a
correctly masked softmax puts exactly zero weight on a masked key (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch.nn.attention.flex_attention import create_mask

import attnscope
from attnscope.analyses.leaks import declared_cells, pattern_table
from attnscope.demo.cached_decoder import CachedDecoder, CachedDecoderConfig
from attnscope.errors import OptionError

T = 12


def window_mod(w):
    return lambda b, h, q, kv: (q >= kv) & (q - kv < w)  # the query itself plus the w - 1 keys before it


def capture_decoder(window, ids):
    torch.manual_seed(0)
    model = CachedDecoder(CachedDecoderConfig(window=window)).eval()
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids)
    return cap


def brute_outside(rec, allowed):
    """Mean per row of weight on keys allowed[b, q, k] forbids; largest cell. Plain loops."""
    w = rec.weights
    rows, sums, worst = np.zeros(w.shape[1]), np.zeros(w.shape[1]), np.zeros(w.shape[1])
    for b in range(w.shape[0]):
        for h in range(w.shape[1]):
            for q in range(w.shape[2]):
                rows[h] += 1
                for k in range(w.shape[3]):
                    if not allowed[b, q + rec.query_offset, k]:
                        sums[h] += w[b, h, q, k]
                        worst[h] = max(worst[h], w[b, h, q, k])
    return sums / rows, worst


def test_mask_mod_is_evaluated_as_flex_attention_does():
    ids = torch.randint(0, 16, (2, T), generator=torch.Generator().manual_seed(0))
    rec = capture_decoder(None, ids).attention[0]
    docs = torch.tensor([[0] * 5 + [1] * 7, [0] * 8 + [1] * 4])
    mods = {"window": window_mod(3),
            "documents": lambda b, h, q, kv: (docs[b, q] == docs[b, kv]) & (q >= kv),
            # written for scalars: fails on broadcast tensors, evaluated cell by cell through vmap
            "scalar style": lambda b, h, q, kv: (docs[b][q] == docs[b][kv]) & (q >= kv)}
    for name, mod in mods.items():
        ours = declared_cells(rec, mod)  # (B, T, T)
        ref = create_mask(mod, 2, 1, T, T, device="cpu")[:, 0].numpy()  # torch FlexAttention's own dense mask
        assert (ours == ref).all(), name


def test_window_pattern_right_and_off_by_one():
    ids = torch.randint(0, 16, (2, T), generator=torch.Generator().manual_seed(1))
    cap = capture_decoder(4, ids)  # the model's window is 4
    same = pattern_table(cap, window_mod(4))
    assert len(same) == 2 * 4 and (same["outside_mass"] < 1e-7).all()  # masked softmax: exactly zero outside
    assert (same["worst_query"] == -1).all()
    narrower = pattern_table(cap, window_mod(3))  # declared 3, the model uses 4: weight on the 4th key back
    dense = create_mask(window_mod(3), 1, 1, T, T, device="cpu")[0, 0].numpy()[None].repeat(2, 0)
    for r, rec in enumerate(cap.attention):
        mass, worst = brute_outside(rec, dense)  # brute force over the same cells
        rows = narrower[narrower["name"] == rec.name]
        np.testing.assert_allclose(rows["outside_mass"], mass, rtol=1e-9)
        np.testing.assert_allclose(rows["max_outside"], worst, rtol=1e-9)
    assert (narrower["outside_mass"] > 1e-3).all()
    assert ((narrower["worst_query"] - narrower["worst_key"]) == 3).all()  # exactly one key too far back


def test_documents_pattern_per_item_finds_cross_document_weight():
    ids = torch.randint(0, 16, (2, T), generator=torch.Generator().manual_seed(2))
    cap = capture_decoder(None, ids)  # plain causal: documents packed in a row see each other
    docs = np.array([[0] * 5 + [1] * 7, [0] * 3 + [1] * 3 + [2] * 6])
    allowed = (docs[:, :, None] == docs[:, None, :]) & np.tri(T, dtype=bool)[None]  # (B, T, T)
    t = pattern_table(cap, allowed)
    for rec in cap.attention:
        mass, _ = brute_outside(rec, allowed)
        np.testing.assert_allclose(t[t["name"] == rec.name]["outside_mass"], mass, rtol=1e-9)
    for _, row in t.iterrows():  # the worst cell crosses a document boundary
        b, q, k = row["worst_item"], row["worst_query"], row["worst_key"]
        assert docs[b, q] != docs[b, k] and k < q
    causal = pattern_table(cap, np.tri(T, dtype=bool))
    assert (causal["outside_mass"] < 1e-7).all()  # the allowance it uses is legitimate: nothing reported


def test_cache_step_rows_sit_at_absolute_positions():
    torch.manual_seed(0)
    model = CachedDecoder(CachedDecoderConfig(window=4)).eval()
    ids = torch.randint(0, 16, (1, 9))
    with torch.no_grad():
        _, cache = model.step(ids[:, :8], None)
        with attnscope.capture(model) as cap:
            model.step(ids[:, 8:], cache)
    rec = cap.attention[0]
    assert rec.query_offset == 8 and rec.queries == 1 and rec.keys == 9
    assert declared_cells(rec, window_mod(4))[0, 0].tolist() == [False] * 5 + [True] * 4  # row 8 of the window
    assert (pattern_table(cap, window_mod(4))["outside_mass"] < 1e-7).all()


def test_where_and_bad_patterns():
    ids = torch.randint(0, 16, (1, T), generator=torch.Generator().manual_seed(3))
    cap = capture_decoder(None, ids)
    only = pattern_table(cap, window_mod(2), where="blocks.1.*")
    assert set(only["name"]) == {"blocks.1.attn"}
    with pytest.raises(OptionError, match="bool"):
        pattern_table(cap, np.ones((T, T)))
    with pytest.raises(OptionError, match="smaller than"):
        pattern_table(cap, np.ones((4, 4), dtype=bool))
    with pytest.raises(OptionError, match="B=1"):
        pattern_table(cap, np.ones((3, T, T), dtype=bool))


def test_dashboard_veil_shows_the_declared_pattern():
    pytest.importorskip("bokeh")
    from attnscope.views.scene import Scene

    ids = torch.randint(0, 16, (1, T), generator=torch.Generator().manual_seed(4))
    cap = capture_decoder(None, ids)  # causal, no window
    plain = Scene(cap, lens_side=64).lens_arrays(0, 0)
    declared = Scene(cap, lens_side=64, pattern=window_mod(3)).lens_arrays(0, 0)
    # applied mask: grey above the diagonal only, never magenta (a correct causal softmax)
    assert ((plain["veil"] == 1) == ~np.tri(T, dtype=bool)).all() and not (plain["veil"] == 2).any()
    outside = ~create_mask(window_mod(3), 1, 1, T, T, device="cpu")[0, 0].numpy()  # FlexAttention's own mask
    assert ((declared["veil"] > 0) == outside).all()
    # weight that lands outside the window (below the band, at or before the diagonal) shows as magenta
    w = cap.attention[0].weights[0, 0]
    assert ((declared["veil"] == 2) == (outside & (w > 1e-6))).all()  # 1e-6: the view's leak floor
    assert (declared["veil"] == 2).any() and "declared pattern" in declared["title"]


def test_statistics_only_capture_gives_nan_not_zero():
    torch.manual_seed(0)
    model = CachedDecoder(CachedDecoderConfig()).eval()
    with torch.no_grad(), attnscope.capture(model, keep="stats") as cap:
        model(torch.randint(0, 16, (1, T)))
    t = pattern_table(cap, window_mod(2))
    assert len(t) == 8 and t["outside_mass"].isna().all() and (t["worst_query"] == -1).all()


def test_pattern_builders_and_mask_mods_give_the_same_table():
    from attnscope.analyses.patterns import documents_pattern, window_pattern

    ids = torch.randint(0, 16, (2, T), generator=torch.Generator().manual_seed(5))
    cap = capture_decoder(None, ids)
    docs = torch.tensor([[0] * 5 + [1] * 7, [0] * 3 + [1] * 3 + [2] * 6])
    by_builder = pattern_table(cap, documents_pattern(docs))  # (B, T, T) tensor
    by_mod = pattern_table(cap, lambda b, h, q, kv: (docs[b, q] == docs[b, kv]) & (q >= kv))
    np.testing.assert_allclose(by_builder["outside_mass"], by_mod["outside_mass"], rtol=0, atol=0)
    assert (by_builder["outside_mass"] > 1e-3).all()
    np.testing.assert_allclose(pattern_table(cap, window_pattern(T, 3))["outside_mass"],
                               pattern_table(cap, window_mod(3))["outside_mass"], rtol=0, atol=0)
