"""The training-run view in real JupyterLab + Debian Chromium: it follows a loop running in the same kernel.

The notebook displays the view, then trains a tiny model with a planted collapse (one head's query weights
scaled up at step 12). While the kernel is still busy training, the browser's Bokeh document must already hold
recorded steps and then more of them; a tap on a strip cell must show that head's curve.
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest

import views_notebooks
from labserver import KERNEL_IDLE_JS, chromium, jupyter_lab, open_notebook

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ARTIFACTS = Path(__file__).resolve().parents[2] / "artifacts"

SETUP = """\
import time, torch, attnscope
torch.manual_seed(0)
layer = torch.nn.TransformerEncoderLayer(16, 4, 32, dropout=0.1, batch_first=True)
model = torch.nn.TransformerEncoder(layer, 2, enable_nested_tensor=False).train()
opt = torch.optim.Adam(model.parameters(), lr=1e-3)
tr = attnscope.track(model, every=2)
board = attnscope.dashboard(tr)
board
"""

LOOP = """\
g = torch.Generator().manual_seed(1)
for step in range(24):
    x = torch.randn(4, 6, 16, generator=g)
    if step == 12:  # planted: head 2 of the first layer gets sharp, collapsed attention
        with torch.no_grad():
            model.layers[0].self_attn.in_proj_weight[8:12] *= 30.0
    with tr.step(step):
        loss = (model(x) - x.roll(1, dims=1)).pow(2).mean()
    loss.backward(); opt.step(); opt.zero_grad()
    time.sleep(0.4)
