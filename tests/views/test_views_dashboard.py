"""The notebook dashboard without a browser: construction, linked selection, payload, escaping, degrading."""

from __future__ import annotations

import dataclasses
import json

import ipywidgets as W
import numpy as np
import pytest
import torch
import traitlets
from bokeh.core.json_encoder import serialize_json
from jupyter_bokeh.widgets import BokehModel
from torch import nn

import attnscope
from attnscope.capture import record_sums
from attnscope.errors import AttnscopeWarning, OptionError
from attnscope.views import Dashboard, dashboard
from attnscope.views.scene import CAUTION
from conftest import HOSTILE, SOURCE, TARGET


def figures(board):
    return {m.name: m for m in board.scene.layout.references() if getattr(m, "name", None)}


def test_dashboard_is_a_widget_with_every_view(translator):
    board = dashboard(translator, tokens={"source": SOURCE, "target": TARGET})
    assert isinstance(board, W.Widget) and isinstance(board, Dashboard)
    assert isinstance(board.plot, BokehModel)
    names = figures(board)
    assert {"as-atlas", "as-lens", "as-scores", "as-stream", "as-twins", "as-findings", "as-caution"} <= set(names)
    assert CAUTION in names["as-caution"].text and "Jain & Wallace 2019" in CAUTION
    # every kept head has a tile in the one mosaic: 6 records x 4 heads (nn.Transformer above), 24 + 1 pixels each
    (mosaic,) = board.scene.atlas_src.data["image"]
    assert mosaic.shape == (6 * 25, 4 * 25) and mosaic.dtype == np.uint8
    assert (mosaic[24::25, :] == 255).all() and (mosaic[:, 24::25] == 255).all()  # background between tiles
    assert board.head_choice.options[3][0] == "encoder.layers.0.self_attn · head 3"
    assert len(repr(board)) < 120


def test_self_and_cross_attention_are_told_apart(translator):
    board = dashboard(translator)
    cells = board.scene.cells_src.data
    kinds = {r: k for r, k in zip(cells["record"], cells["kind"])}
    assert kinds["decoder.layers.0.multihead_attn"] == "cross" and kinds["decoder.layers.0.self_attn"] == "self"
    edges = {k: {e for e, kk in zip(cells["edge"], cells["kind"]) if kk == k} for k in ("self", "cross")}
    assert len(edges["self"]) == len(edges["cross"]) == 1 and edges["self"] != edges["cross"]
    labels = board.scene.atlas_fig.yaxis[0].major_label_overrides
    assert sum(v.startswith("\u21c4") for v in labels.values()) == 2  # the two cross-attention rows


def test_lens_shows_torch_weights_of_the_selected_head(mha_case):
    cap, ref, _ = mha_case
    board = dashboard(cap)
    for item in (0, 1):
        board.item = item
        for g in (1, 0):
            board.head = g
            # reference: nn.MultiheadAttention(need_weights=True, average_attn_weights=False)
            np.testing.assert_allclose(board.scene.lens_src.data["image"][0], ref[item, g], atol=1e-6)
            assert board.scene.lens_mapper.high == pytest.approx(ref[item, g].max(), rel=1e-6)


def test_padding_is_veiled(mha_case):
    cap, _, pad = mha_case
    board = dashboard(cap, item=1)
    veil = board.scene.lens_src.data["veil"][0]
    # key_padding_mask True = key forbidden for every query (torch's convention); torch puts no weight there
    expected = np.broadcast_to(pad[1][None, :], veil.shape).astype(np.uint8)
    np.testing.assert_array_equal(veil, expected)


