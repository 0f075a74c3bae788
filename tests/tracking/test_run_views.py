"""Views of a tracked run without a browser: set values in code, check what the Bokeh data sources hold.

The expected values come from the tracker's own tables (which test_track.py checks against outside
references); these tests check that the views show those numbers, for the head and statistic chosen.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
import traitlets

import attnscope
from track_runs import mha_stack, plant_collapse, sdpa_decoder, train

COLLAPSED = ("0.layers.0.self_attn", 2)


@pytest.fixture(scope="module")
def collapsed_run():
    model = mha_stack()
    tr = attnscope.track(model, every=2)
    train(model, "mha", 30, tr, before_step=plant_collapse(0, 2, 20))
    return tr


def test_strip_curve_and_marks_follow_head_and_statistic(collapsed_run):
    tr = collapsed_run
    board = attnscope.dashboard(tr)
    board.stop()
    table = tr.table()
    src = board.scene.strip_src.data
    assert src["step"] == table["step"].tolist()
    np.testing.assert_array_equal(src["value"], table["entropy_ratio"])
    g = board.scene.head_index(*COLLAPSED)
    marks = board.scene.strip_alert_src.data
    assert set(marks["row"]) == {g} and marks["step"] == list(range(20, 30, 2))  # alerts marked where they fire
    board.head = g
    mine = table[(table["name"] == COLLAPSED[0]) & (table["head"] == COLLAPSED[1])]
    assert board.scene.curve_src.data["step"] == mine["step"].tolist()
    np.testing.assert_array_equal(board.scene.curve_src.data["value"], mine["entropy_ratio"])
    assert board.scene.curve_alert_src.data["step"] == list(range(20, 30, 2))
    assert "0.layers.0.self_attn · h2" in board.scene.curve_fig.title.text
    board.statistic = "sink_mass"
    np.testing.assert_array_equal(board.scene.strip_src.data["value"], table["sink_mass"])
    np.testing.assert_array_equal(board.scene.curve_src.data["value"], mine["sink_mass"])
    assert board.scene.mapper.high == pytest.approx(table["sink_mass"].max())
    board.head = 0  # a healthy head: no marks on its curve
    assert board.scene.curve_alert_src.data["step"] == []
    assert "steps 0–28 (15 recorded)" in board.status.value and "5 alerts" in board.status.value
    assert "collapse: entropy ratio" in board.alert_list.value
    with pytest.raises(traitlets.TraitError, match="statistic"):
        board.statistic = "entropy_rate"


def test_a_tap_on_a_strip_cell_shows_that_head(collapsed_run):
    board = attnscope.dashboard(collapsed_run)
    board.stop()
    data = board.scene.strip_src.data
    cell = next(i for i, r in enumerate(data["row"]) if r == 5)
    board.scene.strip_src.selected.indices = [cell]  # what a tap in the browser sets
    assert board.head == 5 and board.head_choice.value == 5
    assert board.scene.curve_fig.title.text.startswith(board.scene.labels[5])


def test_live_mode_follows_the_run_until_stopped():
    model = sdpa_decoder()
    tr = attnscope.track(model, every=2)
    board = attnscope.dashboard(tr)
    assert board.live and board.live_choice.value and board.scene.strip_src.data["step"] == []
    train(model, "sdpa", 5, tr)  # steps 0, 2, 4 recorded while the widget listens
    assert sorted(set(board.scene.strip_src.data["step"])) == [0, 2, 4]
    assert len(board.scene.stream_src.data["xs"]) == 2 and board.scene.stream_src.data["xs"][0] == [0, 2, 4]
    assert board.head_choice.options and "following the run" in board.status.value
    board.stop()
    assert tr._listeners == []
    before = list(board.scene.strip_src.data["step"])
    with tr.step(6):
        model(train.__globals__["batches"]("sdpa", 1)[0][0])
    assert board.scene.strip_src.data["step"] == before  # stopped: no longer follows


def test_loaded_run_shows_but_does_not_follow(collapsed_run, tmp_path):
    attnscope.save(collapsed_run, tmp_path / "run.attnscope")
    loaded = attnscope.load(tmp_path / "run.attnscope")
    board = attnscope.dashboard(loaded)
    assert not board.live
    board.live_choice.value = True  # the button pressed
    assert not board.live and not board.live_choice.value and "nothing to follow" in board.problem.value
    assert board.scene.strip_src.data["step"] == collapsed_run.table()["step"].tolist()


def test_exported_page_holds_the_run_and_the_caveat(collapsed_run, tmp_path):
    out = attnscope.export_html(collapsed_run, tmp_path / "run.html", statistic="max_weight")
    page = out.read_text()
    assert "cdn.bokeh.org" not in page
    assert "Jain &amp;amp; Wallace 2019" in page or "Jain &amp; Wallace 2019" in page
    assert "collapse: entropy ratio" in page
    docs = re.findall(r'<script type="application/json" id="[^"]+">\s*(.*?)\s*</script>', page, re.S)
    doc = json.loads(docs[0])
    text = json.dumps(doc)
    for name in ("as-run-strip", "as-run-curve", "as-run-stream", "as-run-head-select", "as-run-stat-select"):
        assert f'"{name}"' in text
