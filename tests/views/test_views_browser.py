"""Real browser: the dashboard in headless JupyterLab + Debian Chromium, and the exported page from file://.

Nothing is set up for BokehJS: the notebook has no ``output_notebook`` cell, the page is opened offline.
State is read from BokehJS itself (``Bokeh.documents``) and from the widget DOM.
"""

from __future__ import annotations

import hashlib
import json
import time
from pathlib import Path

import pytest

from attnscope.views import export_html
from attnscope.views.scene import Scene
from conftest import HOSTILE, SOURCE, TARGET, translator_capture
from labserver import chromium, jupyter_lab, open_notebook, open_notebook7, run_all
import views_notebooks

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ARTIFACTS = Path(__file__).resolve().parents[2] / "artifacts"
TIMINGS: dict[str, float] = {}

# What the views show right now, read from BokehJS.
STATE_JS = """() => {
  if (!window.Bokeh) return null;
  for (const d of Bokeh.documents) {
    const lens = d.get_model_by_name('as-lens');
    if (!lens) continue;
    const get = (n) => d.get_model_by_name(n).data;
    return {title: lens.title.text, pick: [get('as-pick').x[0], get('as-pick').y[0]],
            q: Array.from(get('as-qlab').tok), k: Array.from(get('as-klab').tok),
            stream_y: Array.from(get('as-stream-pick').y), twin_y: Array.from(get('as-twin-pick').y),
            selected: Array.from(d.get_model_by_name('as-cells').selected.indices),
            scores: d.get_model_by_name('as-scores').title.text, idle: d.is_idle,
            top: d.get_model_by_name('as-lens-image').glyph.color_mapper.high,
            lens_max: Math.max(...get('as-lens-src').image[0]), veil: d.get_model_by_name('as-veil').visible};
  }
  return null; }"""

# The same without the lens' pixel values (a 512 x 512 lens is too large to spread into Math.max).
SMALL_STATE_JS = """() => {
  if (!window.Bokeh) return null;
  for (const d of Bokeh.documents) {
    const lens = d.get_model_by_name('as-lens');
    if (!lens) continue;
    return {title: lens.title.text, idle: d.is_idle, twin_y: Array.from(d.get_model_by_name('as-twin-pick').data.y)};
  }
  return null; }"""

# Page coordinates of data point (x, y) in the figure named `name`, via the figure's own scales.
SCREEN_JS = """([name, x, y]) => {
  for (const v of Bokeh.index.all_views()) {
    if (v.model.name !== name || v.frame == null) continue;
    v.el.scrollIntoView({block: 'center'});  // the mouse only reaches what is on screen
    const r = v.canvas_view.el.getBoundingClientRect();
    return [r.left + v.frame.x_scale.compute(x), r.top + v.frame.y_scale.compute(y)];
  }
  return null; }"""

COLOURS_JS = """([name]) => {
  for (const v of Bokeh.index.all_views()) {
    if (v.model.name !== name || v.canvas_view == null) continue;
    const c = v.canvas_view.el.querySelector('canvas') ?? v.canvas_view.primary.canvas;
    const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
    const s = new Set(); for (let i = 0; i < d.length; i += 16) s.add(d[i] << 16 | d[i+1] << 8 | d[i+2]);
    return s.size;
  }
  return -1; }"""


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    ARTIFACTS.mkdir(exist_ok=True)
    with jupyter_lab(tmp_path_factory.mktemp("lab")) as lab:
        TIMINGS["lab_startup_s"] = round(lab["startup_s"], 2)
        yield lab
    (ARTIFACTS / "views_browser_timings.json").write_text(json.dumps(TIMINGS, indent=1))


@pytest.fixture(scope="module")
def playwright():
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        yield p


@pytest.fixture(scope="module")
def browser(playwright, tmp_path_factory):
    with chromium(playwright, tmp_path_factory.mktemp("profile"), width=1900, height=2000) as ctx:
        yield ctx


