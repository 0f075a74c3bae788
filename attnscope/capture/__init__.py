"""The only code that touches a model: discovery, interception, hooks and their removal."""

from attnscope.capture.session import Capture, capture, head_table, record_sums, tap

__all__ = ["Capture", "capture", "head_table", "record_sums", "tap"]