print("trained", len(tr.steps), "alerts", len(tr.alerts()))
"""

STATE_JS = """() => {
  if (!window.Bokeh) return null;
  for (const d of Bokeh.documents) {
    const strip = d.get_model_by_name('as-run-strip');
    if (!strip) continue;
    return {steps: Array.from(new Set(Array.from(strip.data.step))).length,
            rows: strip.data.step.length,
            marks: Array.from(d.get_model_by_name('as-run-strip-alerts').data.step),
            curve: d.get_model_by_name('as-run-curve-fig').title.text, idle: d.is_idle};
  }
  return null; }"""

# starts cell i and returns at once (not awaiting the command, which resolves when the cell has run)
RUN_CELL_JS = """(i) => { const nb = jupyterapp.shell.currentWidget.content; nb.activeCellIndex = i;
  jupyterapp.commands.execute('notebook:run-cell'); }"""

KERNEL_BUSY_JS = ("() => jupyterapp.shell.currentWidget?.sessionContext?.session?.kernel?.status")

SCREEN_JS = """([name, x, y]) => {
  for (const v of Bokeh.index.all_views()) {
    if (v.model.name !== name || v.frame == null) continue;
    v.el.scrollIntoView({block: 'center'});
    const r = v.canvas_view.el.getBoundingClientRect();
    return [r.left + v.frame.x_scale.compute(x), r.top + v.frame.y_scale.compute(y)];
  }
  return null; }"""


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    ARTIFACTS.mkdir(exist_ok=True)
    with jupyter_lab(tmp_path_factory.mktemp("lab")) as lab:
        yield lab


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p, chromium(p, tmp_path_factory.mktemp("profile"), width=1400, height=1800) as ctx:
        yield ctx


def test_run_view_follows_training_live_and_answers_a_tap(lab, browser):
    views_notebooks.write(lab["root"] / "run.ipynb", SETUP, LOOP)
    page = browser.new_page()
    problems: list[str] = []
    page.on("pageerror", lambda e: problems.append(f"pageerror: {e}"))
    page.on("console", lambda m: m.type == "error" and problems.append(f"console: {m.text}"))
    open_notebook(page, lab, "run")
    page.evaluate(RUN_CELL_JS, 0)  # the view first; the training loop once the view is on screen
    board = page.locator(".jp-NotebookPanel:not(.lm-mod-hidden) .jp-OutputArea-output .as-run-dashboard")
    js_error = page.get_by_text("Click to show javascript error.")
    board.locator(".as-run-plot canvas").first.or_(js_error).first.wait_for(state="visible", timeout=90_000)
    assert not js_error.count(), "\n".join(problems)
    page.wait_for_function(KERNEL_IDLE_JS, timeout=30_000)
    page.evaluate(RUN_CELL_JS, 1)
    # while the loop still runs (kernel busy), the browser already shows recorded steps, and then more
    seen_busy: list[int] = []
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        status = page.evaluate(KERNEL_BUSY_JS)
        s = page.evaluate(STATE_JS)
        if status == "busy" and s is not None and s["steps"] > 0:
            seen_busy.append(s["steps"])
        if status == "idle" and seen_busy:
            break
        page.wait_for_timeout(150)
    assert len(set(seen_busy)) >= 3, seen_busy  # at least three different step counts arrived mid-run
    page.locator(".jp-OutputArea-output", has_text="trained 12 alerts").wait_for(timeout=30_000)
    page.wait_for_function(f"() => ({STATE_JS})()?.steps === 12", timeout=30_000)
    s = page.evaluate(STATE_JS)
    assert s["rows"] == 12 * 8 and s["marks"] and min(s["marks"]) == 12  # the collapse marked from step 12
    board.locator(".as-run-status", has_text="12 recorded").wait_for(timeout=10_000)
    # tap the strip cell of layer 1, head 3 (row 7) at step 10: the kernel shows its curve
    px, py = page.evaluate(SCREEN_JS, ["as-run-strip-fig", 10, 7])
    page.mouse.click(px, py)
    page.wait_for_function(f"() => ({STATE_JS})().curve.startsWith('layers.1.self_attn · h3')", timeout=30_000)
    shown = board.locator(".as-run-head select").evaluate("s => s.options[s.selectedIndex].text")
    assert shown.replace("\u00a0", " ") == "layers.1.self_attn · h3"
    board.get_by_text("Jain & Wallace 2019", exact=False).wait_for(state="visible", timeout=10_000)  # the caveat
    board.screenshot(path=str(ARTIFACTS / "run_dashboard_lab.png"))
    assert not problems, problems
    page.close()


PAGE_JS = """() => {
  const d = window.Bokeh?.documents[0];
  if (!d || !d.is_idle) return null;
  return {curve: d.get_model_by_name('as-run-curve-fig').title.text,
          strip: d.get_model_by_name('as-run-strip-fig').title.text,
          points: Array.from(d.get_model_by_name('as-run-curve').data.value),
          marks: Array.from(d.get_model_by_name('as-run-curve-alerts').data.step)};
}"""


def test_exported_run_page_answers_a_tap_and_a_menu_offline(browser, tmp_path):
    import torch

    import attnscope

    torch.manual_seed(0)
    layer = torch.nn.TransformerEncoderLayer(16, 4, 32, dropout=0.0, batch_first=True)
    model = torch.nn.TransformerEncoder(layer, 2, enable_nested_tensor=False).train()
    tr = attnscope.track(model, every=1)
    g = torch.Generator().manual_seed(1)
    for step in range(12):
        if step == 6:  # planted: head 1 of the first layer collapses
            with torch.no_grad():
                model.layers[0].self_attn.in_proj_weight[4:8] *= 30.0
        with tr.step(step):
            model(torch.randn(2, 6, 16, generator=g))
    path = attnscope.export_html(tr, tmp_path / "run.html")
    page = browser.new_page()
    problems: list[str] = []
    page.on("pageerror", lambda e: problems.append(str(e)))
    page.on("request", lambda r: r.url.startswith("http") and problems.append(f"network: {r.url}"))
    page.goto(path.as_uri())
    page.wait_for_function(f"() => ({PAGE_JS})() !== null", timeout=30_000)
    assert page.evaluate(PAGE_JS)["curve"].startswith("layers.0.self_attn · h0")
    px, py = page.evaluate(SCREEN_JS, ["as-run-strip-fig", 8, 1])  # the cell of layers.0 head 1 at step 8
    page.mouse.click(px, py)
    page.wait_for_function(f"() => ({PAGE_JS})()?.curve.startsWith('layers.0.self_attn · h1')", timeout=10_000)
    state = page.evaluate(PAGE_JS)
    table = tr.table().query("name == 'layers.0.self_attn' and head == 1")
    assert state["points"] == pytest.approx(table["entropy_ratio"].tolist(), rel=1e-6)  # the page's JS filtered
    assert state["marks"] == [a.step for a in tr.alerts() if a.head == 1 and a.name == "layers.0.self_attn"] != []
    page.locator("select").nth(1).select_option("sink_mass")  # the statistic menu (inside Bokeh's shadow root)
    page.wait_for_function(f"() => ({PAGE_JS})()?.strip.endsWith('sink_mass')", timeout=10_000)
    assert page.evaluate(PAGE_JS)["points"] == pytest.approx(table["sink_mass"].tolist(), rel=1e-6)
    page.screenshot(path=str(ARTIFACTS / "run_page.png"))
    assert not problems, problems
    page.close()
