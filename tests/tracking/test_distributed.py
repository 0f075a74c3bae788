"""Under torch.distributed (gloo), a recorded step's statistics are merged across ranks and one rank writes.

Reference: one process running the same model on both ranks' batches together (the statistics are means over
rows, so the merge must give exactly what one process over all rows gives, up to float64 rounding).
"""

from __future__ import annotations

import os
import pathlib
import socket
import subprocess
import sys
import textwrap

import numpy as np
import pandas as pd
import pytest

import attnscope

SCRIPT = textwrap.dedent('''
    """Two ranks train one DDP model with a tracker: python script.py RANK WORLD PORT OUTDIR TESTDIR."""
    import datetime, sys
    import torch, torch.distributed as dist
    sys.path.insert(0, sys.argv[5])
    import attnscope
    from track_runs import batches, loss_of, mha_stack

    rank, world, port, out = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3], sys.argv[4]
    dist.init_process_group("gloo", init_method=f"tcp://127.0.0.1:{port}", rank=rank, world_size=world,
                            timeout=datetime.timedelta(seconds=30))
    try:
        model = mha_stack(dropout=0.0).train()
        ddp = torch.nn.parallel.DistributedDataParallel(model)
        opt = torch.optim.SGD(ddp.parameters(), lr=0.05)
        tr = attnscope.track(model, every=2, path=f"{out}/run.jsonl")
        for step, (x, y) in enumerate(batches("mha", 4, seed=1)):
            half = slice(rank * 3, rank * 3 + 3)             # each rank takes 3 of the 6 sequences
            with tr.step(step):
                loss = loss_of(ddp, "mha", x[half], y[half])
            loss.backward(); opt.step(); opt.zero_grad()
        tr.table().to_csv(f"{out}/heads{rank}.csv", index=False)
        tr.residual_table().to_csv(f"{out}/blocks{rank}.csv", index=False)
        # both ranks done before either tears the group down: a rank that closes its gloo pairs while the other
        # still finishes its last exchange can abort in gloo's threads at exit ("terminate called without an
        # active exception", seen once in CI)
        dist.barrier()
    finally:
        dist.destroy_process_group()
''')


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.slow
def test_two_gloo_ranks_merge_each_recorded_step_and_rank_zero_writes(tmp_path):
    from track_runs import batches, mha_stack

    script = tmp_path / "two_ranks.py"
    script.write_text(SCRIPT)
    root = pathlib.Path(attnscope.__file__).resolve().parent.parent
    env = dict(os.environ, PYTHONPATH=str(root), GLOO_SOCKET_IFNAME="lo", OMP_NUM_THREADS="1")
    port = free_port()
    here = str(pathlib.Path(__file__).parent)
    procs = [subprocess.Popen([sys.executable, str(script), str(r), "2", str(port), str(tmp_path), here], env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for r in range(2)]
    try:
        results = [p.communicate(timeout=60) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
    for p, (_, err) in zip(procs, results):
        assert p.returncode == 0, err[-2000:]
    heads = [pd.read_csv(tmp_path / f"heads{r}.csv") for r in range(2)]
    blocks = [pd.read_csv(tmp_path / f"blocks{r}.csv") for r in range(2)]
    pd.testing.assert_frame_equal(heads[0], heads[1])  # every rank holds the merged statistics
    pd.testing.assert_frame_equal(blocks[0], blocks[1])
    assert sorted(set(heads[0]["step"])) == [0, 2]
    written = attnscope.load(tmp_path / "run.jsonl")  # one file, from rank 0 only (both were given the path)
    np.testing.assert_allclose(written.table()[heads[0].columns[3:]].to_numpy(float),
                               heads[0][heads[0].columns[3:]].to_numpy(float), rtol=1e-12)
    # reference: one process, the same (initial) weights, all six sequences of step 0 at once
    model = mha_stack(dropout=0.0).train()
    tr = attnscope.track(model, every=1)
    x, _ = batches("mha", 1, seed=1)[0]
    with tr.step(0):
        model(x)
    single = tr.table()
    merged = heads[0][heads[0]["step"] == 0].reset_index(drop=True)
    assert (merged["rows"] == single["rows"]).all() and (single["rows"] == 6 * 8).all()
    for col in ("entropy", "entropy_ratio", "max_weight", "sink_mass", "mean_distance", "output_norm",
                "output_relative"):
        np.testing.assert_allclose(merged[col], single[col], rtol=1e-5, err_msg=col)
    one = tr.residual_table()
    mb = blocks[0][blocks[0]["step"] == 0].reset_index(drop=True)
    for col in ("positions", "residual_norm", "residual_max", "massive_ratio"):
        np.testing.assert_allclose(mb[col], one[col], rtol=1e-5, err_msg=col)
