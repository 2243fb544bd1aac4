"""The figure of ``shortcut-audit heatmap``: overlay.png beside heatmap.npy and heatmap.json.

:func:`shortcut_audit.heatmap.run_heatmap` computes and stores the map; this module
draws it (matplotlib lives only in report/).
"""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import UsageError
from ..sensitivity import peak_box
from ..store import write_bytes_atomic
from .figures import heatmap_overlay_png

__all__ = ["overlay_png", "write_heatmap_files"]


def overlay_png(result) -> bytes:
    """The overlay figure of a ``HeatmapResult``: the image, its heatmap, the peak box."""
    if getattr(result, "values", None) is None or getattr(result, "pixels", None) is None:
        raise UsageError("this heatmap result holds no heatmap values or image; pass the result "
                         "run_heatmap returned in this session.")
    title = f"{Path(result['image']).name}: {result['target']} ({result['base_score']:.3f})"
    return heatmap_overlay_png(result.pixels, result.values, title=title, box=peak_box(result.values))


def write_heatmap_files(result, out: str | os.PathLike | None = None) -> Path:
    """Write ``overlay.png`` for a ``HeatmapResult`` into ``out`` (default: ``result.out``,
    the folder run_heatmap wrote heatmap.npy and heatmap.json to); return its path."""
    folder = out if out is not None else getattr(result, "out", None)
    if folder is None:
        raise UsageError("no output folder: pass out=, or the result run_heatmap returned with out set.")
    path = Path(folder) / "overlay.png"
    write_bytes_atomic(path, overlay_png(result))
    return path
