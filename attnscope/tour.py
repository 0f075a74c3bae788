"""The demo tour: the whole job on the bundled models, as data and a readable report.

It loads the shipped demo models (:mod:`attnscope.demo`), runs every check on them and writes the
standalone page. ``attnscope demo`` prints its report; the example notebooks call the same steps.

>>> result = run_tour(page=None, examples=4)
>>> result.ok
True

The tour's findings are the ones planted in the demo models: the off-by-one decoder leaks, the correct one
does not, the heads specimen's uniform, sink, silent and duplicate heads are found. ``ok`` says whether
every finding matched what was planted.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

import attnscope
from attnscope.analyses.causality import check_causal
from attnscope.analyses.heads import dead_heads, duplicate_heads, head_output_norms
from attnscope.demo import load, task
from attnscope.demo.heads_specimen import PLANTED
from attnscope.demo.training import lm_generation_accuracy, seq2seq_exact_match

__all__ = ["TourResult", "run_tour"]

CAUTION = ("Attention weights show where a model looked, not why it decided: they are not a faithful "
           "explanation of its decisions (Jain & Wallace 2019) and are no basis for high-stakes decisions.")


@dataclass
class TourResult:
    """What the tour found.

    Fields:
        lines: the report, one line per entry.
        ok: every finding matched what was planted in the demo models.
        page: path of the standalone page, or None when none was written.
        checks: one dict per check (check, subject, result, detail), for tables and the page.
        findings: dead and duplicate head findings of the heads specimen, as (name, head, reason) tuples.
    """

    lines: list[str] = field(default_factory=list)
    ok: bool = True
    page: Path | None = None
    checks: list[dict] = field(default_factory=list)
    findings: list[tuple] = field(default_factory=list)

    def say(self, text: str = "") -> None:
        self.lines.append(text)

    def expect(self, what: str, subject: str, passed: bool, detail: str) -> None:
        """Record a check whose expected outcome is known from what was planted."""
        self.checks.append({"check": what, "subject": subject, "result": "as planted" if passed else "UNEXPECTED",
                            "detail": detail})
        self.ok = self.ok and passed


def _seq2seq(result: TourResult, examples: list[task.Example]) -> tuple[attnscope.Capture, dict]:
    result.say("1. Seq2seq: pick-path rewrite ('R3 S12 B7' -> 'B7-S12-R3'), post-LN nn.Transformer vs pre-LN SDPA")
    src, tgt_in, _ = task.seq2seq_batch(examples)
    norms = {}
    post_cap = None
    for name in ("seq2seq_post_ln", "seq2seq_pre_ln"):
        model = load(name)
        acc = seq2seq_exact_match(model, examples)
        with torch.no_grad(), attnscope.capture(model) as cap:
            model(src, tgt_in)
        guided_name, guided = model.GUIDED_HEAD
        (last,) = [r for r in cap.attention if r.name == guided_name]
        follow = _alignment_share(last.weights[:, last.heads.index(guided)], examples)
        result.say(f"   {name:<16} exact match {acc:6.1%} on {len(examples)} fresh labels; "
                   f"cross-attention of {last.name} head {guided} follows the alignment on {follow:.0%} of tokens")
        result.expect("cross-attention follows the alignment on >= 90%", f"{last.name} head {guided}",
                      follow >= 0.9, f"{follow:.0%}")
        result.expect("exact match >= 95%", name, acc >= 0.95, f"{acc:.1%}")
        norms[name] = [(r.name, float(r.norms.mean())) for r in cap.residual]
        if post_cap is None:
            post_cap = cap
    result.say("   residual-stream norm per block (mean over batch and positions):")
    for (a_name, a), (_, b) in zip(norms["seq2seq_post_ln"], norms["seq2seq_pre_ln"]):
        result.say(f"     {a_name:<18} post-LN {a:6.2f}   pre-LN {b:6.2f}")
    grow_post = norms["seq2seq_post_ln"][-1][1] / norms["seq2seq_post_ln"][0][1]
    grow_pre = norms["seq2seq_pre_ln"][-1][1] / norms["seq2seq_pre_ln"][0][1]
    result.say(f"   growth first -> last block: post-LN x{grow_post:.2f}, pre-LN x{grow_pre:.2f} "
               "(pre-LN lets the residual stream grow; post-LN renormalises it after every block)")
    result.expect("pre-LN residual grows more than post-LN", "seq2seq_pre_ln vs seq2seq_post_ln",
                  grow_pre > grow_post, f"x{grow_pre:.2f} vs x{grow_post:.2f}")
    tokens = {"source": [list(e.source) for e in examples], "target": [["<bos>", *e.target[:-1]] for e in examples]}
    return post_cap, tokens


def _alignment_share(weights: np.ndarray, examples: list[task.Example]) -> float:
    """Share of target tokens whose argmax source position is the task's known source token."""
    hits = total = 0
    for b, ex in enumerate(examples):
        for t, s in enumerate(ex.alignment):
            hits += int(np.argmax(weights[b, t]) == s)
            total += 1
    return hits / max(total, 1)


