"""The standalone page: the dashboard's views in one offline HTML file, interactive without a kernel.

Every head's map is stored in the page as uint16 codes with one scale per map (``weight ≈ code * scale``,
error at most half a code step), written as two byte planes (high bytes, then low bytes: they compress better
than interleaved pairs); Bokeh JS callbacks turn the chosen head's codes back into weights and put them in the
lens. Mask veils are stored once per distinct veil (a causal model's heads share one). BokehJS is inlined, so the
file opens from disk with no network.

>>> import torch, attnscope, tempfile, pathlib
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> x = torch.randn(1, 3, 8)
>>> with attnscope.capture(mha) as cap:
...     _ = mha(x, x, x)
>>> path = export_html(cap, pathlib.Path(tempfile.mkdtemp()) / "heads.html", tokens=["a", "b", "c"])
>>> "cdn.bokeh.org" in path.read_text()
False
"""

from __future__ import annotations

import math
import os
import warnings
from pathlib import Path
from typing import Any

import numpy as np
from bokeh.embed import file_html
from bokeh.layouts import column, row
from bokeh.models import Button, CheckboxGroup, ColumnDataSource, CustomJS, Div, Select
from bokeh.resources import INLINE

from attnscope.errors import AttnscopeWarning, OptionError
from attnscope.views.scene import STATISTICS, Scene, Tally
from attnscope.views.tiles import quantise_weights

__all__ = ["export_html", "page_layout"]

#: Bytes of map data (before compression) a page holds at most; past it the maps are pooled further.
PAGE_BYTES = 64_000_000

# One function shared by every callback: point lens, veil and marks at (head, item) from the stored maps.
_SELECT_JS = """
function show(g, item) {
  const G = cells.data.g.length;
  const idx = item * G + g;
  const L = vault.data;
  const tq = L.tq[idx], tk = L.tk[idx];
  const geom = {x: [-0.5], y: [-0.5], dw: [tk], dh: [tq]};
  // codes (high byte plane, low byte plane) back to weights (float32), so colour bar and hover read weights
  const planes = L.image[idx], scale = L.scale[idx];
  const shape = [planes.shape[1], planes.shape[2]], n = shape[0] * shape[1];
  const w = new Float32Array(n);
  for (let i = 0; i < n; i++) w[i] = (planes[i] * 256 + planes[n + i]) * scale;
  const image = Bokeh.require('core/util/ndarray').ndarray(w, {shape: shape});
  lens.data = Object.assign({image: [image], veil: [veils.data.veil[L.veil_at[idx]]], scale: [1.0]}, geom);
  const li = item * R + L.record[idx];
  qlab.data = {tok: names.data.q[li]};
  klab.data = {tok: names.data.k[li]};
  mapper.high = L.top[idx];
  lens_fig.x_range.setv({start: -0.5, end: tk - 0.5, bounds: [-0.5, tk - 0.5]});
  lens_fig.y_range.setv({start: tq - 0.5, end: -0.5, bounds: [-0.5, tq - 0.5]});
  lens_fig.title.text = L.title[idx];
  pick.data = {x: [cells.data.x[g]], y: [cells.data.y[g]]};
  const M = marks.data;
  stream_pick.data = M.sw[g] > 0 ? {x: [M.sx[g]], y: [M.sy[g]], w: [M.sw[g]]} : {x: [], y: [], w: []};
  twin_pick.data = has_twins ? {x: [G / 2, twin_pos[g] + 0.5], y: [twin_pos[g] + 0.5, G / 2], w: [G, 1], h: [1, G]}
                             : {x: [], y: [], w: [], h: []};
  if (cells.selected.indices.length !== 1 || cells.selected.indices[0] !== g) cells.selected.indices = [g];
  if (head_select.value !== String(g)) head_select.value = String(g);
}
function show_item(item) {
  const keep = (src, vault_src) => {
    const out = {};
    const V = vault_src.data;
    for (const key of Object.keys(V)) {
      if (key === 'item') continue;
      out[key] = [];
      for (let i = 0; i < V.item.length; i++) if (V.item[i] === item) out[key].push(V[key][i]);
    }
    src.data = out;
  };
  keep(atlas, atlas_vault);
  keep(stream, stream_vault);
  stream_mapper.setv({low: stream_range.data.low[item], high: stream_range.data.high[item]});
}
"""


