"""Dataset-scale head statistics: constant memory, mergeable, and the same across torch.distributed ranks.

References: ``scipy.stats.entropy`` over every row of every batch (brute force, from maps captured in the
test), one process over all data against two local gloo processes over halves of it.
"""

from __future__ import annotations

import os
import pathlib
import runpy
import socket
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import torch
from scipy.stats import entropy
from torch import nn

import attnscope
from attnscope.analyses.aggregate import HeadTotals, aggregate_heads
from attnscope.errors import OptionError, ShapeError
from attnscope.records import STAT_COLUMNS

SCRIPT = textwrap.dedent('''
    """Two-rank aggregation run by test_aggregate.py: python script.py RANK WORLD PORT OUT."""
    import datetime
    import sys

    import numpy as np
    import torch
    import torch.distributed as dist
    from torch import nn


    def build():
        torch.manual_seed(0)
        layer = nn.TransformerEncoderLayer(16, 4, 32, dropout=0.0, batch_first=True)
        return nn.TransformerEncoder(layer, 2, enable_nested_tensor=False).eval()


    def data():
        g = torch.Generator().manual_seed(1)
        return [torch.randn(n, 6, 16, generator=g) for n in (2, 3, 1, 4, 2)]  # uneven batches


    def flat(totals):
        return {f"{name}|{field}": value for name in totals.names
                for field, value in totals.sums[name].as_arrays().items()}


    def main():
        from attnscope.analyses.aggregate import aggregate_heads

        rank, world, port, out = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3], sys.argv[4]
        dist.init_process_group("gloo", init_method=f"tcp://127.0.0.1:{port}", rank=rank, world_size=world,
                                timeout=datetime.timedelta(seconds=20))
        try:
            mine = data()[rank::world]  # ranks see 3 and 2 batches
            totals = aggregate_heads(build(), mine, progress=False).all_reduce()
            np.savez(out, batches=totals.batches, **flat(totals))
        finally:
            dist.destroy_process_group()


    if __name__ == "__main__":
        main()
''')


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def parts(tmp_path_factory):
    path = tmp_path_factory.mktemp("dist") / "two_ranks.py"
    path.write_text(SCRIPT)
    return path, runpy.run_path(str(path), run_name="parts")


def test_totals_equal_brute_force_entropy_over_all_rows(parts):
    _, ns = parts
    model, batches = ns["build"](), ns["data"]()
    totals = aggregate_heads(model, batches, progress=False)
    table = totals.table()
    assert table["calls"].tolist() == [5] * 8 and totals.batches == 5
    with torch.no_grad(), attnscope.capture(model) as cap:
        for x in batches:
            model(x)
    for row in table.itertuples():
        maps = np.concatenate([r.weights[:, row.head] for r in cap.attention if r.name == row.name])  # (N, T, T)
        flat = maps.reshape(-1, maps.shape[-1]).astype(np.float64)
        assert row.rows == flat.shape[0]
        assert row.entropy == pytest.approx(np.mean([entropy(p) for p in flat]), rel=1e-5)  # reference: scipy
        assert row.sink_mass == pytest.approx(flat[:, 0].mean(), rel=1e-5)
        assert row.max_weight == pytest.approx(flat.max(axis=1).mean(), rel=1e-5)


def test_merge_of_parts_equals_the_whole_and_memory_does_not_grow(parts):
    _, ns = parts
    model, batches = ns["build"](), ns["data"]()
    whole = aggregate_heads(model, batches, progress=False)
    first, rest = (aggregate_heads(model, part, progress=False) for part in (batches[:2], batches[2:]))
    merged = first.merge(rest)
    for name in whole.names:
        for field, value in whole.sums[name].as_arrays().items():
            np.testing.assert_allclose(merged.sums[name].as_arrays()[field], value, rtol=1e-12)
    assert merged.calls == whole.calls and merged.batches == whole.batches

    def size(totals):
        return sum(a.nbytes for s in totals.sums.values() for a in s.as_arrays().values())

    many = aggregate_heads(model, (b for b in batches * 4), progress=False)  # a generator of 20 batches
    assert many.batches == 20 and size(many) == size(whole)  # one sum per head, whatever the batch count