def _causality(result: TourResult, examples: list[task.Example]) -> None:
    result.say("")
    result.say("2. Causal masking: the decoder-only model and its twin trained with an off-by-one mask")
    ids, _ = task.lm_batch(examples[:2])
    for name in ("decoder_only", "decoder_only_leaky"):
        model = load(name)
        accuracy = lm_generation_accuracy(model, examples)
        report = check_causal(model, ids)
        if report.ok:
            text = "no output position depends on a later input"
        else:
            i, j, m = report.violations[0]
            text = (f"LEAK: output position {i} depends on later input {j} (x{m:.3g} of the output scale); "
                    f"{len(report.leaking_outputs)} output positions found leaking; brought in by '{report.blame}'")
        result.say(f"   {name:<19} free-running accuracy {accuracy:6.1%}; check_causal: {text}")
        expect_ok = name == "decoder_only"
        result.expect("check_causal", name, report.ok == expect_ok, "passes" if report.ok else text)


def _heads(result: TourResult, examples: list[task.Example]) -> None:
    result.say("")
    result.say("3. Dead and duplicate heads in the heads specimen (planted by weight surgery)")
    model = load("heads_specimen")
    ids, _ = task.lm_batch(examples)
    with torch.no_grad(), attnscope.capture(model) as cap:
        model(ids)
    norms = head_output_norms(model, ids)
    dead = dead_heads(cap, output_norms=norms)
    twins = duplicate_heads(cap)
    for f in dead:
        result.say(f"   dead      {f.name} head {f.head}: {f.reason}")
        result.findings.append((f.name, f.head, f.reason))
    for p in twins:
        result.say(f"   duplicate {p.name_a} head {p.head_a} ~ {p.name_b} head {p.head_b} "
                   f"(Jensen-Shannon distance {p.distance:.3f})")
        result.findings.append((p.name_a, p.head_a, f"duplicate of {p.name_b} head {p.head_b} "
                                                    f"(JS distance {p.distance:.3f})"))
    found = {(f.kind, f.name, f.head) for f in dead}
    for kind in ("uniform", "sink", "silent"):
        for name, head in PLANTED[kind]:
            result.expect(f"{kind} head found", f"{name} head {head}", (kind, name, head) in found, kind)
    pairs = {((p.name_a, p.head_a), (p.name_b, p.head_b)) for p in twins}
    for a, b in PLANTED["duplicate"]:
        result.expect("duplicate pair found", f"{a[0]} {a[1]} ~ {b[0]} {b[1]}", (a, b) in pairs or (b, a) in pairs,
                      "duplicate")
    planted = {(k, n, h) for k in ("uniform", "sink", "silent") for n, h in PLANTED[k]}
    extra = sorted(found - planted)
    result.expect("no other dead head", "heads_specimen", not extra, ", ".join(map(str, extra)) or "none")


def run_tour(page: str | os.PathLike | None = "attnscope-demo.html", examples: int = 16, seed: int = 2024) -> TourResult:
    """Run the whole demo; write the standalone page to *page* (None: no page).

    Args:
        page: where to write the dashboard page of the post-LN seq2seq model's capture.
        examples: fresh held-out labels to evaluate on (the models never saw them).
        seed: seed of the label generator.
    """
    result = TourResult()
    data = task.make_examples(examples, seed=seed, split="held_out")
    torch.manual_seed(seed)
    cap, tokens = _seq2seq(result, data)
    _causality(result, data)
    _heads(result, data)
    if page is not None:
        from attnscope.views import export_html

        result.page = Path(export_html(cap, page, tokens=tokens, checks=result.checks, findings=result.findings,
                                       title="attnscope demo: pick-path rewrite, post-LN seq2seq"))
    result.say("")
    matched = sum(c["result"] == "as planted" for c in result.checks)
    result.say(f"{matched} of {len(result.checks)} findings as planted.")
    if result.page is not None:
        result.say(f"dashboard page written to {result.page}")
    result.say(CAUTION)
    return result
