"""Regenerate the README picture of a tracked run: ``python tests/views/readme_picture_run.py``.

The demo decoder is trained at a learning rate far too high (the collapsing run of
examples/watch_training.ipynb) in a headless JupyterLab; its view is shown with a collapsed head of the first
block chosen in the head menu, and photographed in Debian Chromium as docs/images/run_watch.png.
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

RUN_CELL = '''\
import torch, attnscope
from attnscope.demo import task
from attnscope.demo.decoder_only import DecoderOnly
from attnscope.demo.training import lm_loss

torch.set_num_threads(1)
torch.manual_seed(0)
model = DecoderOnly().train()
opt = torch.optim.Adam(model.parameters(), lr=0.1)      # far too high, no warm-up
tr = attnscope.track(model, every=3)
for step in range(60):
    with tr.step(step):
        loss = lm_loss(model, task.make_examples(32, seed=step))
    loss.backward(); opt.step(); opt.zero_grad()
attnscope.dashboard(tr)
'''
HEAD = "blocks.0.attn · h2"


def main() -> None:
    from playwright.sync_api import sync_playwright

    root = HERE.parents[1]
    (root / "artifacts").mkdir(exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="attnscope-picture-"))
    with jupyter_lab(work / "lab") as lab, sync_playwright() as p, \
            chromium(p, work / "profile", width=1400, height=2000) as ctx:
        views_notebooks.write(lab["root"] / "run_watch.ipynb", RUN_CELL)
        page = ctx.new_page()
        open_notebook(page, lab, "run_watch")
        run_all(page)
        board = page.locator(".jp-NotebookPanel:not(.lm-mod-hidden) .jp-OutputArea-output .as-run-dashboard")
        board.locator(".as-run-plot canvas").first.wait_for(state="visible", timeout=120_000)
        board.locator(".as-run-head select").select_option(label=HEAD)
        board.locator(".as-run-status", has_text=HEAD).wait_for(timeout=30_000)
        page.wait_for_timeout(1500)  # let every figure repaint
        shot = root / "artifacts" / "run_watch_readme.png"
        board.screenshot(path=str(shot))
        shutil.copyfile(shot, root / "docs" / "images" / "run_watch.png")
        print(root / "docs" / "images" / "run_watch.png")
        page.close()


if __name__ == "__main__":
    main()
