"""Views of a tracked training run: a notebook widget that can follow the run live, and an offline page.

:func:`run_dashboard` (what :func:`attnscope.dashboard` returns for a tracker) is state plus observers:
``head`` and ``statistic`` are traits; a tap on a strip cell, a menu or code changes them, and the Bokeh data
sources follow. With ``live=True`` the widget listens to the tracker and re-reads it after every recorded
step, so it updates in the notebook while the training loop runs in the same kernel (the frontend receives
the changes as the loop runs). :func:`export_run_html` writes the same figures to one offline HTML file, with
JavaScript callbacks for the tap and the menu.

Attention weights show where a model looked, not why it decided: they are not a faithful explanation of its
decisions (Jain & Wallace 2019) and are no basis for high-stakes decisions.

>>> import torch, attnscope
>>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
>>> tr = attnscope.track(layer, every=1)
>>> board = attnscope.dashboard(tr)          # follows the run: it is still recording
>>> with tr.step(0):
...     _ = layer(torch.randn(2, 4, 16))
>>> board.scene.strip_src.data["step"]
[0, 0]
>>> board.stop()
"""

from __future__ import annotations

import html
import os
from pathlib import Path
from typing import Any

import ipywidgets as W
import traitlets
from bokeh.embed import file_html
from bokeh.layouts import column, row
from bokeh.models import CustomJS, Div, Select
from bokeh.resources import INLINE

from attnscope.errors import OptionError
from attnscope.views.notebook import _BokehView, load_bokehjs
from attnscope.views.run_scene import RUN_STATISTICS, RunScene, alert_list_html

__all__ = ["RunDashboard", "export_run_html", "run_dashboard"]