def _vaults(scene: Scene) -> dict[str, ColumnDataSource]:
    """Every map, tile, label and mark the page may show, laid out for the JS callbacks."""
    lens: dict[str, list] = dict(image=[], veil_at=[], scale=[], top=[], tq=[], tk=[], record=[], title=[])
    veils: dict[bytes, int] = {}  # distinct veils (shape and codes) -> position in the veil vault
    veil_list: list[np.ndarray] = []
    names: dict[str, list] = dict(q=[], k=[])
    atlas: dict[str, list] = dict(image=[], x=[], y=[], dw=[], dh=[], item=[])
    stream: dict[str, list] = dict(image=[], x=[], y=[], dw=[], dh=[], name=[], tok=[], item=[])
    stream_range: dict[str, list] = dict(low=[], high=[])
    for item in range(scene.batch):
        for h in scene.heads:
            a = scene.lens_arrays(h.g, item, labels=False)
            codes, scale = quantise_weights(a["image"])  # (Tq', Tk') uint16
            lens["image"].append(np.stack([codes >> 8, codes & 0xFF]).astype(np.uint8))  # (2, Tq', Tk')
            key = repr(a["veil"].shape).encode() + a["veil"].tobytes()
            if key not in veils:
                veils[key] = len(veil_list)
                veil_list.append(a["veil"])
            lens["veil_at"].append(veils[key])
            lens["scale"].append(scale)
            lens["top"].append(a["top"])
            lens["tq"].append(a["tq"])
            lens["tk"].append(a["tk"])
            lens["record"].append(h.record)
            lens["title"].append(a["title"])
        for r, rec in enumerate(scene.records):
            b = min(item, rec.batch - 1)
            names["q"].append(scene.labels.axis(rec.name, rec.queries, b, axis="q", kind=rec.kind,
                                                offset=rec.query_offset))
            names["k"].append(scene.labels.axis(rec.name, rec.keys, b, axis="k", kind=rec.kind))
        tiles = scene.atlas_data(item)
        for key, values in tiles.items():
            atlas[key].extend(values)
        atlas["item"].extend([item] * len(tiles["image"]))
        data, lo, hi = scene.stream_data(item)
        for key, values in data.items():
            stream[key].extend(values)
        stream["item"].extend([item] * len(data["image"]))
        stream_range["low"].append(lo)
        stream_range["high"].append(hi)
    marks: dict[str, list] = dict(sx=[], sy=[], sw=[])
    for h in scene.heads:
        m = scene.marks(h.g)["stream"]
        marks["sx"].append(m["x"][0] if m["x"] else 0.0)
        marks["sy"].append(m["y"][0] if m["y"] else 0.0)
        marks["sw"].append(m["w"][0] if m["w"] else 0)
    scores = {name: scene.score_values(name)[0] for name in STATISTICS if name in scene.scores.columns}
    ranges = {name: list(scene.score_values(name)[1:]) for name in scores}
    return dict(vault=ColumnDataSource(lens, name="as-vault"), veils=ColumnDataSource(dict(veil=veil_list),
                                                                                      name="as-veil-vault"),
                names=ColumnDataSource(names, name="as-names"),
                atlas_vault=ColumnDataSource(atlas, name="as-atlas-vault"),
                stream_vault=ColumnDataSource(stream, name="as-stream-vault"),
                stream_range=ColumnDataSource(stream_range, name="as-stream-range"),
                marks=ColumnDataSource(marks, name="as-marks"),
                score_vault=ColumnDataSource(scores, name="as-score-vault"),
                score_range=ColumnDataSource({k: v for k, v in ranges.items()}, name="as-score-range"))


def _tally_button(tally: Tally, head_select: Select) -> Button:
    """A summary item: a click selects the next flagged head through the head chooser (cycling)."""
    button = Button(label=tally.text, disabled=not tally.heads, name=f"as-tally-{tally.kind}",
                    css_classes=[f"as-tally-{tally.kind}"], width_policy="min")
    button.js_on_event("button_click", CustomJS(args=dict(heads=list(tally.heads or ()), head_select=head_select),
                                                code="""
const at = heads.indexOf(Number(head_select.value));
if (heads.length > 0) head_select.value = String(heads[(at + 1) % heads.length]);"""))
    return button


def _lens_side_for(cap: Any, lens_side: int, max_bytes: int) -> int:
    """The lens side that keeps the stored maps (uint16 codes + uint8 veil, 3 bytes a cell) under *max_bytes*."""
    def size(side: int) -> int:
        total = 0
        for rec in cap.attention:
            if rec.weights is not None:
                b, h, tq, tk = rec.weights.shape
                total += b * h * min(tq, side) * min(tk, side) * 3
        return total

    side = lens_side
    while side > 8 and size(side) > max_bytes:
        side = int(side / math.sqrt(2))
    if side < lens_side:
        warnings.warn(f"export_html: maps are stored pooled to {side} cells a side to keep the page under "
                      f"{max_bytes / 1e6:.0f} MB of map data; pass max_bytes= to keep more", AttnscopeWarning,
                      stacklevel=3)
    return side