def watch(page):
    page.problems = []
    page.on("pageerror", lambda e: page.problems.append(f"pageerror: {e}"))
    page.on("console", lambda m: m.type == "error" and page.problems.append(f"console: {m.text}"))
    page.on("dialog", lambda d: (page.problems.append(f"dialog: {d.message}"), d.dismiss()))
    return page


def state(page):
    return page.evaluate(STATE_JS)


def hover_text(page, fig, x, y):
    px, py = page.evaluate(SCREEN_JS, [fig, x, y])
    page.mouse.move(px, py)
    tip = page.locator(".bk-Tooltip .bk-tooltip-content").first
    tip.wait_for(state="visible", timeout=10_000)
    text = tip.inner_text()
    scripts = tip.evaluate("t => t.querySelectorAll('script').length")
    page.mouse.move(0, 0)
    return text, scripts


def tap(page, fig, x, y):
    px, py = page.evaluate(SCREEN_JS, [fig, x, y])
    page.mouse.click(px, py)


def shot(locator):
    return hashlib.sha1(locator.screenshot()).hexdigest()


def test_dashboard_in_jupyterlab_without_setup_cell(lab, browser):
    views_notebooks.write(lab["root"] / "board.ipynb", views_notebooks.TRANSLATOR)
    page = watch(browser.new_page())
    open_notebook(page, lab, "board")
    t0 = time.perf_counter()
    run_all(page)
    board = page.locator(".jp-NotebookPanel:not(.lm-mod-hidden) .jp-OutputArea-output .as-dashboard")
    canvas = board.locator(".as-plot canvas").first
    js_error = page.get_by_text("Click to show javascript error.")
    canvas.or_(js_error).first.wait_for(state="visible", timeout=90_000)
    assert not js_error.count(), "\n".join(page.problems)
    page.wait_for_function(f"() => ({STATE_JS})()?.idle === true", timeout=30_000)
    TIMINGS["run_all_to_first_render_s"] = round(time.perf_counter() - t0, 2)
    s0 = state(page)
    assert 0 < s0["lens_max"] <= 1 and s0["top"] == pytest.approx(s0["lens_max"], rel=1e-6)
    assert "encoder.layers.0.self_attn · head 0" in s0["title"] and s0["q"] == SOURCE and s0["selected"] == [0]
    assert page.evaluate(COLOURS_JS, ["as-lens"]) > 10 and page.evaluate(COLOURS_JS, ["as-atlas"]) > 10
    page.wait_for_timeout(300)
    lens_png = shot(board.locator(".as-plot"))

    # hover: the token pair and weight, the hostile token shown as text (row 1 is the hostile source token)
    text, scripts = hover_text(page, "as-lens", 2, 1)
    assert "weight" in text and HOSTILE in text and "lamp" in text and scripts == 0

    # select through the ipywidgets dropdown: decoder.layers.1.self_attn head 1, a causal head (veil visible)
    t1 = time.perf_counter()
    board.locator(".as-head select").select_option(label="decoder.layers.1.self_attn · head 1")
    expect_status = "showing decoder.layers.1.self_attn · head 1"
    board.locator(".as-status", has_text=expect_status).wait_for(timeout=30_000)
    page.wait_for_function(f"() => ({STATE_JS})().title.includes('decoder.layers.1.self_attn · head 1')",
                           timeout=30_000)
    TIMINGS["dropdown_round_trip_s"] = round(time.perf_counter() - t1, 3)
    s1 = state(page)
    assert s1["pick"] == [1.5, 4.5] and s1["selected"] == [17]  # atlas + scores mark
    assert s1["q"] == TARGET and s1["k"] == TARGET
    assert s1["stream_y"] == [3.5] and s1["stream_y"] != s0["stream_y"]  # block decoder.layers.1
    scene = Scene(translator_capture())  # the same capture as the notebook's; twins rows in clustered order
    assert s1["twin_y"][0] == scene.twin_pos[17] + 0.5
    assert "causal" in s1["title"]
    page.wait_for_timeout(300)
    assert shot(board.locator(".as-plot")) != lens_png
    board.screenshot(path=str(ARTIFACTS / "dashboard_lab_causal.png"))

    # tap an atlas tile: decoder.layers.0.multihead_attn head 2 (cross-attention)
    t2 = time.perf_counter()
    tap(page, "as-atlas", 2.5, 3.5)
    page.wait_for_function(f"() => ({STATE_JS})().title.includes('decoder.layers.0.multihead_attn · head 2')",
                           timeout=30_000)
    TIMINGS["tile_tap_round_trip_s"] = round(time.perf_counter() - t2, 3)
    s2 = state(page)
    assert s2["q"] == TARGET and s2["k"] == SOURCE and s2["pick"] == [2.5, 3.5]
    board.locator(".as-status", has_text="decoder.layers.0.multihead_attn · head 2").wait_for(timeout=10_000)
    assert board.locator(".as-head select").evaluate("s => s.options[s.selectedIndex].text.replace(/\\u00a0/g, ' ')") == \
        "decoder.layers.0.multihead_attn · head 2"

    # tap a scores cell: encoder.layers.1.self_attn head 3
    tap(page, "as-scores", 3.5, 1.5)
    page.wait_for_function(f"() => ({STATE_JS})().title.includes('encoder.layers.1.self_attn · head 3')",
                           timeout=30_000)
    assert state(page)["selected"] == [7] and state(page)["pick"] == [3.5, 1.5]

    # tap a row of the twins matrix: row 20 of the clustered order
    g = scene.twin_order[20]
    tap(page, "as-twins", 3.5, 20.5)
    page.wait_for_function(f"() => ({STATE_JS})().selected[0] === {g}", timeout=30_000)
    assert scene.heads[g].label in state(page)["title"]
    assert state(page)["twin_y"][0] == 20.5 and state(page)["pick"] == [scene.heads[g].slot + 0.5,
                                                                         scene.heads[g].record + 0.5]

    # the summary line's duplicate count (an ipywidgets button) selects the next duplicate head
    twins = scene.tally[1]
    board.locator(".as-tally-duplicate").click()
    g = twins.next_head(g)
    page.wait_for_function(f"() => ({STATE_JS})().selected[0] === {g}", timeout=30_000)
    assert scene.heads[g].label in state(page)["title"]
    board.screenshot(path=str(ARTIFACTS / "dashboard_lab.png"))
    assert not page.problems, page.problems
    page.close()


