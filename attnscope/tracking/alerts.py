"""Alerts over a tracked run: each head and block judged against its own recent past.

Pure functions on the tables of a :class:`~attnscope.tracking.Tracker`; nothing here touches a model.

>>> import pandas as pd
>>> heads = pd.DataFrame({"step": [0, 10, 20, 30], "name": "a", "head": 0,
...                       "entropy_ratio": [0.80, 0.78, 0.81, 0.10], "sink_mass": 0.3,
...                       "output_norm": 1.0, "output_relative": 1.0})
>>> [(a.step, a.kind) for a in find_alerts(heads, None, AlertRules(min_history=3))]
[(30, 'collapse')]
"""

from __future__ import annotations

from collections import deque
from dataclasses import asdict, dataclass, fields
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from attnscope.errors import OptionError

__all__ = ["ALERT_KINDS", "Alert", "AlertRules", "find_alerts"]

ALERT_KINDS = ("collapse", "dying", "sink", "residual growth", "massive activation")


class Alert(NamedTuple):
    """One alert: ``(step, name, head, kind, reason)``; ``head`` is None for a block-level alert."""

    step: int
    name: str
    head: int | None
    kind: str
    reason: str


@dataclass(frozen=True)
class AlertRules:
    """Thresholds of :func:`find_alerts`, each relative to the series' own *baseline*.

    The baseline of a series (one statistic of one head or block) at a recorded step is the median of its
    last ``window`` recorded values that raised no alert of that kind; an alert is possible once
    ``min_history`` such values exist. Values that raise an alert stay out of the baseline, so an alert keeps
    firing while the change lasts instead of fading once the window has filled with the changed values.

    Fields:
        window: recorded steps in a baseline (default 5). The median of 5 ignores one or two noisy steps
            and still follows the slow drift of ordinary learning (a head sharpening over many steps).
        min_history: values needed before anything is judged (default 3): fewer give no median worth the name.
        collapse_at: **collapse** when a head's ``entropy_ratio`` falls below this fraction of its baseline
            (default 0.5). Entropy collapse (S. Zhai et al., "Stabilizing Transformer Training by Preventing
            Attention Entropy Collapse", ICML 2023) has no universal threshold: it is a fall far below the
            run's own curve. Minibatch noise moves a head's mean entropy ratio by a few percent between
            steps; losing half of it within a few recorded steps is far outside that.
        collapse_min_drop: and the fall is at least this much in absolute ``entropy_ratio`` (default 0.1, a
            tenth of the largest entropy possible), so a head that was already very sharp (baseline 0.02)
            does not alert on noise in tiny numbers.
        dying_at: **dying** when a head's ``output_norm`` (‖Σ α·v·W_O‖, the norm-based view of G. Kobayashi et
            al., EMNLP 2020) falls below this fraction of its own baseline *and* below this fraction of the
            mean of its module's other heads (default 0.1). Both, because a whole module shrinking together
            (weight decay, a norm layer) is no dying head, and a head that was always small did not die.
        sink_at: **sink** when a head's ``sink_mass`` (mean weight on the first allowed key; attention sinks,
            G. Xiao et al., ICLR 2024) reaches this value while its baseline was below it (default 0.9, the
            same as :func:`~attnscope.analyses.heads.dead_heads`): nearly all mass on one key, and new.
        growth_at: **residual growth** when a block's mean residual-stream norm exceeds this multiple of its
            baseline (default 3.0). Norms drift as a model learns, slowly; tripling within a few recorded
            steps is the runaway growth of a diverging run (post-LN without warm-up).
        massive_at: **massive activation** when a block's massive-activation ratio (largest |h| over the
            median |h| of the same hidden state) reaches this value (default 1000: M. Sun et al., "Massive
            Activations in Large Language Models", COLM 2024, call activations about 1000x the median massive).
    """

    window: int = 5
    min_history: int = 3
    collapse_at: float = 0.5
    collapse_min_drop: float = 0.1
    dying_at: float = 0.1
    sink_at: float = 0.9
    growth_at: float = 3.0
    massive_at: float = 1000.0

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value) or value <= 0:
                raise OptionError(f"alert rule {f.name} must be a positive number; received {value!r}")
        if int(self.window) != self.window or int(self.min_history) != self.min_history:
            raise OptionError(f"window and min_history must be whole numbers; received {self.window!r}, "
                              f"{self.min_history!r}")
        if self.min_history > self.window:
            raise OptionError(f"min_history ({self.min_history}) cannot exceed window ({self.window})")

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)

    def replace(self, **changes: float) -> AlertRules:
        """These rules with *changes* (names checked, with suggestions)."""
        self._check_names(changes)
        return AlertRules(**{**self.as_dict(), **changes})

    @classmethod
    def _check_names(cls, options: Any) -> None:
        from attnscope.errors import suggest

        known = [f.name for f in fields(cls)]
        for key in options:
            if key not in known:
                raise OptionError(f"unknown alert rule {key!r}; known: {', '.join(known)}.{suggest(key, known)}")

    @classmethod
    def from_options(cls, options: dict[str, Any] | AlertRules | None) -> AlertRules:
        if options is None:
            return cls()
        if isinstance(options, AlertRules):
            return options
        cls._check_names(options)
        return cls(**options)


