"""Save and load captures without pickle.

A capture file is a zip archive holding ``capture.json`` (format name, version, one entry per record) and one
``.npy`` file per array, written and read with ``allow_pickle=False``. Loading checks the format name, the
version, that every array the manifest names is present with the dtype and shape it states, and refuses
anything else with :class:`~attnscope.errors.CaptureFileError`; nothing in the file is ever executed.

>>> import os, tempfile, torch, attnscope
>>> mha = torch.nn.MultiheadAttention(8, 2)
>>> x = torch.randn(3, 1, 8)
>>> with attnscope.capture(mha) as cap:
...     _ = mha(x, x, x)
>>> path = os.path.join(tempfile.mkdtemp(), "run.attnscope")
>>> attnscope.save(cap, path)
>>> attnscope.load(path).attention[0].weights.shape
(1, 2, 3, 3)
"""

from __future__ import annotations

import io
import json
import os
import zipfile
import zlib
from dataclasses import fields
from typing import Any

import numpy as np

from attnscope.capture import Capture
from attnscope.errors import CaptureFileError, OptionError
from attnscope.records import AttentionRecord, HeadSums, ResidualRecord

__all__ = ["FORMAT", "VERSION", "load", "save"]

FORMAT = "attnscope-capture"
VERSION = 1
_MANIFEST = "capture.json"
_SUMS = [f.name for f in fields(HeadSums)]


def save(cap: Capture, path: str | os.PathLike) -> None:
    """Write *cap* (a finished capture) to *path* as a zip of JSON and ``.npy`` arrays.

    A :class:`~attnscope.tracking.Tracker` (from :func:`attnscope.track`) is written as a run file instead
    (JSON lines, see :mod:`attnscope.tracking.store`); :func:`load` reads both.
    """
    if type(cap).__name__ == "Tracker":
        from attnscope.tracking.store import write_run

        write_run(path, cap._header(), cap.steps)
        return
    if not isinstance(cap, Capture):
        raise OptionError(f"save() expects a Capture or a Tracker; received {type(cap).__name__}")
    cap._closed("save()")
    arrays: dict[str, np.ndarray] = {}
    entries = []
    for i, rec in enumerate(cap.attention):
        entry: dict[str, Any] = {"name": rec.name, "kind": rec.kind, "causal": bool(rec.causal),
                                 "shape": list(rec.shape), "heads": list(rec.heads), "call": rec.call,
                                 "source": rec.source, "query_offset": rec.query_offset, "arrays": {}}
        if rec.helper is not None:
            entry["helper"] = rec.helper  # optional: files written before it existed load without it
        parts = {"weights": rec.weights, "allowed": rec.allowed}
        if rec.stats is not None:
            parts.update({f"stats.{k}": v for k, v in rec.stats.as_arrays().items()})
        for part, value in parts.items():
            if value is not None:
                key = f"attention/{i}/{part}"
                arrays[key] = np.ascontiguousarray(value)
                entry["arrays"][part] = _describe(key, arrays[key])
        entries.append(entry)
    residual = []
    for i, rec in enumerate(cap.residual):
        key = f"residual/{i}/norms"
        arrays[key] = np.ascontiguousarray(rec.norms)
        residual.append({"name": rec.name, "call": rec.call, "norms": _describe(key, arrays[key])})
    manifest = {"format": FORMAT, "version": VERSION, "keep": cap.keep, "attention": entries, "residual": residual}
    tmp = f"{os.fspath(path)}.partial"
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
        zf.writestr(_MANIFEST, json.dumps(manifest, indent=1))
        for key, value in arrays.items():
            buf = io.BytesIO()
            np.lib.format.write_array(buf, value, allow_pickle=False)
            zf.writestr(key + ".npy", buf.getvalue())
    os.replace(tmp, path)


