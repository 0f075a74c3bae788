"""Regenerate the README picture: ``python tests/views/readme_picture.py`` writes docs/images/dashboard.png.

The README's own dashboard example (the bundled seq2seq demo model) runs in a headless JupyterLab, a causal
decoder head is chosen in the head dropdown, and the widget is photographed in Debian Chromium.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from labserver import chromium, jupyter_lab, open_notebook, run_all  # noqa: E402
import views_notebooks  # noqa: E402

README_CELL = '''\
import torch, attnscope
from attnscope.demo import load, task

model = load("seq2seq_post_ln")
examples = task.make_examples(4, seed=1, split="held_out")
src, tgt_in, _ = task.seq2seq_batch(examples)
with torch.no_grad(), attnscope.capture(model) as cap:
    model(src, tgt_in)
tokens = {"source": [list(e.source) for e in examples], "target": [["<bos>", *e.target[:-1]] for e in examples]}
findings = {"silent heads": attnscope.dead_heads(cap), "twin heads": attnscope.duplicate_heads(cap)}
attnscope.dashboard(cap, tokens=tokens, findings=findings)
'''
HEAD = "transformer.decoder.layers.1.self_attn · head 2"


def main() -> None:
    from playwright.sync_api import sync_playwright

    root = HERE.parents[1]
    shot = root / "artifacts" / "dashboard_readme.png"
    shot.parent.mkdir(exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="attnscope-picture-"))
    with jupyter_lab(work / "lab") as lab, sync_playwright() as p, \
            chromium(p, work / "profile", width=1900, height=2200) as ctx:
        views_notebooks.write(lab["root"] / "readme.ipynb", README_CELL)
        page = ctx.new_page()
        open_notebook(page, lab, "readme")
        run_all(page)
        board = page.locator(".jp-NotebookPanel:not(.lm-mod-hidden) .jp-OutputArea-output .as-dashboard")
        board.locator(".as-plot canvas").first.wait_for(state="visible", timeout=90_000)
        board.locator(".as-head select").select_option(label=HEAD)
        board.locator(".as-status", has_text=HEAD).wait_for(timeout=30_000)
        page.wait_for_timeout(1500)  # let every figure repaint
        board.screenshot(path=str(shot))
    shutil.copyfile(shot, root / "docs" / "images" / "dashboard.png")
    print(root / "docs" / "images" / "dashboard.png")


if __name__ == "__main__":
    main()
