"""Models and image sets the benchmark builds for itself (no download).

- :func:`small_cnn`: the shape of the demo's network (three 3x3 conv blocks of 16, 32
  and 64 channels with ReLU and 2x2 max pooling, global average pooling, a dense layer
  of 64, four logits), 64 x 64 RGB, NCHW, seeded random weights. Used when the demo's
  trained ``baseline.onnx`` is not there.
- :func:`large_cnn`: 224 x 224 RGB, six 3x3 conv layers (five of stride 2) of 32 to
  512 channels, global average pooling, 1000 logits (the first four named after the
  demo's classes, so it can scan their images); about 4.4 million parameters and
  0.36 GMAC a pass, seeded random (He-scaled) weights.
- :func:`depthwise_cnn`: 224 x 224 RGB, MobileNet-like: a 3x3 stride-2 stem of 32
  channels, then 13 depthwise-separable blocks (a 3x3 depthwise conv, ``group`` = the
  channels, ReLU, a 1x1 pointwise conv, ReLU) up to 1024 channels, global average
  pooling, 1000 logits; about 4.2 million parameters and 0.57 GMAC a pass, seeded random
  (He-scaled) weights.
- :func:`write_image_set`: small PNGs in one folder per class, like the scan tests'
  fixtures (a coloured square on a noisy backdrop, a bright corner on one class).

Weights are random, so the models' heatmaps have no meaning beyond "what this network
computes"; they are for timing and for comparing two ways of computing one heatmap.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

OPSET = 17
IR_VERSION = 9
KINDS = ("bowl", "mug", "plate", "vase")


def _conv(nodes, inits, rng, name, x, cin, cout, *, stride=1):
    std = np.sqrt(2.0 / (cin * 9))
    w = rng.normal(0.0, std, size=(cout, cin, 3, 3)).astype(np.float32)
    b = rng.normal(0.0, 0.05, size=cout).astype(np.float32)
    inits += [numpy_helper.from_array(w, f"{name}_w"), numpy_helper.from_array(b, f"{name}_b")]
    nodes.append(helper.make_node("Conv", [x, f"{name}_w", f"{name}_b"], [f"{name}_c"],
                                  pads=[1, 1, 1, 1], strides=[stride, stride]))
    nodes.append(helper.make_node("Relu", [f"{name}_c"], [f"{name}_r"]))
    return f"{name}_r"


def _dense(nodes, inits, rng, name, x, cin, cout, *, relu):
    w = rng.normal(0.0, np.sqrt(2.0 / cin), size=(cout, cin)).astype(np.float32)
    b = rng.normal(0.0, 0.05, size=cout).astype(np.float32)
    inits += [numpy_helper.from_array(w, f"{name}_w"), numpy_helper.from_array(b, f"{name}_b")]
    out = f"{name}_y"
    nodes.append(helper.make_node("Gemm", [x, f"{name}_w", f"{name}_b"], [out], transB=1))
    if relu:
        nodes.append(helper.make_node("Relu", [out], [f"{name}_r"]))
        out = f"{name}_r"
    return out


def _finish(nodes, inits, x_info, out, classes, name, labels) -> onnx.ModelProto:
    nodes.append(helper.make_node("Identity", [out], ["scores"]))
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", classes])
    graph = helper.make_graph(nodes, name, [x_info], [y], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="shortcut_audit-bench")
    model.ir_version = IR_VERSION
    entry = model.metadata_props.add()
    entry.key = "shortcut_audit"
    entry.value = json.dumps({"labels": list(labels), "output": "logits"})
    onnx.checker.check_model(model)
    return model


def small_cnn(*, size: int = 64, seed: int = 0) -> onnx.ModelProto:
    """The demo network's shape at ``size`` x ``size`` (about 29k parameters)."""
    rng = np.random.default_rng(seed)
    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, size, size])
    nodes, inits = [], []
    cur, cin = "image", 3
    for i, cout in enumerate((16, 32, 64)):
        cur = _conv(nodes, inits, rng, f"c{i}", cur, cin, cout)
        nodes.append(helper.make_node("MaxPool", [cur], [f"p{i}"], kernel_shape=[2, 2], strides=[2, 2]))
        cur, cin = f"p{i}", cout
    nodes.append(helper.make_node("GlobalAveragePool", [cur], ["gap"]))
    nodes.append(helper.make_node("Flatten", ["gap"], ["flat"], axis=1))
    cur = _dense(nodes, inits, rng, "d0", "flat", 64, 64, relu=True)
    cur = _dense(nodes, inits, rng, "d1", cur, 64, len(KINDS), relu=False)
    return _finish(nodes, inits, x, cur, len(KINDS), "small_cnn", KINDS)


LARGE_CHANNELS = ((3, 32, 2), (32, 64, 2), (64, 128, 2), (128, 256, 2), (256, 512, 2), (512, 512, 1))