class RunDashboard(W.VBox):
    """The notebook widget of a tracked run (see :func:`run_dashboard`).

    Traits:
        head: index of the head shown in the curve (rows of the strip, top to bottom).
        statistic: the statistic the strip and the curve show.
        live: whether the widget follows the tracker after each recorded step.
    """

    head = traitlets.Int(0)
    statistic = traitlets.Unicode("entropy_ratio")
    live = traitlets.Bool(False)

    def __init__(self, scene: RunScene, *, live: bool = False, bokehjs: str = "always", **kwargs: Any) -> None:
        if bokehjs not in ("always", "never"):
            raise OptionError(f"bokehjs: expected 'always' or 'never', received {bokehjs!r}")
        self.scene = scene
        self._bokehjs = bokehjs
        self._stop_listening: Any = None
        self.head_choice = W.Dropdown(options=self._head_options(), value=scene.g if scene.keys else None,
                                      description="head", layout=W.Layout(width="420px"))
        self.statistic_choice = W.Dropdown(options=list(RUN_STATISTICS), value=scene.statistic,
                                           description="statistic", layout=W.Layout(width="260px"))
        self.live_choice = W.ToggleButton(value=False, description="follow the run",
                                          tooltip="re-read the run after every recorded step")
        self.status = W.Label(value="")
        self.problem = W.HTML(value="")
        self.alert_list = W.HTML(value="")
        self.plot = _BokehView(scene.layout)
        for widget, name in ((self.head_choice, "as-run-head"), (self.statistic_choice, "as-run-statistic"),
                             (self.live_choice, "as-run-live"), (self.status, "as-run-status"),
                             (self.problem, "as-run-problem"), (self.alert_list, "as-run-alert-list"),
                             (self.plot, "as-run-plot")):
            widget.add_class(name)
        super().__init__([W.HBox([self.head_choice, self.statistic_choice, self.live_choice]), self.status,
                          self.problem, self.plot, self.alert_list], **kwargs)
        self.add_class("as-run-dashboard")
        self.set_trait("head", scene.g)
        self.set_trait("statistic", scene.statistic)
        W.link((self, "statistic"), (self.statistic_choice, "value"))
        self.live_choice.observe(self._on_live_choice, names="value")
        self.head_choice.observe(self._on_head_choice, names="value")
        scene.strip_src.selected.on_change("indices", self._on_tap)
        self.live = live
        self._show_status()

    def _head_options(self) -> list[tuple[str, int]]:
        return [(label, i) for i, label in enumerate(self.scene.labels)]

    # ------------------------------------------------------------ validation and observers
    @traitlets.validate("head")
    def _valid_head(self, proposal: Any) -> int:
        g = proposal["value"]
        if self.scene.keys and not 0 <= g < len(self.scene.keys):
            raise traitlets.TraitError(f"head: expected 0..{len(self.scene.keys) - 1}, received {g}")
        return g

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
        except Exception as e:  # noqa: BLE001 - an observer must not take the widget (or the training loop) down
            self.problem.value = (f"<span style='color:#b00020'>could not {html.escape(what)}: "
                                  f"{html.escape(type(e).__name__)}: {html.escape(str(e))}</span>")
        finally:
            self._show_status()

    @traitlets.observe("head")
    def _on_head(self, change: Any) -> None:
        if self.scene.keys:
            self._guarded("show the head", lambda: self.scene.select(change["new"]))
            if self.head_choice.value != change["new"]:
                self.head_choice.value = change["new"]

    def _on_head_choice(self, change: Any) -> None:
        if change["new"] is not None and change["new"] != self.head:
            self.head = change["new"]

    @traitlets.observe("statistic")
    def _on_statistic(self, change: Any) -> None:
        self._guarded("colour the strip", lambda: self.scene.set_statistic(change["new"]))

    @traitlets.validate("live")
    def _valid_live(self, proposal: Any) -> bool:
        if proposal["value"] and getattr(self.scene.tracker, "_model", None) is None:
            self.problem.value = "<span style='color:#b00020'>a loaded run does not grow: nothing to follow</span>"
            return False
        return bool(proposal["value"])

    def _on_live_choice(self, change: Any) -> None:
        self.live = change["new"]
        if self.live_choice.value != self.live:  # refused (a loaded run): the button shows what holds
            self.live_choice.value = self.live

    @traitlets.observe("live")
    def _on_live(self, change: Any) -> None:
        if self.live_choice.value != change["new"]:
            self.live_choice.value = change["new"]
        if change["new"] and self._stop_listening is None:
            self._stop_listening = self.scene.tracker.listen(self._on_recorded)
        elif not change["new"] and self._stop_listening is not None:
            self._stop_listening()
            self._stop_listening = None
        self._show_status()

    def _on_recorded(self, tracker: Any, stats: Any) -> None:
        self._guarded("follow the run", self.refresh)

    def _on_tap(self, attr: str, old: Any, new: Any) -> None:
        """A tap on a strip cell shows that cell's head in the curve."""
        picked = [int(i) for i in new]
        if picked:
            g = self.scene.row_of_cell(picked[-1])
            if g != self.head:
                self.head = g

    def refresh(self) -> None:
        """Re-read the tracker (what live mode does after each recorded step)."""
        self.scene.refresh()
        options = self._head_options()
        if list(self.head_choice.options) != options:
            self.head_choice.options = options
            self.head_choice.value = self.scene.g if options else None

    def stop(self) -> None:
        """Stop following the run."""
        self.live = False

    def _show_status(self) -> None:
        s = self.scene
        steps = sorted(set(s.strip_src.data["step"]))
        shown = s.labels[s.g] if s.keys else "no head yet"
        span = f"steps {steps[0]}–{steps[-1]} ({len(steps)} recorded)" if steps else "no step recorded yet"
        self.status.value = (f"{span} · showing {shown} · {s.statistic} · {len(s.alerts)} alerts"
                             + (" · following the run" if self.live else ""))
        self.alert_list.value = alert_list_html(s.alerts)

    def show(self, name: str, head: int) -> None:
        """Show the curve of head *head* of module *name*."""
        self.head = self.scene.head_index(name, head)

    # ------------------------------------------------------------ display
    def _ipython_display_(self) -> None:
        from IPython.display import display

        if self._bokehjs == "always":
            load_bokehjs()
        display(self._repr_mimebundle_(), raw=True)

    def __repr__(self) -> str:
        return f"RunDashboard({self.scene!r}, live={self.live})"


