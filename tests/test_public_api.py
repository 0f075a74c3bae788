"""The public surface is small and locked: a change to it is a decision, not an accident."""

import attnscope

EXPECTED = [
    "AttentionRecord", "AttnscopeError", "AttnscopeWarning", "Capture", "CaptureError", "CaptureFileError",
    "CaptureStateError", "HeadSums", "MemoryBudgetError", "NoAttentionError", "OptionError", "ProbeError",
    "ResidualRecord", "ShapeError", "UnsupportedModelError", "capture", "load", "save", "tap",
]


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