def load(path: str | os.PathLike) -> Capture:
    """Read a capture written by :func:`save`; anything else raises :class:`~attnscope.errors.CaptureFileError`.

    A run file (written by :func:`save` of a tracker, or by ``attnscope.track(..., path=...)`` as it went)
    comes back as a :class:`~attnscope.tracking.Tracker` that can be read and shown, not recorded into.
    """
    where = os.fspath(path)
    from attnscope.tracking.store import is_run_file

    if is_run_file(where):
        from attnscope.tracking.session import Tracker
        from attnscope.tracking.store import read_run

        header, steps = read_run(where)
        try:
            return Tracker._from_steps(steps, int(header["every"]), header.get("rules") or {})
        except (KeyError, TypeError, ValueError, OptionError) as err:
            raise CaptureFileError(f"{where}: the run header is not valid ({err})") from err
    try:
        with zipfile.ZipFile(where) as zf:
            manifest = _read_manifest(zf, where)
            attention = [_attention(zf, e, where) for e in manifest["attention"]]
            residual = [ResidualRecord(name=str(e["name"]), call=int(e["call"]), norms=_array(zf, e["norms"], where))
                        for e in manifest["residual"]]
    except CaptureFileError:
        raise
    except FileNotFoundError:
        raise
    except (zipfile.BadZipFile, zipfile.LargeZipFile, zlib.error, EOFError, OSError) as err:
        raise CaptureFileError(f"{where} is not a readable attnscope capture (not a complete zip archive: {err})") from err
    except (KeyError, TypeError, ValueError) as err:
        raise CaptureFileError(f"{where} is not a valid attnscope capture: {err}") from err
    return Capture._from_records(attention, residual, manifest["keep"])


def _describe(key: str, value: np.ndarray) -> dict:
    return {"key": key, "dtype": value.dtype.str, "shape": list(value.shape)}


def _read_manifest(zf: zipfile.ZipFile, where: str) -> dict:
    try:
        manifest = json.loads(zf.read(_MANIFEST).decode("utf-8"))
    except KeyError:
        raise CaptureFileError(f"{where} has no {_MANIFEST}: it is not an attnscope capture") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        raise CaptureFileError(f"{where}: {_MANIFEST} is not valid JSON ({err})") from err
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise CaptureFileError(f"{where} is not an attnscope capture (format {manifest.get('format') if isinstance(manifest, dict) else None!r})")
    if manifest.get("version") != VERSION:
        raise CaptureFileError(f"{where} is capture format version {manifest.get('version')!r}; this attnscope "
                               f"reads version {VERSION}")
    if manifest.get("keep") not in ("maps", "stats"):
        raise CaptureFileError(f"{where}: unknown keep mode {manifest.get('keep')!r}")
    return manifest


def _array(zf: zipfile.ZipFile, desc: dict, where: str) -> np.ndarray:
    key = desc["key"]
    try:
        raw = zf.read(key + ".npy")
    except KeyError:
        raise CaptureFileError(f"{where} lacks the array {key!r} its manifest names") from None
    try:
        value = np.lib.format.read_array(io.BytesIO(raw), allow_pickle=False)
    except ValueError as err:  # object arrays need pickle: refused
        raise CaptureFileError(f"{where}: array {key!r} cannot be read without pickle; refused ({err})") from err
    if value.dtype.str != desc["dtype"] or list(value.shape) != list(desc["shape"]):
        raise CaptureFileError(f"{where}: array {key!r} is {value.dtype.str} {list(value.shape)}, but the manifest "
                               f"says {desc['dtype']} {desc['shape']}")
    if value.dtype.kind not in "fbiu":
        raise CaptureFileError(f"{where}: array {key!r} has dtype {value.dtype}, not a number or bool")
    return value


def _attention(zf: zipfile.ZipFile, e: dict, where: str) -> AttentionRecord:
    parts = {name: _array(zf, desc, where) for name, desc in e["arrays"].items()}
    stats = None
    if any(p.startswith("stats.") for p in parts):
        stats = HeadSums(**{k: parts[f"stats.{k}"] for k in _SUMS})
    shape = tuple(int(s) for s in e["shape"])
    heads = tuple(int(h) for h in e["heads"])
    weights = parts.get("weights")
    if len(shape) != 4 or (weights is not None and weights.shape != (shape[0], len(heads), shape[2], shape[3])):
        raise CaptureFileError(f"{where}: record {e['name']!r} has weights {None if weights is None else weights.shape} "
                               f"that do not fit its shape {shape} and heads {heads}")
    if weights is None and stats is None:
        raise CaptureFileError(f"{where}: record {e['name']!r} holds neither weights nor statistics")
    if e["kind"] not in ("self", "cross"):
        raise CaptureFileError(f"{where}: record {e['name']!r} has unknown kind {e['kind']!r}")
    return AttentionRecord(name=str(e["name"]), kind=e["kind"], weights=weights, allowed=parts.get("allowed"),
                           causal=bool(e["causal"]), stats=stats, shape=shape, heads=heads, call=int(e["call"]),
                           source=str(e["source"]), query_offset=int(e["query_offset"]),
                           helper=None if e.get("helper") is None else str(e["helper"]))