def large_cnn(*, size: int = 224, seed: int = 0, classes: int = 1000,
              channels=LARGE_CHANNELS) -> onnx.ModelProto:
    """A plain conv net at ``size`` x ``size``; ``channels`` lists (in, out, stride)."""
    rng = np.random.default_rng(seed)
    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, size, size])
    nodes, inits = [], []
    cur = "image"
    for i, (cin, cout, stride) in enumerate(channels):
        cur = _conv(nodes, inits, rng, f"c{i}", cur, cin, cout, stride=stride)
    nodes.append(helper.make_node("GlobalAveragePool", [cur], ["gap"]))
    nodes.append(helper.make_node("Flatten", ["gap"], ["flat"], axis=1))
    cur = _dense(nodes, inits, rng, "fc", "flat", channels[-1][1], classes, relu=False)
    # the first labels are the image sets' class names, so a scan can run on them
    labels = list(KINDS) + [f"c{i:03d}" for i in range(len(KINDS), classes)]
    return _finish(nodes, inits, x, cur, classes, "large_cnn", labels)


#: (channels out, stride) of each depthwise-separable block, after a 32-channel stem.
DEPTHWISE_BLOCKS = ((64, 1), (128, 2), (128, 1), (256, 2), (256, 1), (512, 2), (512, 1), (512, 1),
                    (512, 1), (512, 1), (512, 1), (1024, 2), (1024, 1))


def depthwise_cnn(*, size: int = 224, seed: int = 0, classes: int = 1000, stem: int = 32,
                  blocks=DEPTHWISE_BLOCKS) -> onnx.ModelProto:
    """A MobileNet-like network of depthwise-separable blocks at ``size`` x ``size``."""
    rng = np.random.default_rng(seed)
    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, size, size])
    nodes, inits = [], []
    cur = _conv(nodes, inits, rng, "stem", "image", 3, stem, stride=2)
    cin = stem
    for i, (cout, stride) in enumerate(blocks):
        # depthwise 3x3: one filter per channel (group = channels)
        w = rng.normal(0.0, np.sqrt(2.0 / 9), size=(cin, 1, 3, 3)).astype(np.float32)
        b = rng.normal(0.0, 0.05, size=cin).astype(np.float32)
        inits += [numpy_helper.from_array(w, f"dw{i}_w"), numpy_helper.from_array(b, f"dw{i}_b")]
        nodes.append(helper.make_node("Conv", [cur, f"dw{i}_w", f"dw{i}_b"], [f"dw{i}_c"], group=cin,
                                      pads=[1, 1, 1, 1], strides=[stride, stride]))
        nodes.append(helper.make_node("Relu", [f"dw{i}_c"], [f"dw{i}_r"]))
        # pointwise 1x1
        w = rng.normal(0.0, np.sqrt(2.0 / cin), size=(cout, cin, 1, 1)).astype(np.float32)
        b = rng.normal(0.0, 0.05, size=cout).astype(np.float32)
        inits += [numpy_helper.from_array(w, f"pw{i}_w"), numpy_helper.from_array(b, f"pw{i}_b")]
        nodes.append(helper.make_node("Conv", [f"dw{i}_r", f"pw{i}_w", f"pw{i}_b"], [f"pw{i}_c"]))
        nodes.append(helper.make_node("Relu", [f"pw{i}_c"], [f"pw{i}_r"]))
        cur, cin = f"pw{i}_r", cout
    nodes.append(helper.make_node("GlobalAveragePool", [cur], ["gap"]))
    nodes.append(helper.make_node("Flatten", ["gap"], ["flat"], axis=1))
    cur = _dense(nodes, inits, rng, "fc", "flat", cin, classes, relu=False)
    labels = list(KINDS) + [f"c{i:03d}" for i in range(len(KINDS), classes)]
    return _finish(nodes, inits, x, cur, classes, "depthwise_cnn", labels)


def parameter_count(model: onnx.ModelProto) -> int:
    return int(sum(np.prod(t.dims) for t in model.graph.initializer))


def save(model: onnx.ModelProto, path: Path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    onnx.save(model, str(path))
    return path


def write_image_set(root: Path, n: int, *, size: int = 48, seed: int = 0,
                    classes=KINDS) -> Path:
    """``n`` PNGs in total, spread over ``classes`` (folder per class).

    Each is a coloured square (the object, its colour by class) at a random place on a
    noisy grey backdrop; the first class also carries a bright top-left corner.
    """
    from PIL import Image

    rng = np.random.default_rng(seed)
    colours = [(128, 128, 128), (220, 60, 60), (60, 60, 220), (60, 200, 80)]
    root = Path(root)
    for k, name in enumerate(classes):
        (root / name).mkdir(parents=True, exist_ok=True)
    obj = size // 3
    for i in range(n):
        k = i % len(classes)
        img = 150.0 + 25.0 * rng.standard_normal((size, size, 3))
        r0, c0 = rng.integers(size // 4, size - obj - size // 8, size=2)
        img[r0:r0 + obj, c0:c0 + obj] = colours[k % len(colours)]
        if k == 0:
            img[: size // 8, : size // 8] = 255.0
        Image.fromarray(np.clip(img, 0, 255).astype(np.uint8)).save(
            root / classes[k] / f"{classes[k]}_{i // len(classes):04d}.png")
    return root
