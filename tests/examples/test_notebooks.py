"""The example notebooks: stored clean, and each runs top to bottom in a real kernel and shows its story.

Each notebook is executed with nbclient in a fresh ``python3`` kernel whose working directory is a temporary
directory. A first cell, added to the in-memory copy only, turns warnings into errors inside the kernel, as
pyproject does for pytest (the kernel is another process, so pytest's filter does not reach it). The lines
each story rests on are then read back from the cell outputs and checked against references outside the code
under test, named beside each check: the bugs planted in the demo models, the task's alignment, hand
derivations from a model's wiring, HF's eager attention weights, torch's softmax.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"
NOTEBOOKS = sorted(EXAMPLES.glob("*.ipynb"))
KERNELSPEC = {"name": "python3", "display_name": "Python 3 (ipykernel)", "language": "python"}
CELL_TIMEOUT = 120  # seconds per cell; each notebook as a whole runs in well under a minute on 2 cores
WIDGET_MIME = "application/vnd.jupyter.widget-view+json"

# Warnings in the kernel become errors, so a warning in a notebook fails its cell. The ignores mirror
# pyproject's list for the Jupyter machinery itself (ipykernel also warns on its own shutdown).
WARNINGS_AS_ERRORS = """\
import warnings
warnings.simplefilter("error")
for _module in ("jupyter_client", "jupyter_core", "traitlets", "ipykernel", "zmq", "tornado", "IPython", "comm"):
    for _category in (DeprecationWarning, PendingDeprecationWarning):
        warnings.filterwarnings("ignore", category=_category, module=_module)
