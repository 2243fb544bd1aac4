"""Figures and the HTML report (matplotlib and HTML live only here)."""

from .figures import heatmap_overlay_png, write_scan_figures

__all__ = ["heatmap_overlay_png", "write_scan_figures"]
