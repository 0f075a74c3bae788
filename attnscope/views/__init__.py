"""Notebook and page views of a capture: ipywidgets + Bokeh. They render what capture and analyses hold and
compute nothing of their own beyond pooling and quantising for display.

Attention weights show where a model looked, not why it decided: they are not a faithful explanation of its
decisions (Jain & Wallace 2019) and are no basis for high-stakes decisions.
"""

from attnscope.views.notebook import Dashboard, dashboard, load_bokehjs
from attnscope.views.page import export_html

__all__ = ["Dashboard", "dashboard", "export_html", "load_bokehjs"]
