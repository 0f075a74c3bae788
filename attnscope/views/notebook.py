"""The notebook dashboard: ipywidgets controls around the Bokeh views of :mod:`attnscope.views.scene`.

The widget is state plus observers: ``head``, ``item``, ``statistic`` and ``veil`` are traits; changing one (from
a control, a tap on a tile or in code) points the Bokeh data sources at the new selection. The full map of a
head travels to the browser only when that head is selected; the first render sends pooled uint8 tiles.

BokehJS comes with the widget: when the dashboard is displayed it first publishes the inline BokehJS bundle
(guarded, so a page that already has this BokehJS version skips it), so no ``output_notebook`` cell is needed
and nothing is fetched from the network.

>>> import torch, attnscope
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> x = torch.randn(1, 4, 8)
>>> with attnscope.capture(mha) as cap:
...     _ = mha(x, x, x)
>>> board = dashboard(cap, tokens=["<s>", "a", "b", "c"])
>>> board.head = 1
>>> board.scene.lens_src.data["image"][0].shape
(4, 4)
"""

from __future__ import annotations

import contextlib
import html
import json
from collections.abc import Iterator
from typing import Any

import ipywidgets as W
import traitlets
from bokeh import __version__ as BOKEH_VERSION
from bokeh.events import Tap
from jupyter_bokeh.widgets import BokehModel

from attnscope.errors import OptionError
from attnscope.views.scene import STATISTICS, Scene

__all__ = ["Dashboard", "bokehjs_loader", "dashboard", "load_bokehjs"]

_JS_MIME = "application/javascript"
_LOAD_MIME = "application/vnd.bokehjs_load.v0+json"
_BOKEHJS_COMPONENTS = ("bokeh", "bokeh-widgets")
_loader_cache: str | None = None


def bokehjs_loader() -> str:
    """JavaScript that runs the inline BokehJS bundle unless this BokehJS version is already in the page."""
    global _loader_cache
    if _loader_cache is None:
        from bokeh.resources import Resources

        parts = Resources(mode="inline", components=list(_BOKEHJS_COMPONENTS)).js_raw
        body = ",\n".join(f"function(Bokeh) {{\n{js}\n}}" for js in parts)
        _loader_cache = (
            "(function(root) {\n"
            f"  const version = {json.dumps(BOKEH_VERSION)};\n"
            "  if (root.Bokeh !== undefined && root.Bokeh.version === version && root.Bokeh.Widgets !== undefined) return;\n"
            f"  const parts = [{body}];\n"
            "  for (const part of parts) part.call(root, root.Bokeh);\n"
            "})(window);\n")
    return _loader_cache


def load_bokehjs() -> None:
    """Put the inline BokehJS into the notebook page (offline), unless the page already has it.

    A dashboard does this itself when it is displayed; call it when the dashboard is shown inside another
    widget (a Tab, an HBox), whose display does not ask the dashboard.
    """
    from IPython.display import display

    js = bokehjs_loader()
    display({_JS_MIME: js, _LOAD_MIME: js}, raw=True)


class _BokehView(BokehModel):
    """A BokehModel that can send the changes of one update as one patch message.

    jupyter_bokeh sends every property change on its own (four comm messages each, then a repaint in the
    browser); inside :meth:`batched` the changes are held and go out together, applied by BokehJS at once.
    """

    _held: list[Any] | None = None

    def _document_patched(self, event: Any) -> None:
        if event.setter is self:
            return
        if self._held is not None:
            self._held.append(event)
            return
        super()._document_patched(event)

    @contextlib.contextmanager
    def batched(self) -> Iterator[None]:
        if self._held is not None:  # already batching: the outer block sends
            yield
            return
        self._held = []
        try:
            yield
        finally:
            events, self._held = self._held, None
            if events:
                self._send_patch(events)

    def _send_patch(self, events: list[Any]) -> None:
        from bokeh.protocol import Protocol

        msg = Protocol().create("PATCH-DOC", events)
        self.send({"msg": "patch", "payload": msg.header_json})
        self.send({"msg": "patch", "payload": msg.metadata_json})
        self.send({"msg": "patch", "payload": msg.content_json})
        for buffer in msg.buffers:
            self.send({"msg": "patch", "payload": json.dumps(buffer.ref)})
            self.send({"msg": "patch"}, [buffer.to_bytes()])