def test_dashboard_in_notebook7(lab, browser):
    views_notebooks.write(lab["root"] / "classic.ipynb", views_notebooks.TRANSLATOR)
    page = watch(browser.new_page())
    open_notebook7(page, lab, "classic")
    # Notebook 7 itself reports "reading 'schema'" while loading user settings, also for a notebook holding
    # only `1 + 1`; only what happens from running the cells on is ours
    page.problems.clear()
    run_all(page)
    board = page.locator(".jp-OutputArea-output .as-dashboard")
    js_error = page.get_by_text("Click to show javascript error.")
    board.locator(".as-plot canvas").first.or_(js_error).first.wait_for(state="visible", timeout=90_000)
    assert not js_error.count(), "\n".join(page.problems)
    page.wait_for_function(f"() => ({STATE_JS})()?.idle === true", timeout=30_000)
    board.locator(".as-head select").select_option(label="decoder.layers.0.multihead_attn · head 3")
    page.wait_for_function(f"() => ({STATE_JS})().title.includes('decoder.layers.0.multihead_attn · head 3')",
                           timeout=30_000)
    assert state(page)["k"] == SOURCE and page.evaluate(COLOURS_JS, ["as-lens"]) > 10
    board.screenshot(path=str(ARTIFACTS / "dashboard_notebook7.png"))
    assert not page.problems, page.problems
    page.close()