def test_leaked_mass_is_painted(leaky):
    board = dashboard(leaky)
    assert board.scene.veil.visible
    board.veil_choice.value = False  # the toggle hides the veil, the map stays
    assert not board.scene.veil.visible and board.scene.lens_src.data["image"]
    board.veil = True
    rec = leaky.attention[0]
    for g in (0, 1):
        board.head = g
        veil = board.scene.lens_src.data["veil"][0]
        # brute force: forbidden (above the diagonal) and carrying weight, from the recorded weights
        w = rec.weights[0, g]
        for i in range(6):
            for j in range(6):
                want = 0 if j <= i else (2 if w[i, j] > 1e-6 else 1)
                assert veil[i, j] == want
        assert "leak 0.4" in board.scene.lens_fig.title.text  # head table leak_mass ≈ 0.44–0.45


def test_selecting_a_head_updates_every_linked_view(translator):
    board = dashboard(translator, tokens={"source": SOURCE, "target": TARGET})
    s = board.scene
    before = {k: dict(src.data) for k, src in (("pick", s.pick_src), ("stream", s.stream_pick_src),
                                                ("twins", s.twin_pick_src))}
    g = 14  # decoder.layers.0.multihead_attn, head 2 (records of 4 heads in call order)
    board.head = g
    h = s.heads[g]
    assert (h.record, h.head) == (3, 2)
    assert s.pick_src.data == {"x": [2.5], "y": [3.5]} != before["pick"]
    assert list(s.cells_src.selected.indices) == [g]
    assert board.head_choice.value == g
    assert s.stream_pick_src.data["y"] == [2.5] != before["stream"]["y"]  # block decoder.layers.0
    assert s.twin_pick_src.data["y"][0] == s.twin_pos[g] + 0.5 != before["twins"]["y"][0]  # clustered order
    assert s.twin_order[s.twin_pos[g]] == g and s.twin_row(s.twin_pos[g] + 0.5) == g
    assert s.qlab_src.data["tok"] == TARGET and s.klab_src.data["tok"] == SOURCE  # cross: queries from target
    assert s.lens_src.data["dh"] == [4] and s.lens_src.data["dw"] == [6]
    assert (s.lens_fig.x_range.end, s.lens_fig.y_range.start) == (5.5, 3.5)
    assert "decoder.layers.0.multihead_attn · head 2" in s.lens_fig.title.text
    assert " · cross · " in s.lens_fig.title.text
    assert "head 2" in board.status.value


def test_a_tap_in_atlas_or_scores_selects_the_head(translator):
    board = dashboard(translator)
    # what jupyter_bokeh does with a browser tap: set the shared cells' selection, firing its callbacks
    board.scene.cells_src.selected.indices = [9]
    assert board.head == 9 and board.head_choice.value == 9
    np.testing.assert_array_equal(board.scene.lens_src.data["image"][0], translator.attention[2].weights[0, 1])
    board.scene.cells_src.selected.indices = []  # a tap on empty space keeps the selection
    assert board.head == 9 and list(board.scene.cells_src.selected.indices) == [9]


def test_a_tap_on_a_twins_row_selects_its_head(translator):
    from bokeh.events import Tap

    board = dashboard(translator)
    fig = board.scene.twins_fig
    fig._trigger_event(Tap(model=fig, x=3.2, y=13.6))  # what jupyter_bokeh does with a browser tap event
    g = board.scene.twin_order[13]  # row 13 of the clustered order
    assert board.head == g and list(board.scene.cells_src.selected.indices) == [g]
    fig._trigger_event(Tap(model=fig, x=3.2, y=-4.0))  # outside the matrix: nothing changes
    assert board.head == g


