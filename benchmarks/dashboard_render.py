"""Render time of the dashboard in a real browser, against a trivial one-plot Bokeh widget, in one Chromium session.

Run: ``python benchmarks/dashboard_render.py [--repeats 3] [--switches 8]``  (needs /usr/bin/chromium)

A headless JupyterLab is started on localhost and driven by playwright. Two notebooks, each opened fresh
(new kernel) ``--repeats`` times, alternating so that a noisy neighbour hits both alike:

* trivial: an ``output_notebook(INLINE)`` cell, then one Bokeh figure (a 2-head nn.MultiheadAttention map on
  6 tokens) in a BokehModel with a head Dropdown;
* dashboard: an nn.TransformerEncoder of 12 layers x 12 heads at T=256 captured with keep="maps", then
  ``attnscope.views.dashboard(cap)`` with no set-up cell (it brings BokehJS itself).

Reported (medians): run-all -> first render (canvas visible and the Bokeh document idle), from a fresh kernel;
the widget cell alone re-run in a warm kernel; the head-switch round trip (Dropdown change in the browser ->
kernel callback -> Bokeh patch applied in the page and painted), timed inside the page with performance.now().
Targets (from the project's issue): dashboard first render <= 1.5x the trivial widget's; switch <= 250 ms.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests" / "views"))

from labserver import chromium, jupyter_lab, open_notebook, run_all  # noqa: E402
import views_notebooks  # noqa: E402

TRIVIAL_SETUP = """\
from bokeh.io import output_notebook
from bokeh.resources import INLINE
output_notebook(resources=INLINE, hide_banner=True)
"""
TRIVIAL_WIDGET = """\
import numpy as np, torch, ipywidgets as W
from bokeh.models import ColumnDataSource
from bokeh.plotting import figure
from bokeh.transform import linear_cmap
from jupyter_bokeh.widgets import BokehModel
torch.manual_seed(0)
words = ["w0", "w1", "w2", "w3", "w4", "w5"]
mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
x = torch.randn(1, 6, 8)
with torch.no_grad():
    maps = mha(x, x, x, need_weights=True, average_attn_weights=False)[1][0].numpy()  # (H, T, T)
qi, ki = np.meshgrid(np.arange(6), np.arange(6), indexing="ij")
def cells(h):
    return dict(q=[words[i] for i in qi.ravel()], k=[words[j] for j in ki.ravel()], w=maps[h].ravel())
src = ColumnDataSource(cells(0))
fig = figure(name="triv-fig", title="head 0", width=360, height=360, x_range=words, y_range=words[::-1])
fig.rect(x="k", y="q", width=1, height=1, source=src, fill_color=linear_cmap("w", "Cividis256", 0, 1))
pick = W.Dropdown(options=[("head 0", 0), ("head 1", 1)], value=0)
pick.add_class("triv-pick")
def show(change):
    src.data = cells(change["new"]); fig.title.text = f"head {change['new']}"
pick.observe(show, names="value")
W.VBox([pick, BokehModel(fig)])
"""
BOARD_CAPTURE = """\
import torch, attnscope, attnscope.views
from torch import nn
torch.manual_seed(0)
layer = nn.TransformerEncoderLayer(48, 12, 96, dropout=0.0, batch_first=True)
model = nn.TransformerEncoder(layer, 12, enable_nested_tensor=False).eval()
x = torch.randn(1, 256, 48)
with torch.no_grad(), attnscope.capture(model) as cap:
    model(x, mask=nn.Transformer.generate_square_subsequent_mask(256), is_causal=True)
