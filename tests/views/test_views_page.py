"""The standalone page without a browser, and the dashboard in a real kernel (nbclient, no browser)."""

from __future__ import annotations

import re

import nbformat
import numpy as np
import pytest
from bokeh.embed import file_html  # noqa: F401  (the page must not need anything else)
from nbclient import NotebookClient
from nbformat.v4 import new_code_cell

import attnscope
from attnscope.errors import AttnscopeWarning
from attnscope.views import export_html
from attnscope.views.page import _vaults
from attnscope.views.scene import CAUTION, Scene
from conftest import HOSTILE, SOURCE, TARGET
import views_notebooks


def test_page_is_self_contained_and_escaped(translator, tmp_path):
    path = export_html(translator, tmp_path / "heads.html", tokens={"source": SOURCE, "target": TARGET},
                       findings=[("encoder.layers.0.self_attn", 1, HOSTILE)], title=HOSTILE)
    html = path.read_text(encoding="utf-8")
    assert "cdn.bokeh.org" not in html and not re.search(r"<script[^>]+src=", html)
    assert HOSTILE not in html
    assert "Bokeh" in html and "3.9" in html  # BokehJS is inlined
    assert "Jain &amp; Wallace 2019" in html or "Jain & Wallace 2019" in html
    assert CAUTION.split(":")[0] in html


def test_page_stores_every_map_within_half_a_code_step(translator):
    scene = Scene(translator)
    vaults = _vaults(scene)
    v, veils = vaults["vault"].data, vaults["veils"].data["veil"]
    assert len(v["image"]) == scene.batch * len(scene.heads)
    for item in range(scene.batch):
        for h in scene.heads:
            idx = item * len(scene.heads) + h.g
            rec = translator.attention[h.record]
            w = rec.weights[item, h.slot]
            # uint16 codes as two byte planes (high, low): weight ≈ (256 * high + low) * scale, half a step off
            high, low = v["image"][idx].astype(np.int64)
            assert np.abs((256 * high + low) * v["scale"][idx] - w).max() <= v["scale"][idx] / 2 + 1e-9
            # the shared veil: grey (1) exactly where the call's own mask forbids, no leak (2) in torch's maps
            forbidden = ~np.broadcast_to(rec.allowed, rec.weights.shape)[item, h.slot] if rec.allowed is not None \
                else np.zeros(w.shape, bool)
            assert np.array_equal(veils[v["veil_at"][idx]], forbidden.astype(np.uint8))
    assert len(veils) < len(v["image"])  # stored once per distinct veil, not once per map


def test_page_pools_maps_past_its_byte_budget(translator, tmp_path):
    with pytest.warns(AttnscopeWarning, match="pooled to"):
        export_html(translator, tmp_path / "small.html", max_bytes=2_000)


@pytest.mark.slow
def test_dashboard_in_a_real_kernel_brings_bokehjs_itself(tmp_path):
    """nbclient runs the notebook without any set-up cell: the first output is the BokehJS loader."""
    nb = nbformat.read(views_notebooks.write(tmp_path / "d.ipynb", views_notebooks.TRANSLATOR), as_version=4)
    nb.cells.append(new_code_cell("board.head = 9\nprint(board.status.value)"))
    nb.cells.append(new_code_cell("attnscope.views.load_bokehjs()  # for a dashboard inside another widget"))
    NotebookClient(nb, timeout=180, kernel_name="python3", resources={"metadata": {"path": str(tmp_path)}}).execute()
    outputs = nb.cells[0].outputs
    js = outputs[0]["data"]["application/javascript"]
    assert 'root.Bokeh.version === version' in js and attnscope.__name__ not in js[:200]
    assert outputs[0]["data"]["application/vnd.bokehjs_load.v0+json"] == js
    assert "application/vnd.jupyter.widget-view+json" in outputs[1]["data"]
    assert nb.cells[1].outputs[0]["text"].startswith("showing decoder.layers.0.self_attn · head 1")
    assert nb.cells[2].outputs[0]["data"]["application/javascript"] == js
    state = nb.metadata["widgets"]["application/vnd.jupyter.widget-state+json"]["state"]
    assert {"BokehModel", "DropdownModel", "VBoxModel"} <= {m["model_name"] for m in state.values()}


@pytest.mark.parametrize("count", [5, 8])
def test_token_labels_of_the_wrong_length_raise_and_write_nothing(tmp_path, count):
    import torch

    import attnscope
    from attnscope.errors import ShapeError

    torch.manual_seed(0)
    mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    x = torch.randn(1, 6, 8)  # 6 positions: the only length a token list may have
    with attnscope.capture(mha) as cap:
        mha(x, x, x)
    tokens = [f"t{i}" for i in range(count)]
    path = tmp_path / "page.html"
    with pytest.raises(ShapeError, match=rf"sequence of {count} strings fits no axis.*expected 6 \(keys of"):
        attnscope.export_html(cap, path, tokens=tokens)
    assert not path.exists()
    with pytest.raises(ShapeError, match=rf"{count} strings.*expected 6"):
        attnscope.dashboard(cap, tokens=tokens)
    with pytest.raises(ShapeError, match=rf"{count} strings"):
        attnscope.dashboard(cap, tokens={"source": tokens})
    if count > 6:  # one list per batch item may be shorter (a padded item), never longer than every axis
        with pytest.raises(ShapeError, match=r"tokens\[0\]: a sequence of 8 strings is longer.*at most 6"):
            attnscope.dashboard(cap, tokens=[tokens])
    else:
        assert attnscope.dashboard(cap, tokens=[tokens]).scene.lens_arrays(0, 0)["k"] == [*tokens, "5"]
    assert attnscope.export_html(cap, path, tokens=tokens[:6] + ["x"] * (6 - count)).exists()  # right length: fine


def test_page_summary_line_counts_and_cycles_through_the_flagged_heads(tmp_path):
    from attnscope import demo
    from attnscope.demo import task

    model = demo.load("heads_specimen")
    ids, _ = task.lm_batch(task.make_examples(3, seed=0))
    with attnscope.capture(model) as cap:
        model(ids)
    html = export_html(cap, tmp_path / "specimen.html").read_text(encoding="utf-8")
    dead = {(f.name, f.head) for f in attnscope.dead_heads(cap)}
    pairs = attnscope.duplicate_heads(cap)
    twins = {(p.name_a, p.head_a) for p in pairs} | {(p.name_b, p.head_b) for p in pairs}
    for text in (f"{len(dead)} dead", f"{len(twins)} duplicate ({len(pairs)} pair)", "0 leaking", "flagged heads:"):
        assert f'"{text}"' in html, text  # a Bokeh Button label or Div text in the page's document JSON
    scene = Scene(cap)
    assert scene.tally[0].heads == tuple(sorted(scene.head_index(n, h) for n, h in dead))
    assert "heads.indexOf(Number(head_select.value))" in html
    assert CAUTION.split(":")[0] in html
