"""The command line, run as a user would: a real subprocess for one case, main() in-process for the rest."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pandas as pd
import torch

import attnscope
from attnscope.cli import main

FACTORY = textwrap.dedent("""
    import torch
    from torch import nn

    class Tiny(nn.Module):
        def __init__(self):
            super().__init__()
            torch.manual_seed(3)
            self.emb = nn.Embedding(20, 16)
            self.attn = nn.MultiheadAttention(16, 2, batch_first=True)

        def forward(self, ids):
            x = self.emb(ids)
            return self.attn(x, x, x)[0]

    def make():
        return Tiny()

    def with_inputs():
        return Tiny(), torch.arange(6).view(1, 6)
""")


def test_table_of_a_user_factory_matches_a_direct_capture(tmp_path, monkeypatch):
    (tmp_path / "userzoo.py").write_text(FACTORY)
    monkeypatch.chdir(tmp_path)
    csv = tmp_path / "heads.csv"
    assert main(["table", "userzoo:with_inputs", "--csv", str(csv), "--keep", "maps"]) == 0
    got = pd.read_csv(csv)
    sys.path.insert(0, str(tmp_path))
    try:
        import userzoo
    finally:
        sys.path.pop(0)
    model, ids = userzoo.with_inputs()
    with torch.no_grad(), attnscope.capture(model.eval()) as cap:  # reference: the Python API directly
        model(ids)
    want = cap.head_table()
    assert list(got["name"]) == list(want["name"]) == ["attn", "attn"]
    pd.testing.assert_series_equal(got["entropy"], want["entropy"], atol=1e-6, check_names=False)


def test_table_makes_token_inputs_and_show_reads_the_saved_capture(tmp_path, monkeypatch, capsys):
    (tmp_path / "userzoo2.py").write_text(FACTORY)
    monkeypatch.chdir(tmp_path)
    saved = tmp_path / "run.attnscope"
    assert main(["table", "userzoo2:make", "--batch", "3", "--seq", "5", "--save", str(saved)]) == 0
    first = capsys.readouterr().out
    assert "attn" in first and "capture saved" in first
    assert attnscope.load(saved).attention[0].shape == (3, 2, 5, 5)
    assert main(["show", str(saved)]) == 0
    assert capsys.readouterr().out.splitlines()[1] == first.splitlines()[1]  # the same first row


def test_errors_exit_2_with_a_message(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["table", "no_such_module:make"]) == 2
    assert "cannot import 'no_such_module'" in capsys.readouterr().err
    assert main(["table", "missing-colon"]) == 2
    (tmp_path / "bad.attnscope").write_text("not a capture")
    assert main(["show", str(tmp_path / "bad.attnscope")]) == 2
    assert "CaptureFileError" in capsys.readouterr().err


def test_module_entry_point_runs_builtin_model():
    out = subprocess.run([sys.executable, "-m", "attnscope", "table", "--seq", "5"], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert "decoder.layers.1.multihead_attn" in out.stdout and "cross" in out.stdout


ZOO = textwrap.dedent("""
    import torch
    import torch.nn.functional as F
    from torch import nn

    class Dec(nn.Module):
        def __init__(self, shift):
            super().__init__()
            torch.manual_seed(0)
            self.emb, self.qkv, self.shift = nn.Embedding(30, 16), nn.Linear(16, 48), shift

        def forward(self, ids):
            x = self.emb(ids)
            q, k, v = self.qkv(x).view(*ids.shape, 3, 2, 8).permute(2, 0, 3, 1, 4)
            mask = torch.ones(ids.size(1), ids.size(1), dtype=torch.bool).tril(diagonal=self.shift)
            return F.scaled_dot_product_attention(q, k, v, attn_mask=mask).transpose(1, 2).flatten(2)  # (B, T, D)

    def good():
        return Dec(0)

    def leaky():
        return Dec(1)

    def padded():
        m = Dec(0)
        ids = torch.randint(0, 30, (2, 6))
        pad = torch.zeros(2, 6, dtype=torch.bool)
        pad[1, 4:] = True
        return (lambda t: m(t).mean(dim=1, keepdim=True).expand(-1, 6, -1)), ids, pad, m  # pools over pads: a leak
""")


def test_check_commands_exit_1_on_a_leak_and_0_when_clean(tmp_path, monkeypatch, capsys):
    (tmp_path / "deczoo.py").write_text(ZOO)
    monkeypatch.chdir(tmp_path)
    assert main(["check-causal", "deczoo:good", "--seq", "10"]) == 0
    assert "is causal" in capsys.readouterr().out
    assert main(["check-causal", "deczoo:leaky", "--seq", "10", "--mode", "exhaustive"]) == 1
    out = capsys.readouterr().out
    assert "output position 0 depends on later input position 1" in out  # the off-by-one mask: i sees i + 1
    assert main(["check-padding", "deczoo:padded", "--seq-dim", "1"]) == 1
    assert "does not ignore padding" in capsys.readouterr().out
    assert main(["check-padding", "deczoo:good"]) == 2  # no pad mask to know what is padded
    assert "needs (fn, x, pad_mask)" in capsys.readouterr().err


def test_demo_reports_the_planted_findings(tmp_path, capsys):
    page = tmp_path / "demo.html"
    assert main(["demo", "--page", str(page), "--examples", "6"]) == 0
    out = capsys.readouterr().out
    assert "decoder_only_leaky" in out and "LEAK" in out and "brought in by 'blocks.0.attn'" in out
    assert "blocks.1.attn head 1: uniform" in out and "blocks.0.attn head 3: silent" in out
    assert "of 12 findings as planted" in out and "not a faithful explanation" in out
    html = page.read_text()
    assert "cdn.bokeh.org" not in html and len(html) > 100_000  # self-contained: BokehJS inline


def test_every_command_has_help(capsys):
    import pytest

    for cmd in ("demo", "table", "show", "page", "check-causal", "check-padding", "check-cache"):
        with pytest.raises(SystemExit) as stop:
            main([cmd, "--help"])
        assert stop.value.code == 0
        assert "usage: attnscope " + cmd in capsys.readouterr().out
