"""A run file keeps every step recorded before the process died: a real subprocess killed with SIGKILL."""

from __future__ import annotations

import os
import pathlib
import signal
import subprocess
import sys
import textwrap
import warnings

import pytest

import attnscope

SCRIPT = textwrap.dedent('''
    import sys, torch, attnscope
    sys.path.insert(0, sys.argv[2])
    from track_runs import batches, loss_of, mha_stack

    model = mha_stack().train()
    opt = torch.optim.Adam(model.parameters(), lr=1e-3)
    tr = attnscope.track(model, every=2, path=sys.argv[1])
    step = 0
    while True:                                   # trains until killed
        for x, y in batches("mha", 50, seed=step + 1):
            with tr.step(step):
                loss = loss_of(model, "mha", x, y)
            loss.backward(); opt.step(); opt.zero_grad()
            if step % 2 == 0:
                print(f"recorded {step}", flush=True)   # the step's block has returned: it is on disk
            step += 1
''')


@pytest.mark.slow
def test_sigkill_mid_run_loses_no_recorded_step(tmp_path):
    script = tmp_path / "train_forever.py"
    script.write_text(SCRIPT)
    run = tmp_path / "run.jsonl"
    root = pathlib.Path(attnscope.__file__).resolve().parent.parent
    env = dict(os.environ, PYTHONPATH=str(root), OMP_NUM_THREADS="1")
    proc = subprocess.Popen([sys.executable, str(script), str(run), str(pathlib.Path(__file__).parent)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    reported = []
    try:
        while len(reported) < 6:
            line = proc.stdout.readline()
            assert line, proc.stderr.read()[-2000:]
            reported.append(int(line.split()[1]))
        proc.send_signal(signal.SIGKILL)  # no handler, no flush, no atexit: the process just ends
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        loaded = attnscope.load(run)
    assert all("cut short" in str(w.message) for w in caught)  # only a torn last line may be dropped
    steps = [s.step for s in loaded.steps]
    assert steps[: len(reported)] == reported  # every step reported before the kill is there, in order
    assert steps == list(range(0, 2 * len(steps), 2))
    assert len(loaded.table()) == len(steps) * 8  # 2 modules x 4 heads per step, none half written