def test_exported_page_offline_from_file(playwright, tmp_path, tmp_path_factory):
    cap = translator_capture()
    path = export_html(cap, tmp_path / "heads.html", tokens={"source": SOURCE, "target": TARGET},
                       findings=[("encoder.layers.0.self_attn", 2, HOSTILE)])
    remote = []
    with chromium(playwright, tmp_path_factory.mktemp("offline"), width=1900, height=2000) as ctx:
        ctx.set_offline(True)
        ctx.route("**/*", lambda r: r.continue_() if r.request.url.startswith("file:")
                  else (remote.append(r.request.url), r.abort()))
        page = watch(ctx.new_page())
        t0 = time.perf_counter()
        page.goto(path.as_uri())
        page.locator("canvas").first.wait_for(state="visible", timeout=30_000)
        page.wait_for_function(f"() => ({STATE_JS})()?.idle === true", timeout=30_000)
        TIMINGS["page_first_render_s"] = round(time.perf_counter() - t0, 2)
        assert page.evaluate(COLOURS_JS, ["as-lens"]) > 10 and page.evaluate(COLOURS_JS, ["as-atlas"]) > 10
        assert "encoder.layers.0.self_attn · head 0" in state(page)["title"]
        text, scripts = hover_text(page, "as-lens", 2, 1)
        assert HOSTILE in text and scripts == 0

        # Bokeh Select (no kernel): head, then a tile tap, then the batch item and the statistic
        selects = page.locator("select")
        selects.nth(0).select_option(label="decoder.layers.1.self_attn · head 1")
        page.wait_for_function(f"() => ({STATE_JS})().title.includes('decoder.layers.1.self_attn · head 1')",
                               timeout=10_000)
        s1 = state(page)
        assert s1["pick"] == [1.5, 4.5] and s1["q"] == TARGET and s1["stream_y"] == [3.5] and s1["selected"] == [17]
        tap(page, "as-atlas", 2.5, 3.5)
        page.wait_for_function(f"() => ({STATE_JS})().title.includes('decoder.layers.0.multihead_attn · head 2')",
                               timeout=10_000)
        s2 = state(page)
        assert s2["k"] == SOURCE and 0 < s2["lens_max"] <= 1 and s2["top"] == pytest.approx(s2["lens_max"], rel=1e-4)
        assert selects.nth(0).evaluate("s => s.options[s.selectedIndex].text.replace(/\\u00a0/g, ' ')") == \
            "decoder.layers.0.multihead_attn · head 2"
        scene = Scene(cap)  # the twins rows are ordered by clusters: row 5 is the head twin_order names
        tap(page, "as-twins", 1.5, 5.5)
        page.wait_for_function(f"() => ({STATE_JS})().selected[0] === {scene.twin_order[5]}", timeout=10_000)
        assert scene.heads[scene.twin_order[5]].label in state(page)["title"]
        selects.nth(1).select_option(label="item 1")
        page.wait_for_function(f"() => ({STATE_JS})().title.includes('item 1')", timeout=10_000)
        page.get_by_text("mask veil").click()
        page.wait_for_function(f"() => ({STATE_JS})().veil === false", timeout=10_000)
        selects.nth(2).select_option("sink_mass")
        page.wait_for_function(f"() => ({STATE_JS})().scores.includes('sink_mass')", timeout=10_000)
        # the summary line: a click on the duplicate count selects a flagged head, a second click the next one
        twins = scene.tally[1]
        assert twins.kind == "duplicate" and len(twins.heads) >= 2
        button = page.get_by_role("button", name=twins.text)
        g = state(page)["selected"][0]
        for _ in range(2):
            g = twins.next_head(g)
            button.click()
            page.wait_for_function(f"() => ({STATE_JS})().selected[0] === {g}", timeout=10_000)
            assert scene.heads[g].label in state(page)["title"]
        page.wait_for_timeout(300)
        page.screenshot(path=str(ARTIFACTS / "dashboard_page.png"), full_page=True)
        assert not page.problems, page.problems
        assert remote == []


