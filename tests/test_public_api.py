"""The public surface is small and locked: a change to it is a decision, not an accident."""

import attnscope

EXPECTED = [
    "AttentionRecord", "AttnscopeError", "AttnscopeWarning", "Capture", "CaptureError", "CaptureFileError",
    "CaptureStateError", "CausalReport", "HeadSums", "MemoryBudgetError", "NoAttentionError", "OptionError",
    "PaddingReport", "ProbeError", "ResidualRecord", "ShapeError", "UnsupportedModelError", "ablate",
    "aggregate_heads", "assert_causal", "assert_padding", "attention_rollout", "capture", "check_causal",
    "check_padding", "compare_captures", "dashboard", "dead_heads", "duplicate_heads", "export_html",
    "head_clusters", "head_distances", "head_importance", "head_output_norms", "leak_summary", "leak_table",
    "load", "save", "stitch_steps", "tap",
    "Tracker", "track",
    "MaskReport", "assert_mask", "causal_pattern", "check_mask", "documents_pattern", "pattern_from_predicate",
    "prefix_pattern", "window_pattern",
]
EXPECTED += ["CacheReport", "assert_cache", "check_cache", "pattern_table"]  # mask contracts


def test_all_is_sorted_and_locked():
    assert attnscope.__all__ == sorted(attnscope.__all__)
    assert attnscope.__all__ == sorted(EXPECTED)


def test_every_exported_name_resolves():
    for name in attnscope.__all__:
        assert getattr(attnscope, name) is not None, name


def test_errors_share_one_base():
    for name in attnscope.__all__:
        obj = getattr(attnscope, name)
        if isinstance(obj, type) and name.endswith("Error"):
            assert issubclass(obj, attnscope.AttnscopeError), name


def test_import_stays_light():
    """`import attnscope` loads neither bokeh nor widgets nor scipy; they come with the functions that need them."""
    import subprocess
    import sys

    code = "import sys, attnscope; print(sorted(m for m in ('bokeh', 'ipywidgets', 'scipy') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