def test_progress_bar_and_default_batch_feeding(capsys):
    torch.manual_seed(0)
    mha = nn.MultiheadAttention(8, 2, batch_first=True)

    class Wrap(nn.Module):
        def __init__(self):
            super().__init__()
            self.attn = mha

        def forward(self, x, mask=None):
            return self.attn(x, x, x, key_padding_mask=mask)[0]

    model = Wrap()
    x = torch.randn(6, 4, 8)
    loader = torch.utils.data.DataLoader(torch.utils.data.TensorDataset(x, torch.zeros(6)), batch_size=3)
    tuples = aggregate_heads(model, loader, progress=True)  # (inputs, targets): inputs fed
    assert "attention statistics" in capsys.readouterr().err  # tqdm.auto wrote its bar
    dicts = aggregate_heads(model, [{"x": x[:3]}, {"x": x[3:]}], progress=False)
    np.testing.assert_allclose(tuples.table()[list(STAT_COLUMNS)], dicts.table()[list(STAT_COLUMNS)], rtol=1e-6)
    pad = torch.zeros(3, 4, dtype=torch.bool)
    pad[:, 3] = True  # the last key is padding
    masked = aggregate_heads(model, [x[:3]], run=lambda m, b: m(b, mask=pad), progress=False)
    assert masked.table()["leak_mass"].eq(0).all() and masked.table()["rows"].tolist() == [12, 12]
    with pytest.raises(OptionError, match="run=lambda"):
        aggregate_heads(model, ["text"], progress=False)


def test_merge_of_different_modules_takes_the_union_and_refuses_other_heads():
    torch.manual_seed(0)
    enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(8, 2, 16, batch_first=True), 2, enable_nested_tensor=False)
    x = torch.randn(2, 3, 8)
    first = aggregate_heads(enc, [x], layers=["layers.0.self_attn"], progress=False)
    second = aggregate_heads(enc, [x], layers=["layers.1.self_attn"], progress=False)
    both = first.merge(second)
    assert both.names == ("layers.0.self_attn", "layers.1.self_attn") and both.batches == 2
    one_head = aggregate_heads(enc, [x], heads=[1], layers=["layers.0.self_attn"], progress=False)
    with pytest.raises(ShapeError, match="heads"):
        first.merge(one_head)
    with pytest.raises(OptionError, match="init_process_group"):
        first.all_reduce()
    assert repr(HeadTotals.empty()) == "HeadTotals(modules=0, batches=0)"


@pytest.mark.slow
def test_two_gloo_ranks_give_what_one_process_gives(parts, tmp_path):
    path, ns = parts
    port = free_port()
    root = pathlib.Path(attnscope.__file__).resolve().parent.parent
    env = dict(os.environ, PYTHONPATH=str(root), GLOO_SOCKET_IFNAME="lo", OMP_NUM_THREADS="1")
    outs = [tmp_path / f"rank{r}.npz" for r in range(2)]
    procs = [subprocess.Popen([sys.executable, str(path), str(r), "2", str(port), str(outs[r])], env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for r in range(2)]
    try:
        results = [p.communicate(timeout=25) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
    for p, (_, err) in zip(procs, results):
        assert p.returncode == 0, err[-2000:]
    # one process, all data, with the ranks' thread count: float32 sums inside a call depend on how many
    # threads split them, and the comparison below is exact
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        single = ns["flat"](aggregate_heads(ns["build"](), ns["data"](), progress=False))
    finally:
        torch.set_num_threads(before)
    for out in outs:  # every rank holds the merged totals
        got = np.load(out)
        assert int(got["batches"]) == 5
        assert sorted(k for k in got.files if k != "batches") == sorted(single)
        for key, value in single.items():
            np.testing.assert_allclose(got[key], value, rtol=1e-12, atol=1e-12)
