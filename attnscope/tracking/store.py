"""A tracked run on disk: JSON lines, one header line, then one line per recorded step, append-only.

Each step is written as one line with a single ``write``, then flushed and ``fsync``-ed before the step's
block returns, so a crash or a killed kernel keeps every step recorded before it. A last line cut short by a
crash in the middle of a write is the only thing that can be lost; :func:`read_run` drops it with a warning.
Nothing in the file is executed (plain JSON; NaN and infinity as JSON's common ``NaN``/``Infinity`` extension).

>>> import os, tempfile
>>> from attnscope.tracking.session import StepStats
>>> path = os.path.join(tempfile.mkdtemp(), "run.jsonl")
>>> w = RunWriter(path, {"every": 1, "rules": {}, "model": None})
>>> w.append(StepStats(0, [{"name": "a", "head": 0, "entropy": 0.5}], []))
>>> w.close()
>>> [s.step for s in read_run(path)[1]]
[0]
"""

from __future__ import annotations

import json
import math
import os
import warnings
from typing import Any

from attnscope.errors import AttnscopeWarning, CaptureFileError, OptionError

__all__ = ["FORMAT", "VERSION", "RunWriter", "read_run", "write_run"]

FORMAT = "attnscope-run"
VERSION = 1


def _line(obj: dict[str, Any]) -> bytes:
    return (json.dumps(obj, separators=(",", ":")) + "\n").encode("utf-8")


def _step_entry(stats: Any) -> dict[str, Any]:
    return {"step": int(stats.step), "heads": stats.heads, "blocks": stats.blocks}


class RunWriter:
    """Appends recorded steps to a run file; each append is on disk (fsync) when it returns."""

    def __init__(self, path: str | os.PathLike, header: dict[str, Any], *, overwrite: bool = False) -> None:
        self.path = os.fspath(path)
        self._fd: int | None = None
        if os.path.exists(self.path) and not overwrite:
            raise OptionError(f"{self.path} exists; pick another path= or pass overwrite=True to replace it")
        flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_APPEND
        self._fd = os.open(self.path, flags, 0o644)
        self._write(_line({"format": FORMAT, "version": VERSION, **header}))

    def _write(self, data: bytes) -> None:
        if self._fd is None:
            raise OptionError(f"the run file {self.path} is closed")
        view = memoryview(data)
        while view:
            n = os.write(self._fd, view)
            view = view[n:]
        os.fsync(self._fd)

    def append(self, stats: Any) -> None:
        self._write(_line(_step_entry(stats)))

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None

    def __del__(self) -> None:
        self.close()


def write_run(path: str | os.PathLike, header: dict[str, Any], steps: list[Any]) -> None:
    """Write a whole run at once (through a temporary file, so *path* is never half written)."""
    tmp = f"{os.fspath(path)}.partial"
    with open(tmp, "wb") as f:
        f.write(_line({"format": FORMAT, "version": VERSION, **header}))
        for s in steps:
            f.write(_line(_step_entry(s)))
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def is_run_file(path: str | os.PathLike) -> bool:
    """Whether *path* starts like a run file (a JSON object), not a capture (a zip archive)."""
    with open(path, "rb") as f:
        return f.read(1) == b"{"


def read_run(path: str | os.PathLike) -> tuple[dict[str, Any], list[Any]]:
    """Header and :class:`~attnscope.tracking.StepStats` of a run file; a torn last line is dropped with a warning."""
    from attnscope.tracking.session import BLOCK_COLUMNS, HEAD_COLUMNS, StepStats

    where = os.fspath(path)
    with open(where, "rb") as f:
        raw = f.read()
    lines = raw.split(b"\n")
    torn = lines.pop()  # after the last newline: empty unless the last write was cut short
    try:
        header = json.loads(lines[0]) if lines else None
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        raise CaptureFileError(f"{where} is not an attnscope run file (first line is not JSON: {err})") from err
    if not isinstance(header, dict) or header.get("format") != FORMAT:
        raise CaptureFileError(f"{where} is not an attnscope run file (format "
                               f"{header.get('format') if isinstance(header, dict) else None!r})")
    if header.get("version") != VERSION:
        raise CaptureFileError(f"{where} is run format version {header.get('version')!r}; this attnscope reads "
                               f"version {VERSION}")
    steps = []
    for i, line in enumerate(lines[1:], start=2):
        try:
            e = json.loads(line)
            heads = [_check_row(r, ("name", "head"), HEAD_COLUMNS) for r in e["heads"]]
            blocks = [_check_row(r, ("name",), BLOCK_COLUMNS) for r in e["blocks"]]
            steps.append(StepStats(int(e["step"]), heads, blocks))
        except (UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError, ValueError) as err:
            raise CaptureFileError(f"{where}: line {i} is not a recorded step ({err})") from err
    if torn.strip():
        warnings.warn(f"{where}: the last line was cut short (a crash during its write); it is left out",
                      AttnscopeWarning, stacklevel=3)
    return header, steps


def _check_row(row: Any, keys: tuple[str, ...], numbers: tuple[str, ...]) -> dict[str, Any]:
    if not isinstance(row, dict):
        raise TypeError(f"expected an object per row; found {type(row).__name__}")
    out: dict[str, Any] = {"name": str(row["name"])}
    if "head" in keys:
        out["head"] = int(row["head"])
    for c in numbers:
        value = row.get(c, math.nan)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise TypeError(f"column {c!r} holds {value!r}, not a number")
        out[c] = value
    return out
