"""Regenerate the README pictures: ``python tests/views/readme_picture.py`` writes docs/images/*.png.

Each story's dashboard runs in a headless JupyterLab on a bundled demo model, a head is chosen in the head
dropdown, and the widget is photographed in Debian Chromium:

* ``dashboard.png`` — the README's own seq2seq example, a causal decoder head;
* ``story_causal.png`` — the decoder trained with an off-by-one mask: the lens shows weight just above the
  diagonal, and the checks table holds the behavioural probe's report;
* ``story_heads.png`` — the heads specimen with its dead and duplicate head findings: the summary line's duplicate
  button clicked, so the first duplicate head is selected and marked in the clustered twins matrix.
* ``story_masks.png`` — a FlexAttention decoder whose window is off by one, the veil showing the declared
  window of 4 keys: magenta where weight lands on the fifth key back.
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

CAUSAL_CELL = '''\
import torch, attnscope
from attnscope.demo import load, task

model = load("decoder_only_leaky")
ids, _ = task.lm_batch(task.make_examples(2, seed=0, split="held_out"))
with torch.no_grad(), attnscope.capture(model) as cap:
    model(ids)
report = attnscope.check_causal(model, ids)
attnscope.dashboard(cap, tokens=[model.vocab.decode(row) for row in ids], checks=[report])
'''
CAUSAL_HEAD = "blocks.0.attn · head 0"

HEADS_CELL = '''\
import torch, attnscope
from attnscope.demo import load, task

model = load("heads_specimen")
ids, _ = task.lm_batch(task.make_examples(16, seed=3, split="held_out"))
with torch.no_grad(), attnscope.capture(model) as cap:
    model(ids)
findings = {"dead heads": attnscope.dead_heads(cap, output_norms=attnscope.head_output_norms(model, ids)),
            "duplicate heads": attnscope.duplicate_heads(cap)}
attnscope.dashboard(cap, tokens=[model.vocab.decode(row) for row in ids], findings=findings)
'''
HEADS_HEAD = "blocks.1.attn · head 1"

MASKS_CELL = '''\
import warnings, torch, attnscope
from attnscope.demo.flex_decoder import FlexDecoder, FlexDecoderConfig

warnings.filterwarnings("ignore", message="flex_attention called without torch.compile")
torch.manual_seed(1)
model = FlexDecoder(FlexDecoderConfig(pattern="window", window=4, window_off_by_one=True)).eval()
ids = torch.randint(2, 16, (1, 20), generator=torch.Generator().manual_seed(7))
with torch.no_grad(), attnscope.capture(model) as cap:
    model(ids)
declared = lambda b, h, q_idx, kv_idx: (q_idx >= kv_idx) & (q_idx - kv_idx < 4)
attnscope.dashboard(cap, pattern=declared, checks=attnscope.pattern_table(cap, declared).round(3))
'''
MASKS_HEAD = "blocks.0.attn · head 0"

# (name, cell, head chosen in the dropdown, summary-line button clicked after it or None)
PICTURES = (("dashboard", README_CELL, HEAD, None), ("story_causal", CAUSAL_CELL, CAUSAL_HEAD, None),
            ("story_heads", HEADS_CELL, HEADS_HEAD, "duplicate"), ("story_masks", MASKS_CELL, MASKS_HEAD, None))
ONLY = sys.argv[1:]  # names of the pictures to take (default: all)


def main() -> None:
    from playwright.sync_api import sync_playwright

    root = HERE.parents[1]
    (root / "artifacts").mkdir(exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="attnscope-picture-"))
    with jupyter_lab(work / "lab") as lab, sync_playwright() as p, \
            chromium(p, work / "profile", width=1900, height=2200) as ctx:
        for name, cell, head, tally in PICTURES:
            if ONLY and name not in ONLY:
                continue
            views_notebooks.write(lab["root"] / f"{name}.ipynb", cell)
            page = ctx.new_page()
            open_notebook(page, lab, name)
            run_all(page)
            board = page.locator(".jp-NotebookPanel:not(.lm-mod-hidden) .jp-OutputArea-output .as-dashboard")
            board.locator(".as-plot canvas").first.wait_for(state="visible", timeout=90_000)
            board.locator(".as-head select").select_option(label=head)
            board.locator(".as-status", has_text=head).wait_for(timeout=30_000)
            if tally is not None:  # the summary line's button: the next flagged head of that kind
                board.locator(f".as-tally-{tally}").click()
                board.locator(".as-status", has_text=f"· {tally} 1 of").wait_for(timeout=30_000)
            page.wait_for_timeout(1500)  # let every figure repaint
            shot = root / "artifacts" / f"{name}_readme.png"
            board.screenshot(path=str(shot))
            shutil.copyfile(shot, root / "docs" / "images" / f"{name}.png")
            print(root / "docs" / "images" / f"{name}.png")
            page.close()


if __name__ == "__main__":
    main()
