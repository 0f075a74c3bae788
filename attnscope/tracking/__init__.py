"""Watch heads while a model trains: per-head statistics over steps, alerts, files, framework hooks.

>>> import torch, attnscope
>>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
>>> tr = attnscope.track(layer, every=5)
>>> with tr.step(3):                 # not a recorded step: nothing runs
...     _ = layer(torch.randn(1, 4, 16))
>>> tr.table().empty
True
"""

from attnscope.tracking.alerts import ALERT_KINDS, Alert, AlertRules, find_alerts
from attnscope.tracking.session import BLOCK_COLUMNS, HEAD_COLUMNS, StepStats, Tracker, track

__all__ = ["ALERT_KINDS", "BLOCK_COLUMNS", "HEAD_COLUMNS", "Alert", "AlertRules", "StepStats", "Tracker",
           "find_alerts", "track"]