class Dashboard(W.VBox):
    """The notebook dashboard widget (see :func:`dashboard`).

    Traits:
        head: index of the selected head over all kept heads, in capture order (see ``scene.heads``).
        item: the batch item shown.
        statistic: the head-table column coloured in scores.
        veil: whether the mask veil covers the lens.
    """

    head = traitlets.Int(0)
    item = traitlets.Int(0)
    statistic = traitlets.Unicode("entropy_ratio")
    veil = traitlets.Bool(True)

    def __init__(self, scene: Scene, *, bokehjs: str = "always", **kwargs: Any) -> None:
        if bokehjs not in ("always", "never"):
            raise OptionError(f"bokehjs: expected 'always' or 'never', received {bokehjs!r}")
        self.scene = scene
        self._bokehjs = bokehjs
        self.head_choice = W.Dropdown(options=[(h.label, h.g) for h in scene.heads], value=scene.g,
                                      description="head", layout=W.Layout(width="420px"))
        self.item_choice = W.Dropdown(options=[(f"item {b}", b) for b in range(scene.batch)], value=scene.item,
                                      description="batch", layout=W.Layout(width="160px"))
        self.statistic_choice = W.Dropdown(options=list(STATISTICS), value=scene.statistic,
                                           description="scores", layout=W.Layout(width="240px"))
        self.veil_choice = W.ToggleButton(value=True, description="mask veil", tooltip="grey: forbidden, magenta: leak")
        self.status = W.Label(value="")
        self.tally_buttons = {t.kind: W.Button(description=t.text, disabled=not t.heads, layout=W.Layout(width="auto"),
                                               tooltip=f"show the {t.kind} heads one after another" if t.heads
                                               else t.text) for t in scene.tally}
        for t in scene.tally:
            self.tally_buttons[t.kind].on_click(lambda _button, t=t: self._on_tally(t))
            self.tally_buttons[t.kind].add_class(f"as-tally-{t.kind}")
        self.tally_row = W.HBox([W.Label(value="flagged heads:"), *self.tally_buttons.values()])
        self.problem = W.HTML(value="")
        scene.twins_fig.on_event(Tap, self._on_twin_tap)  # before the document is serialized: it subscribes
        self.plot = _BokehView(scene.layout)
        for widget, name in ((self.head_choice, "as-head"), (self.item_choice, "as-item"),
                             (self.statistic_choice, "as-statistic"), (self.veil_choice, "as-veil"),
                             (self.status, "as-status"), (self.tally_row, "as-tally"), (self.problem, "as-problem"),
                             (self.plot, "as-plot")):
            widget.add_class(name)
        super().__init__([self.tally_row,
                          W.HBox([self.head_choice, self.item_choice, self.statistic_choice, self.veil_choice]),
                          self.status, self.problem, self.plot], **kwargs)
        self.add_class("as-dashboard")
        self.set_trait("head", scene.g)
        self.set_trait("item", scene.item)
        self.set_trait("statistic", scene.statistic)
        W.link((self, "head"), (self.head_choice, "value"))
        W.link((self, "item"), (self.item_choice, "value"))
        W.link((self, "statistic"), (self.statistic_choice, "value"))
        W.link((self, "veil"), (self.veil_choice, "value"))
        scene.cells_src.selected.on_change("indices", self._on_tap)
        self._show_status()

    # ------------------------------------------------------------ validation and observers
    @traitlets.validate("head")
    def _valid_head(self, proposal: Any) -> int:
        g = proposal["value"]
        if not 0 <= g < len(self.scene.heads):
            raise traitlets.TraitError(f"head: expected 0..{len(self.scene.heads) - 1}, received {g}")
        return g

    @traitlets.validate("item")
    def _valid_item(self, proposal: Any) -> int:
        b = proposal["value"]
        if not 0 <= b < self.scene.batch:
            raise traitlets.TraitError(f"item: expected a batch item in 0..{self.scene.batch - 1}, received {b}")
        return b

    @traitlets.validate("statistic")
    def _valid_statistic(self, proposal: Any) -> str:
        name = proposal["value"]
        try:
            self.scene._check_statistic(name)
        except OptionError as e:
            raise traitlets.TraitError(str(e)) from None
        return name

    def _guarded(self, what: str, action: Any) -> None:
        """Run a view update; show its error under the controls and keep the widget usable."""
        try:
            with self.plot.batched():
                action()
            self.problem.value = ""
        except Exception as e:  # noqa: BLE001 - an observer must not take the widget down
            self.problem.value = (f"<span style='color:#b00020'>could not {html.escape(what)}: "
                                  f"{html.escape(type(e).__name__)}: {html.escape(str(e))}</span>")
        finally:
            self._show_status()

    @traitlets.observe("head")
    def _on_head(self, change: Any) -> None:
        self._guarded("show the head", lambda: self.scene.select(change["new"]))

    @traitlets.observe("item")
    def _on_item(self, change: Any) -> None:
        self._guarded("show the batch item", lambda: self.scene.set_item(change["new"]))

    @traitlets.observe("statistic")
    def _on_statistic(self, change: Any) -> None:
        self._guarded("colour the scores", lambda: self.scene.set_statistic(change["new"]))

    @traitlets.observe("veil")
    def _on_veil(self, change: Any) -> None:
        self._guarded("switch the veil", lambda: self.scene.set_veil(change["new"]))

    def _on_tap(self, attr: str, old: Any, new: Any) -> None:
        """A tap on an atlas tile or a scores cell (Bokeh selection) selects that head."""
        picked = [int(i) for i in new]
        if picked and picked[-1] != self.head:
            self.head = picked[-1]
        elif not picked:
            self._guarded("keep the selection", lambda: setattr(self.scene.cells_src.selected, "indices", [self.head]))

    def _on_twin_tap(self, event: Any) -> None:
        """A tap on a row of the twins matrix selects that row's head."""
        g = self.scene.twin_row(event.y)
        if g is not None:
            self.head = g

    def _on_tally(self, tally: Any) -> None:
        """A click on a summary item selects its next flagged head (cycling through them)."""
        g = tally.next_head(self.head)
        if g is not None:
            self.head = g
            self._show_status()
            self.status.value += f" · {tally.kind} {tally.heads.index(g) + 1} of {len(tally.heads)}"

    def _show_status(self) -> None:
        h = self.scene.heads[self.scene.g]
        self.status.value = f"showing {h.label} · item {self.scene.item} · scores: {self.scene.statistic}"

    # ------------------------------------------------------------ display
    def _ipython_display_(self) -> None:
        from IPython.display import display

        if self._bokehjs == "always":
            load_bokehjs()
        display(self._repr_mimebundle_(), raw=True)

    def show(self, record: int | str, head: int) -> None:
        """Select a head by record (index or module name) and the model's head index.

        >>> board.show("decoder.layers.0.multihead_attn", 2)   # doctest: +SKIP
        """
        self.head = self.scene.head_index(record, head)

    def first_render_bytes(self) -> int:
        """Bytes of widget state the browser receives when the dashboard is first shown (BokehJS not counted).

        Every widget of the tree (controls, layouts, styles, the Bokeh document) opens with its full state;
        this sums their JSON and binary buffers as the comm messages carry them.
        """
        from ipywidgets.widgets.widget import _remove_buffers

        seen: set[str] = set()
        total = 0
        todo: list[Any] = [self]
        while todo:
            w = todo.pop()
            if not isinstance(w, W.Widget) or w.model_id in seen:
                continue
            seen.add(w.model_id)
            state, _, buffers = _remove_buffers(w.get_state())
            total += len(json.dumps(state, separators=(",", ":"))) + sum(len(memoryview(b).cast("B")) for b in buffers)
            for name in w.keys:
                value = getattr(w, name)
                todo.extend(value if isinstance(value, (list, tuple)) else [value])
        return total

    def __repr__(self) -> str:
        return f"Dashboard({self.scene!r})"


