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
