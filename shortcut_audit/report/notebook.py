"""HTML for Jupyter: how an audit, a comparison and a heatmap show themselves in a notebook.

``AuditResult``, ``CompareResult`` and ``HeatmapResult`` have a one-line
``_repr_html_`` that imports this module when a notebook asks, so importing the package
does not import it. Everything here is one self-contained HTML fragment: a verdict
table, small inline PNGs (data URIs), and a link to the full report when it was
written. Every text from the data (class names, paths) is escaped.
"""

from __future__ import annotations

import html
import os
from pathlib import Path
from typing import Any

import numpy as np

from .figures import _heat_rgba, _png_array, _upscale, positive_max
from .html import data_uri

__all__ = ["audit_html", "compare_html", "heatmap_html", "mean_heatmap_png"]

#: Class-mean heatmaps shown inline at most (a large audit links to its report instead).
MAX_MEANS = 24
#: Rows of a verdict table shown inline at most.
MAX_ROWS = 60
TILE = 96

_STYLE = ("<style>.sa-nb table{border-collapse:collapse;font-size:12px}"
          ".sa-nb th,.sa-nb td{border:1px solid #ccc;padding:2px 6px;text-align:left}"
          ".sa-nb td.num{text-align:right}.sa-nb figure{display:inline-block;margin:4px;"
          "text-align:center;font-size:11px}.sa-nb img{image-rendering:pixelated}</style>")


def _e(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _pct(x: float | None) -> str:
    return "–" if x is None else f"{100 * x:.0f}%"


def mean_heatmap_png(heat: np.ndarray, *, vmax: float, side: int = TILE) -> bytes:
    """A class-mean heatmap as a small PNG on white (no axes), ``side`` pixels at most."""
    heat = np.asarray(heat, dtype=np.float64)
    rgba = _heat_rgba(heat, vmax)
    rgb = rgba[..., :3] * rgba[..., 3:] + (1.0 - rgba[..., 3:])
    s = max(1, side // max(heat.shape))
    return _png_array(np.clip(_upscale(rgb, s), 0.0, 1.0))


def _link(folder: Path | None, name: str) -> str:
    """A link to the written page, relative to the notebook's folder (the working folder)."""
    if folder is None:
        return ""
    page = Path(folder) / name
    if not page.exists():
        return ""
    try:
        href = Path(os.path.relpath(page.resolve(), Path.cwd().resolve())).as_posix()
    except ValueError:                       # another drive: an absolute file URI
        href = page.resolve().as_uri()
    return f'<p>Full report: <a href="{_e(href)}" target="_blank">{_e(page)}</a></p>'


def _table(head: list[str], rows: list[list[str]], numeric: set[int]) -> str:
    out = ["<table><thead><tr>", *(f"<th>{_e(h)}</th>" for h in head), "</tr></thead><tbody>"]
    for row in rows[:MAX_ROWS]:
        out.append("<tr>" + "".join(
            f'<td class="num">{cell}</td>' if i in numeric else f"<td>{cell}</td>"
            for i, cell in enumerate(row)) + "</tr>")
    out.append("</tbody></table>")
    if len(rows) > MAX_ROWS:
        out.append(f"<p>and {len(rows) - MAX_ROWS} more rows.</p>")
    return "".join(out)


def audit_html(result) -> str:
    """An ``AuditResult``: summary, verdict per class, class-mean heatmaps, report link."""
    by_class: dict[str, list] = {}
    for f in result.findings:
        by_class.setdefault(f.class_name, []).append(f)
    rows = []
    for c in result.classes:
        found = "; ".join(f"{_e(f.kind)} ({_e(f.status)})" for f in by_class.get(c.name, [])) or "–"
        rows.append([_e(c.name), str(c.images), _pct(c.accuracy), f"{c.mean_confidence:.2f}", found])
    table = _table(["class", "images", "accuracy", "mean confidence", "findings"], rows, {1, 2, 3})
    means = [(c.name, c.mean_heatmap) for c in result.classes if c.mean_heatmap is not None]
    tiles = ""
    if means:
        vmax = positive_max(*[m for _, m in means])
        shown = means[:MAX_MEANS]
        tiles = "<h4>Class-mean heatmaps (one scale)</h4>" + "".join(
            f'<figure><img alt="mean heatmap of {_e(n)}" src="{data_uri(mean_heatmap_png(m, vmax=vmax))}">'
            f"<figcaption>{_e(n)}</figcaption></figure>" for n, m in shown)
        if len(means) > len(shown):
            tiles += f"<p>and {len(means) - len(shown)} more classes in the report.</p>"
    n_found = len(result.findings)
    confirmed = sum(1 for f in result.findings if f.status == "confirmed")
    head = (f"<h3>Shortcut audit</h3><p>{len(result.images)} images audited, {len(result.skipped)} "
            f"skipped, {n_found} finding{'s' if n_found != 1 else ''} ({confirmed} confirmed) "
            f"in {len(result.classes)} classes.</p>")
    return (f'<div class="sa-nb">{_STYLE}{head}<h4>Verdict per class</h4>{table}{tiles}'
            f"{_link(result.out, 'report.html')}</div>")


def compare_html(result) -> str:
    """A ``CompareResult``: verdict per finding, images per class, report link."""
    counts = result.counts()
    summary = ", ".join(f"{n} {_e(v)}" for v, n in counts.items() if n) or "no finding in either audit"
    rows = [[_e(f.class_name), _e(f.kind), _e(f.before_status), _e(f.after_status), f"<b>{_e(f.verdict)}</b>"]
            for f in result.findings]
    table = (_table(["class", "kind", "before", "after", "verdict"], rows, set())
             if rows else "<p>Neither audit has a finding.</p>")
    classes = _table(["class", "paired images"], [[_e(c.name), str(c.images)] for c in result.classes], {1})
    return (f'<div class="sa-nb">{_STYLE}<h3>Comparison of two audits</h3><p>{summary}.</p>'
            f"<h4>Verdict per finding</h4>{table}<h4>Classes</h4>{classes}"
            f"{_link(result.out, 'compare.html')}</div>")


def heatmap_html(result) -> str:
    """A ``HeatmapResult`` (heatmap.json's content): the overlay and what was explained."""
    out = getattr(result, "out", None)
    img = ""
    png = None
    if out is not None and (Path(out) / "overlay.png").exists():
        png = (Path(out) / "overlay.png").read_bytes()
    elif getattr(result, "values", None) is not None and getattr(result, "pixels", None) is not None:
        from .overlay import overlay_png
        png = overlay_png(result)
    if png is not None:
        img = f'<img alt="heatmap overlay" style="max-width:100%" src="{data_uri(png)}">'
    rows = [[_e(k), _e(result.get(k))] for k in ("image", "target", "predicted", "base_score", "passes")
            if k in result]
    return f'<div class="sa-nb">{_STYLE}<h3>Occlusion heatmap</h3>{_table(["", ""], rows, set())}{img}</div>'