def test_batch_item_chooser_changes_atlas_stream_and_lens(translator):
    board = dashboard(translator, head=5)
    rec = translator.attention[1]
    mosaic0 = board.scene.atlas_src.data["image"][0].copy()
    stream0 = board.scene.stream_src.data["image"][0].copy()
    board.item_choice.value = 1
    assert board.item == 1
    np.testing.assert_array_equal(board.scene.lens_src.data["image"][0], rec.weights[1, 1])
    # T=6 <= tile side: each tile is the map itself, scaled to its own maximum (hand formula), each cell 4x4 pixels
    w = translator.attention[0].weights[1, 0]
    tile = board.scene.tile_of(board.scene.atlas_src.data["image"][0], 0)
    np.testing.assert_array_equal(tile[::4, ::4], np.rint(w / w.max() * 254).astype(np.uint8))
    assert (board.scene.atlas_src.data["image"][0] != mosaic0).any()
    np.testing.assert_allclose(board.scene.stream_src.data["image"][0][0], translator.residual[0].norms[1])
    assert not np.array_equal(stream0, board.scene.stream_src.data["image"][0])


def test_statistic_chooser_colours_scores_from_the_head_table(mha_case):
    cap, ref, pad = mha_case
    board = dashboard(cap)
    board.statistic_choice.value = "sink_mass"
    # reference: mean weight on key 0 over all (item, query) rows, from torch's own weights (key 0 is never padded)
    np.testing.assert_allclose(board.scene.cells_src.data["score"], ref[:, :, :, 0].mean(axis=(0, 2)), rtol=1e-5)
    board.statistic = "entropy_ratio"
    assert board.scene.scores_fig.title.text == "scores: entropy_ratio per head"
    with pytest.raises(traitlets.TraitError, match="Did you mean 'sink_mass'"):
        board.statistic = "sink_mas"
    assert board.statistic == "entropy_ratio"


def test_bad_selection_is_refused_and_the_widget_stays_usable(translator):
    board = dashboard(translator)
    with pytest.raises(traitlets.TraitError, match="expected 0..23"):
        board.head = 24
    board.head = 2
    assert board.head == 2 and "head 2" in board.status.value


def test_a_failing_update_shows_its_error_and_recovers(translator):
    # a damaged capture: the second record claims 2 batch items but holds the maps of one
    recs = list(translator.attention)
    recs[1] = dataclasses.replace(recs[1], weights=recs[1].weights[:1], stats=record_sums(recs[1]))
    damaged = attnscope.Capture._from_records(recs, list(translator.residual), keep="maps")
    board = dashboard(damaged)
    board.item = 1
    assert "could not show the batch item" in board.problem.value and "IndexError" in board.problem.value
    assert "item 1" in board.status.value  # finally: the status line still follows the state
    board.item = 0
    board.head = 5
    assert board.problem.value == ""
    np.testing.assert_array_equal(board.scene.lens_src.data["image"][0], recs[1].weights[0, 1])


def test_given_distances_are_matched_to_heads_by_label(translator):
    from attnscope.analyses.similarity import head_distances

    frame = head_distances(translator)
    order = np.random.default_rng(0).permutation(len(frame))
    board = dashboard(translator, distances=frame.iloc[order, order])  # shuffled: matched by (call, name, head)
    at = np.asarray(board.scene.twin_order)  # drawn in cluster order: the same matrix, rows and columns permuted
    np.testing.assert_allclose(board.scene.twin_src.data["image"][0], frame.to_numpy()[np.ix_(at, at)], rtol=1e-6,
                               equal_nan=True)
    assert sorted(at) == list(range(len(frame)))
    assert "given" in board.scene.twins_fig.title.text
    with pytest.raises(attnscope.ShapeError, match=r"expected a \(24, 24\) matrix"):
        dashboard(translator, distances=np.zeros((3, 3)))


def test_stats_only_capture_shows_statistics_only():
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(8, 2, batch_first=True)
    x = torch.randn(1, 4, 8)
    with torch.no_grad(), attnscope.capture(mha, keep="stats") as cap:
        mha(x, x, x)
    board = dashboard(cap)
    assert (board.scene.atlas_src.data["image"][0] == 255).all()  # no maps: background only
    assert "statistics only" in board.scene.lens_fig.title.text
    assert "statistics only" in board.scene.twins_fig.title.text
    np.testing.assert_allclose(board.scene.cells_src.data["score"], cap.head_table()["entropy_ratio"])