@pytest.mark.slow
def test_exported_page_at_144_heads_and_1024_positions(playwright, tmp_path, tmp_path_factory):
    """A GPT-2-shaped capture of 12 x 12 heads at T=1024 (narrow width to keep the forward cheap), offline page."""
    import torch
    import transformers

    import attnscope
    from attnscope.analyses.similarity import head_distances

    torch.manual_seed(0)
    cfg = transformers.GPT2Config(n_layer=12, n_head=12, n_embd=96, n_positions=1024, vocab_size=500,
                                  resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)
    model = transformers.GPT2Model._from_config(cfg, attn_implementation="eager").eval()
    ids = torch.randint(0, 500, (1, 1024))
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids)
    assert sum(len(r.heads) for r in cap.attention) == 144
    dist = head_distances(cap)
    path = tmp_path / "large.html"
    with pytest.warns(attnscope.AttnscopeWarning):  # maps pooled for the page and the lens: said, not silent
        export_html(cap, path, tokens=[f"w{i}" for i in range(1024)], distances=dist)
    assert path.stat().st_size <= 20 * 10 ** 6
    with chromium(playwright, tmp_path_factory.mktemp("large"), width=1900, height=2200) as ctx:
        page = watch(ctx.new_page())
        page.goto(path.as_uri())
        page.locator("canvas").first.wait_for(state="visible", timeout=60_000)
        page.wait_for_function(f"() => ({SMALL_STATE_JS})()?.idle === true", timeout=60_000)
        ARTIFACTS.mkdir(exist_ok=True)
        page.screenshot(path=str(ARTIFACTS / "page_144_heads.png"), full_page=True)
        assert page.evaluate(COLOURS_JS, ["as-twins"]) > 10 and page.evaluate(COLOURS_JS, ["as-atlas"]) > 10
        # a tap on row 40 of the clustered twins matrix selects the head drawn there
        axis = page.evaluate("""() => { for (const d of Bokeh.documents) { const f = d.get_model_by_name('as-twins');
          if (f) return [f.below[0].ticker.ticks.length, f.left[0].axis_label]; } return null; }""")
        assert axis == [36, "head (layer.head)"]  # 144 heads, every 4th labelled on the axis
        x, y = page.evaluate(SCREEN_JS, ["as-twins", 10.5, 40.5])
        page.mouse.click(x, y)
        page.wait_for_function(f"() => ({SMALL_STATE_JS})().twin_y[0] === 40.5", timeout=20_000)
        ARTIFACTS.mkdir(exist_ok=True)
        page.screenshot(path=str(ARTIFACTS / "page_144_heads.png"), full_page=True)
        assert not page.problems


# The twins matrix and the atlas as BokehJS holds them: row labels of the twins (clustered order), axis models.
TWINS_JS = """() => {
  for (const d of Bokeh.documents) {
    const f = d.get_model_by_name('as-twins'), a = d.get_model_by_name('as-atlas');
    if (!f || !a) continue;
    const labels = (axis) => Object.entries(axis.major_label_overrides instanceof Map
      ? Object.fromEntries(axis.major_label_overrides) : axis.major_label_overrides).map(([k, v]) => [Number(k), v]);
    return {rows: Array.from(d.get_model_by_name('as-glab').data.tok), twin_y: labels(f.left[0]),
            twin_title: f.title.text, twin_axis: f.left[0].axis_label, image: f.renderers[0].data_source.data.dw[0],
            atlas_y: labels(a.left[0]).map(e => e[1]), atlas_x: labels(a.below[0]).map(e => e[1]),
            cells: {record: Array.from(d.get_model_by_name('as-cells').data.record),
                    head: Array.from(d.get_model_by_name('as-cells').data.head)}};
  }
  return null; }"""


