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

The writers the command line and the demo call after the computation returns (the
computing modules never import report/):

- :func:`write_scan_report` (after :func:`shortcut_audit.audit`),
- :func:`write_compare_page` (after :func:`shortcut_audit.compare`),
- :func:`write_heatmap_files` (after :func:`shortcut_audit.run_heatmap`).
"""

from .figures import heatmap_overlay_png, safe_name
from .compare_page import write_compare_page
from .html import data_uri, render
from .overlay import write_heatmap_files
from .scan_page import build_figures, render_report, report_plan, write_scan_report
from .sources import AuditFiles, read_audit

#: The earlier name of :func:`write_scan_report`.
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
    "write_compare_page",
    "write_heatmap_files",
    "write_scan_figures",
    "write_scan_report",
]
