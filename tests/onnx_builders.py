"""Small ONNX classifiers built with ``onnx.helper``, for tests.

Every builder returns an :class:`onnx.ModelProto` (opset 17, IR version 9, which every
supported onnxruntime loads); :func:`save` writes one to disk with optional
``shortcut_audit`` metadata. The good models are closed-form functions of the pixels, so
a test can compute the expected scores with numpy:

* :func:`linear_model` -- ``scores = W @ flatten_nchw(x) + b``, optionally followed by
  Softmax or Sigmoid, for either layout, channel count, batch kind and input dtype.
* :func:`reference_logits` -- the same function in numpy, for the expected values.

The bad models each break one thing the model adapter checks: :func:`two_input_model`,
:func:`rank2_input_model`, :func:`rank3_output_model`, :func:`nan_model`,
:func:`external_data_model`.

Examples
--------
>>> import numpy as np
>>> m = linear_model(np.zeros((2, 12), np.float32), np.zeros(2, np.float32),
...                  height=2, width=2)
>>> [i.name for i in m.graph.input]
['image']
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

__all__ = [
    "OPSET",
    "IR_VERSION",
    "linear_model",
    "reference_logits",
    "random_linear",
    "save",
    "two_input_model",
    "rank2_input_model",
    "rank3_output_model",
    "nan_model",
    "external_data_model",
]

OPSET = 17
IR_VERSION = 9

_DTYPES = {
    "float32": TensorProto.FLOAT,
    "float16": TensorProto.FLOAT16,
    "float64": TensorProto.DOUBLE,
    "uint8": TensorProto.UINT8,
}


def _finish(graph: onnx.GraphProto, *, check: bool = True) -> onnx.ModelProto:
    model = helper.make_model(
        graph,
        opset_imports=[helper.make_opsetid("", OPSET)],
        producer_name="shortcut_audit-tests",
    )
    model.ir_version = IR_VERSION
    if check:
        onnx.checker.check_model(model)
    return model


def _batch_dim(batch: int | None) -> int | str:
    return "N" if batch is None else int(batch)


def _image_nodes(
    *,
    channels: int,
    height: int,
    width: int,
    layout: str,
    batch: int | None,
    input_dtype: str,
    input_name: str,
    dynamic_size: bool,
) -> tuple[onnx.ValueInfoProto, list[onnx.NodeProto], str]:
    """The image input and the nodes that turn it into a float32 NCHW tensor.

    Returns the input's value info, the nodes, and the name of the NCHW float tensor.
    """
    if layout not in ("nchw", "nhwc"):
        raise ValueError(f"layout must be 'nchw' or 'nhwc'; got {layout!r}")
    if input_dtype not in _DTYPES:
        raise ValueError(f"input_dtype must be one of {sorted(_DTYPES)}; got {input_dtype!r}")
    h: int | str = "H" if dynamic_size else height
    w: int | str = "W" if dynamic_size else width
    n = _batch_dim(batch)
    shape = [n, channels, h, w] if layout == "nchw" else [n, h, w, channels]
    x = helper.make_tensor_value_info(input_name, _DTYPES[input_dtype], shape)
    nodes: list[onnx.NodeProto] = []
    current = input_name
    if input_dtype != "float32":
        nodes.append(helper.make_node("Cast", [current], ["x_float"], to=TensorProto.FLOAT))
        current = "x_float"
    if layout == "nhwc":
        nodes.append(helper.make_node("Transpose", [current], ["x_nchw"], perm=[0, 3, 1, 2]))
        current = "x_nchw"
    return x, nodes, current


def linear_model(
    weights: np.ndarray,
    bias: np.ndarray,
    *,
    height: int,
    width: int,
    channels: int = 3,
    layout: str = "nchw",
    batch: int | None = None,
    output: str = "logits",
    input_dtype: str = "float32",
    input_name: str = "image",
    dynamic_size: bool = False,
) -> onnx.ModelProto:
    """A linear classifier over the NCHW-flattened input tensor.

    ``scores = weights @ flatten(x_nchw) + bias``, where ``x_nchw`` is the model's input
    tensor (after the adapter's preprocessing) in NCHW order, flattened C-major
    (index ``c*H*W + row*W + col``). For ``layout="nhwc"`` the graph transposes its input
    to NCHW first, so the same ``weights`` give the same function of the image in either
    layout.

    Parameters
    ----------
    weights : ndarray (K, C*H*W)
        One row of weights per class.
    bias : ndarray (K,)
    height, width : int
        Input size in pixels (rows, columns).
    channels : int
        Channel count of the input (1 or 3 for a usable image model; other counts build
        a model the adapter must refuse).
    layout : {"nchw", "nhwc"}
    batch : int or None
        None declares a symbolic batch dimension ``"N"``; an int fixes it.
    output : {"logits", "probs", "sigmoid"}
        ``"probs"`` appends Softmax over the classes, ``"sigmoid"`` appends Sigmoid.
    input_dtype : {"float32", "uint8", "float16", "float64"}
        Element type of the input; the graph casts it to float32 first.
    input_name : str
    dynamic_size : bool
        Declare the spatial dimensions as symbolic ``"H"`` and ``"W"``; the weights still
        fix the size the graph can actually run at.

    Returns
    -------
    onnx.ModelProto
        Input ``input_name``, output ``"scores"`` of shape (N, K).
    """
    weights = np.asarray(weights, dtype=np.float32)
    bias = np.asarray(bias, dtype=np.float32)
    k = weights.shape[0]
    if weights.shape != (k, channels * height * width) or bias.shape != (k,):
        raise ValueError(
            f"weights must be (K, {channels * height * width}) and bias (K,); "
            f"got {weights.shape} and {bias.shape}"
        )
    if output not in ("logits", "probs", "sigmoid"):
        raise ValueError(f"output must be 'logits', 'probs' or 'sigmoid'; got {output!r}")
    x, nodes, current = _image_nodes(
        channels=channels, height=height, width=width, layout=layout, batch=batch,
        input_dtype=input_dtype, input_name=input_name, dynamic_size=dynamic_size,
    )
    nodes.append(helper.make_node("Flatten", [current], ["flat"], axis=1))
    last = "scores" if output == "logits" else "logits"
    nodes.append(helper.make_node("Gemm", ["flat", "W", "b"], [last], transB=1))
    if output == "probs":
        nodes.append(helper.make_node("Softmax", ["logits"], ["scores"], axis=1))
    elif output == "sigmoid":
        nodes.append(helper.make_node("Sigmoid", ["logits"], ["scores"]))
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, [_batch_dim(batch), k])
    graph = helper.make_graph(
        nodes, "linear", [x], [y],
        [numpy_helper.from_array(weights, "W"), numpy_helper.from_array(bias, "b")],
    )
    return _finish(graph)


def reference_logits(
    weights: np.ndarray, bias: np.ndarray, x_nhwc: np.ndarray
) -> np.ndarray:
    """Numpy twin of :func:`linear_model` before its Softmax/Sigmoid.

    Parameters
    ----------
    weights : ndarray (K, C*H*W)
    bias : ndarray (K,)
    x_nhwc : ndarray (N, H, W, C)
        The model-input tensor (already scaled / normalised) in NHWC order.

    Returns
    -------
    ndarray (N, K) float64
    """
    x = np.asarray(x_nhwc, dtype=np.float64).transpose(0, 3, 1, 2).reshape(len(x_nhwc), -1)
    return x @ np.asarray(weights, np.float64).T + np.asarray(bias, np.float64)


def random_linear(
    k: int, channels: int, height: int, width: int, *, seed: int = 0, scale: float = 1.0
) -> tuple[np.ndarray, np.ndarray]:
    """Seeded random ``(weights (K, C*H*W), bias (K,))`` in float32 for :func:`linear_model`.

    Weights are normal with standard deviation ``scale / sqrt(C*H*W)`` so the logits of
    an input in [0, 1] stay of order ``scale``.
    """
    rng = np.random.default_rng(seed)
    d = channels * height * width
    w = rng.normal(0.0, scale / np.sqrt(d), size=(k, d)).astype(np.float32)
    b = rng.normal(0.0, 0.1, size=k).astype(np.float32)
    return w, b


def save(
    model: onnx.ModelProto, path: str | Path, *, metadata: dict | None = None
) -> Path:
    """Write ``model`` to ``path``; with ``metadata``, store it as JSON under the key
    ``"shortcut_audit"`` of the model's ``metadata_props`` (replacing any earlier entry).

    ``metadata`` may also be a str, stored verbatim (to write malformed metadata).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    path = Path(path)
    if metadata is not None:
        model = onnx.ModelProto.FromString(model.SerializeToString())
        kept = [p for p in model.metadata_props if p.key != "shortcut_audit"]
        del model.metadata_props[:]
        model.metadata_props.extend(kept)
        value = metadata if isinstance(metadata, str) else json.dumps(metadata)
        entry = model.metadata_props.add()
        entry.key = "shortcut_audit"
        entry.value = value
    onnx.save(model, str(path))
    return path


def two_input_model(*, height: int = 4, width: int = 4) -> onnx.ModelProto:
    """Two NCHW image inputs ``a`` and ``b`` (3 channels), output ``a + b`` reduced to (N, 2)."""
    shape = ["N", 3, height, width]
    a = helper.make_tensor_value_info("a", TensorProto.FLOAT, shape)
    b = helper.make_tensor_value_info("b", TensorProto.FLOAT, shape)
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 2])
    w = np.ones((2, 3 * height * width), np.float32)
    nodes = [
        helper.make_node("Add", ["a", "b"], ["s"]),
        helper.make_node("Flatten", ["s"], ["flat"], axis=1),
        helper.make_node("Gemm", ["flat", "W"], ["scores"], transB=1),
    ]
    graph = helper.make_graph(nodes, "two_inputs", [a, b], [y], [numpy_helper.from_array(w, "W")])
    return _finish(graph)


