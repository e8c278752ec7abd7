"""Terminal dashboard (``modemap view``): a thin layer over the library.

The library never imports this package; it needs ``textual``.
"""

from __future__ import annotations

from modemap.app.tui.app import DashboardApp, load_view_inputs, run_view, run_view_data

__all__ = ["DashboardApp", "load_view_inputs", "run_view", "run_view_data"]
