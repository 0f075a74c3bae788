"""The dashboard's plots: one Bokeh layout of figures over shared data sources.

Views (each a named Bokeh figure):

* **atlas**: every (record, head) of the capture as a small pooled map, one row per attention call in call
  order, one column per kept head; cross-attention rows are outlined in orange, self-attention in grey.
* **lens**: the selected head at full resolution (pooled only past ``lens_side`` positions), query tokens down,
  key tokens across, hover giving the token pair and the weight; the **veil** on top greys the cells the
  applied mask forbids and paints magenta the forbidden cells that still got weight (leaks).
* **scores**: a per-head statistic of the head table (chooser: entropy_ratio, sink_mass, leak_mass,
  mean_distance, ...) laid out like the atlas.
* **stream**: residual-stream norms per block and position for the chosen batch item.
* **twins**: the head-to-head distance matrix (duplicate heads are the dark cells off the diagonal).
* **findings**: the silent/twin-head findings and check results handed in, as tables.

Above them (notebook and page), a summary line counts the dead, duplicate and leaking heads (:attr:`Scene.tally`);
each count is a button that selects the next flagged head.

Selection (record, head), batch item, statistic and veil are set through :class:`Scene` methods; they
only assign ``source.data`` and a few properties, the figures are built once. Nothing here computes an
analysis: the numbers come from the capture's records and head table or from the caller.

>>> import torch, attnscope
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> x = torch.randn(1, 4, 8)
>>> with attnscope.capture(mha) as cap:
...     _ = mha(x, x, x)
>>> scene = Scene(cap)
>>> scene.select(1)
>>> scene.lens_src.data["image"][0].shape
(4, 4)
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from bokeh.layouts import column, row
from bokeh.models import (
    BasicTicker,
    ColorBar,
    ColumnDataSource,
    CustomJSHover,
    CustomJSTickFormatter,
    Div,
    FixedTicker,
    HoverTool,
    LinearColorMapper,
    Range1d,
    TapTool,
)
from bokeh.palettes import Cividis256, Colorblind8, Inferno256, Magma256, Plasma256
from bokeh.plotting import figure

from attnscope.analyses.leaks import declared_cells
from attnscope.errors import AttnscopeWarning, OptionError, ShapeError, suggest
from attnscope.records import STAT_COLUMNS
from attnscope.views.findings import as_frame, as_tables, html_table
from attnscope.views.labels import TokenLabels
from attnscope.views.tiles import LEAK_FLOOR, TILE_TOP, mask_codes, pool, quantise_tile

__all__ = ["CAUTION", "STATISTICS", "Scene", "Tally"]

CAUTION = ("Attention weights show where a model looked, not why it decided: they are not a faithful explanation "
           "of its decisions (Jain & Wallace 2019) and are no basis for high-stakes decisions.")

#: The statistics the scores chooser offers, first the four the views are built around.
STATISTICS = ("entropy_ratio", "sink_mass", "leak_mass", "mean_distance",
              *(c for c in STAT_COLUMNS if c not in ("entropy_ratio", "sink_mass", "leak_mass", "mean_distance")))

WEIGHT_PALETTE = Cividis256  # perceptually uniform sequential, also for colour-blind readers
SCORE_PALETTE = Plasma256
STREAM_PALETTE = Inferno256
TWIN_PALETTE = Magma256  # alike heads (small distance) dark
VEIL_PALETTE = ("#00000000", "#c8c8c8e0", "#ff00c8")  # allowed: clear, forbidden: grey, leak: magenta
SELF_EDGE, CROSS_EDGE = "#8c8c8c", Colorblind8[1]
PICK_COLOUR = "#e4002b"
BACKGROUND = "#f4f4f4"

#: Pixels of the whole atlas at the default tile side: 12 x 12 heads of 24 x 24 cells.
ATLAS_PIXELS = 144 * 24 * 24
#: Largest number of heads drawn in the twins matrix.
TWIN_HEADS = 256
#: Distances are computed for the twins view on the fly only below this many pairwise cell comparisons;
#: larger captures pass ``distances=`` (for example from :func:`attnscope.analyses.similarity.head_distances`).
AUTO_DISTANCE_CELLS = 30_000_000

# Hover formatters: an axis position -> "i: token". Bokeh escapes formatter output in tooltips.
_TOKEN_AT = """
const t = src.data.tok; const i = Math.round(value);
return (i >= 0 && i < t.length) ? i + ': ' + t[i] : '';
"""
_TICK_TOKEN = """
const t = src.data.tok; const i = Math.round(tick);
if (i < 0 || i >= t.length || Math.abs(tick - i) > 1e-6) return '';
const s = String(t[i]); return s.length > 12 ? s.slice(0, 11) + '\u2026' : s;
"""
_WEIGHT_AT = "return (value * src.data.scale[0]).toFixed(4);"
_STREAM_AT = """
const r = special_vars.index; const t = src.data.tok[r]; const i = Math.round(value);
return (t != null && i >= 0 && i < t.length) ? i + ': ' + t[i] : String(i);
"""


@dataclass(frozen=True)
class HeadRef:
    """One head of the capture as the views address it: record index, head position, labels."""

    g: int  # index over all kept heads, capture order
    record: int  # index into cap.attention
    slot: int  # position on the record's head axis
    head: int  # the model's head index
    label: str


@dataclass(frozen=True)
class Tally:
    """One item of the summary line: the heads an analysis flagged (None when it was not run) and its text.

    >>> t = Tally("dead", (3, 7), "2 dead")
    >>> [t.next_head(0), t.next_head(3), t.next_head(7)]
    [3, 7, 3]
    """

    kind: str  # "dead", "duplicate" or "leaking"
    heads: tuple[int, ...] | None  # global head indices, capture order; None: not run
    text: str  # the line's words, e.g. "2 dead" or "duplicate: not run (...)"

    def next_head(self, current: int) -> int | None:
        """The flagged head after *current* (the first when *current* is not flagged), cycling; None if none."""
        if not self.heads:
            return None
        return self.heads[(self.heads.index(current) + 1) % len(self.heads)] if current in self.heads else self.heads[0]


def _record_labels(records: Sequence[Any]) -> list[str]:
    names = [r.name or "(model)" for r in records]
    seen = {n: names.count(n) for n in names}
    return [f"{n} #{r.call}" if seen[n] > 1 else n for n, r in zip(names, records)]


def _short(s: str, n: int = 28) -> str:
    return s if len(s) <= n else "\u2026" + s[-(n - 1):]


def _cluster_order(dist: np.ndarray) -> list[int]:
    """Leaf order of an average-linkage clustering of the heads (unknown distances count as 1, the largest)."""
    n = len(dist)
    if n < 3:
        return list(range(n))
    from scipy.cluster.hierarchy import leaves_list, linkage
    from scipy.spatial.distance import squareform

    d = np.where(np.isfinite(dist), dist, 1.0).astype(np.float64)
    d = 0.5 * (d + d.T)
    np.fill_diagonal(d, 0.0)
    return [int(i) for i in leaves_list(linkage(squareform(d, checks=False), method="average"))]


def _axis_lengths(records: list, blocks: list) -> dict[int, str]:
    """Full length of every axis of a capture -> the first place it occurs, for token-length messages."""
    out: dict[int, str] = {}
    for rec in records:
        _, _, tq, tk = rec.shape
        out.setdefault(int(tk), f"keys of '{rec.name}'")
        out.setdefault(int(rec.query_offset + tq), f"queries of '{rec.name}'")
    for block in blocks:
        out.setdefault(int(block.norms.shape[-1]), f"positions of block '{block.name}'")
    return out


class Scene:
    """All figures and data sources of the dashboard, and the methods that point them at a head.

    Args:
        cap: a capture (``.attention``, ``.residual``, ``.head_table()``).
        tokens: see :mod:`attnscope.views.labels`.
        ids: token ids for a tokenizer-like *tokens*.
        findings, checks: tables to show (see :mod:`attnscope.views.findings`).
        distances: head-to-head distances: a square array in capture head order or a DataFrame indexed like
            :func:`attnscope.analyses.similarity.head_distances`; ``None`` computes them when small.
        statistic: the statistic shown first in scores.
        tile: side of an overview tile in cells; reduced (with an AttnscopeWarning) for very many heads.
        lens_side: the selected map is pooled to at most this many cells a side (AttnscopeWarning).
        pattern: a declared attention pattern (see :func:`attnscope.analyses.leaks.declared_cells`) the veil shows
            on self-attention maps instead of the mask the call applied; ``None``: the applied mask.
    """

    def __init__(self, cap: Any, tokens: Any = None, *, ids: Any = None, findings: Any = None, checks: Any = None,
                 distances: Any = None, statistic: str = "entropy_ratio", tile: int = 24,
                 lens_side: int = 512, pattern: Any = None) -> None:
        self.pattern = pattern
        self.records = list(cap.attention)
        self.blocks = list(getattr(cap, "residual", []) or [])
        if not self.records:
            raise ShapeError("dashboard: the capture holds no attention record (did the model run inside the block?)")
        self.table = cap.head_table()
        names = [r.name for r in self.records] + [b.name for b in self.blocks]
        self.labels = tokens if isinstance(tokens, TokenLabels) else TokenLabels(tokens, ids=ids, names=names)
        self.labels.check_lengths(_axis_lengths(self.records, self.blocks))
        self.heads: list[HeadRef] = []
        rec_labels = _record_labels(self.records)
        for r, rec in enumerate(self.records):
            for j, h in enumerate(rec.heads):
                self.heads.append(HeadRef(len(self.heads), r, j, int(h), f"{rec_labels[r]} · head {h}"))
        self.rec_labels = rec_labels
        self.batch = min(rec.batch for rec in self.records)
        self.item, self.g, self.statistic = 0, 0, self._check_statistic(statistic)
        self.lens_side = int(lens_side)
        self.tile = self._tile_side(int(tile))
        self._warn_pooled_lens()
        self.scores = self._score_table()
        self.distances, self.twin_note = self._distances(cap, distances)
        self.tally = self._tally(cap, given=distances is not None)
        self._atlas_memo: dict[int, dict[str, list]] = {}
        self._veil_memo: dict[tuple[int, int, int], np.ndarray] = {}
        self.findings = as_tables(findings, "findings") or [("findings", as_frame(None))]
        self.checks = as_tables(checks, "checks") or [("checks", as_frame(None))]
        self._build()
        self.set_statistic(self.statistic)
        self.set_item(0)

    # ---------------------------------------------------------------- inputs
    def _check_statistic(self, name: str) -> str:
        if name not in STATISTICS:
            raise OptionError(f"statistic: expected one of {', '.join(STATISTICS)}, received {name!r}."
                              f"{suggest(name, STATISTICS)}")
        return name

    def _tile_side(self, tile: int) -> int:
        if tile < 2:
            raise OptionError(f"tile: expected a side of at least 2 cells, received {tile}")
        side = tile
        if len(self.heads) * tile * tile > ATLAS_PIXELS:
            side = max(4, int(math.sqrt(ATLAS_PIXELS / len(self.heads))))
        if side < tile:
            warnings.warn(f"atlas: {len(self.heads)} heads are drawn as {side}x{side} tiles instead of {tile}x{tile} "
                          f"to keep the page light; select a head to see its full map", AttnscopeWarning, stacklevel=4)
        return min(side, tile)

    def _warn_pooled_lens(self) -> None:
        long = [r for r in self.records if r.weights is not None and max(r.queries, r.keys) > self.lens_side]
        if long:
            n = max(max(r.queries, r.keys) for r in long)
            warnings.warn(f"lens: maps of up to {n} positions are shown pooled to {self.lens_side} cells a side "
                          f"(zoom keeps the token axes; hover shows the pooled mean); pass lens_side= to change",
                          AttnscopeWarning, stacklevel=4)

    def _score_table(self) -> pd.DataFrame:
        t = self.table.set_index(["call", "head"])
        keys = [(self.records[h.record].call, h.head) for h in self.heads]
        cols = [c for c in STATISTICS if c in t.columns]
        return t.reindex(keys)[cols].reset_index(drop=True)

    def _distances(self, cap: Any, distances: Any) -> tuple[np.ndarray | None, str]:
        n = len(self.heads)
        if n > TWIN_HEADS:
            warnings.warn(f"twins: {n} heads are too many for the distance matrix (at most {TWIN_HEADS}); "
                          f"capture fewer heads or layers to see it", AttnscopeWarning, stacklevel=4)
            return None, f"not drawn: {n} heads (at most {TWIN_HEADS})"
        note = "Jensen–Shannon distance of head maps"
        if distances is None:
            heads_by_shape: dict[tuple[int, ...], int] = {}
            for rec in self.records:
                if rec.weights is not None:
                    key = rec.weights.shape[:1] + rec.weights.shape[2:]  # (B, Tq, Tk): comparable maps
                    heads_by_shape[key] = heads_by_shape.get(key, 0) + len(rec.heads)
            if not heads_by_shape:
                return None, "not available: the capture kept statistics only"
            cost = sum(k * k * int(np.prod(shape)) // 2 for shape, k in heads_by_shape.items())
            if cost > AUTO_DISTANCE_CELLS:
                return None, "not computed here (large): pass distances="
            from attnscope.analyses.similarity import head_distances

            distances = head_distances(cap)
        else:
            note = "head-to-head distances (given)"
        if isinstance(distances, pd.DataFrame):
            want = [(self.records[h.record].call, self.records[h.record].name, h.head) for h in self.heads]
            frame = distances
            if frame.index.nlevels == 2:
                want = [(w[1], w[2]) for w in want]
            m = frame.reindex(index=want, columns=want).to_numpy(dtype=np.float32)
        else:
            m = np.asarray(distances, dtype=np.float32)
        if m.shape != (n, n):
            raise ShapeError(f"distances: expected a ({n}, {n}) matrix over the capture's heads, received {m.shape}")
        return m, note

    def _first_head(self, name: str, head: int) -> int | None:
        """The first kept head (capture order) of module *name* with the model's head index *head*."""
        return next((h.g for h in self.heads if self.records[h.record].name == name and h.head == head), None)

    def _tally(self, cap: Any, *, given: bool) -> list[Tally]:
        """The summary line: dead heads (:func:`~attnscope.analyses.heads.dead_heads`), duplicate heads (the
        pairs of :func:`~attnscope.analyses.heads.duplicate_heads` when the twins matrix was computed here, or
        given distances at most its default 0.1 apart), leaking heads (head table ``leak_mass`` above the
        tolerance of :func:`~attnscope.analyses.leaks.leak_summary`)."""
        from attnscope.analyses.heads import dead_heads, duplicate_heads
        from attnscope.analyses.leaks import DEFAULT_TOLERANCE

        dead = [g for g in dict.fromkeys(self._first_head(f.name, f.head) for f in dead_heads(cap)) if g is not None]
        out = [Tally("dead", tuple(dead), f"{len(dead)} dead")]
        if self.distances is None:
            out.append(Tally("duplicate", None, f"duplicate: not run ({self.twin_note})"))
        else:
            if given:
                close = np.argwhere(np.triu(self.distances <= 0.1, k=1))  # pairs (a, b), a < b
                pairs = [(int(a), int(b)) for a, b in close]
            else:
                pairs = [(self._first_head(p.name_a, p.head_a), self._first_head(p.name_b, p.head_b))
                         for p in duplicate_heads(cap)]
            twins = sorted({g for pair in pairs for g in pair if g is not None})
            out.append(Tally("duplicate", tuple(twins), f"{len(twins)} duplicate ({len(pairs)} "
                                                        f"pair{'s' * (len(pairs) != 1)})"))
        leak = self.scores["leak_mass"] if "leak_mass" in self.scores else pd.Series(dtype=float)
        if leak.notna().any():
            leaking = tuple(int(g) for g in np.flatnonzero(leak.to_numpy() > DEFAULT_TOLERANCE))
            out.append(Tally("leaking", leaking, f"{len(leaking)} leaking"))
        else:
            out.append(Tally("leaking", None, "leaking: not run (no leak mass in the head table)"))
        return out

    # ---------------------------------------------------------------- figures
    def _build(self) -> None:
        n_rec = len(self.records)
        width = max(len(r.heads) for r in self.records)
        cell = int(np.clip(440 / max(n_rec, width, 1), 8, 44))
        self.cell_px = cell
        grid_w, grid_h = max(420, 170 + width * cell + 40), 60 + n_rec * cell + 40

        # ---- shared per-head cells: hover, tap, scores colour
        self.cells_src = ColumnDataSource(dict(
            x=[h.slot + 0.5 for h in self.heads], y=[h.record + 0.5 for h in self.heads],
            g=[h.g for h in self.heads], head=[h.head for h in self.heads],
            record=[_short(self.rec_labels[h.record], 60) for h in self.heads],
            kind=[self.records[h.record].kind for h in self.heads],
            edge=[CROSS_EDGE if self.records[h.record].kind == "cross" else SELF_EDGE for h in self.heads],
            score=[0.0] * len(self.heads),
        ), name="as-cells")
        self.pick_src = ColumnDataSource(dict(x=[0.5], y=[0.5]), name="as-pick")

        heads_same = all(r.heads == self.records[0].heads for r in self.records)
        x_ticks = [j + 0.5 for j in range(width)]
        x_names = {j + 0.5: (f"h{self.records[0].heads[j]}" if heads_same else f"#{j}") for j in range(width)}
        y_ticks = [r + 0.5 for r in range(n_rec)]
        y_names = {r + 0.5: ("\u21c4 " + _short(self.rec_labels[r], 26)) if rec.kind == "cross" else _short(self.rec_labels[r])
                   for r, rec in enumerate(self.records)}

        def grid_figure(name: str, title: str, extra: int = 0) -> Any:
            f = figure(name=name, title=title, width=grid_w + extra, height=grid_h,
                       x_range=Range1d(0, width, bounds=(0, width)), y_range=Range1d(n_rec, 0, bounds=(0, n_rec)),
                       tools="pan,wheel_zoom,reset", toolbar_location="right", background_fill_color=BACKGROUND,
                       match_aspect=False)
            f.xaxis.ticker = FixedTicker(ticks=x_ticks)
            f.xaxis.major_label_overrides = x_names
            f.yaxis.ticker = FixedTicker(ticks=y_ticks)
            f.yaxis.major_label_overrides = y_names
            f.center = []  # no grid lines (fewer models to send and draw)
            f.xaxis.axis_label = "head"
            return f

        self.atlas_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[]), name="as-atlas-src")
        self.atlas_fig = grid_figure("as-atlas", "atlas: every head, tiles scaled to own max")
        self.atlas_mapper = LinearColorMapper(palette=WEIGHT_PALETTE, low=0, high=TILE_TOP, high_color=BACKGROUND)
        self.atlas_fig.image(image="image", x="x", y="y", dw="dw", dh="dh", source=self.atlas_src,
                             color_mapper=self.atlas_mapper)
        tiles = self.atlas_fig.rect(x="x", y="y", width=0.92, height=0.92, source=self.cells_src, fill_alpha=0,
                                    line_color="edge", line_width=1.5, name="as-atlas-cells")
        tiles.nonselection_glyph = None
        tiles.selection_glyph = None
        self.atlas_fig.rect(x="x", y="y", width=1.0, height=1.0, source=self.pick_src, fill_alpha=0,
                            line_color=PICK_COLOUR, line_width=3)
        self.atlas_fig.add_tools(TapTool(renderers=[tiles]), HoverTool(renderers=[tiles], tooltips=[
            ("record", "@record"), ("head", "@head"), ("kind", "@kind")]))

        # ---- scores
        self.score_mapper = LinearColorMapper(palette=SCORE_PALETTE, low=0, high=1, nan_color="#dddddd")
        self.scores_fig = grid_figure("as-scores", "scores", extra=70)
        cells = self.scores_fig.rect(x="x", y="y", width=1, height=1, source=self.cells_src,
                                     fill_color={"field": "score", "transform": self.score_mapper},
                                     line_color="edge", line_width=1, name="as-score-cells")
        cells.nonselection_glyph = None
        cells.selection_glyph = None
        self.scores_fig.rect(x="x", y="y", width=1.0, height=1.0, source=self.pick_src, fill_alpha=0,
                             line_color=PICK_COLOUR, line_width=3)
        self.scores_fig.add_layout(ColorBar(color_mapper=self.score_mapper, width=12), "right")
        self.scores_fig.add_tools(TapTool(renderers=[cells]), HoverTool(renderers=[cells], tooltips=[
            ("record", "@record"), ("head", "@head"), ("kind", "@kind"), ("value", "@score{0.0000}")]))

        # ---- lens + veil
        self.qlab_src = ColumnDataSource(dict(tok=[]), name="as-qlab")
        self.klab_src = ColumnDataSource(dict(tok=[]), name="as-klab")
        # one source for map and veil: a selection is one data change (one message to the browser)
        self.lens_src = ColumnDataSource(dict(image=[], veil=[], x=[], y=[], dw=[], dh=[], scale=[]),
                                         name="as-lens-src")
        self.lens_mapper = LinearColorMapper(palette=WEIGHT_PALETTE, low=0, high=1, nan_color=BACKGROUND)
        self.lens_fig = figure(name="as-lens", title="lens", width=600, height=600,
                               x_range=Range1d(-0.5, 0.5), y_range=Range1d(0.5, -0.5),
                               tools="pan,wheel_zoom,box_zoom,reset,save", toolbar_location="right",
                               background_fill_color=BACKGROUND)
        img = self.lens_fig.image(image="image", x="x", y="y", dw="dw", dh="dh", source=self.lens_src,
                                  color_mapper=self.lens_mapper, name="as-lens-image")
        self.veil = self.lens_fig.image(image="veil", x="x", y="y", dw="dw", dh="dh", source=self.lens_src,
                                        color_mapper=LinearColorMapper(palette=VEIL_PALETTE, low=0, high=2),
                                        name="as-veil")
        for axis, src, label in ((self.lens_fig.xaxis, self.klab_src, "key"),
                                 (self.lens_fig.yaxis, self.qlab_src, "query")):
            axis.ticker = BasicTicker(min_interval=1, desired_num_ticks=24, num_minor_ticks=0)
            axis.formatter = CustomJSTickFormatter(args=dict(src=src), code=_TICK_TOKEN)
            axis.axis_label = label
        self.lens_fig.xaxis.major_label_orientation = math.pi / 2
        self.lens_fig.title.text_font_size = "11px"  # long module names: the title must fit the figure
        self.lens_fig.center = []  # no grid lines (fewer models to send and draw)
        self.lens_fig.add_layout(ColorBar(color_mapper=self.lens_mapper, width=12), "right")
        self.lens_fig.add_tools(HoverTool(renderers=[img], tooltips=[
            ("query", "$y{tok}"), ("key", "$x{tok}"), ("weight", "@image{w}")], formatters={
            "$y": CustomJSHover(args=dict(src=self.qlab_src), code=_TOKEN_AT),
            "$x": CustomJSHover(args=dict(src=self.klab_src), code=_TOKEN_AT),
            "@image": CustomJSHover(args=dict(src=self.lens_src), code=_WEIGHT_AT)}))

        # ---- stream
        n_blocks = len(self.blocks)
        t_max = max([b.norms.shape[-1] for b in self.blocks] or [1])
        self.stream_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[], name=[], tok=[]),
                                           name="as-stream-src")
        self.stream_pick_src = ColumnDataSource(dict(x=[], y=[], w=[]), name="as-stream-pick")
        self.stream_mapper = LinearColorMapper(palette=STREAM_PALETTE, low=0, high=1, nan_color=BACKGROUND)
        self.stream_fig = figure(name="as-stream", width=600, height=int(np.clip(70 + 22 * n_blocks, 180, 520)),
                                 title="stream: residual-stream norm per block and position" if n_blocks
                                 else "stream: no residual stream captured",
                                 x_range=Range1d(-0.5, t_max - 0.5), y_range=Range1d(max(n_blocks, 1), 0),
                                 tools="pan,wheel_zoom,reset", toolbar_location="right",
                                 background_fill_color=BACKGROUND)
        simg = self.stream_fig.image(image="image", x="x", y="y", dw="dw", dh="dh", source=self.stream_src,
                                     color_mapper=self.stream_mapper)
        self.stream_fig.rect(x="x", y="y", width="w", height=1, source=self.stream_pick_src, fill_alpha=0,
                             line_color=PICK_COLOUR, line_width=2)
        self.stream_fig.yaxis.ticker = FixedTicker(ticks=[b + 0.5 for b in range(n_blocks)])
        self.stream_fig.yaxis.major_label_overrides = {b + 0.5: _short(blk.name or "(model)")
                                                       for b, blk in enumerate(self.blocks)}
        self.stream_fig.xaxis.axis_label = "position"
        self.stream_fig.center = []  # no grid lines (fewer models to send and draw)
        self.stream_fig.add_layout(ColorBar(color_mapper=self.stream_mapper, width=12), "right")
        self.stream_fig.add_tools(HoverTool(renderers=[simg], tooltips=[
            ("block", "@name"), ("position", "$x{tok}"), ("norm", "@image{0.000}")],
            formatters={"$x": CustomJSHover(args=dict(src=self.stream_src), code=_STREAM_AT)}))

        # ---- twins: heads ordered by clusters (average linkage) so look-alikes sit together; labelled axes
        n = len(self.heads)
        self.twin_order = _cluster_order(self.distances) if self.distances is not None else list(range(n))
        self.twin_pos = [0] * n
        for at, g in enumerate(self.twin_order):
            self.twin_pos[g] = at
        self.glab_src = ColumnDataSource(dict(tok=[_short(self.heads[g].label, 48) for g in self.twin_order]),
                                         name="as-glab")
        self.twin_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[]), name="as-twin-src")
        self.twin_pick_src = ColumnDataSource(dict(x=[], y=[], w=[], h=[]), name="as-twin-pick")
        twin_top = 1.0 if self.distances is None or not np.isfinite(self.distances).any() else max(
            float(np.nanmax(self.distances)), 1e-6)
        self.twin_mapper = LinearColorMapper(palette=TWIN_PALETTE, low=0, high=twin_top, nan_color="#dddddd")
        self.twins_fig = figure(name="as-twins", width=480, height=480, title=f"twins: {self.twin_note}",
                                x_range=Range1d(0, max(n, 1)), y_range=Range1d(max(n, 1), 0),
                                tools="pan,wheel_zoom,reset", toolbar_location="right",
                                background_fill_color=BACKGROUND)
        timg = self.twins_fig.image(image="image", x="x", y="y", dw="dw", dh="dh", source=self.twin_src,
                                    color_mapper=self.twin_mapper)
        self.twins_fig.rect(x="x", y="y", width="w", height="h", source=self.twin_pick_src, fill_alpha=0,
                            line_color=PICK_COLOUR, line_width=1.5)
        every = max(1, -(-n // 36))  # at most 36 tick labels per axis; hover names every head
        ticks = [at + 0.5 for at in range(0, n, every)]
        names = {at + 0.5: self._compact(self.twin_order[at]) for at in range(0, n, every)}
        for ax, text in ((self.twins_fig.xaxis, "head (ordered by clusters)"),
                         (self.twins_fig.yaxis, "head (layer.head)")):
            ax.ticker = FixedTicker(ticks=ticks)
            ax.major_label_overrides = names
            ax.axis_label = text
            ax.major_label_text_font_size = "8px" if n > 24 else "10px"
        self.twins_fig.xaxis.major_label_orientation = 1.2
        self.twins_fig.center = []  # no grid lines (fewer models to send and draw)
        self.twins_fig.add_layout(ColorBar(color_mapper=self.twin_mapper, width=12), "right")
        self.twins_fig.add_tools(HoverTool(renderers=[timg], tooltips=[
            ("head", "$y{lab}"), ("with", "$x{lab}"), ("distance", "@image{0.000}")], formatters={
            "$y": CustomJSHover(args=dict(src=self.glab_src), code=_TOKEN_AT.replace("Math.round(value)",
                                                                                     "Math.floor(value)")),
            "$x": CustomJSHover(args=dict(src=self.glab_src), code=_TOKEN_AT.replace("Math.round(value)",
                                                                                     "Math.floor(value)"))}))
        if self.distances is not None:
            order = np.asarray(self.twin_order)
            self.twin_src.data = dict(image=[self.distances[np.ix_(order, order)]], x=[0], y=[0], dw=[n], dh=[n])

        # ---- findings and the caution line
        self.findings_div = Div(name="as-findings", width=560, styles={"overflow": "auto", "max-height": "460px"},
                                text=_TABLE_STYLE + "".join(html_table(frame, title)
                                                            for title, frame in self.findings + self.checks))
        self.caution_div = Div(name="as-caution", text=f"<div class='as-caution'>{CAUTION}</div>", width=1200,
                               styles={"color": "#7a4b00", "font-size": "12px"})
        self.layout = column(self.caution_div, row(self.atlas_fig, self.lens_fig), row(self.scores_fig,
                             self.stream_fig), row(self.twins_fig, self.findings_div), name="as-layout")

    # ---------------------------------------------------------------- updates
    def head_index(self, record: int | str, head: int) -> int:
        """The global index of (record, model head index); *record* is an index or a record name."""
        if isinstance(record, str):
            names = [r.name for r in self.records]
            if record not in names:
                raise OptionError(f"no attention record named {record!r}.{suggest(record, names)}")
            record = names.index(record)
        for h in self.heads:
            if h.record == record and h.head == head:
                return h.g
        kept = self.records[record].heads if 0 <= record < len(self.records) else ()
        raise OptionError(f"record {record} has no kept head {head}; kept heads: {list(kept)}")

    def twin_row(self, y: float | None) -> int | None:
        """The head of the twins matrix row at data coordinate *y* (None outside the matrix)."""
        if self.distances is None or y is None or not 0 <= y < len(self.heads):
            return None
        return self.twin_order[int(y)]

    def _compact(self, g: int) -> str:
        """Short axis name of head *g*: record number (call order) and head, ``"3.7"``."""
        h = self.heads[g]
        return f"{h.record}.{h.head}"

    def lens_arrays(self, g: int, item: int, *, labels: bool = True) -> dict[str, Any]:
        """The selected map for display: weights (pooled past lens_side), veil codes, labels, title.

        ``labels=False`` leaves the token labels out (``q`` and ``k`` are None), for callers that store them once
        per record.
        """
        h = self.heads[g]
        rec = self.records[h.record]
        item = min(item, rec.batch - 1)
        tq, tk = rec.queries, rec.keys
        q = self.labels.axis(rec.name, tq, item, axis="q", kind=rec.kind, offset=rec.query_offset) if labels else None
        k = self.labels.axis(rec.name, tk, item, axis="k", kind=rec.kind) if labels else None
        stat = self.scores.iloc[g]
        if rec.weights is None:
            return dict(image=np.full((1, 1), np.nan, dtype=np.float32), veil=np.zeros((1, 1), np.uint8),
                        tq=tq, tk=tk, q=q, k=k, top=1.0,
                        title=f"{h.label}: statistics only (capture with keep='maps' to see the map)")
        w = rec.weights[item, h.slot]  # (Tq, Tk)
        declared = self.pattern is not None and rec.kind == "self"
        if declared:  # the veil shows the user's declared pattern: grey where it forbids, magenta where weight lands
            allowed = declared_cells(rec, self.pattern)[item]
        else:
            allowed = None if rec.allowed is None else np.asarray(rec.allowed_full()[item, h.slot])
        pooled = max(tq, tk) > self.lens_side
        # a veil without leaks depends on the mask alone: pooled once per mask slice, shared by the heads using it
        key = None
        if pooled and allowed is not None and not declared:
            leaks = np.greater(w > LEAK_FLOOR, allowed).any()  # weight above the floor where the mask forbids
            key = None if leaks else (h.record, item if rec.allowed.shape[0] > 1 else 0,
                                      h.slot if rec.allowed.shape[1] > 1 else 0)
        veil = self._veil_memo.get(key) if key is not None else None
        if veil is None:
            veil = mask_codes(w, allowed)
            if pooled:
                veil = pool(veil, self.lens_side, how="max").astype(np.uint8)
            if key is not None:
                self._veil_memo[key] = veil
        if pooled:
            w = pool(w, self.lens_side)
        finite = w[np.isfinite(w)]
        top = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
        mask_note = "no mask applied" if rec.allowed is None else (
            f"leak {stat.get('leak_mass', float('nan')):.3g}" + (", causal" if rec.causal else ""))
        if declared:
            outside = float(np.where(allowed, 0.0, np.nan_to_num(rec.weights[item, h.slot])).sum(-1).mean())
            mask_note += f" · veil: declared pattern, outside {outside:.3g}"
        title = (f"{h.label} · item {item} · {rec.kind} · {mask_note}"
                 + (f" · pooled to {w.shape[0]}x{w.shape[1]}" if pooled else ""))
        return dict(image=np.ascontiguousarray(w, dtype=np.float32), veil=veil, tq=tq, tk=tk, q=q, k=k, top=top,
                    title=title)

    def marks(self, g: int) -> dict[str, dict[str, list]]:
        """Data of the selection marks in atlas/scores, stream and twins for head *g*."""
        h = self.heads[g]
        rec = self.records[h.record]
        block = max((b for b, blk in enumerate(self.blocks)
                     if rec.name == blk.name or rec.name.startswith(blk.name + ".") or not blk.name),
                    key=lambda b: len(self.blocks[b].name), default=None)
        stream = dict(x=[], y=[], w=[])
        if block is not None:
            t = self.blocks[block].norms.shape[-1]
            stream = dict(x=[(t - 1) / 2], y=[block + 0.5], w=[t])
        n = len(self.heads)
        twins = dict(x=[], y=[], w=[], h=[])
        if self.distances is not None:
            at = self.twin_pos[g]
            twins = dict(x=[n / 2, at + 0.5], y=[at + 0.5, n / 2], w=[n, 1], h=[1, n])
        return dict(pick=dict(x=[h.slot + 0.5], y=[h.record + 0.5]), stream=stream, twins=twins)

    def select(self, g: int, item: int | None = None) -> None:
        """Point lens, veil and every selection mark at head *g* (global index) of batch item *item*."""
        if not 0 <= g < len(self.heads):
            raise OptionError(f"head: expected a head index in 0..{len(self.heads) - 1}, received {g}")
        if item is not None and item != self.item:
            self.set_item(item)
        self.g = g
        a = self.lens_arrays(g, self.item)
        # only what changed is assigned: each assignment is one message to the browser
        for src, tok in ((self.qlab_src, a["q"]), (self.klab_src, a["k"])):
            if list(src.data["tok"]) != tok:
                src.data = dict(tok=tok)
        self.lens_src.data = dict(image=[a["image"]], veil=[a["veil"]], scale=[1.0], x=[-0.5], y=[-0.5],
                                  dw=[a["tk"]], dh=[a["tq"]])
        self.lens_mapper.high = a["top"]
        self._frame_lens(a["tq"], a["tk"])
        self.lens_fig.title.text = a["title"]
        m = self.marks(g)
        for src, data in ((self.pick_src, m["pick"]), (self.stream_pick_src, m["stream"]),
                          (self.twin_pick_src, m["twins"])):
            if {k: list(v) for k, v in src.data.items()} != data:
                src.data = data
        if list(self.cells_src.selected.indices) != [g]:
            self.cells_src.selected.indices = [g]

    def _frame_lens(self, tq: int, tk: int) -> None:
        xr, yr = self.lens_fig.x_range, self.lens_fig.y_range
        if (xr.start, xr.end, yr.start, yr.end) != (-0.5, tk - 0.5, tq - 0.5, -0.5):
            xr.update(start=-0.5, end=tk - 0.5, bounds=(-0.5, tk - 0.5))
            yr.update(start=tq - 0.5, end=-0.5, bounds=(-0.5, tq - 0.5))

    def atlas_data(self, item: int) -> dict[str, list]:
        """All heads of batch item *item* as one mosaic image: each head a ``tile x tile`` block of uint8 codes.

        One image (not one per head) keeps the document small and quick to draw. Each block is the head's map
        pooled to at most ``tile`` cells a side, scaled to its own maximum and repeated up to the block size;
        one background row and column (code 255) separate neighbouring blocks.
        """
        if item in self._atlas_memo:  # the mosaic of an item never changes: built once
            return {key: list(v) for key, v in self._atlas_memo[item].items()}
        side, n_rec = self.tile, len(self.records)
        width = max(len(r.heads) for r in self.records)
        step = side + 1
        mosaic = np.full((n_rec * step, width * step), TILE_TOP + 1, dtype=np.uint8)
        for h in self.heads:
            rec = self.records[h.record]
            if rec.weights is None:
                continue
            tile = quantise_tile(pool(rec.weights[min(item, rec.batch - 1), h.slot], side))
            rows = np.arange(side) * tile.shape[0] // side  # nearest cell of the pooled tile for each pixel
            cols = np.arange(side) * tile.shape[1] // side
            r0, c0 = h.record * step, h.slot * step
            mosaic[r0:r0 + side, c0:c0 + side] = tile[rows[:, None], cols[None, :]]
        self._atlas_memo[item] = dict(image=[mosaic], x=[0], y=[0], dw=[width], dh=[n_rec])
        return {key: list(v) for key, v in self._atlas_memo[item].items()}

    def tile_of(self, mosaic: np.ndarray, g: int) -> np.ndarray:
        """The ``tile x tile`` block of head *g* in an atlas mosaic."""
        h, step = self.heads[g], self.tile + 1
        return mosaic[h.record * step:h.record * step + self.tile, h.slot * step:h.slot * step + self.tile]

    def stream_data(self, item: int) -> tuple[dict[str, list], float, float]:
        """Residual norms of every block for batch item *item*, and their range for the colour bar."""
        data: dict[str, list] = dict(image=[], x=[], y=[], dw=[], dh=[], name=[], tok=[])
        hi = -math.inf
        for b, blk in enumerate(self.blocks):
            norms = np.asarray(blk.norms[min(item, blk.norms.shape[0] - 1)], dtype=np.float32)[None, :]  # (1, T)
            t = norms.shape[-1]
            data["image"].append(norms)
            data["x"].append(-0.5)
            data["y"].append(b)
            data["dw"].append(t)
            data["dh"].append(1)
            data["name"].append(blk.name or "(model)")
            data["tok"].append(self.labels.axis(blk.name, t, item, axis="t"))
            finite = norms[np.isfinite(norms)]
            if finite.size:
                hi = max(hi, float(finite.max()))
        if not math.isfinite(hi):
            hi = 1.0
        return data, 0.0, hi if hi > 0 else 1.0  # norms are >= 0: a zero base keeps small spreads small

    def set_item(self, item: int) -> None:
        """Show batch item *item* in atlas, stream and lens."""
        if not 0 <= item < self.batch:
            raise OptionError(f"item: expected a batch item in 0..{self.batch - 1}, received {item}")
        self.item = item
        self.atlas_src.data = self.atlas_data(item)
        data, lo, hi = self.stream_data(item)
        self.stream_src.data = data
        self.stream_mapper.update(low=lo, high=hi)
        self.select(self.g)

    def score_values(self, name: str) -> tuple[list[float], float, float]:
        """Values of statistic *name* per head, and the colour-bar range."""
        self._check_statistic(name)
        if name not in self.scores.columns:
            raise OptionError(f"statistic {name!r} is not in the capture's head table")
        v = self.scores[name].to_numpy(dtype=np.float64)
        finite = v[np.isfinite(v)]
        lo = 0.0
        hi = float(finite.max()) if finite.size else 1.0
        if name in ("entropy_ratio", "sink_mass", "max_weight"):
            hi = 1.0
        return [float(x) for x in v], lo, hi if hi > lo else lo + 1.0

    def set_statistic(self, name: str) -> None:
        """Colour scores by statistic *name*."""
        values, lo, hi = self.score_values(name)
        self.statistic = name
        self.cells_src.data["score"] = values
        self.score_mapper.update(low=lo, high=hi)
        self.scores_fig.title.text = f"scores: {name} per head"

    def set_veil(self, visible: bool) -> None:
        """Show or hide the mask veil over the lens."""
        self.veil.visible = bool(visible)

    def __repr__(self) -> str:
        return f"Scene(records={len(self.records)}, heads={len(self.heads)}, item={self.item}, head={self.g})"


_TABLE_STYLE = """<style>
.as-table { border-collapse: collapse; font-size: 12px; margin-bottom: 10px; }
.as-table th, .as-table td { border-bottom: 1px solid #ddd; padding: 2px 8px; text-align: left; }
.as-table-title { font-weight: 600; margin: 6px 0 2px 0; }
.as-table-empty { color: #777; font-size: 12px; margin-bottom: 10px; }
</style>"""
