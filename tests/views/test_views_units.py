"""Display helpers of the views: token labels, pooling and quantising, mask codes, finding tables."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from attnscope.errors import OptionError, ShapeError
from attnscope.views.findings import as_frame, html_table
from attnscope.views.labels import TokenLabels
from attnscope.views.tiles import mask_codes, pool, quantise_tile, quantise_weights
from conftest import HOSTILE, SOURCE, TARGET

# ---------------------------------------------------------------- labels


def test_labels_default_to_positions_and_fill_short_sequences():
    assert TokenLabels().axis("x", 3, 0) == ["0", "1", "2"]
    # hand-computed: a sequence shorter than the axis keeps positions for the rest
    assert TokenLabels(["a", "b"]).axis("x", 4, 0) == ["a", "b", "2", "3"]


def test_labels_per_item_and_query_offset():
    lab = TokenLabels([["a", "b", "c"], ["x", "y", "z"]])
    assert lab.axis(None, 3, 1) == ["x", "y", "z"]
    # a cached decoding step: one query at absolute position 2 (hand-computed)
    assert lab.axis(None, 1, 0, offset=2) == ["c"]


def test_labels_roles_follow_names_and_kinds(translator):
    lab = TokenLabels({"source": SOURCE, "target": TARGET}, names=[r.name for r in translator.attention])
    by_name = {r.name: r for r in translator.attention}
    enc, dec = by_name["encoder.layers.0.self_attn"], by_name["decoder.layers.0.self_attn"]
    cross = by_name["decoder.layers.0.multihead_attn"]
    assert lab.axis(enc.name, enc.queries, 0, axis="q", kind="self") == SOURCE
    assert lab.axis(dec.name, dec.keys, 0, axis="k", kind="self") == TARGET
    assert lab.axis(cross.name, cross.queries, 0, axis="q", kind="cross") == TARGET
    assert lab.axis(cross.name, cross.keys, 0, axis="k", kind="cross") == SOURCE
    assert lab.axis("encoder.layers.1", 6, 0, axis="t") == SOURCE  # residual block by name


def test_labels_named_record_override_and_bad_key(translator):
    names = [r.name for r in translator.attention]
    lab = TokenLabels({"source": SOURCE, "target": TARGET, names[3]: ("source", ["k"] * 6)}, names=names)
    assert lab.axis(names[3], 4, 0, axis="q", kind="cross") == SOURCE[:4]
    assert lab.axis(names[3], 6, 0, axis="k", kind="cross") == ["k"] * 6
    with pytest.raises(OptionError, match="Did you mean 'source'"):
        TokenLabels({"sourse": SOURCE}, names=names)


def test_labels_from_a_tokenizer_like_callable():
    vocab = ["<pad>", "lamp", "lit", HOSTILE]

    class Vocab:  # the one method of a tokenizer the views use
        def convert_ids_to_tokens(self, ids):
            return [vocab[i] for i in ids]

    ids = np.array([[1, 2, 3], [3, 0, 0]])
    assert TokenLabels(Vocab(), ids=ids).axis(None, 3, 1) == [HOSTILE, "<pad>", "<pad>"]
    assert TokenLabels(lambda row: [vocab[i] for i in row], ids=ids).axis(None, 3, 0) == ["lamp", "lit", HOSTILE]
    with pytest.raises(OptionError, match="ids="):
        TokenLabels(Vocab())
    with pytest.raises(ShapeError, match="returned 1 strings for 3 ids"):
        TokenLabels(lambda row: ["x"], ids=ids)
    with pytest.raises(OptionError, match="received int"):
        TokenLabels(3)


# ---------------------------------------------------------------- tiles


def test_pool_mean_matches_hand_computed_blocks():
    a = np.arange(100, dtype=np.float32).reshape(10, 10)
    # hand-computed bin edges for 10 cells into 3: linspace(0, 10, 4) rounded = 0, 3, 7 -> blocks 0:3, 3:7, 7:10
    blocks = [slice(0, 3), slice(3, 7), slice(7, 10)]
    expected = np.array([[a[r, c].mean() for c in blocks] for r in blocks])
    np.testing.assert_allclose(pool(a, 3), expected, rtol=1e-6)
    np.testing.assert_allclose(pool(a, 3, how="max"), [[a[r, c].max() for c in blocks] for r in blocks])
    assert pool(a, 16).shape == (10, 10)  # never upsampled


def test_quantise_tile_scales_to_own_maximum():
    t = np.array([[0.0, 0.1], [0.2, np.nan]], dtype=np.float32)
    # hand-computed: 0.1 / 0.2 * 254 = 127; NaN is the "no data" code 255
    assert quantise_tile(t).tolist() == [[0, 127], [254, 255]]
    assert quantise_tile(np.zeros((2, 2))).max() == 0


def test_quantise_weights_error_is_at_most_half_a_step():
    w = np.random.default_rng(0).dirichlet(np.ones(50), size=40).astype(np.float32)
    codes, scale = quantise_weights(w)
    assert codes.dtype == np.uint16 and codes.max() == 65535
    assert np.abs(codes * scale - w).max() <= scale / 2 + 1e-9


def test_mask_codes_mark_forbidden_and_leaked_cells():
    allowed = np.tril(np.ones((3, 3), dtype=bool))
    w = np.array([[1.0, 0.0, 0.0], [0.5, 0.3, 0.2], [0.2, 0.3, 0.5]])
    # hand-computed: (1, 2) is forbidden and holds 0.2 -> leak; (0, 1), (0, 2) forbidden and empty
    assert mask_codes(w, allowed).tolist() == [[0, 1, 1], [0, 0, 2], [0, 0, 0]]
    assert mask_codes(w, None).tolist() == [[0] * 3] * 3


# ---------------------------------------------------------------- finding tables


def test_findings_from_the_analyses_tuple_shapes():
    silent = as_frame([("blocks.0.attn", 3, "uniform")])
    twins = as_frame([("blocks.0.attn", 1, "blocks.1.attn", 2, 0.01)])
    assert list(silent.columns) == ["name", "head", "reason"]
    assert list(twins.columns) == ["name_a", "head_a", "name_b", "head_b", "distance"]
    assert twins["distance"].tolist() == [0.01]


def test_findings_from_dicts_dataclasses_and_frames():
    @dataclasses.dataclass
    class Check:
        check: str
        passed: bool

    assert as_frame([Check("causal", True)]).to_dict("records") == [{"check": "causal", "passed": True}]
    assert as_frame([{"check": "padding", "passed": False}]).shape == (1, 2)
    assert as_frame(pd.DataFrame({"a": [1]})).shape == (1, 1)
    with pytest.raises(OptionError, match="different lengths"):
        as_frame([(1, 2, 3), (1, 2)])


def test_html_table_escapes_headers_and_cells():
    frame = pd.DataFrame({HOSTILE: ["x"], "reason": [HOSTILE]})
    page = html_table(frame, HOSTILE)
    assert HOSTILE not in page
    assert page.count("&lt;script&gt;alert(1)&lt;/script&gt;") == 3  # title, header and cell


@pytest.mark.parametrize("case", ["translator", "leaky"])
def test_pooled_veils_shared_between_heads_equal_each_heads_own(case, request):
    """A veil without leaks is pooled once per mask and shared; each head's veil still equals its own."""
    from attnscope.views.scene import Scene

    cap = request.getfixturevalue(case)
    from attnscope.errors import AttnscopeWarning

    with pytest.warns(AttnscopeWarning, match="pooled to"):  # said, not silent
        scene = Scene(cap, lens_side=2) if case == "translator" else Scene(cap, lens_side=4)
    for item in range(scene.batch):
        for h in scene.heads:
            rec = cap.attention[h.record]
            w = rec.weights[item, h.slot]
            allowed = None if rec.allowed is None else np.broadcast_to(rec.allowed, rec.weights.shape)[item, h.slot]
            # the veil from scratch: 1 where the call's mask forbids, 2 where a forbidden cell holds weight
            own = np.zeros(w.shape, np.uint8) if allowed is None else np.where(~allowed, np.where(w > 1e-6, 2, 1), 0)
            side = scene.lens_side
            if max(w.shape) > side:
                own = pool(own.astype(np.uint8), side, how="max")
            assert np.array_equal(scene.lens_arrays(h.g, item)["veil"], own)
    if case == "leaky":  # the planted bug: weight beyond the causal mask shows as leak cells
        assert (scene.lens_arrays(0, 0)["veil"] == 2).any()
    else:
        assert scene._veil_memo  # the decoder's causal heads share pooled veils
