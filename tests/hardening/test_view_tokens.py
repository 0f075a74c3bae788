"""Hostile token strings render escaped (never as markup or script) in the widget and the exported page."""

from __future__ import annotations

import html
import json

import pytest
import torch
from torch import nn

import attnscope

HOSTILE = [
    "<script>alert(1)</script>",
    '" onmouseover="alert(2)',
    "'; alert(3); '",
    "<img src=x onerror=alert(4)>",
    "</div></body>",
    "${alert(5)}",
    "&lt;already-escaped&gt;",
    "",
    "x" * 4000,
    "\ud800",            # a lone surrogate: not encodable as UTF-8
    "\u202eevil",        # right-to-left override
    "مرحبا بالعالم",      # right-to-left script
    "line\nbreak\ttab",
]
RAW_MARKUP = ["<script>alert(1)", 'onmouseover="alert(2)', "<img src=x onerror", "</div></body>"]


@pytest.fixture(scope="module")
def hostile_capture():
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(8, 2, batch_first=True).eval()
    x = torch.randn(1, len(HOSTILE), 8)
    with torch.no_grad(), attnscope.capture(mha) as cap:
        mha(x, x, x)
    return cap


def findings():
    return [("", i % 2, t) for i, t in enumerate(HOSTILE)]


def test_widget_html_pieces_hold_no_raw_markup(hostile_capture):
    board = attnscope.dashboard(hostile_capture, tokens=HOSTILE, findings=findings(),
                                checks=[{"check": t, "ok": False} for t in HOSTILE])
    pieces = []
    stack = [board]
    while stack:  # every HTML-bearing widget and Bokeh Div under the dashboard
        w = stack.pop()
        stack.extend(getattr(w, "children", ()))
        if type(w).__name__ in ("HTML", "HTMLMath", "Label"):
            pieces.append(w.value)
    from bokeh.models import Div

    pieces += [d.text for d in board.scene.layout.select({"type": Div})]
    assert html.escape(HOSTILE[0]) in board.scene.findings_div.text  # shown, as text
    for piece in pieces:
        for raw in RAW_MARKUP:
            assert raw not in piece
    # tokens travel as data (drawn by BokehJS as text), exactly as given
    board.head = 0
    assert list(board.scene.qlab_src.data["tok"]) == HOSTILE


def test_page_escapes_every_hostile_string_and_stays_valid_utf8(hostile_capture, tmp_path):
    path = attnscope.export_html(hostile_capture, tmp_path / "hostile.html", tokens=HOSTILE, findings=findings(),
                                 title=HOSTILE[0])
    raw = path.read_bytes()
    text = raw.decode("utf-8")  # valid UTF-8 although a token was a lone surrogate
    for bad in RAW_MARKUP:
        assert bad not in text
    assert html.escape(HOSTILE[0]) in text  # the findings table shows it, escaped
    assert text.count("<script") == text.count("</script>")  # only the page's own scripts


@pytest.mark.browser
def test_page_with_hostile_tokens_renders_offline_and_runs_no_injected_script(hostile_capture, tmp_path):
    from playwright.sync_api import sync_playwright

    path = attnscope.export_html(hostile_capture, tmp_path / "hostile.html", tokens=HOSTILE, findings=findings())
    args = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync"]
    with sync_playwright() as p:
        ctx = p.chromium.launch_persistent_context(str(tmp_path / "profile"), executable_path="/usr/bin/chromium",
                                                   args=args, headless=True, viewport={"width": 1400, "height": 1600})
        try:
            ctx.set_offline(True)
            page = ctx.new_page()
            dialogs, errors = [], []
            page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(path.as_uri())
            page.locator("canvas").first.wait_for(state="visible", timeout=30_000)
            page.wait_for_function("() => window.Bokeh && Bokeh.documents.length && Bokeh.documents[0].is_idle",
                                   timeout=30_000)
            toks = page.evaluate("""() => { for (const d of Bokeh.documents) { const s = d.get_model_by_name('as-qlab');
                                      if (s) return Array.from(s.data.tok); } return null; }""")
            page.wait_for_timeout(300)
        finally:
            ctx.close()
    assert dialogs == [] and errors == []  # no alert() ran, nothing broke
    assert toks is not None and toks[0] == HOSTILE[0] and toks[-1] == HOSTILE[-1]
    print("lone surrogate arrived as", json.dumps(toks[9]))
    assert len(toks[9]) == 1  # the lone surrogate: one character on the axis, not a crash
