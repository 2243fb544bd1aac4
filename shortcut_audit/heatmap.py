"""One image's heatmap, written to a folder: the library side of ``shortcut-audit heatmap``.

:func:`run_heatmap` computes the map and writes heatmap.npy and heatmap.json; the
overlay figure (overlay.png) is the caller's to draw, with
:func:`shortcut_audit.report.write_heatmap_files` (the command line does it).
"""

from __future__ import annotations

import io
import os
import time
from pathlib import Path
from typing import Callable

import numpy as np

from .dataset import load_image
from .engine import PassEngine
from .errors import UsageError
from .model import ModelConfig, OnnxClassifier
from .occlusion import Fill, Plan, pass_count
from .options import some_names
from .scan import DEFAULT_FILL, DEFAULT_PLAN
from .sensitivity import heatmap_job
from .store import write_bytes_atomic, write_json

__all__ = ["HeatmapResult", "run_heatmap"]


class HeatmapResult(dict):
    """What :func:`run_heatmap` returns: heatmap.json's content (a dict), plus ``out``,
    the folder it was written to, ``values`` (the heatmap, as in heatmap.npy) and
    ``pixels`` (the image as the model saw it); it shows its overlay in a notebook."""

    out: Path | None = None
    values: np.ndarray | None = None
    pixels: np.ndarray | None = None


def run_heatmap(image: str | os.PathLike, model: str | os.PathLike | OnnxClassifier, *,
                out: str | os.PathLike, model_config: ModelConfig | None = None,
                plan: Plan = DEFAULT_PLAN, fill: Fill = DEFAULT_FILL, target: str | int | None = None,
                score: str = "prob", tolerance: float | None = None,
                progress: Callable[[dict], None] | None = None) -> HeatmapResult:
    """Compute one image's occlusion heatmap and write heatmap.npy and heatmap.json.

    Parameters
    ----------
    image : path
    model : path or OnnxClassifier
    out : path
        Folder for the files (created); overlay.png is written by
        :func:`shortcut_audit.report.write_heatmap_files`.
    target : str or int, optional
        Class name or index to explain; the model's prediction when omitted.
    tolerance : float, optional
        Early stopping for random plans: stop adding masks once the map's estimated
        relative error stays below this (recorded with the masks used).

    Returns
    -------
    HeatmapResult
        The content of heatmap.json (a dict), with ``out`` set.

    Raises
    ------
    UsageError, ModelError, ImageSkip (the image cannot be decoded), OutputError
    """
    t0 = time.perf_counter()
    clf = model if isinstance(model, OnnxClassifier) else OnnxClassifier(model, model_config)
    pixels = load_image(image, size=(clf.height, clf.width), channels=clf.channels, resize=clf.resize)
    t_index = None
    if target is not None:
        if isinstance(target, int) or (isinstance(target, str) and target.isdigit() and target not in clf.labels):
            t_index = int(target)
        elif target in clf.labels:
            t_index = clf.labels.index(target)
        else:
            raise UsageError(f"--target {target!r} is not one of the model's labels "
                             f"({some_names(clf.labels, 20)}); pass one of them.")
        if not 0 <= t_index < clf.n_classes:
            raise UsageError(f"--target {t_index} is out of range for {clf.n_classes} classes.")
    total = pass_count(plan, clf.height, clf.width) + 1
    engine = PassEngine.for_classifier(clf, score,
                                       on_batch=lambda n: progress and progress(
                            {"phase": "passes", "done": engine.stats.passes, "total": total,
                             "passes_per_second": engine.stats.passes_per_second}))
    results = list(engine.run([(0, heatmap_job(pixels, plan=plan, fill=fill, target=t_index,
                                                chunk=clf.batch_size, tolerance=tolerance,
                                                prepared_by=clf))]))
    hm = results[0][1]
    if isinstance(hm, Exception):
        raise hm
    elapsed = time.perf_counter() - t0
    out_dir = Path(out)
    buf = io.BytesIO()
    np.save(buf, hm.values.astype(np.float32))
    write_bytes_atomic(out_dir / "heatmap.npy", buf.getvalue())
    label = clf.labels[hm.target]
    info = {"image": str(image), "model": clf.path.name, "model_sha256": clf.sha256,
            "target": label, "target_index": hm.target, "predicted": clf.labels[hm.predicted],
            "base_score": hm.base_score, "score": score, "plan": plan.to_dict(), "fill": fill.to_dict(),
            "seed": getattr(plan, "seed", fill.seed), "passes": hm.passes, "coverage": hm.coverage,
            "size": [clf.height, clf.width], "tolerance": hm.tolerance,
            "error_estimate": hm.error_estimate, "elapsed_seconds": round(elapsed, 3)}
    write_json(out_dir / "heatmap.json", info)
    result = HeatmapResult(info)
    result.out = out_dir
    result.values = hm.values
    result.pixels = pixels
    return result
