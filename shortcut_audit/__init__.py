"""shortcut_audit: audit an image classifier for shortcut features by occlusion.

The Python API matches the command line::

    import shortcut_audit as sa
    result = sa.audit("photos/", "model.onnx", out="audit/")   # shortcut-audit audit
    sa.write_scan_report(result, "audit/")                      # figures/ and report.html
    for finding in result.findings:
        print(finding.id, finding.class_name, finding.kind, finding.status)

The computation returns its result (and keeps audit.json, compare.json, heatmap.json);
the figures and pages are written by the ``write_*`` functions of report/, which the
command line calls.

See DESIGN.md for the stages and audit.json.
"""

from ._version import __version__

from .dataset import ImageEntry, ImageRecord, Skip, load_image
from .listing import class_names, list_images
from .engine import PassEngine
from .errors import AuditError, ClusterError, DataError, ImageSkip, ModelError, OutputError, UsageError
from .findings import Finding, Thresholds
from .compare import compare
from .comparison import CompareResult
from .heatmap import HeatmapResult, run_heatmap
from .model import Classifier, ModelConfig, OnnxClassifier, read_model_config
from .occlusion import Fill, GridPlan, RandomPatchPlan, SmoothMaskPlan
from .scan import AuditResult, ScanSettings, audit
from .sensitivity import Heatmap, ImageStats, occlusion_heatmap


def _notebook_view(name: str):
    """A ``_repr_html_`` that draws with report/notebook.py when Jupyter asks (the result
    classes live in computing modules, which never import report/)."""
    def _repr_html_(self) -> str:
        from .report import notebook
        return getattr(notebook, name)(self)
    _repr_html_.__name__ = "_repr_html_"
    return _repr_html_


#: Names served from report/ and pack.py on first use: importing the package imports
#: neither matplotlib nor jinja2 (``from shortcut_audit import write_scan_report`` works).
_WRITERS = {"render_report": "report", "write_scan_report": "report", "write_compare_page": "report",
            "write_heatmap_files": "report", "make_pack": "pack"}


def __getattr__(name: str):
    if name in _WRITERS:
        import importlib

        return getattr(importlib.import_module(f".{_WRITERS[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_WRITERS))


AuditResult._repr_html_ = _notebook_view("audit_html")
CompareResult._repr_html_ = _notebook_view("compare_html")
HeatmapResult._repr_html_ = _notebook_view("heatmap_html")

__all__ = [
    "__version__",
    # errors
    "AuditError", "UsageError", "ModelError", "DataError", "ImageSkip", "OutputError", "ClusterError",
    # data and model
    "ImageEntry", "ImageRecord", "Skip", "list_images", "class_names", "load_image",
    "Classifier", "ModelConfig", "OnnxClassifier", "read_model_config",
    # occlusion and heatmaps
    "GridPlan", "RandomPatchPlan", "SmoothMaskPlan", "Fill", "PassEngine",
    "Heatmap", "ImageStats", "occlusion_heatmap", "run_heatmap",
    # the audit
    "ScanSettings", "AuditResult", "Finding", "Thresholds", "audit",
    # what people read
    "render_report", "write_scan_report", "write_compare_page", "write_heatmap_files",
    "make_pack", "compare", "CompareResult", "HeatmapResult",
]