def test_tokens_are_escaped_in_every_html_piece(translator):
    board = dashboard(translator, tokens={"source": SOURCE, "target": TARGET},
                      findings=[("encoder.layers.0.self_attn", 1, HOSTILE)], checks=[{"check": HOSTILE, "ok": True}])
    htmls = [figures(board)["as-findings"].text, figures(board)["as-caution"].text, board.problem.value]
    assert all(HOSTILE not in h for h in htmls)
    assert figures(board)["as-findings"].text.count("&lt;script&gt;") == 2
    # token strings travel as data (drawn on canvas or set as text by BokehJS), never inside an HTML field
    board.head = 0
    assert HOSTILE in board.scene.qlab_src.data["tok"]


def test_first_render_payload_stays_small_and_maps_travel_on_selection(translator):
    board = dashboard(translator)
    first = board.first_render_bytes()
    bundle = len(serialize_json(board.plot.render_bundle))
    assert bundle < first < bundle + 60_000  # the Bokeh document dominates; controls are small
    assert len(board.scene.lens_src.data["image"]) == 1  # one full map, the selected one


def test_a_selection_reaches_the_browser_as_one_patch(translator):
    board = dashboard(translator)
    sent = []
    board.plot.send = lambda content, buffers=None: sent.append((content, buffers))  # the widget's comm messages
    board.head = 17
    headers = [json.loads(c["payload"]) for c, _ in sent if '"msgtype"' in c.get("payload", "")]
    assert [h["msgtype"] for h in headers] == ["PATCH-DOC"]
    content = json.loads(sent[2][0]["payload"])
    changed = {e.get("attr") for e in content["events"]} | {e["kind"] for e in content["events"]}
    assert {"text", "high", "ColumnDataChanged", "indices"} <= changed  # title, colour bar, sources, selection
    assert sum(1 for _, b in sent if b) >= 1  # the map travels as a binary buffer, not as JSON numbers


@pytest.mark.slow
def test_twelve_by_twelve_heads_at_256_positions_fit_the_budget():
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(48, 12, 96, dropout=0.0, batch_first=True)
    model = nn.TransformerEncoder(layer, 12, enable_nested_tensor=False).eval()
    x = torch.randn(1, 256, 48)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(x, mask=nn.Transformer.generate_square_subsequent_mask(256), is_causal=True)
    board = dashboard(cap, tokens=[f"t{i}" for i in range(256)])
    sent = board.first_render_bytes()
    # a naive float JSON of every map, for scale: 144 maps x 65,536 weights
    naive_one = len(json.dumps(cap.attention[0].weights[0, 0].tolist()))
    assert sent <= 2_000_000
    assert 144 * naive_one / sent >= 40
    assert board.scene.atlas_src.data["image"][0].shape == (12 * 25, 12 * 25)


@pytest.mark.slow
def test_very_many_heads_degrade_with_a_warning():
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(16, 16, 16, dropout=0.0, batch_first=True)
    model = nn.TransformerEncoder(layer, 64, enable_nested_tensor=False).eval()
    x = torch.randn(1, 8, 16)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(x)
    with pytest.warns(AttnscopeWarning) as seen:
        board = dashboard(cap)
    text = " ".join(str(w.message) for w in seen)
    assert "1024 heads are drawn as 9x9 tiles" in text or "tiles instead of 24x24" in text
    assert "too many for the distance matrix" in text
    side = board.scene.tile
    assert side < 24 and board.scene.atlas_src.data["image"][0].shape == (64 * (side + 1), 16 * (side + 1))
    assert board.first_render_bytes() < 2_000_000
    board.head = 1023
    assert board.scene.pick_src.data == {"x": [15.5], "y": [63.5]}