def rank2_input_model(features: int = 12, classes: int = 2) -> onnx.ModelProto:
    """A tabular classifier: input (N, features), output (N, classes) logits."""
    x = helper.make_tensor_value_info("features", TensorProto.FLOAT, ["N", features])
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", classes])
    w = np.ones((classes, features), np.float32)
    nodes = [helper.make_node("Gemm", ["features", "W"], ["scores"], transB=1)]
    graph = helper.make_graph(nodes, "rank2", [x], [y], [numpy_helper.from_array(w, "W")])
    return _finish(graph)


def rank3_output_model(
    *, height: int = 4, width: int = 4, classes: int = 2, declare_shape: bool = True
) -> onnx.ModelProto:
    """An NCHW 3-channel image model whose output is (N, 1, classes).

    With ``declare_shape=False`` the output's shape is left out of the graph, so the
    rank only shows in a forward pass.
    """
    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, height, width])
    shape = ["N", 1, classes] if declare_shape else None
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, shape)
    w = np.ones((classes, 3 * height * width), np.float32) / (3 * height * width)
    nodes = [
        helper.make_node("Flatten", ["image"], ["flat"], axis=1),
        helper.make_node("Gemm", ["flat", "W"], ["logits"], transB=1),
        helper.make_node("Unsqueeze", ["logits", "axes"], ["scores"]),
    ]
    inits = [numpy_helper.from_array(w, "W"), numpy_helper.from_array(np.array([1], np.int64), "axes")]
    graph = helper.make_graph(nodes, "rank3", [x], [y], inits)
    # onnx's checker wants a declared output shape; onnxruntime does not
    return _finish(graph, check=declare_shape)


