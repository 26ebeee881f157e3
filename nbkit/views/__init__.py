"""Notebook views (ipywidgets + ipympl): they only select data from a recording and draw it."""
from nbkit.views.explorer import Explorer, explore

__all__ = ["explore", "Explorer"]
