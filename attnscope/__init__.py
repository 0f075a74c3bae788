"""attnscope: see and check what the attention of small transformer models does.

>>> import torch, attnscope
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> x = torch.randn(1, 4, 8)
>>> with attnscope.capture(mha) as cap:
...     _ = mha(x, x, x)
>>> cap.head_table()[["name", "head"]].values.tolist()
[['', 0], ['', 1]]

Attention weights show where a model looked, not why it decided: they are not a faithful explanation of its
decisions (Jain & Wallace 2019) and are no basis for high-stakes decisions.
"""

from __future__ import annotations

import importlib
from typing import Any

from attnscope.capture import Capture, capture, tap
from attnscope.errors import (
    AttnscopeError,
    AttnscopeWarning,
    CaptureError,
    CaptureFileError,
    CaptureStateError,
    MemoryBudgetError,
    NoAttentionError,
    OptionError,
    ProbeError,
    ShapeError,
    UnsupportedModelError,
)
from attnscope.records import AttentionRecord, HeadSums, ResidualRecord

__version__ = "0.1.0"

# Heavier parts load on first use, so `import attnscope` stays light (no bokeh, no widgets, no scipy).
_LAZY = {
    "save": "attnscope.io",
    "load": "attnscope.io",
    # behavioural probes
    "CausalReport": "attnscope.analyses.causality",
    "PaddingReport": "attnscope.analyses.causality",
    "assert_causal": "attnscope.analyses.causality",
    "assert_padding": "attnscope.analyses.causality",
    "check_causal": "attnscope.analyses.causality",
    "check_padding": "attnscope.analyses.causality",
    # declared dependency patterns
    "MaskReport": "attnscope.analyses.contracts",
    "assert_mask": "attnscope.analyses.contracts",
    "check_mask": "attnscope.analyses.contracts",
    "causal_pattern": "attnscope.analyses.patterns",
    "documents_pattern": "attnscope.analyses.patterns",
    "pattern_from_predicate": "attnscope.analyses.patterns",
    "prefix_pattern": "attnscope.analyses.patterns",
    "window_pattern": "attnscope.analyses.patterns",
    "CacheReport": "attnscope.analyses.cache",
    "assert_cache": "attnscope.analyses.cache",
    "check_cache": "attnscope.analyses.cache",
    # heads
    "dead_heads": "attnscope.analyses.heads",
    "duplicate_heads": "attnscope.analyses.heads",
    "head_clusters": "attnscope.analyses.heads",
    "head_output_norms": "attnscope.analyses.heads",
    "head_distances": "attnscope.analyses.similarity",
    "leak_summary": "attnscope.analyses.leaks",
    "leak_table": "attnscope.analyses.leaks",
    "pattern_table": "attnscope.analyses.leaks",
    "ablate": "attnscope.analyses.ablation",
    "head_importance": "attnscope.analyses.ablation",
    "attention_rollout": "attnscope.analyses.rollout",
    "aggregate_heads": "attnscope.analyses.aggregate",
    "stitch_steps": "attnscope.analyses.generation",
    "compare_captures": "attnscope.analyses.compare",
    # watching training
    "Tracker": "attnscope.tracking",
    "track": "attnscope.tracking",
    # views (need the notebook extra: ipywidgets, bokeh, jupyter_bokeh)
    "dashboard": "attnscope.views",
    "export_html": "attnscope.views",
}

__all__ = sorted([
    "AttentionRecord",
    "AttnscopeError",
    "AttnscopeWarning",
    "Capture",
    "CaptureError",
    "CaptureFileError",
    "CaptureStateError",
    "HeadSums",
    "MemoryBudgetError",
    "NoAttentionError",
    "OptionError",
    "ProbeError",
    "ResidualRecord",
    "ShapeError",
    "UnsupportedModelError",
    "capture",
    "tap",
    *_LAZY,
])


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'attnscope' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
