"""The README's Python walkthrough runs as written (the README must stay true)."""

from __future__ import annotations

import re
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"


def python_blocks() -> list[str]:
    return re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.S)


def test_readme_python_blocks_run(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    blocks = python_blocks()
    assert blocks, "README has no python walkthrough"
    for block in blocks:
        namespace: dict = {}
        exec(compile(block, str(README), "exec"), namespace)  # noqa: S102 - our own README


def test_readme_claims_about_the_capture_hold(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile(python_blocks()[0], str(README), "exec"), namespace)  # noqa: S102
    cap = namespace["cap"]
    assert repr(cap.attention[0]) == ("AttentionRecord(name='encoder.layers.0.self_attn', kind='self', "
                                      "weights=(2, 4, 10, 10), causal=False, source='mha')")
    assert cap.attention[-1].kind == "cross" and cap.attention[-1].name == "decoder.layers.5.multihead_attn"
    assert cap.residual[0].norms.shape == (2, 10)


def _run_block(containing: str) -> dict:
    (block,) = [b for b in python_blocks() if containing in b]
    namespace: dict = {}
    exec(compile(block, str(README), "exec"), namespace)  # noqa: S102
    return namespace


def test_readme_causal_example_says_what_it_shows():
    ns = _run_block("check_causal(load(\"decoder_only_leaky\")")
    report = ns["report"]
    assert (report.ok, report.violations[0][:2], report.blame) == (False, (0, 1), "blocks.0.attn")


def test_readme_heads_example_finds_the_planted_heads():
    from attnscope.demo.heads_specimen import PLANTED

    ns = _run_block("heads_specimen")
    found = {(f.name, f.head) for f in ns["attnscope"].dead_heads(ns["cap"], output_norms=ns["norms"])}
    planted = {tuple(p) for kind in ("uniform", "sink", "silent") for p in PLANTED[kind]}
    assert found == planted


def test_readme_tracking_example_says_what_it_shows(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    ns = _run_block("attnscope.track(")
    tr = ns["tr"]
    assert [s.step for s in tr.steps] == [0, 10, 20] and tr.alerts() == []  # "none in this healthy run"
    assert ns["attnscope"].load("run.jsonl").table().equals(tr.table())
    ns["board"].stop()
    tr.close()