def test_long_maps_are_pooled_in_the_lens_with_a_warning():
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(4, 1, batch_first=True)
    x = torch.randn(1, 2048, 4)
    with torch.no_grad(), attnscope.capture(mha) as cap:
        mha(x, x, x)
    with pytest.warns(AttnscopeWarning, match="pooled to 512 cells"):
        board = dashboard(cap)
    assert board.scene.lens_src.data["image"][0].shape == (512, 512)
    assert board.scene.lens_src.data["dw"] == [2048]  # the axes keep all 2048 positions for zoom and hover
    # hand-computed: a pooled row covers 4 query rows (mass 4 in all), spread over 512 means of 16 cells: 4/16
    np.testing.assert_allclose(board.scene.lens_src.data["image"][0].sum(axis=1), 0.25, rtol=1e-3)
    assert "pooled to 512x512" in board.scene.lens_fig.title.text


def test_options_fail_with_suggestions(translator):
    with pytest.raises(OptionError, match="Did you mean 'sink_mass'"):
        dashboard(translator, statistic="sinkmass")
    with pytest.raises(OptionError, match="bokehjs"):
        dashboard(translator, bokehjs="sometimes")
    board = dashboard(translator)
    with pytest.raises(OptionError, match="no kept head 9"):
        board.show("encoder.layers.0.self_attn", 9)
    with pytest.raises(OptionError, match="Did you mean 'decoder.layers.0.self_attn'"):
        board.show("decoder.layers.0.self_atn", 1)
    board.show("decoder.layers.0.multihead_attn", 2)
    assert board.head == 14


def test_findings_and_checks_from_the_analyses_are_listed(translator):
    from attnscope.analyses.causality import check_causal
    from attnscope.analyses.heads import dead_heads, duplicate_heads

    twins = duplicate_heads(translator, max_distance=0.5)
    torch.manual_seed(0)
    layer = nn.TransformerEncoderLayer(8, 2, 16, dropout=0.0, batch_first=True).eval()
    mask = nn.Transformer.generate_square_subsequent_mask(5)
    report = check_causal(lambda x: layer(x, src_mask=mask, is_causal=True), torch.randn(1, 5, 8))
    board = dashboard(translator, findings={"silent heads": dead_heads(translator), "twin heads": twins},
                      checks={"causal (encoder layer)": report})
    text = figures(board)["as-findings"].text
    assert "silent heads" in text and "twin heads" in text and "causal (encoder layer)" in text
    assert twins and f"<td>{twins[0].name_a}</td>" in text and "<th>distance</th>" in text
    assert "<th>ok</th>" in text and "<td>True</td>" in text and "<th>dependency</th>" not in text


def test_twins_matrix_is_labelled_and_ordered_by_clusters():
    from scipy.cluster.hierarchy import leaves_list, linkage
    from scipy.spatial.distance import squareform

    torch.manual_seed(0)
    mha = torch.nn.MultiheadAttention(8, 4, batch_first=True)
    x = torch.randn(1, 6, 8)
    with attnscope.capture(mha) as cap:
        mha(x, x, x)
    # planted: heads 0 and 3 alike, 1 and 2 alike; the clustered order must put each pair side by side
    d = np.array([[0, .9, .8, .05], [.9, 0, .04, .7], [.8, .04, 0, .9], [.05, .7, .9, 0]])
    s = dashboard(cap, distances=d).scene
    expected = [int(i) for i in leaves_list(linkage(squareform(d), method="average"))]  # reference: scipy
    assert s.twin_order == expected
    assert abs(s.twin_pos[0] - s.twin_pos[3]) == 1 and abs(s.twin_pos[1] - s.twin_pos[2]) == 1
    for ax in (s.twins_fig.xaxis[0], s.twins_fig.yaxis[0]):
        assert ax.visible and ax.axis_label.startswith("head")
        assert [ax.major_label_overrides[t] for t in ax.ticker.ticks] == [f"0.{g}" for g in expected]