def test_dashboard_in_jupyterlab_at_144_heads_and_1024_positions(lab, browser):
    """GPT-2-small's shape (12 x 12 heads, T=1024; narrow width) in JupyterLab: render, twins tap, summary line."""
    import re

    views_notebooks.write(lab["root"] / "gpt2_144.ipynb", views_notebooks.GPT2_144)
    page = watch(browser.new_page())
    open_notebook(page, lab, "gpt2_144")
    t0 = time.perf_counter()
    run_all(page)
    board = page.locator(".jp-NotebookPanel:not(.lm-mod-hidden) .jp-OutputArea-output .as-dashboard")
    canvas = board.locator(".as-plot canvas").first
    js_error = page.get_by_text("Click to show javascript error.")
    canvas.or_(js_error).first.wait_for(state="visible", timeout=120_000)
    assert not js_error.count(), "\n".join(page.problems)
    page.wait_for_function(f"() => ({SMALL_STATE_JS})()?.idle === true", timeout=60_000)
    TIMINGS["run_all_to_first_render_144_heads_s"] = round(time.perf_counter() - t0, 2)
    assert "h.0.attn · head 0" in page.evaluate(SMALL_STATE_JS)["title"]
    assert page.evaluate(COLOURS_JS, ["as-atlas"]) > 10 and page.evaluate(COLOURS_JS, ["as-twins"]) > 10
    assert page.evaluate(COLOURS_JS, ["as-lens"]) > 10

    # heads grouped by layer: one atlas row per layer, one column per head; the twins axis names layer.head
    t = page.evaluate(TWINS_JS)
    assert t["atlas_y"] == [f"h.{i}.attn" for i in range(12)] and t["atlas_x"] == [f"h{j}" for j in range(12)]
    assert t["image"] == 144 and len(t["rows"]) == 144 and t["twin_axis"] == "head (layer.head)"
    assert len(t["twin_y"]) == 36 and all(re.fullmatch(r"\d+\.\d+", v) for _, v in t["twin_y"])
    assert "given" in t["twin_title"]
    # the clustered order is a permutation of the 144 heads (not capture order), and each axis label names the
    # head whose row it marks
    labels = [f"{r} · head {h}" for r, h in zip(t["cells"]["record"], t["cells"]["head"])]
    assert sorted(t["rows"]) == sorted(labels) and t["rows"] != labels
    for y, name in t["twin_y"]:
        layer, head = name.split(".")
        assert t["rows"][int(y)] == f"h.{layer}.attn · head {head}"

    # a tap on row 100 of the twins matrix selects the head drawn there, in every view and in the kernel
    row = 100
    g = labels.index(t["rows"][row])
    tap(page, "as-twins", 20.5, row + 0.5)
    page.wait_for_function(f"() => ({SMALL_STATE_JS})().twin_y[0] === {row + 0.5}", timeout=30_000)
    page.wait_for_function(f"() => ({SMALL_STATE_JS})().title.includes({json.dumps(t['rows'][row])})", timeout=30_000)
    board.locator(".as-status", has_text=f"showing {t['rows'][row]} ·").wait_for(timeout=30_000)
    assert page.evaluate("""() => { for (const d of Bokeh.documents) { const c = d.get_model_by_name('as-cells');
      if (c) return Array.from(c.selected.indices); } }""") == [g]

    # the summary line: one button per flagged kind, counts as text; an enabled one selects a flagged head
    texts = {kind: board.locator(f".as-tally-{kind}").inner_text() for kind in ("dead", "duplicate", "leaking")}
    assert re.fullmatch(r"\d+ dead", texts["dead"]) and re.fullmatch(r"\d+ leaking", texts["leaking"])
    assert re.fullmatch(r"\d+ duplicate \(\d+ pairs?\)", texts["duplicate"])
    assert texts["leaking"] == "0 leaking"  # HF's eager causal mask: no weight on a forbidden key
    kind = next(k for k, v in texts.items() if not v.startswith("0 "))
    board.locator(f".as-tally-{kind}").click()
    board.locator(".as-status", has_text=re.compile(rf"· {kind} \d+ of {texts[kind].split()[0]}$")).wait_for(
        timeout=30_000)
    page.wait_for_timeout(500)
    board.screenshot(path=str(ARTIFACTS / "dashboard_lab_144_heads.png"))
    assert not page.problems, page.problems
    page.close()