def nan_model(
    threshold: float, *, height: int = 4, width: int = 4, classes: int = 3
) -> onnx.ModelProto:
    """An NCHW RGB logit model that emits NaN for images whose mean input exceeds ``threshold``.

    ``scores[n, k] = mean(x[n]) * (k + 1) + log(threshold - mean(x[n]))``; the log of a
    negative number is NaN in IEEE arithmetic. ``mean(x)`` is over the model-input tensor
    (after scaling, so in [0, 1] with the default scale 1/255). A negative ``threshold``
    gives NaN for every image.
    """
    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, height, width])
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", classes])
    ramp = np.arange(1, classes + 1, dtype=np.float32).reshape(1, classes)
    nodes = [
        helper.make_node("ReduceMean", ["image"], ["m4"], axes=[1, 2, 3], keepdims=1),
        helper.make_node("Flatten", ["m4"], ["m"], axis=1),  # (N, 1)
        helper.make_node("Sub", ["t", "m"], ["gap"]),
        helper.make_node("Log", ["gap"], ["lg"]),
        helper.make_node("Mul", ["m", "ramp"], ["lin"]),
        helper.make_node("Add", ["lin", "lg"], ["scores"]),
    ]
    inits = [
        numpy_helper.from_array(np.array([[threshold]], np.float32), "t"),
        numpy_helper.from_array(ramp, "ramp"),
    ]
    graph = helper.make_graph(nodes, "nan", [x], [y], inits)
    return _finish(graph)


def external_data_model(
    folder: str | Path,
    *,
    location: str = "../outside.bin",
    name: str = "model.onnx",
    height: int = 2,
    width: int = 2,
    classes: int = 2,
    write_data: bool = True,
) -> Path:
    """Write a linear NCHW RGB model whose weights live in an external data file.

    The weight initializer's ``external_data`` points at ``location`` (relative to
    ``folder``, or absolute); with ``write_data`` the weights are written there too, so
    only a location check (not a missing file) can stop the model. Row k of the weights
    is ``4 * (k + 1) / (3*height*width)`` everywhere and the bias is zero, so
    ``logit_k = 4 * (k + 1) * mean(x)`` (distinct per class, so plainly logits).

    Returns
    -------
    pathlib.Path
        The path of the written ``.onnx`` file, ``folder / name``.
    """
    folder = Path(folder)
    d = 3 * height * width
    weights = np.repeat(4.0 * np.arange(1, classes + 1, dtype=np.float32)[:, None] / d, d, axis=1)
    model = linear_model(weights, np.zeros(classes, np.float32), height=height, width=width)
    init = next(t for t in model.graph.initializer if t.name == "W")
    init.ClearField("raw_data")
    del init.float_data[:]
    init.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", "0"), ("length", str(weights.nbytes))):
        entry = init.external_data.add()
        entry.key = key
        entry.value = value
    if write_data:
        target = Path(location) if Path(location).is_absolute() else folder / location
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(weights.tobytes())
    out = folder / name
    out.parent.mkdir(parents=True, exist_ok=True)
    onnx.save(model, str(out))
    return out
