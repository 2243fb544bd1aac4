"""Figures, the HTML report and the evidence pack's figures (matplotlib and HTML live
only here).

Public API:

- :func:`render_report` (pure) and :func:`write_scan_report` (writes ``figures/`` and
  ``report.html`` beside audit.json); ``write_scan_figures`` is an alias kept for
  callers of the earlier name.
- :mod:`.html`: the shared page machinery (:func:`data_uri`, :func:`render`, the
  autoescaping environment, ``templates/base.html.j2`` and ``macros.html.j2``) that the
  compare page reuses.
- :mod:`.figures`: the PNG figures and :func:`safe_name`.
"""

from .figures import heatmap_overlay_png, safe_name
from .html import data_uri, render
from .scan_page import build_figures, render_report, report_plan, write_scan_report
from .sources import AuditFiles, read_audit

#: The earlier name of :func:`write_scan_report` (scan.py calls it until it switches).
write_scan_figures = write_scan_report

__all__ = [
    "AuditFiles",
    "build_figures",
    "data_uri",
    "heatmap_overlay_png",
    "read_audit",
    "render",
    "render_report",
    "report_plan",
    "safe_name",
    "write_scan_figures",
    "write_scan_report",
]