class _Baseline:
    """The last ``window`` unalerted values of one series."""

    def __init__(self, window: int) -> None:
        self.values: deque[float] = deque(maxlen=window)

    def median(self, min_history: int) -> float | None:
        if len(self.values) < min_history:
            return None
        return float(np.median(self.values))

    def add(self, value: float) -> None:
        if np.isfinite(value):
            self.values.append(value)


def find_alerts(heads: pd.DataFrame, blocks: pd.DataFrame | None, rules: AlertRules | None = None) -> list[Alert]:
    """Alerts of a run from its head table and residual table (as :meth:`Tracker.table` gives them).

    Returns:
        Alerts sorted by step, then name and head; heads before blocks at the same step.
    """
    rules = rules or AlertRules()
    out: list[Alert] = []
    mh = int(rules.min_history)
    if heads is not None and len(heads):
        for (name, head), series in heads.sort_values("step").groupby(["name", "head"], sort=False):
            ent, norm, sink = (_Baseline(int(rules.window)) for _ in range(3))
            for row in series.itertuples(index=False):
                step = int(row.step)
                value = float(row.entropy_ratio)
                base = ent.median(mh)
                if (base is not None and np.isfinite(value) and value < rules.collapse_at * base
                        and base - value >= rules.collapse_min_drop):
                    out.append(Alert(step, name, int(head), "collapse",
                                     f"collapse: entropy ratio {value:.3f}, {value / base:.0%} of its recent "
                                     f"baseline {base:.3f}"))
                else:
                    ent.add(value)
                value = float(row.output_norm)
                relative = float(row.output_relative)
                base = norm.median(mh)
                if (base is not None and np.isfinite(value) and base > 0 and value < rules.dying_at * base
                        and np.isfinite(relative) and relative < rules.dying_at):
                    out.append(Alert(step, name, int(head), "dying",
                                     f"dying: output norm {value:.3g}, {value / base:.1%} of its recent baseline "
                                     f"{base:.3g} and {relative:.1%} of its module's other heads"))
                else:
                    norm.add(value)
                value = float(row.sink_mass)
                base = sink.median(mh)
                if base is not None and np.isfinite(value) and value >= rules.sink_at and base < rules.sink_at:
                    out.append(Alert(step, name, int(head), "sink",
                                     f"sink: {value:.0%} of the weight on the first allowed key, up from a recent "
                                     f"baseline of {base:.0%}"))
                else:
                    sink.add(value)
    if blocks is not None and len(blocks):
        for name, series in blocks.sort_values("step").groupby("name", sort=False):
            norm = _Baseline(int(rules.window))
            for row in series.itertuples(index=False):
                step = int(row.step)
                value = float(row.residual_norm)
                base = norm.median(mh)
                if base is not None and np.isfinite(value) and base > 0 and value > rules.growth_at * base:
                    out.append(Alert(step, name, None, "residual growth",
                                     f"residual growth: mean residual norm {value:.3g}, {value / base:.1f}x its "
                                     f"recent baseline {base:.3g}"))
                else:
                    norm.add(value)
                ratio = float(row.massive_ratio)
                if np.isfinite(ratio) and ratio >= rules.massive_at or ratio == np.inf:
                    out.append(Alert(step, name, None, "massive activation",
                                     f"massive activation: largest |h| is {ratio:.0f}x the median |h| of its "
                                     f"hidden state (at least {rules.massive_at:.0f}x counts)"))
    order = {k: i for i, k in enumerate(ALERT_KINDS)}
    out.sort(key=lambda a: (a.step, a.head is None, a.name, -1 if a.head is None else a.head, order[a.kind]))
    return out