def dashboard(cap: Any, tokens: Any = None, *, ids: Any = None, findings: Any = None, checks: Any = None,
              distances: Any = None, statistic: str = "entropy_ratio", item: int = 0, head: int | None = None,
              tile: int = 24, lens_side: int = 512, bokehjs: str = "always", pattern: Any = None) -> Dashboard:
    """An interactive notebook view of a capture: every head, the selected head's map, statistics, residual norms.

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> x = torch.randn(1, 3, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> board = attnscope.dashboard(cap, tokens=["the", "cat", "sat"])   # display it: last line of a cell
    >>> board.head = 1                                                   # or tap a tile in the atlas

    Args:
        cap: a capture from :func:`attnscope.capture` (or :func:`attnscope.load`); a tracker from
            :func:`attnscope.track` gets the training-run view (:mod:`attnscope.views.run_board`), which follows
            the run while it records (``statistic``, ``head`` and ``bokehjs`` apply).
        tokens: token strings: a list of str, a list per batch item, ``{"source": ..., "target": ...}`` for
            encoder–decoder models, or a tokenizer-like callable with *ids* (see :mod:`attnscope.views.labels`).
        ids: ``(B, T)`` token ids, for a callable *tokens*.
        findings: silent/twin head findings to list (a DataFrame or the lists the head analyses return).
        checks: check results to list (a DataFrame, list of dicts or tuples).
        distances: head-to-head distance matrix for twins (see :class:`attnscope.views.scene.Scene`).
        statistic: the statistic coloured in scores first.
        item: the batch item shown first.
        head: the head selected first (index over all kept heads in capture order); default the first.
        tile: side of an overview tile in cells (reduced, with an AttnscopeWarning, for very many heads).
        lens_side: the selected head's map is pooled past this many positions (AttnscopeWarning).
        bokehjs: ``"always"`` publishes the inline BokehJS loader with each display (skipped in the page when
            already loaded); ``"never"`` leaves loading BokehJS to you.
        pattern: a declared attention pattern (bool ``(T, T)`` / ``(B, T, T)`` or a FlexAttention-style
            ``mask_mod``) the mask veil shows on self-attention maps instead of the mask each call applied.

    Returns:
        A :class:`Dashboard` (an ``ipywidgets.VBox``).
    """
    if type(cap).__name__ == "Tracker":  # a training run (attnscope.track): its own view, live while it records
        from attnscope.views.run_board import run_dashboard

        return run_dashboard(cap, statistic=statistic, head=head or 0, bokehjs=bokehjs)
    scene = Scene(cap, tokens, ids=ids, findings=findings, checks=checks, distances=distances,
                  statistic=statistic, tile=tile, lens_side=lens_side, pattern=pattern)
    if item:
        scene.set_item(item)
    if head is not None:
        scene.select(head)
    return Dashboard(scene, bokehjs=bokehjs)
