"""Bokeh figures of a tracked training run, built once over data sources that later change in place.

* the *strip*: recorded steps across, every head down, coloured by one statistic; alerts marked where they fire;
* the *curve*: the chosen head's statistic over steps, with its alerts;
* the *stream*: each block's mean residual-stream norm over steps (log scale), with block alerts.

Attention weights show where a model looked, not why it decided: they are not a faithful explanation of its
decisions (Jain & Wallace 2019) and are no basis for high-stakes decisions.

>>> import torch, attnscope
>>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
>>> tr = attnscope.track(layer, every=1)
>>> for step in range(3):
...     with tr.step(step):
...         _ = layer(torch.randn(2, 4, 16))
>>> scene = RunScene(tr)
>>> scene.select(1)
>>> scene.curve_src.data["step"]
[0, 1, 2]
"""

from __future__ import annotations

import html
import math
from typing import Any

import numpy as np
from bokeh.layouts import column
from bokeh.models import (ColorBar, ColumnDataSource, Div, FixedTicker, HoverTool, LinearColorMapper, TapTool)
from bokeh.palettes import Category10_10, Cividis256
from bokeh.plotting import figure

from attnscope.errors import OptionError, suggest

__all__ = ["CAVEAT", "RUN_STATISTICS", "RunScene", "alert_list_html"]

#: Statistics a run view can colour by, in menu order.
RUN_STATISTICS = ("entropy_ratio", "entropy", "max_weight", "sink_mass", "mean_distance", "output_norm",
                  "output_relative", "leak_mass")

CAVEAT = ("Attention weights show where a model looked, not why it decided: they are not a faithful "
          "explanation of its decisions (Jain &amp; Wallace 2019) and are no basis for high-stakes decisions. "
          "Alerts compare each head and block with its own recent past; they are prompts to look, not verdicts.")

_ALERT_COLOURS = {"collapse": "#d62728", "dying": "#7f7f7f", "sink": "#9467bd", "residual growth": "#ff7f0e",
                  "massive activation": "#8c564b"}


def _finite(values: Any) -> list[float]:
    """Floats for a data source, NaN kept (Bokeh leaves such cells and points out)."""
    return [float(v) for v in values]


def alert_list_html(alerts: list[Any], limit: int = 12) -> str:
    """The latest *limit* alerts as an escaped HTML list (newest first)."""
    if not alerts:
        return "<div class='as-run-alerts'>no alert so far</div>"
    items = []
    for a in list(reversed(alerts))[:limit]:
        who = a.name if a.head is None else f"{a.name} · head {a.head}"
        colour = _ALERT_COLOURS.get(a.kind, "#000")
        items.append(f"<li><b style='color:{colour}'>step {a.step}</b> {html.escape(who)}: {html.escape(a.reason)}</li>")
    more = f"<div>… and {len(alerts) - limit} earlier</div>" if len(alerts) > limit else ""
    return f"<div class='as-run-alerts'><b>{len(alerts)} alerts</b><ul>{''.join(items)}</ul>{more}</div>"