def run_dashboard(tracker: Any, *, statistic: str = "entropy_ratio", head: int = 0, live: bool | None = None,
                  bokehjs: str = "always") -> RunDashboard:
    """A notebook widget of a tracked run: heads over steps, the chosen head's curve, residual norms, alerts.

    Args:
        tracker: from :func:`attnscope.track` or :func:`attnscope.load`.
        statistic: what the strip and the curve show first (one of :data:`~attnscope.views.run_scene.RUN_STATISTICS`).
        head: the head shown in the curve first (strip row).
        live: follow the run after every recorded step (default: when the tracker is still recording).
        bokehjs: as for :func:`attnscope.dashboard`.
    """
    scene = RunScene(tracker, statistic=statistic, head=head)
    if live is None:
        live = getattr(tracker, "_model", None) is not None
    return RunDashboard(scene, live=live, bokehjs=bokehjs)


_SHOW_JS = """
function show(g, stat) {
  const S = strip.data, xs = [], ys = [];
  for (let i = 0; i < S.row.length; i++) if (S.row[i] === g) { xs.push(S.step[i]); ys.push(S[stat][i]); }
  curve.data = {step: xs, value: ys};
  const A = vault.data, M = {step: [], value: [], kind: [], reason: [], colour: []};
  for (let i = 0; i < A.row.length; i++) if (A.row[i] === g) {
    M.step.push(A.step[i]); M.kind.push(A.kind[i]); M.reason.push(A.reason[i]); M.colour.push(A.colour[i]);
    const j = xs.indexOf(A.step[i]); M.value.push(j >= 0 ? ys[j] : NaN);
  }
  marks.data = M;
  fig.title.text = labels[g] + ': ' + stat;
  if (head_select.value !== String(g)) head_select.value = String(g);
}
"""


def export_run_html(tracker: Any, path: str | os.PathLike, *, statistic: str = "entropy_ratio", head: int = 0,
                    title: str = "attnscope training run") -> Path:
    """Write the run's views as one self-contained HTML file (inline BokehJS, works offline).

    >>> import torch, attnscope, tempfile, pathlib
    >>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
    >>> tr = attnscope.track(layer, every=1)
    >>> with tr.step(0):
    ...     _ = layer(torch.randn(2, 4, 16))
    >>> out = attnscope.export_html(tr, pathlib.Path(tempfile.mkdtemp()) / "run.html")
    >>> "cdn.bokeh.org" in out.read_text()
    False
    """
    scene = RunScene(tracker, statistic=statistic, head=head)
    head_select = Select(title="head", options=[(str(i), lab) for i, lab in enumerate(scene.labels)],
                         value=str(scene.g), width=420, name="as-run-head-select")
    stat_select = Select(title="statistic", options=list(RUN_STATISTICS), value=scene.statistic, width=220,
                         name="as-run-stat-select")
    vault = scene.strip_alert_src  # every head alert, filtered per head by the callbacks
    args = dict(strip=scene.strip_src, curve=scene.curve_src, vault=vault, marks=scene.curve_alert_src,
                fig=scene.curve_fig, labels=scene.labels, head_select=head_select, stat_select=stat_select)
    scene.strip_src.selected.js_on_change("indices", CustomJS(args=args, code=_SHOW_JS + """
const picked = strip.selected.indices;
if (picked.length > 0) show(strip.data.row[picked[picked.length - 1]], stat_select.value);"""))
    head_select.js_on_change("value", CustomJS(args=args, code=_SHOW_JS + """
show(Number(head_select.value), stat_select.value);"""))
    stat_select.js_on_change("value", CustomJS(args=dict(args, mapper=scene.mapper, strip_fig=scene.strip_fig),
                                               code=_SHOW_JS + """
const stat = stat_select.value;
const data = Object.assign({}, strip.data); data.value = data[stat]; strip.data = data;
const v = data[stat].filter(Number.isFinite);
if (v.length) mapper.setv({low: Math.min(...v), high: Math.max(...v) > Math.min(...v) ? Math.max(...v) : Math.min(...v) + 1e-9});
strip_fig.title.text = 'heads over steps: ' + stat;
show(Number(head_select.value), stat);"""))
    alerts = Div(text=alert_list_html(scene.alerts, limit=50), width=760, name="as-run-alert-div")
    page = column(row(head_select, stat_select), scene.layout, alerts, name="as-run-page")
    out = Path(path)
    out.write_text(file_html(page, INLINE, title=title), encoding="utf-8")
    return out