def export_html(cap: Any, path: str | os.PathLike, tokens: Any = None, *, ids: Any = None, findings: Any = None,
                checks: Any = None, distances: Any = None, statistic: str = "entropy_ratio", head: int = 0,
                title: str = "attnscope dashboard", tile: int = 24, lens_side: int = 512,
                max_bytes: int = PAGE_BYTES) -> Path:
    """Write the dashboard's views as one self-contained HTML file (inline BokehJS, works offline).

    >>> export_html(cap, "heads.html", tokens=["the", "cat", "sat"])    # doctest: +SKIP
    PosixPath('heads.html')

    Args:
        cap: a capture from :func:`attnscope.capture` (or :func:`attnscope.load`); a tracker from
            :func:`attnscope.track` gets the training-run page (``statistic``, ``head`` and ``title`` apply).
        path: file to write.
        tokens, ids, findings, checks, distances, statistic, tile: as for :func:`attnscope.dashboard`.
        head: the head selected when the page opens.
        title: the page title (escaped).
        lens_side: maps are pooled past this many positions.
        max_bytes: most bytes of map data to store; past it the maps are pooled further (AttnscopeWarning).

    Returns:
        The path written.
    """
    if type(cap).__name__ == "Tracker":  # a training run (attnscope.track): its own page
        from attnscope.views.run_board import export_run_html

        return export_run_html(cap, path, statistic=statistic, head=head,
                               title="attnscope training run" if title == "attnscope dashboard" else title)
    page = page_layout(cap, tokens, ids=ids, findings=findings, checks=checks, distances=distances,
                       statistic=statistic, head=head, tile=tile, lens_side=lens_side, max_bytes=max_bytes)
    out = Path(path)
    out.write_text(file_html(page, INLINE, title=title), encoding="utf-8")
    return out


def page_layout(cap: Any, tokens: Any = None, *, ids: Any = None, findings: Any = None, checks: Any = None,
                distances: Any = None, statistic: str = "entropy_ratio", head: int = 0, tile: int = 24,
                lens_side: int = 512, max_bytes: int = PAGE_BYTES) -> Any:
    """The page's Bokeh layout (controls, summary line, views, every stored map and the JS callbacks), unwritten.

    :func:`export_html` writes it with ``bokeh.embed.file_html``; the arguments are the same.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 3, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> page_layout(cap).name
    'as-page'
    """
    if max_bytes <= 0:
        raise OptionError(f"max_bytes: expected a positive number of bytes, received {max_bytes}")
    side = _lens_side_for(cap, lens_side, max_bytes)
    scene = Scene(cap, tokens, ids=ids, findings=findings, checks=checks, distances=distances,
                  statistic=statistic, tile=tile, lens_side=side)
    if head != scene.g:  # the scene opens on head 0
        scene.select(head)
    v = _vaults(scene)
    head_select = Select(title="head", options=[(str(h.g), h.label) for h in scene.heads], value=str(scene.g),
                         width=420, name="as-head-select")
    item_select = Select(title="batch item", options=[(str(b), f"item {b}") for b in range(scene.batch)],
                         value="0", width=140, name="as-item-select")
    stat_select = Select(title="scores", options=[s for s in STATISTICS if s in scene.scores.columns],
                         value=scene.statistic, width=200, name="as-stat-select")
    veil_box = CheckboxGroup(labels=["mask veil (grey: forbidden, magenta: leak)"], active=[0], name="as-veil-box")
    args = dict(cells=scene.cells_src, lens=scene.lens_src, qlab=scene.qlab_src,
                klab=scene.klab_src, mapper=scene.lens_mapper, lens_fig=scene.lens_fig, pick=scene.pick_src,
                stream_pick=scene.stream_pick_src, twin_pick=scene.twin_pick_src, has_twins=scene.distances is not None,
                twin_pos=scene.twin_pos, twin_order=scene.twin_order,
                head_select=head_select, item_select=item_select, atlas=scene.atlas_src, stream=scene.stream_src,
                stream_mapper=scene.stream_mapper, R=len(scene.records), **v)
    on_tap = CustomJS(args=args, code=_SELECT_JS + """
const picked = cells.selected.indices;
if (picked.length > 0) show(picked[picked.length - 1], Number(item_select.value));
else cells.selected.indices = [Number(head_select.value)];""")
    scene.cells_src.selected.js_on_change("indices", on_tap)
    scene.twins_fig.js_on_event("tap", CustomJS(args=args, code=_SELECT_JS + """
const at = Math.floor(cb_obj.y);
if (has_twins && at >= 0 && at < cells.data.g.length) show(twin_order[at], Number(item_select.value));"""))
    head_select.js_on_change("value", CustomJS(args=args, code=_SELECT_JS + """
show(Number(head_select.value), Number(item_select.value));"""))
    item_select.js_on_change("value", CustomJS(args=args, code=_SELECT_JS + """
const item = Number(item_select.value); show_item(item); show(Number(head_select.value), item);"""))
    stat_select.js_on_change("value", CustomJS(args=dict(cells=scene.cells_src, mapper=scene.score_mapper,
                                                         fig=scene.scores_fig, values=v["score_vault"],
                                                         ranges=v["score_range"]), code="""
const name = this.value;
const data = Object.assign({}, cells.data); data.score = values.data[name]; cells.data = data;
mapper.setv({low: ranges.data[name][0], high: ranges.data[name][1]});
fig.title.text = 'scores: ' + name + ' per head';"""))
    veil_box.js_on_change("active", CustomJS(args=dict(veil=scene.veil), code="veil.visible = this.active.includes(0);"))
    tally_row = row(Div(text="flagged heads:", name="as-tally-label"), *[_tally_button(t, head_select)
                                                                       for t in scene.tally], name="as-tally")
    return column(tally_row, row(head_select, item_select, stat_select, veil_box), scene.layout, name="as-page")