class RunScene:
    """Figures and data sources of a tracked run; :meth:`refresh` re-reads the tracker (live mode)."""

    def __init__(self, tracker: Any, *, statistic: str = "entropy_ratio", head: int = 0) -> None:
        if not hasattr(tracker, "table") or not hasattr(tracker, "residual_table"):
            raise OptionError(f"expected a tracker from attnscope.track or attnscope.load; received "
                              f"{type(tracker).__name__}")
        self.tracker = tracker
        self._check_statistic(statistic)
        self.statistic = statistic
        self.g = head
        self.labels: list[str] = []
        self.keys: list[tuple[str, int]] = []
        self.strip_src = ColumnDataSource(name="as-run-strip", data=self._empty_strip())
        self.strip_alert_src = ColumnDataSource(name="as-run-strip-alerts",
                                                data=dict(step=[], row=[], kind=[], reason=[], colour=[]))
        self.curve_src = ColumnDataSource(name="as-run-curve", data=dict(step=[], value=[]))
        self.curve_alert_src = ColumnDataSource(name="as-run-curve-alerts",
                                                data=dict(step=[], value=[], kind=[], reason=[], colour=[]))
        self.stream_src = ColumnDataSource(name="as-run-stream", data=dict(xs=[], ys=[], name=[], colour=[]))
        self.stream_alert_src = ColumnDataSource(name="as-run-stream-alerts",
                                                 data=dict(step=[], value=[], name=[], reason=[], colour=[]))
        self.mapper = LinearColorMapper(palette=Cividis256, low=0.0, high=1.0, nan_color="#ffffff")
        self._build()
        self.refresh()

    # ---------------------------------------------------------------- figures
    def _empty_strip(self) -> dict[str, list]:
        return dict(step=[], row=[], label=[], value=[], **{s: [] for s in RUN_STATISTICS})

    def _build(self) -> None:
        width = self.tracker.every
        self.strip_fig = figure(name="as-run-strip-fig", height=260, width=760, tools="tap,reset",
                                toolbar_location="right", title=f"heads over steps: {self.statistic}",
                                x_axis_label="step")
        cells = self.strip_fig.rect(x="step", y="row", width=width, height=0.92, source=self.strip_src,
                                    fill_color={"field": "value", "transform": self.mapper}, line_color=None,
                                    nonselection_fill_alpha=1.0, selection_line_color="#000")
        self.strip_fig.scatter(x="step", y="row", source=self.strip_alert_src, marker="x", size=9,
                               line_width=2, color="colour")
        self.strip_fig.add_tools(HoverTool(renderers=[cells], tooltips=[("head", "@label"), ("step", "@step"),
                                                                        ("value", "@value{0.000}")]))
        self.strip_fig.select_one(TapTool).renderers = [cells]
        self.strip_fig.y_range.flipped = True
        self.strip_fig.yaxis.ticker = FixedTicker(ticks=[])
        self.strip_fig.add_layout(ColorBar(color_mapper=self.mapper, width=10), "right")
        self.curve_fig = figure(name="as-run-curve-fig", height=220, width=760, tools="pan,wheel_zoom,reset",
                                title="head", x_axis_label="step")
        self.curve_fig.line(x="step", y="value", source=self.curve_src, line_width=2, color="#1f77b4")
        self.curve_fig.scatter(x="step", y="value", source=self.curve_src, size=4, color="#1f77b4")
        marks = self.curve_fig.scatter(x="step", y="value", source=self.curve_alert_src, marker="x", size=12,
                                       line_width=2, color="colour")
        self.curve_fig.add_tools(HoverTool(renderers=[marks], tooltips=[("step", "@step"), ("alert", "@reason")]))
        self.stream_fig = figure(name="as-run-stream-fig", height=220, width=760, y_axis_type="log",
                                 tools="pan,wheel_zoom,reset", title="mean residual-stream norm per block",
                                 x_axis_label="step")
        self.stream_fig.multi_line(xs="xs", ys="ys", line_color="colour", source=self.stream_src, line_width=2,
                                   legend_field="name")
        self.stream_fig.legend.location = "top_left"
        self.stream_fig.legend.label_text_font_size = "8pt"
        bmarks = self.stream_fig.scatter(x="step", y="value", source=self.stream_alert_src, marker="x", size=12,
                                         line_width=2, color="colour")
        self.stream_fig.add_tools(HoverTool(renderers=[bmarks], tooltips=[("block", "@name"), ("step", "@step"),
                                                                          ("alert", "@reason")]))
        self.caveat = Div(text=f"<i>{CAVEAT}</i>", width=760, name="as-run-caveat")
        self.layout = column(self.strip_fig, self.curve_fig, self.stream_fig, self.caveat, name="as-run-layout")

    # ---------------------------------------------------------------- data
    def _check_statistic(self, name: str) -> None:
        if name not in RUN_STATISTICS:
            raise OptionError(f"statistic: expected one of {', '.join(RUN_STATISTICS)}; received {name!r}."
                              f"{suggest(str(name), RUN_STATISTICS)}")

    def refresh(self) -> None:
        """Re-read the tracker's tables and alerts into the data sources (new steps, new heads)."""
        table = self.tracker.table()
        for key in zip(table["name"], table["head"]):
            key = (str(key[0]), int(key[1]))
            if key not in self.keys:
                self.keys.append(key)
                self.labels.append(f"{key[0]} · h{key[1]}")
        index = {k: i for i, k in enumerate(self.keys)}
        rows = [index[(str(n), int(h))] for n, h in zip(table["name"], table["head"])]
        data = dict(step=[int(s) for s in table["step"]], row=rows, label=[self.labels[r] for r in rows],
                    value=_finite(table[self.statistic]),
                    **{s: _finite(table[s]) for s in RUN_STATISTICS})
        self.strip_src.data = data
        self._rescale()
        n = len(self.keys)
        self.strip_fig.yaxis.ticker.ticks = list(range(n))
        self.strip_fig.yaxis.major_label_overrides = {i: lab for i, lab in enumerate(self.labels)}
        self.strip_fig.height = int(min(640, 80 + 18 * max(n, 1)))
        self.alerts = self.tracker.alerts()
        heads = [a for a in self.alerts if a.head is not None and (a.name, a.head) in index]
        self.strip_alert_src.data = dict(step=[a.step for a in heads], row=[index[(a.name, a.head)] for a in heads],
                                         kind=[a.kind for a in heads], reason=[a.reason for a in heads],
                                         colour=[_ALERT_COLOURS[a.kind] for a in heads])
        res = self.tracker.residual_table()
        xs, ys, names = [], [], []
        for name, part in res.groupby("name", sort=False):
            part = part.sort_values("step")
            xs.append([int(s) for s in part["step"]])
            ys.append(_finite(part["residual_norm"]))
            names.append(str(name))
        self.stream_src.data = dict(xs=xs, ys=ys, name=names,
                                    colour=[Category10_10[i % 10] for i in range(len(names))])
        blocks = [a for a in self.alerts if a.head is None]
        at = {(str(n), int(s)): float(v) for n, s, v in zip(res["name"], res["step"], res["residual_norm"])}
        self.stream_alert_src.data = dict(step=[a.step for a in blocks],
                                          value=[at.get((a.name, a.step), math.nan) for a in blocks],
                                          name=[a.name for a in blocks], reason=[a.reason for a in blocks],
                                          colour=[_ALERT_COLOURS[a.kind] for a in blocks])
        if n:
            self.g = min(self.g, n - 1)
            self._show_curve()

    def _rescale(self) -> None:
        values = np.asarray(self.strip_src.data["value"], dtype=float)
        values = values[np.isfinite(values)]
        low, high = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
        if high <= low:
            high = low + 1e-9
        self.mapper.update(low=low, high=high)

    def _show_curve(self) -> None:
        d = self.strip_src.data
        steps = [s for s, r in zip(d["step"], d["row"]) if r == self.g]
        values = [v for v, r in zip(d[self.statistic], d["row"]) if r == self.g]
        self.curve_src.data = dict(step=steps, value=values)
        at = dict(zip(steps, values))
        name, head = self.keys[self.g]
        mine = [a for a in self.alerts if a.name == name and a.head == head]
        self.curve_alert_src.data = dict(step=[a.step for a in mine], value=[at.get(a.step, math.nan) for a in mine],
                                         kind=[a.kind for a in mine], reason=[a.reason for a in mine],
                                         colour=[_ALERT_COLOURS[a.kind] for a in mine])
        self.curve_fig.title.text = f"{self.labels[self.g]}: {self.statistic}"
        picked = self.strip_src.selected.indices[-1:]
        rows = self.strip_src.data["row"]
        if not (picked and picked[0] < len(rows) and rows[picked[0]] == self.g):  # keep a tapped cell of this head
            cell = self._first_cell(self.g)
            self.strip_src.selected.indices = [] if cell is None else [cell]

    def _first_cell(self, g: int) -> int | None:
        for i, r in enumerate(self.strip_src.data["row"]):
            if r == g:
                return i
        return None

    def row_of_cell(self, cell: int) -> int:
        return int(self.strip_src.data["row"][cell])

    def select(self, g: int) -> None:
        """Show head *g* (index into :attr:`labels`) in the curve."""
        if not 0 <= g < len(self.keys):
            raise OptionError(f"head: expected 0..{len(self.keys) - 1}, received {g}")
        self.g = g
        self._show_curve()

    def set_statistic(self, name: str) -> None:
        self._check_statistic(name)
        self.statistic = name
        data = dict(self.strip_src.data)
        data["value"] = list(data[name])
        self.strip_src.data = data
        self._rescale()
        self.strip_fig.title.text = f"heads over steps: {name}"
        if self.keys:
            self._show_curve()

    def head_index(self, name: str, head: int) -> int:
        try:
            return self.keys.index((name, int(head)))
        except ValueError:
            names = sorted({k[0] for k in self.keys})
            raise OptionError(f"no tracked head {head} of {name!r}.{suggest(name, names)}") from None

    def __repr__(self) -> str:
        return f"RunScene(heads={len(self.keys)}, steps={len(set(self.strip_src.data['step']))}, statistic={self.statistic!r})"