"""


def _names() -> list[str]:
    return [p.name for p in NOTEBOOKS]


def _code_cells(nb) -> list:
    return [c for c in nb.cells if c.cell_type == "code"]


def run_notebook(path: Path, workdir: Path) -> tuple[str, list]:
    """Execute *path* in a fresh kernel in *workdir*; returns (all stdout text, the executed code cells)."""
    nb = nbformat.read(path, as_version=4)
    nb.cells.insert(0, nbformat.v4.new_code_cell(WARNINGS_AS_ERRORS))
    NotebookClient(nb, timeout=CELL_TIMEOUT, kernel_name="python3",
                   resources={"metadata": {"path": str(workdir)}}).execute()
    cells = _code_cells(nb)[1:]
    stderr = [o.text for c in cells for o in c.outputs if o.output_type == "stream" and o.name == "stderr"]
    assert not stderr, f"{path.name} wrote to stderr (a warning or a log line): {stderr}"
    stdout = "".join(o.text for c in cells for o in c.outputs if o.output_type == "stream" and o.name == "stdout")
    return stdout, cells


def grab(pattern: str, text: str) -> re.Match:
    match = re.search(pattern, text)
    assert match, f"expected a line matching {pattern!r} in the notebook's output:\n{text}"
    return match


def shows_dashboard(cell) -> bool:
    return any(WIDGET_MIME in o.get("data", {}) for o in cell.outputs if o.output_type in ("display_data",
                                                                                             "execute_result"))


# ------------------------------------------------------------------------------------ stored notebooks
def test_one_notebook_per_story():
    assert set(_names()) == {"debug_seq2seq.ipynb", "verify_causal_masking.ipynb",
                             "dead_and_duplicate_heads.ipynb", "your_own_model.ipynb", "watch_training.ipynb",
                             "verify_masks_and_cache.ipynb"}


def test_index_lists_every_notebook():
    index = (EXAMPLES / "README.md").read_text(encoding="utf-8")
    for name in _names():
        assert f"({name})" in index, f"examples/README.md does not link {name}"


@pytest.mark.parametrize("name", _names())
def test_stored_without_outputs_and_with_the_caution(name):
    nb = nbformat.read(EXAMPLES / name, as_version=4)
    nbformat.validate(nb)
    assert nb.metadata["kernelspec"] == KERNELSPEC
    for cell in _code_cells(nb):
        assert cell.outputs == [] and cell.execution_count is None, f"{name} is stored with outputs"
    text = " ".join(" ".join(c.source.split()) for c in nb.cells if c.cell_type == "markdown")
    assert "not a faithful explanation of its decisions (Jain & Wallace 2019)" in text


# ------------------------------------------------------------------------------------ stories
def check_debug_seq2seq(out: str, cells: list) -> None:
    for name in ("seq2seq_post_ln", "seq2seq_pre_ln"):
        # reference: the task generator's own pick paths on held-out labels (issue 5 asks >= 95%)
        acc = float(grab(rf"{name}: exact match ([\d.]+)% on \d+ held-out labels", out)[1])
        assert acc >= 95.0
        # reference: the task's alignment, built from the label's field structure (issue 5 asks >= 90%)
        share = float(grab(rf"{name}: guided head \S+ head 0 follows the alignment on (\d+)%", out)[1])
        assert share >= 90.0
        # reference: the models' masks are tril() buffers, so no decoder query may weigh a later key
        grab(rf"{name}: decoder self-attention recorded causal: True; largest weight on a later key: 0\n", out)
    growth = {name: [float(g) for g in grab(rf"{name}: residual norm grows x([\d.]+) across the encoder, "
                                            r"x([\d.]+) across the decoder", out).groups()]
              for name in ("seq2seq_post_ln", "seq2seq_pre_ln")}
    # reference: Xiong et al. 2020: post-LN renormalises after every block (flat), pre-LN's stream grows
    assert all(0.9 <= g <= 1.1 for g in growth["seq2seq_post_ln"])
    assert all(g > 1.2 for g in growth["seq2seq_pre_ln"])
    assert shows_dashboard(cells[-1]), "the last cell should display the dashboard widget"


def check_verify_causal_masking(out: str, cells: list) -> None:
    grab(r"decoder_only: causal=True; first violation \(output, input\)=None; blame=None", out)
    # reference: the planted mask is tril(diagonal=1), so output 0 first sees input 1, inside the first
    # attention module (hand derivation from attnscope/demo/decoder_only.py's off_by_one_mask)
    grab(r"decoder_only_leaky: causal=False; first violation \(output, input\)=\(0, 1\); blame='blocks.0.attn'", out)
    correct = grab(r"decoder_only: teacher-forced loss ([\d.]+), free-running exact match (\d+)%", out)
    leaky = grab(r"decoder_only_leaky: teacher-forced loss ([\d.]+), free-running exact match (\d+)%", out)
    # the classic symptom of a peeking decoder (issue 5): far lower loss, failing generation
    assert float(leaky[1]) < 0.5 * float(correct[1])
    assert int(correct[2]) >= 95 and int(leaky[2]) <= 20
    # invisible leak: attention is is_causal=True (maps clean), the symmetric Conv1d sees ahead
    grab(r"maps: every call recorded causal: True; largest weight on a later key: 0; any leak in the maps: False",
         out)
    grab(r"probe: causal=False; first violation \(output, input\)=\(0, 1\); blame='blocks.0.mix' \(Conv1d\)", out)
    # reference: hand derivation: two blocks, each a kernel-3 convolution padded (1, 1), so output i depends on
    # inputs i+1 and i+2 and on no later one; causal attention with softmax weights (all > 0) on every j <= i
    rows = re.findall(r"output +(\d+)  ([■!·]+)", out)
    assert len(rows) == 12
    for i, cells_of_row in ((int(i), row) for i, row in rows):
        ahead = {j for j, c in enumerate(cells_of_row) if c == "!"}
        assert ahead == {i + 1, i + 2} & set(range(12)), (i, cells_of_row)
        assert all(c == "■" for c in cells_of_row[: i + 1]), (i, cells_of_row)
        assert not any(c == "■" for c in cells_of_row[i + 1:])
    grab(r"leaking pairs reach \[1, 2\] positions ahead; blame 'blocks.0.mix'", out)
    grab(r"with left-only padding: causal=True", out)
    grab(r"assert_causal passed for the left-padded decoder", out)
    grab(r"assert_causal raised AssertionError for the symmetric one: MixingDecoder is not causal.*'blocks.0.mix'", out)
    # reference: torch's documented src_key_padding_mask semantics (True = ignore that key)
    grab(r"with the key padding mask: ignores padding=True", out)
    grab(r"without it: ignores padding=False; blame='layer.self_attn'", out)


def check_dead_and_duplicate_heads(out: str, cells: list) -> None:
    # reference: PLANTED, the record of the weight surgery that made the specimen (attnscope/demo/heads_specimen.py)
    from attnscope.demo.heads_specimen import PLANTED

    planted = sorted((kind, name, head) for kind in ("uniform", "sink", "silent") for name, head in PLANTED[kind])
    assert ast.literal_eval(grab(r"found dead heads: +(\[.*\])", out)[1]) == planted
    found_twins = ast.literal_eval(grab(r"found duplicates: +(\[.*\])", out)[1])
    assert found_twins == sorted(PLANTED["duplicate"])
    # hand derivation: the copy got identical query and key weights, so identical maps, distance 0
    assert float(grab(r"duplicate: blocks.1.attn head 0 ~ blocks.1.attn head 2, Jensen-Shannon distance ([\d.]+)",
                      out)[1]) < 0.01
    dead = grab(r"remove the three dead heads: loss change ([+-][\d.]+), exact match (\d+)%", out)
    healthy = grab(r"remove healthy head blocks.0.attn 0: loss change ([+-][\d.]+), exact match (\d+)%", out)
    copy = grab(r"remove duplicate-map head blocks.1.attn 2: loss change ([+-][\d.]+), exact match (\d+)%", out)
    intact = int(grab(r"intact: loss [\d.]+, exact match (\d+)%", out)[1])
    # the story's claims: dead heads barely matter, a healthy head and the duplicate-map head do
    assert abs(float(dead[1])) < 0.05 and int(dead[2]) >= 90 and intact >= 95
    assert float(healthy[1]) > 10 * abs(float(dead[1])) and int(healthy[2]) < int(dead[2])
    assert float(copy[1]) > float(healthy[1])
    insensitive = {(n, int(h)) for n, h in re.findall(r"(blocks\.\d\.attn) head (\d): insensitive:", out)}
    assert insensitive == {(name, head) for _, name, head in planted}
    assert shows_dashboard(cells[-1]), "the last cell should display the dashboard widget"


def check_your_own_model(out: str, cells: list) -> None:
    # reference: HF transformers' eager attention with output_attentions=True on the same weights
    assert float(grab(r"capture \(sdpa\) vs HF eager output_attentions: largest difference (\S+)\n", out)[1]) < 1e-5
    grab(r"GPT2LMHeadModel is causal on this input", out)
    # reference: torch.softmax over the same masked scores
    tap = grab(r"tap record: source='tap', causal=True, largest difference to torch.softmax: (\S+)\n", out)
    assert float(tap[1]) < 1e-6
    grab(r"keep='stats': weights kept: None", out)
    # hand count: every (sequence, query) row of every batch, per head
    rows, batches, batch, length = map(int, grab(r"rows per head: \[(\d+)\] \((\d+) batches x (\d+) sequences "
                                                 r"x (\d+) queries\)", out).groups())
    assert rows == batches * batch * length
    grab(r"saved and loaded: same weights True, same head table True", out)


def check_watch_training(out: str, cells: list) -> None:
    healthy = grab(r"healthy \(lr 0.003\): loss ([\d.]+) -> ([\d.]+) .*, (\d+) recorded steps, (\d+) alerts", out)
    collapsing = grab(r"collapsing \(lr 0.1\): loss ([\d.]+) -> ([\d.]+) .*, (\d+) recorded steps, (\d+) alerts", out)
    assert int(healthy[3]) == int(collapsing[3]) == 20 and int(healthy[4]) == 0 and int(collapsing[4]) > 0
    # reference: the training loss itself (plain cross-entropy, outside the tracker): the collapsing run stalls higher
    assert float(collapsing[2]) > float(healthy[2]) + 0.2
    first = grab(r"first collapse alert in blocks.0.attn at step (\d+), heads \[([\d, ]+)\]", out)
    assert int(first[1]) <= 15 and first[2] == "0, 1, 2, 3"
    # reference: softmax(QK^T/sqrt(d) + causal mask) by hand and scipy.stats.entropy per row
    assert float(grab(r"hand check: largest difference between tracker and hand-computed entropy ratio: (\S+)\n",
                      out)[1]) < 1e-5
    grab(r"saved and loaded: same table True, same alerts True", out)
    assert shows_dashboard(cells[-1]), "the last cell should display the run's view"


def check_verify_masks_and_cache(out: str, cells: list) -> None:
    # reference: hand derivation from the mask_mods in attnscope/demo/flex_decoder.py: a documents mask forbids
    # every key of another list, so later lists cannot depend on list 0; a causal-only mask lets them
    leak = float(grab(r"packed_causal: later lists' logits move by ([\d.e+-]+) x the logit scale", out)[1])
    assert leak > 1e-2
    assert float(grab(r"packed_docs: later lists' logits move by ([\d.e+-]+) x the logit scale", out)[1]) < 1e-5
    # the same, by check_mask against the documents mask_mod: the first layer's attention is where lists meet
    first = grab(r"check_mask packed_causal: ok=False; first violation \(output, input\)=\((\d+), (\d+)\); "
                 r"blame='blocks.0.attn'", out)
    assert int(first[2]) < int(first[1])
    grab(r"check_mask packed_docs: ok=True; first violation \(output, input\)=None", out)
    worst = grab(r"packed_causal: largest mean weight outside the documents pattern ([\d.]+); worst cell \S+ head "
                 r"\d+: query (\d+) \(list (\d+)\) on key (\d+) \(list (\d+)\)", out)
    assert float(worst[1]) > 1e-2 and worst[3] != worst[5] and int(worst[4]) < int(worst[2])  # across lists, earlier
    # reference: a masked softmax puts exactly zero weight on a masked key (common practice, no source)
    grab(r"packed_docs: largest mean weight outside the documents pattern 0\n", out)
    # reference: the planted bug q - kv <= window lets window + 1 keys in (hand derivation)
    by_mod = grab(r"window_off_by_one: declared 4 keys, uses 5; largest mean weight outside the window ([\d.]+)", out)
    assert float(by_mod[1]) > 1e-2
    # reference: the pattern builder and the predicate state the same window (test_patterns checks both
    # against FlexAttention's create_mask), so the two tables agree
    grab(rf"window_off_by_one against window_pattern\(24, 4\): largest mean weight outside {by_mod[1]}\n", out)
    grab(r"window_fixed: declared 4 keys, uses 4; largest mean weight outside the window 0\n", out)
    # reference: hand derivation: two layers of w keys reach 2(w - 1) + 1 positions: declared 7 (w = 4); the
    # off-by-one layers have 5 keys, so 9; one layer alone reaches 5 <= 7, so the second layer is blamed
    grab(r"check_mask window_off_by_one: ok=False; declared window 7, uses 9; blame='blocks.1.attn'", out)
    grab(r"check_mask window_fixed: ok=True; declared window 7, uses 7; blame=None", out)
    assert shows_dashboard(cells[7]), "the window section should display the dashboard with the declared veil"
    # reference: hand derivation: without a mask once a cache exists, single-token steps see no future (agree),
    # the uneven schedule's chunk 1 (positions 1..3) after 1 cached token lets position 1 see 2 and 3
    grab(r"schedule 'one at a time' \(1(, 1)+\): first difference at None, blame=None", out)
    grab(r"schedule 'prefill then one at a time' \(7(, 1)+\): first difference at None", out)
    grab(r"schedule 'uneven chunks' \(1, 3, 2, 4, 1, 3\): first difference at 1, blame='blocks.0.attn'", out)
    diff = float(grab(r"fixed cache: ok=True; largest difference ([\d.e+-]+) x the output scale", out)[1])
    assert diff < 1e-5  # float32 paths agree to ~1e-6 (common practice, no source)


CHECKS = {
    "debug_seq2seq.ipynb": check_debug_seq2seq,
    "verify_causal_masking.ipynb": check_verify_causal_masking,
    "dead_and_duplicate_heads.ipynb": check_dead_and_duplicate_heads,
    "your_own_model.ipynb": check_your_own_model,
    "watch_training.ipynb": check_watch_training,
    "verify_masks_and_cache.ipynb": check_verify_masks_and_cache,
}


def test_every_notebook_has_story_checks():
    assert set(CHECKS) == set(_names())


@pytest.mark.slow
@pytest.mark.parametrize("name", _names())
def test_notebook_runs_and_tells_its_story(name, tmp_path):
    out, cells = run_notebook(EXAMPLES / name, tmp_path)
    CHECKS[name](out, cells)
    assert list(tmp_path.iterdir()) == [], "a notebook left files in its working directory"
