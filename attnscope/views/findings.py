"""Finding and check tables: whatever the analyses returned, turned into one escaped HTML table.

Accepted inputs (``findings=`` and ``checks=`` of the dashboard): a pandas DataFrame; a list of dicts,
named tuples or dataclasses (a dataclass row shows its scalar fields, a tuple field its length, arrays are
left out); one dataclass (a probe report); a list of plain tuples, where the two shapes the head analyses
return get their column names (``(name, head, reason)`` for silent heads, ``(name_a, head_a, name_b, head_b,
distance)`` for twin heads). A dict of such tables, ``{"silent heads": ..., "twin heads": ...}``, shows one
titled table each.

>>> frame = as_frame([("blocks.0.attn", 3, "uniform")])
>>> list(frame.columns)
['name', 'head', 'reason']
>>> "&lt;b&gt;" in html_table(as_frame([("<b>", 0, "x")]), "findings")
True
"""

from __future__ import annotations

import dataclasses
import html
import math
from collections.abc import Mapping
from typing import Any

import pandas as pd

from attnscope.errors import OptionError

__all__ = ["as_frame", "as_tables", "html_table"]

_TUPLE_COLUMNS = {3: ["name", "head", "reason"], 5: ["name_a", "head_a", "name_b", "head_b", "distance"]}


def as_frame(rows: Any, what: str = "findings") -> pd.DataFrame:
    """Turn a findings/checks input into a DataFrame (see the module docstring)."""
    if rows is None:
        return pd.DataFrame()
    if dataclasses.is_dataclass(rows) and not isinstance(rows, type):
        rows = [rows]
    if isinstance(rows, pd.DataFrame):
        return rows.reset_index(drop=isinstance(rows.index, pd.RangeIndex))
    if isinstance(rows, Mapping):
        return pd.DataFrame([rows])
    try:
        rows = list(rows)
    except TypeError:
        raise OptionError(f"{what}: expected a DataFrame or a list of rows, received {type(rows).__name__}") from None
    if not rows:
        return pd.DataFrame()
    first = rows[0]
    if dataclasses.is_dataclass(first) and not isinstance(first, type):
        return pd.DataFrame([_scalar_fields(r) for r in rows])
    if isinstance(first, Mapping):
        return pd.DataFrame([dict(r) for r in rows])
    if isinstance(first, tuple) and hasattr(first, "_fields"):
        return pd.DataFrame([r._asdict() for r in rows])
    if isinstance(first, (tuple, list)):
        widths = {len(r) for r in rows}
        if len(widths) != 1:
            raise OptionError(f"{what}: rows of different lengths {sorted(widths)}")
        (width,) = widths
        columns = _TUPLE_COLUMNS.get(width, [f"column {i + 1}" for i in range(width)])
        return pd.DataFrame([list(r) for r in rows], columns=columns)
    return pd.DataFrame({what: [str(r) for r in rows]})


def _scalar_fields(row: Any) -> dict[str, Any]:
    """The fields of a dataclass row worth a table cell: scalars as they are, sequences by their length."""
    out: dict[str, Any] = {}
    for f in dataclasses.fields(row):
        value = getattr(row, f.name)
        if value is None or isinstance(value, (str, bool, int, float)):
            out[f.name] = value
        elif isinstance(value, (tuple, list)):
            out[f.name] = len(value)
    return out


def _is_table(value: Any) -> bool:
    return isinstance(value, (pd.DataFrame, list, tuple)) or (
        dataclasses.is_dataclass(value) and not isinstance(value, type))


def as_tables(value: Any, what: str) -> list[tuple[str, pd.DataFrame]]:
    """``[(title, frame), ...]``: one table, or one per entry of a dict of tables."""
    if value is None:
        return []
    if isinstance(value, Mapping) and value and all(_is_table(v) for v in value.values()):
        return [(str(title), as_frame(rows, str(title))) for title, rows in value.items()]
    return [(what, as_frame(value, what))]


def _cell(value: Any) -> str:
    if isinstance(value, float):
        text = "" if math.isnan(value) else f"{value:.4g}"
    else:
        text = str(value)
    return html.escape(text, quote=True)


def html_table(frame: pd.DataFrame, title: str, empty: str = "nothing reported", max_rows: int = 200) -> str:
    """An HTML table of *frame*; every header and cell is escaped (the strings are user data)."""
    head = f"<div class='as-table-title'>{html.escape(title)}</div>"
    if frame.empty:
        return head + f"<div class='as-table-empty'>{html.escape(empty)}</div>"
    shown = frame.head(max_rows)
    cols = "".join(f"<th>{_cell(c)}</th>" for c in shown.columns)
    body = "".join("<tr>" + "".join(f"<td>{_cell(v)}</td>" for v in row) + "</tr>"
                   for row in shown.itertuples(index=False, name=None))
    more = "" if len(frame) <= max_rows else f"<div>… {len(frame) - max_rows} more rows</div>"
    return head + f"<table class='as-table'><thead><tr>{cols}</tr></thead><tbody>{body}</tbody></table>{more}"