tokens = [f"tok{i}" for i in range(256)]
"""
BOARD_WIDGET = "attnscope.views.dashboard(cap, tokens=tokens)\n"

# ids of the Bokeh documents in the page whose root holds a model named `name`
DOCS_JS = """([name]) => !window.Bokeh ? [] : Bokeh.documents
  .filter(d => d.get_model_by_name(name) != null && d.is_idle)
  .map(d => d.get_model_by_name(name).id)"""

# Change the Dropdown in the page, wait until the Bokeh title says `want`, then one more frame (the paint).
SWITCH_JS = """async ([selector, index, name, want]) => {
  const sel = [...document.querySelectorAll(selector)].pop();
  const docs = Bokeh.documents.filter(d => d.get_model_by_name(name) != null);
  const fig = docs[docs.length - 1].get_model_by_name(name);  // the newest widget (a re-run leaves old ones)
  const title = () => fig.title.text.includes(want);
  const t0 = performance.now();
  sel.selectedIndex = index; sel.dispatchEvent(new Event('change', {bubbles: true}));
  await new Promise((done, fail) => { const tick = () => title() ? done() :
    (performance.now() - t0 > 20000 ? fail(new Error('no update')) : requestAnimationFrame(tick)); tick(); });
  await new Promise(r => requestAnimationFrame(() => r()));
  return performance.now() - t0; }"""


def first_render(page, lab, stem: str, fig_name: str) -> float:
    open_notebook(page, lab, stem, timeout_ms=120_000)
    t0 = time.perf_counter()
    run_all(page)
    page.wait_for_function(f"() => ({DOCS_JS})(['{fig_name}']).length > 0", timeout=120_000, polling=20)
    page.locator(".jp-NotebookPanel:not(.lm-mod-hidden) .jp-OutputArea-output canvas").first.wait_for(
        state="visible", timeout=60_000)
    return time.perf_counter() - t0


def warm_render(page, fig_name: str) -> float:
    before = page.evaluate(DOCS_JS, [fig_name])
    t0 = time.perf_counter()
    page.evaluate("() => { const nb = jupyterapp.shell.currentWidget.content;"
                  " nb.activeCellIndex = nb.widgets.length - 1; return jupyterapp.commands.execute('notebook:run-cell'); }")
    page.wait_for_function(f"() => ({DOCS_JS})(['{fig_name}']).some(id => !{before!r}.includes(id))",
                           timeout=120_000, polling=20)
    return time.perf_counter() - t0


def switches(page, selector: str, fig_name: str, labels: list[tuple[int, str]], n: int) -> list[float]:
    out = []
    for i in range(n):
        index, want = labels[i % len(labels)]
        out.append(page.evaluate(SWITCH_JS, [selector, index, fig_name, want]) / 1000)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--switches", type=int, default=8)
    args = ap.parse_args()
    from playwright.sync_api import sync_playwright

    runs: dict[str, list[float]] = {k: [] for k in ("trivial", "board", "trivial_warm", "board_warm",
                                                   "trivial_switch", "board_switch")}
    work = Path(tempfile.mkdtemp(prefix="attnscope-render-"))
    with jupyter_lab(work / "lab") as lab, sync_playwright() as p, chromium(p, work / "profile") as ctx:
        for r in range(args.repeats):
            for kind in ("trivial", "board"):
                stem = f"{kind}{r}"
                cells = (TRIVIAL_SETUP, TRIVIAL_WIDGET) if kind == "trivial" else (BOARD_CAPTURE, BOARD_WIDGET)
                views_notebooks.write(lab["root"] / f"{stem}.ipynb", *cells)
                page = ctx.new_page()
                fig = "triv-fig" if kind == "trivial" else "as-lens"
                runs[kind].append(first_render(page, lab, stem, fig))
                runs[f"{kind}_warm"].append(warm_render(page, fig))
                if kind == "trivial":
                    labels = [(1, "head 1"), (0, "head 0")]
                    runs["trivial_switch"] += switches(page, ".triv-pick select", "triv-fig", labels, args.switches)
                else:
                    labels = [(13, "layers.1.self_attn · head 1"), (77, "layers.6.self_attn · head 5"),
                              (143, "layers.11.self_attn · head 11"), (0, "layers.0.self_attn · head 0")]
                    runs["board_switch"] += switches(page, ".as-head select", "as-lens", labels, args.switches)
                page.evaluate("() => jupyterapp.serviceManager.kernels.shutdownAll()")  # a quiet machine next
                page.close()

    med = {k: statistics.median(v) for k, v in runs.items()}
    print(f"{'':34s}{'trivial':>10s}{'dashboard':>11s}{'ratio':>8s}   runs")
    for label, a, b in (("run-all -> first render (fresh)", "trivial", "board"),
                        ("widget cell re-run (warm kernel)", "trivial_warm", "board_warm"),
                        ("head switch round trip", "trivial_switch", "board_switch")):
        print(f"{label:34s}{med[a]:9.2f}s{med[b]:10.2f}s{med[b] / med[a]:7.2f}x   "
              f"{len(runs[a])}/{len(runs[b])}  (min {min(runs[a]):.2f}/{min(runs[b]):.2f}, "
              f"max {max(runs[a]):.2f}/{max(runs[b]):.2f})")
    print("targets: first render <= 1.5x trivial; head switch <= 0.25 s")


if __name__ == "__main__":
    main()
