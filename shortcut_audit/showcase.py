"""The whole job on the shipped demo: the library side of ``shortcut-audit demo``.

Scans the demo catalogue (mugs, bowls, vases, plates with planted shortcuts) with the
``baseline`` model, scans it with the ``dropout`` and ``rebalanced`` models, compares
baseline against each, writes every report and the baseline's evidence pack, and
returns a summary that the command prints.
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Callable

from .compare import compare
from .demo import demo_paths
from .errors import DataError
from .options import ModelConfig, read_model_config
from .pack import make_pack
from .report import write_compare_page, write_scan_report
from .scan import ScanSettings, audit

__all__ = ["run_demo"]


def run_demo(out: str | os.PathLike, *, settings: ScanSettings | None = None,
             progress: Callable[[dict], None] | None = None) -> dict:
    """Run the demo into ``out``; return what it found and where the reports are.

    Returns
    -------
    dict
        ``{"audits": {model: AuditResult}, "comparisons": {model: CompareResult},
        "reports": {...paths}, "pack": path, "elapsed_seconds": float}``

    Raises
    ------
    DataError
        The demo's files are missing (a broken install).
    """
    t0 = time.perf_counter()
    paths = demo_paths()
    if not paths.images.is_dir():
        raise DataError(f"the demo images are missing from {paths.images}; reinstall shortcut_audit.")
    out = Path(out)
    settings = settings or ScanSettings()
    audits = {}
    for name, model in paths.models.items():
        if not model.onnx.exists():
            raise DataError(f"the demo model {model.onnx} is missing; reinstall shortcut_audit.")
        cfg = read_model_config(model.config) if model.config else ModelConfig()

        def tagged(event: dict, name=name) -> None:
            if progress is not None:
                progress(dict(event, phase=f"{name}: {event.get('phase', '')}"))

        audits[name] = audit(paths.images, model.onnx, out=out / name, masks=paths.masks,
                            model_config=cfg, settings=settings, progress=tagged)
        write_scan_report(audits[name], out / name)
    comparisons = {}
    for name in ("dropout", "rebalanced"):
        comparisons[name] = compare(before_audit=out / "baseline", after_audit=out / name,
                                    out=out / f"baseline-vs-{name}", seed=settings.seed)
        write_compare_page(comparisons[name], out / f"baseline-vs-{name}")
    pack = None
    if audits["baseline"].findings:
        pack = make_pack(out / "baseline", out / "evidence-pack.zip")
    return {
        "audits": audits,
        "comparisons": comparisons,
        "reports": {"baseline": out / "baseline" / "report.html",
                    **{f"baseline-vs-{n}": out / f"baseline-vs-{n}" / "compare.html" for n in comparisons}},
        "pack": pack,
        "elapsed_seconds": round(time.perf_counter() - t0, 1),
    }