# ---------------------------------------------------------------- summary line of flagged heads
@pytest.fixture(scope="module")
def specimen():
    """The demo heads specimen (planted uniform, sink, silent and duplicate heads) on three task sequences."""
    from attnscope import demo
    from attnscope.demo import task

    model = demo.load("heads_specimen")
    ids, _ = task.lm_batch(task.make_examples(3, seed=0))
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids)
    return cap


def _flagged(board, pairs):
    return sorted({board.scene.head_index(name, head) for name, head in pairs})


def test_summary_counts_are_those_of_the_analyses_and_clicks_cycle_through_them(specimen):
    from attnscope.demo.heads_specimen import PLANTED

    board = dashboard(specimen)
    buttons = board.tally_buttons
    assert board.children[0] is board.tally_row and "as-tally-dead" in buttons["dead"]._dom_classes
    dead = attnscope.dead_heads(specimen)
    pairs = attnscope.duplicate_heads(specimen)
    dead_g = _flagged(board, [(f.name, f.head) for f in dead])
    twin_g = _flagged(board, [(p.name_a, p.head_a) for p in pairs] + [(p.name_b, p.head_b) for p in pairs])
    # planted by weight surgery (attnscope.demo.heads_specimen): the uniform and sink heads show in the maps,
    # the duplicate pair is head 0 and head 2 of blocks.1.attn
    assert set(PLANTED["uniform"] + PLANTED["sink"]) <= {(f.name, f.head) for f in dead}
    assert twin_g == _flagged(board, [p for pair in PLANTED["duplicate"] for p in pair])
    assert buttons["dead"].description == f"{len(dead_g)} dead" and len(dead_g) >= 2
    assert buttons["duplicate"].description == f"{len(twin_g)} duplicate ({len(pairs)} pair)"
    # causal masks applied by the model itself: no weight on forbidden keys (leak_table agrees)
    assert buttons["leaking"].description == "0 leaking" and buttons["leaking"].disabled
    assert (attnscope.leak_table(specimen)["leak_mass"] <= 1e-6).all()

    board.head = next(g for g in range(len(board.scene.heads)) if g not in dead_g)
    seen = []
    for _ in range(len(dead_g) + 1):
        buttons["dead"].click()
        seen.append(board.head)
        assert board.scene.g == board.head and board.scene.cells_src.selected.indices == [board.head]
        assert board.scene.lens_fig.title.text.startswith(board.scene.heads[board.head].label)
    assert seen == dead_g + dead_g[:1] and f"dead 1 of {len(dead_g)}" in board.status.value
    buttons["duplicate"].click()
    assert board.head == twin_g[0] and board.scene.pick_src.data["x"] == [board.scene.heads[twin_g[0]].slot + 0.5]


def test_summary_says_when_an_analysis_was_not_run(leaky):
    board = dashboard(leaky)
    texts = {k: b.description for k, b in board.tally_buttons.items()}
    leaking = attnscope.leak_table(leaky)
    assert texts["leaking"] == f"{int((leaking['leak_mass'] > 1e-6).sum())} leaking" != "0 leaking"
    given = np.full((len(board.scene.heads),) * 2, 0.5)
    assert dashboard(leaky, distances=given).tally_buttons["duplicate"].description == "0 duplicate (0 pairs)"
    given[0, 1] = given[1, 0] = 0.05  # at most duplicate_heads' default max_distance 0.1
    assert dashboard(leaky, distances=given).scene.tally[1].heads == (0, 1)

    torch.manual_seed(0)
    mha = nn.MultiheadAttention(8, 2, batch_first=True)
    x = torch.randn(1, 4, 8)
    with torch.no_grad(), attnscope.capture(mha, keep="stats") as cap:
        mha(x, x, x)
    stats = dashboard(cap).tally_buttons
    assert stats["duplicate"].description.startswith("duplicate: not run (not available: the capture kept stat")
    assert stats["duplicate"].disabled and "0" not in stats["duplicate"].description
    assert stats["dead"].description == f"{len(attnscope.dead_heads(cap))} dead"
