"""save/load: exact round trip, and refusal of anything that is not a capture (never unpickles)."""

from __future__ import annotations

import json
import pickle
import zipfile

import numpy as np
import pytest
import torch
from torch import nn

import attnscope
from attnscope.capture import record_sums
from attnscope.errors import CaptureFileError, ShapeError


@pytest.fixture(params=["maps", "stats"])
def cap(request):
    torch.manual_seed(0)
    model = nn.Transformer(d_model=16, nhead=2, num_encoder_layers=1, num_decoder_layers=1, dim_feedforward=32,
                           dropout=0.0, batch_first=True)
    pad = torch.tensor([[False] * 5, [False] * 3 + [True] * 2])
    with attnscope.capture(model, keep=request.param) as c:
        model(torch.randn(2, 5, 16), torch.randn(2, 4, 16), tgt_mask=model.generate_square_subsequent_mask(4),
              src_key_padding_mask=pad, memory_key_padding_mask=pad)
    return c


def test_round_trip_is_exact(cap, tmp_path):
    path = tmp_path / "run.attnscope"
    attnscope.save(cap, path)
    back = attnscope.load(path)
    assert back.keep == cap.keep and len(back.attention) == len(cap.attention) == 3
    for a, b in zip(cap.attention, back.attention):
        for field in ("name", "kind", "causal", "shape", "heads", "call", "source", "query_offset"):
            assert getattr(a, field) == getattr(b, field), field
        for arr in ("weights", "allowed"):
            x, y = getattr(a, arr), getattr(b, arr)
            assert (x is None and y is None) or (np.array_equal(x, y) and x.dtype == y.dtype)
    for a, b in zip(cap.residual, back.residual):
        assert a.name == b.name and np.array_equal(a.norms, b.norms)
    assert cap.head_table().equals(back.head_table())


def _rewrite(src, dst, edit):
    with zipfile.ZipFile(src) as zin, zipfile.ZipFile(dst, "w") as zout:
        for item in zin.infolist():
            data = edit(item.filename, zin.read(item.filename))
            if data is not None:
                zout.writestr(item.filename, data)


def test_refuses_what_is_not_a_capture(cap, tmp_path):
    good = tmp_path / "good.attnscope"
    attnscope.save(cap, good)
    raw = good.read_bytes()

    cases = {}
    (tmp_path / "text.attnscope").write_text("hello")
    cases["not a zip"] = tmp_path / "text.attnscope"
    (tmp_path / "trunc.attnscope").write_bytes(raw[: len(raw) // 2])
    cases["truncated"] = tmp_path / "trunc.attnscope"
    pkl = tmp_path / "pickle.attnscope"
    pkl.write_bytes(pickle.dumps({"format": "attnscope-capture"}))
    cases["a pickle"] = pkl

    def version(name, data):
        if name == "capture.json":
            m = json.loads(data)
            m["version"] = 99
            return json.dumps(m)
        return data

    def drop_array(name, data):
        return None if name.endswith(".npy") and "/0/" in name else data

    def object_array(name, data):
        if name.endswith(".npy") and "/0/" in name:
            import io
            buf = io.BytesIO()
            np.save(buf, np.array([{"x": 1}], dtype=object), allow_pickle=True)  # a pickle-bearing array
            return buf.getvalue()
        return data

    def no_data(name, data):  # record 0 lists neither weights nor statistics (and its arrays are gone)
        if name == "capture.json":
            m = json.loads(data)
            m["attention"][0]["arrays"] = {}
            return json.dumps(m)
        return None if name.startswith("attention/0/") else data

    def wrong_format(name, data):
        return json.dumps({"format": "something-else"}) if name == "capture.json" else data

    for label, edit in {"wrong version": version, "missing array": drop_array,
                        "pickle-bearing array": object_array, "wrong format": wrong_format,
                        "record without data": no_data}.items():
        p = tmp_path / f"{label.replace(' ', '_')}.attnscope"
        _rewrite(good, p, edit)
        cases[label] = p
    with zipfile.ZipFile(good) as zf:  # a corrupted byte inside the stored data of the manifest: CRC check fails
        info = zf.getinfo("capture.json")
    data_start = info.header_offset + 30 + len(info.filename.encode()) + len(info.extra)
    flipped = bytearray(raw)
    flipped[data_start + info.compress_size // 2] ^= 0xFF
    (tmp_path / "flip.attnscope").write_bytes(bytes(flipped))
    cases["corrupted byte"] = tmp_path / "flip.attnscope"

    for label, path in cases.items():
        with pytest.raises(CaptureFileError):
            attnscope.load(path)
            pytest.fail(f"loaded {label}")
    with pytest.raises(CaptureFileError, match="version 99"):
        attnscope.load(cases["wrong version"])
    with pytest.raises(CaptureFileError, match="without pickle"):
        attnscope.load(cases["pickle-bearing array"])
    with pytest.raises(CaptureFileError, match="neither weights nor statistics"):
        attnscope.load(cases["record without data"])


def test_a_record_without_data_has_no_statistics(cap):
    import dataclasses

    empty = dataclasses.replace(cap.attention[0], weights=None, stats=None)
    with pytest.raises(ShapeError, match="neither weights nor statistics"):
        record_sums(empty)


def test_load_never_unpickles(tmp_path, monkeypatch):
    calls = []
    monkeypatch.setattr(pickle, "loads", lambda *a, **k: calls.append(a))
    monkeypatch.setattr(pickle, "load", lambda *a, **k: calls.append(a))
    junk = tmp_path / "x.attnscope"
    junk.write_bytes(pickle.dumps(["not", "a", "capture"]))
    with pytest.raises(CaptureFileError):
        attnscope.load(junk)
    assert calls == []
