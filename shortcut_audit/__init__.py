"""shortcut_audit: audit an image classifier for shortcut features by occlusion.

The Python API matches the command line::

    import shortcut_audit as sa
    result = sa.audit("photos/", "model.onnx", out="audit/")   # shortcut-audit audit
    for finding in result.findings:
        print(finding.id, finding.class_name, finding.kind, finding.status)

See DESIGN.md for the stages and audit.json.
"""

__version__ = "0.1.0"

from .dataset import ImageEntry, ImageRecord, Skip, load_image
from .listing import class_names, list_images
from .engine import PassEngine
from .errors import AuditError, ClusterError, DataError, ImageSkip, ModelError, OutputError, UsageError
from .findings import Finding, Thresholds
from .compare import CompareResult, compare
from .heatmap import run_heatmap
from .pack import make_pack
from .report import render_report, write_scan_report
from .model import Classifier, ModelConfig, OnnxClassifier, read_model_config
from .occlusion import Fill, GridPlan, RandomPatchPlan, SmoothMaskPlan
from .scan import AuditResult, ScanSettings, audit
from .sensitivity import Heatmap, ImageStats, occlusion_heatmap

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
    "render_report", "write_scan_report", "make_pack", "compare", "CompareResult",
]
