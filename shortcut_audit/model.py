"""The model adapter: an ONNX image classifier behind the :class:`Classifier` protocol.

The rest of the tool hands this module batches of pixels, ``(N, H, W, C)`` float32 in
0..255 at the model's input size (rows, columns, channels; C = 3 for RGB or 1 for
gray), and gets back ``(N, K)`` float32 class probabilities. Everything the model
itself needs happens here: scale, mean and std, channel order (rgb / bgr / gray), the
NCHW or NHWC layout, the input's element type, and batching (dynamic batch, a fixed
batch of N that is padded, or a fixed batch of 1 that is looped).

Settings (:mod:`shortcut_audit.options`, re-exported here) come from three places; for
each field the first that sets it wins:

1. the caller's :class:`ModelConfig` (command-line options merged over
   ``--model-config FILE``, see :func:`read_model_config`),
2. the ONNX file's metadata entry ``"shortcut_audit"`` (:data:`METADATA_KEY`), a JSON
   object with the keys of the TOML file (``labels`` as a list; never a file path),
3. what the graph says (layout, size, channels, batch) and the defaults (scale 1/255,
   mean 0, std 1, rgb for 3 channels, gray for 1, resize "stretch"); the output kind is
   detected by a test forward pass on seeded random images.

This is the only module that imports onnxruntime (and onnx, to check a file before
onnxruntime reads it). Errors are :class:`~shortcut_audit.errors.ModelError` (the
model cannot be used) or :class:`~shortcut_audit.errors.UsageError` (an option value is
wrong, a file does not exist), each one line that says what to do.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import time
import warnings
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np

from .errors import ModelError, UsageError
from .options import (CONFIG_KEYS, DEFAULT_RESIZE, DEFAULT_SCALE,  # noqa: F401 (re-exported)
                      METADATA_KEY, ModelConfig, _check_field, _cli_name, _config_from_mapping,
                      _is_number, _is_whole, parse_numbers, parse_size, read_labels,
                      read_model_config)

__all__ = [
    "METADATA_KEY",
    "CONFIG_KEYS",
    "LUMA_WEIGHTS",
    "ModelConfig",
    "Classifier",
    "OnnxClassifier",
    "parse_size",
    "parse_numbers",
    "read_labels",
    "read_model_config",
]

#: ITU-R BT.601 luma weights for R, G, B, used to feed an RGB batch to a gray model.
LUMA_WEIGHTS = (0.299, 0.587, 0.114)


#: Batch sizes tried when the batch size is measured, and the cap on one batch's input.
BATCH_CANDIDATES = (1, 8, 16, 32, 64)
MAX_BATCH_BYTES = 256 * 2**20
#: The measured batch size is the largest candidate whose session rate is at least this
#: share of the fastest. The engine pays a cost per call on top of the session, so it
#: runs best at larger sizes than the session alone (bench/RESULTS.md: 64 against 8 for
#: the 64 x 64 demo model with 2 threads, where 8 ran the engine at 0.45 of its best);
#: at 0.95 a busy moment often picked 8.
BATCH_KEEP = 0.85

# output-kind detection: tolerance on [0, 1] (float rounding) and on row sums
_RANGE_TOL = 1e-6
_SUM_TOL = 1e-3
_TEST_IMAGES = 4
_LOG_FLOOR = 1e-12      # log(p) of a probability output is clipped here
_LOGIT_EPS = 1e-7       # sigmoid outputs are clipped to [eps, 1 - eps] before logit(p)

_ONNX_DTYPES = {
    "tensor(float)": np.float32,
    "tensor(uint8)": np.uint8,
    "tensor(float16)": np.float16,
    "tensor(double)": np.float64,
}
_FLOAT_OUTPUTS = ("tensor(float)", "tensor(float16)", "tensor(double)")


# --------------------------------------------------------------------------- protocol

@runtime_checkable
class Classifier(Protocol):
    """Anything that maps a batch of images to class probabilities.

    ``predict(batch)`` takes ``(N, H, W, C)`` float32 pixels in 0..255 (rows, columns,
    channels) and returns ``(N, K)`` float32 probabilities. Core code only needs this,
    so tests may pass a plain object with a ``predict`` method.
    """

    def predict(self, batch: np.ndarray) -> np.ndarray: ...


# --------------------------------------------------------------------------- ONNX checks

def _short(exc: BaseException, limit: int = 200) -> str:
    """First line of an exception's text, without onnxruntime's status prefix."""
    text = str(exc).strip()
    text = text.splitlines()[0].strip() if text else type(exc).__name__
    text = re.sub(r"^(\[ONNXRuntimeError\]\s*:\s*\d+\s*:\s*\w+\s*:\s*)+", "", text)
    text = re.sub(r"^\S+\.(cc|h|cpp):\d+\s+\S+\s+", "", text)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _graph_tensors(nodes: Sequence[Any], initializers: Sequence[Any] = ()) -> Iterator[Any]:
    """Every TensorProto of a graph: initializers, node attributes, subgraphs."""
    yield from initializers
    for node in nodes:
        for attr in node.attribute:
            if attr.HasField("t"):
                yield attr.t
            yield from attr.tensors
            if attr.HasField("sparse_tensor"):
                yield attr.sparse_tensor.values
                yield attr.sparse_tensor.indices
            if attr.HasField("g"):
                yield from _subgraph_tensors(attr.g)
            for g in attr.graphs:
                yield from _subgraph_tensors(g)


def _subgraph_tensors(graph: Any) -> Iterator[Any]:
    yield from _graph_tensors(graph.node, graph.initializer)
    for sparse in graph.sparse_initializer:
        yield sparse.values
        yield sparse.indices


def _model_tensors(proto: Any) -> Iterator[Any]:
    yield from _subgraph_tensors(proto.graph)
    for function in proto.functions:
        yield from _graph_tensors(function.node)


def _check_external_data(proto: Any, path: Path) -> None:
    """Refuse external data whose location leaves the model's folder.

    A location is refused when it is absolute (``/x``, ``\\\\x``, ``C:x``), has a ``..``
    part, or resolves (following symbolic links) to a place outside the folder.
    """
    from onnx import TensorProto

    folder = Path(os.path.realpath(path.parent))
    for tensor in _model_tensors(proto):
        if tensor.data_location != TensorProto.EXTERNAL:
            continue
        location = next((e.value for e in tensor.external_data if e.key == "location"), "")
        parts = re.split(r"[\\/]+", location)
        try:
            target = Path(os.path.realpath(folder / location)) if location else folder
        except (ValueError, OSError):  # e.g. a NUL byte in the location
            target = Path("/")
        outside = (
            not location
            or location.startswith(("/", "\\"))
            or re.match(r"^[A-Za-z]:", location) is not None
            or os.path.isabs(location)
            or ".." in parts
            or (target != folder and folder not in target.parents)
        )
        if outside:
            raise ModelError(
                f"{path.name} keeps tensor {tensor.name!r} in external data at {location!r}, "
                "outside the model's folder; the tool will not read it. Keep external data "
                "files in the model's folder, named by relative paths without '..'."
            )
        if not target.is_file():
            raise ModelError(
                f"{path.name} keeps tensor {tensor.name!r} in external data file {location!r}, "
                "which is not in the model's folder; copy the data file next to the model."
            )


def _metadata_config(proto: Any, name: str) -> ModelConfig | None:
    """The settings in the model's ``METADATA_KEY`` entry, or None when there is none.

    The value is parsed as JSON data only: it is never a path and never executed.
    """
    values = [p.value for p in proto.metadata_props if p.key == METADATA_KEY]
    if not values:
        return None
    source = f"the model's {METADATA_KEY!r} metadata"
    try:
        data = json.loads(values[-1])
    except (json.JSONDecodeError, RecursionError) as exc:
        raise ModelError(_malformed(name, f"not JSON ({getattr(exc, 'msg', exc)})")) from None
    try:
        return _config_from_mapping(data, source=source, base_dir=None, error=ModelError)
    except ModelError as exc:
        raise ModelError(_malformed(name, str(exc).rstrip("."))) from None


def _malformed(name: str, reason: str) -> str:
    return (
        f"{name} has malformed {METADATA_KEY!r} metadata: {reason}. Fix the metadata, or "
        "pass the model settings with --model-config FILE (the metadata is then ignored)."
    )


def _dim(d: Any) -> int | None:
    """A fixed positive dimension, or None for a symbolic / unknown one."""
    return int(d) if _is_whole(d) and d > 0 else None


def _shape_text(shape: Any) -> str:
    if shape is None:
        return "unknown"
    return "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


# --------------------------------------------------------------------------- classifier

class OnnxClassifier:
    """An ONNX image classifier run by onnxruntime on the CPU.

    Parameters
    ----------
    path : str or os.PathLike
        The ``.onnx`` file. External data must sit in the model's folder.
    config : ModelConfig, optional
        The caller's settings (command line merged over ``--model-config``). They win
        over the model's metadata, which wins over what the graph says and the defaults.
        When the metadata is malformed, a non-empty ``config`` makes the tool ignore the
        metadata (with a warning); otherwise it is a :class:`ModelError`.
    dataset_labels : sequence of str, optional
        Class names to use when neither ``config`` nor the metadata give labels.

    Attributes
    ----------
    path : pathlib.Path
    sha256 : str
        Hex digest of the file's bytes.
    input_name, output_name : str
    layout : {"nchw", "nhwc"}
    height, width : int
        Input size in pixels (rows, columns).
    channels : {1, 3}
    color : {"rgb", "bgr", "gray"}
    input_dtype : numpy dtype class
        ``np.float32`` or ``np.uint8`` (``np.float16`` / ``np.float64`` inputs are fed
        like float32 and cast last).
    dynamic_batch : bool
    fixed_batch : int or None
        The graph's fixed batch size, when it has one.
    n_classes : int
    labels : tuple of str
    output_kind : {"probs", "logits", "sigmoid"}
    resize : {"stretch", "crop", "pad"}
    scale : float
    mean, std : tuple of float
        One number per model channel (RGB order).
    batch_size : int
        Images per session run.
    config : ModelConfig
        The effective settings, every field resolved (``threads`` stays None when
        onnxruntime chooses).

    Raises
    ------
    UsageError
        The file does not exist, or is a folder.
    ModelError
        The file is not a loadable ONNX model, keeps external data outside its folder,
        has several inputs or a non-image input, a first output that is not (N, K),
        NaN scores for every test image, malformed metadata, or labels whose count
        differs from the outputs; the graph's size is dynamic and no ``size`` was given.

    Notes
    -----
    Preprocessing, for a float input: ``x * scale``, then ``(x - mean) / std`` per
    channel with ``mean`` and ``std`` in RGB order, then the channel order (``bgr``
    reverses the channels; a gray model given a 3-channel batch gets the ITU-R BT.601
    luma ``0.299 R + 0.587 G + 0.114 B``, done first), then the layout. A **uint8**
    input gets ``round(clip(x, 0, 255))`` with no scale, mean or std: such a model
    normalises inside its graph. An RGB model given a 1-channel batch gets the gray
    channel repeated three times.

    Batching: a dynamic batch runs ``batch_size`` images per call; a fixed batch of N
    pads the last chunk (by repeating its last image) and drops the extra rows; a
    fixed batch of 1 runs the images one at a time (warned once, as it is slow). When
    ``batch_size`` is not set it is measured once: sizes 8, 16, 32, 64 (capped so
    one batch of float32 input stays under 256 MB) are timed briefly (after a warm-up
    run, best of a few) and the largest within 5% of the fastest is kept. The
    numbers differ between batch sizes only by float rounding; set ``batch_size`` for
    bit-identical runs across machines.

    The output kind, when not set, is detected on a forward pass of 4 seeded random
    images: every score in [0, 1] with rows summing to 1 within 1e-3 is ``probs``, in
    [0, 1] otherwise ``sigmoid``, anything else ``logits``. Pass ``output`` when a
    logit model happens to give scores in [0, 1].
    """

    def __init__(
        self,
        path: str | os.PathLike,
        config: ModelConfig | None = None,
        *,
        dataset_labels: Sequence[str] | None = None,
    ) -> None:
        self.path = Path(path)
        name = self.path.name
        if not self.path.exists():
            raise UsageError(f"model file {str(self.path)!r} does not exist; pass the path of a .onnx file.")
        if self.path.is_dir():
            raise UsageError(f"{str(self.path)!r} is a folder; pass the path of a .onnx file.")
        user = config if config is not None else ModelConfig()
        if not isinstance(user, ModelConfig):
            raise UsageError(f"config must be a ModelConfig; got {type(user).__name__}.")

        proto = self._load_proto()
        _check_external_data(proto, self.path)
        try:
            meta = _metadata_config(proto, name) or ModelConfig()
        except ModelError as exc:
            if user.is_empty():
                raise
            warnings.warn(f"{exc} Ignoring the metadata: using the given settings.", stacklevel=2)
            meta = ModelConfig()
        self._user, self._meta = user, meta
        cfg = user.merged_over(meta)
        init_names = {t.name for t in proto.graph.initializer}
        del proto

        self.sha256 = _file_sha256(self.path)
        self._session = self._make_session(cfg.threads)
        self._read_input(cfg, init_names)
        self._read_output()
        self._resolve_preprocessing(cfg)
        self._warned_slow = False
        self.resize = cfg.resize or DEFAULT_RESIZE

        raw = self._test_pass()
        self.n_classes = int(raw.shape[1])
        self.output_kind = cfg.output or self._detect_kind(raw)
        self.labels = self._resolve_labels(cfg, dataset_labels)
        self.batch_size = self._resolve_batch_size(cfg)
        self.config = ModelConfig(
            labels=self.labels, layout=self.layout, size=(self.height, self.width),
            scale=self.scale, mean=self.mean, std=self.std, channels=self.color,
            resize=self.resize, output=self.output_kind, threads=cfg.threads,
            batch_size=self.batch_size,
        )

    # ---- construction steps

    def _opt(self, field: str) -> str:
        """How a message names where a setting came from."""
        if getattr(self._user, field) is not None:
            return _cli_name(field)
        if getattr(self._meta, field) is not None:
            return f"{field!r} in the model's {METADATA_KEY!r} metadata"
        return _cli_name(field)

    def _load_proto(self) -> Any:
        import onnx

        try:
            proto = onnx.load(str(self.path), load_external_data=False)
        except Exception as exc:  # protobuf raises several kinds
            raise self._not_onnx(exc) from None
        if not proto.graph.node and not proto.graph.output:
            raise self._not_onnx("the file has no graph")
        return proto

    def _not_onnx(self, reason: Any) -> ModelError:
        reason = _short(reason) if isinstance(reason, BaseException) else reason
        return ModelError(
            f"{self.path.name} is not an ONNX model onnxruntime can load: {reason}. "
            "Pass the path of a .onnx file."
        )

    def _make_session(self, threads: int | None) -> Any:
        import onnxruntime as ort

        options = ort.SessionOptions()
        options.log_severity_level = 3
        options.intra_op_num_threads = threads or 0
        options.inter_op_num_threads = 1
        # Idle onnxruntime threads sleep instead of spinning: the engine prepares the next
        # batch on the calling thread meanwhile, and other processes share the cores.
        options.add_session_config_entry("session.intra_op.allow_spinning", "0")
        try:
            return ort.InferenceSession(
                str(self.path), sess_options=options, providers=["CPUExecutionProvider"]
            )
        except Exception as exc:
            raise self._not_onnx(exc) from None

    def _read_input(self, cfg: ModelConfig, init_names: set[str]) -> None:
        name = self.path.name
        inputs = [i for i in self._session.get_inputs() if i.name not in init_names]
        if len(inputs) != 1:
            listed = ", ".join(repr(i.name) for i in inputs) or "none"
            raise ModelError(
                f"{name} has {len(inputs)} inputs ({listed}); the tool needs exactly one, the "
                "image batch (N, C, H, W) or (N, H, W, C). Export the model with a single image input."
            )
        arg = inputs[0]
        self.input_name = arg.name
        shape = arg.shape
        if shape is None or len(shape) != 4:
            rank = "unknown" if shape is None else len(shape)
            raise ModelError(
                f"{name}: input {arg.name!r} has shape {_shape_text(shape)} (rank {rank}); the "
                "tool needs an image input of rank 4, (N, C, H, W) or (N, H, W, C) with 1 or 3 "
                "channels. Pass an image classifier."
            )
        dtype = _ONNX_DTYPES.get(arg.type)
        if dtype is None:
            raise ModelError(
                f"{name}: input {arg.name!r} has element type {arg.type}; the tool feeds float32 "
                "or uint8 images. Export the model with a float32 (or uint8) input."
            )
        self.input_dtype = dtype
        dims = [_dim(d) for d in shape]
        self._input_shape = dims

        layout = cfg.layout
        if layout is None:
            first, last = dims[1] in (1, 3), dims[3] in (1, 3)
            if first and last:
                raise ModelError(
                    f"{name}: input {arg.name!r} has shape {_shape_text(shape)}, which could be "
                    "NCHW or NHWC; pass --layout nchw or --layout nhwc."
                )
            if not first and not last:
                raise ModelError(
                    f"{name}: input {arg.name!r} has shape {_shape_text(shape)}, with no channel "
                    "dimension of 1 or 3 in position 2 (NCHW) or 4 (NHWC); the tool needs a gray "
                    "or RGB image input. Pass --layout (and --channels) if the graph leaves the "
                    "channels dynamic."
                )
            layout = "nchw" if first else "nhwc"
        self.layout = layout
        c_dim, h_dim, w_dim = (dims[1], dims[2], dims[3]) if layout == "nchw" else (dims[3], dims[1], dims[2])

        if c_dim is None:
            if cfg.channels is None:
                raise ModelError(
                    f"{name}: input {arg.name!r} has shape {_shape_text(shape)}, a dynamic channel "
                    "dimension; pass --channels rgb, bgr or gray."
                )
            c_dim = 1 if cfg.channels == "gray" else 3
        elif c_dim not in (1, 3):
            raise ModelError(
                f"{name}: with {self._opt('layout')} {layout}, input {arg.name!r} "
                f"{_shape_text(shape)} has {c_dim} channels; the tool needs 1 (gray) or 3 (RGB). "
                "Check --layout."
            )
        self.channels = c_dim
        color = cfg.channels or ("rgb" if c_dim == 3 else "gray")
        if (color == "gray") != (c_dim == 1):
            fix = "gray" if c_dim == 1 else "rgb or bgr"
            raise ModelError(
                f"{self._opt('channels')} {color} does not fit input {arg.name!r} "
                f"{_shape_text(shape)}, which has {c_dim} channel{'s' if c_dim > 1 else ''}; "
                f"pass --channels {fix}."
            )
        self.color = color

        if cfg.size is not None:
            want_h, want_w = cfg.size
            for graph_dim, want in ((h_dim, want_h), (w_dim, want_w)):
                if graph_dim is not None and graph_dim != want:
                    raise ModelError(
                        f"{name}: input {arg.name!r} has a fixed size {h_dim or '?'}x{w_dim or '?'} "
                        f"but {self._opt('size')} is {want_h}x{want_w}; drop --size or pass the "
                        "graph's size."
                    )
            h_dim, w_dim = want_h, want_w
        elif h_dim is None or w_dim is None:
            raise ModelError(
                f"{name}: input {arg.name!r} has shape {_shape_text(shape)}, a dynamic height or "
                "width; pass --size HxW (e.g. --size 224x224), the size the model was trained at."
            )
        self.height, self.width = h_dim, w_dim

        self.fixed_batch = dims[0]
        self.dynamic_batch = dims[0] is None

    def _read_output(self) -> None:
        outputs = self._session.get_outputs()
        if not outputs:
            raise ModelError(f"{self.path.name} has no outputs; pass an image classifier.")

        def usable(o: Any) -> bool:
            return o.type in _FLOAT_OUTPUTS and (o.shape is None or len(o.shape) == 2)

        chosen = next((o for o in outputs if usable(o)), None)
        if chosen is None:
            o = outputs[0]
            rank = "unknown" if o.shape is None else len(o.shape)
            raise ModelError(
                f"{self.path.name}: output {o.name!r} has shape {_shape_text(o.shape)} (rank "
                f"{rank}, {o.type}); the tool needs an output of shape (N, K), one float score "
                "per class. Export the model with its class scores as a 2-D output."
            )
        self.output_name = chosen.name

    def _resolve_preprocessing(self, cfg: ModelConfig) -> None:
        c = self.channels
        if self.input_dtype == np.uint8:
            given = [f for f in ("scale", "mean", "std") if getattr(cfg, f) is not None]
            if given:
                warnings.warn(
                    f"{self.path.name} takes uint8 input, so {', '.join(self._opt(f) for f in given)} "
                    "is ignored: the model normalises inside its graph.",
                    stacklevel=3,
                )
            self.scale, self.mean, self.std = 1.0, (0.0,) * c, (1.0,) * c
            return
        self.scale = cfg.scale if cfg.scale is not None else DEFAULT_SCALE
        resolved = {}
        for field, default in (("mean", 0.0), ("std", 1.0)):
            values = getattr(cfg, field) or (default,)
            if len(values) not in (1, c):
                raise ModelError(
                    f"{self._opt(field)} has {len(values)} numbers but {self.path.name} takes "
                    f"{c} channel{'s' if c > 1 else ''}; give 1 or {c} number{'s' if c > 1 else ''}."
                )
            resolved[field] = tuple(values) * (c // len(values))
        self.mean, self.std = resolved["mean"], resolved["std"]
        # (x * scale - mean) / std folded into one multiply-add, in float64 then float32
        mean, std = np.asarray(self.mean, np.float64), np.asarray(self.std, np.float64)
        self._gain = (self.scale / std).astype(np.float32)
        self._offset = (mean / std).astype(np.float32)

    def _test_pass(self) -> np.ndarray:
        name = self.path.name
        rng = np.random.default_rng(0)
        n = self.fixed_batch if self.fixed_batch not in (None, 1) else _TEST_IMAGES
        images = rng.uniform(0.0, 255.0, size=(n, self.height, self.width, self.channels))
        try:
            raw = self._run(images.astype(np.float32), warn=False, check_shape=False)
        except ModelError:
            raise
        except Exception as exc:
            raise ModelError(
                f"{name}: the test forward pass failed ({_short(exc)}); check --size, --layout "
                "and --channels against the model."
            ) from None
        finite = np.isfinite(raw).all(axis=1)
        if not finite.any():
            raise ModelError(
                f"{name} gives NaN or infinite scores for every test image (seeded random pixels); "
                "check --scale, --mean and --std, or the model itself."
            )
        if raw.shape[1] < 2:
            raise ModelError(
                f"{name} gives {raw.shape[1]} score per image; the tool needs one score per class "
                "(2 or more). Export a binary model with two outputs."
            )
        return raw

    @staticmethod
    def _detect_kind(raw: np.ndarray) -> str:
        rows = raw[np.isfinite(raw).all(axis=1)].astype(np.float64)
        in_unit = rows.min() >= -_RANGE_TOL and rows.max() <= 1.0 + _RANGE_TOL
        if not in_unit:
            return "logits"
        if np.all(np.abs(rows.sum(axis=1) - 1.0) <= _SUM_TOL):
            return "probs"
        return "sigmoid"

    def _resolve_labels(self, cfg: ModelConfig, dataset_labels: Sequence[str] | None) -> tuple[str, ...]:
        k = self.n_classes
        outputs = f"{k} outputs"
        if cfg.labels is not None:
            if len(cfg.labels) != k:
                where = "--labels" if self._user.labels is not None else (
                    f"'labels' in the model's {METADATA_KEY!r} metadata"
                )
                raise ModelError(
                    f"{where} has {len(cfg.labels)} names but the model has {outputs}; give one "
                    "name per output, in output order."
                )
            return cfg.labels
        if dataset_labels is not None:
            _check_field("labels", list(dataset_labels), "the dataset's class names")  # checks only
            names = tuple(dataset_labels)  # kept as the dataset spells them, or no image matches
            if len(names) != k:
                raise ModelError(
                    f"the dataset has {len(names)} classes but the model has {outputs}; pass "
                    "--labels FILE with one name per output, in output order."
                )
            return names
        return tuple(f"class_{i}" for i in range(k))

    def _resolve_batch_size(self, cfg: ModelConfig) -> int:
        if not self.dynamic_batch:
            assert self.fixed_batch is not None
            if cfg.batch_size is not None and cfg.batch_size != self.fixed_batch:
                warnings.warn(
                    f"{self.path.name} has a fixed batch of {self.fixed_batch}; ignoring "
                    f"{self._opt('batch_size')} {cfg.batch_size}.",
                    stacklevel=3,
                )
            return self.fixed_batch
        if cfg.batch_size is not None:
            return cfg.batch_size
        return self._measure_batch_size()

    def _measure_batch_size(self, *, budget: float = 0.04, slow: float = 1.0) -> int:
        """Time a few batch sizes briefly; keep the largest at ``BATCH_KEEP`` of the fastest.

        Each size gets a warm-up run (not timed: the first run at a new shape allocates)
        and its best time of a few runs, so a busy machine's noise counts less. Larger
        batches also spread the per-call overhead of the engine around the model, hence
        the preference for the largest size that is about as fast as the best.
        """
        per_image = self.height * self.width * self.channels * 4
        cap = max(1, MAX_BATCH_BYTES // per_image)
        rng = np.random.default_rng(1)
        rates: dict[int, float] = {}
        typical: dict[int, float] = {}
        # Not 1: the engine's own cost per call makes single images its slowest size
        # (bench/RESULTS.md), however fast onnxruntime runs them.
        for size in sorted({min(c, cap) for c in BATCH_CANDIDATES if c > 1}):
            images = rng.uniform(0, 255, size=(size, self.height, self.width, self.channels))
            feed = self._prepare(images.astype(np.float32))
            times = []
            try:
                self._session.run([self.output_name], {self.input_name: feed})
                while len(times) < 3 or (sum(times) < budget and len(times) < 50):
                    start = time.perf_counter()
                    self._session.run([self.output_name], {self.input_name: feed})
                    times.append(time.perf_counter() - start)
            except Exception:  # e.g. out of memory at this size: keep what worked
                break
            rates[size] = size / max(min(times), 1e-9)
            typical[size] = size * len(times) / max(sum(times), 1e-9)   # what a long run sees
            if sum(times) > slow:    # not on one slow size: a busy moment would decide
                break
        self.batch_rates = typical         # mean rates, reused by measured_rate (cost estimates)
        if not rates:
            return 1
        best = max(rates.values())
        return max(size for size, rate in rates.items() if rate >= BATCH_KEEP * best)

    # ---- running

    def _as_batch(self, batch: Any) -> np.ndarray:
        x = np.asarray(batch)
        ok_channels = (1, 3)
        if (
            x.ndim != 4
            or x.shape[1:3] != (self.height, self.width)
            or x.shape[3] not in ok_channels
        ):
            raise UsageError(
                f"a batch for {self.path.name} must have shape (N, {self.height}, {self.width}, "
                f"{self.channels}) (images, rows, columns, channels); got {x.shape}. Resize the "
                f"images to {self.height}x{self.width} first."
            )
        return x.astype(np.float32, copy=False)

    def _prepare(self, x: np.ndarray) -> np.ndarray:
        """(n, H, W, C_in) float32 0..255 -> the session's input tensor."""
        if self.channels == 1 and x.shape[3] == 3:
            x = (x @ np.asarray(LUMA_WEIGHTS, np.float32))[..., None]
        elif self.channels == 3 and x.shape[3] == 1:
            x = np.repeat(x, 3, axis=3)
        if self.input_dtype == np.uint8:
            x = np.rint(np.clip(x, 0.0, 255.0))
            if self.color == "bgr":
                x = x[..., ::-1]
            if self.layout == "nchw":
                x = x.transpose(0, 3, 1, 2)
            return np.ascontiguousarray(x, dtype=self.input_dtype)
        # x * gain - offset, written straight into the layout the session takes: the same
        # float32 operations as broadcasting over the channel axis, without its slow
        # 3-long inner loop and the temporaries (several times faster on large inputs).
        n, h, w, c = x.shape
        if self.layout == "nchw":
            out = np.empty((n, c, h, w), dtype=np.float32)
            np.multiply(x.transpose(0, 3, 1, 2), self._gain.reshape(1, c, 1, 1), out=out)
            np.subtract(out, self._offset.reshape(1, c, 1, 1), out=out)
            if self.color == "bgr":
                out = out[:, ::-1]
        else:
            out = np.empty((n, h, w, c), dtype=np.float32)
            flat = out.reshape(n, h, w * c)
            np.multiply(np.ascontiguousarray(x).reshape(n, h, w * c), np.tile(self._gain, w), out=flat)
            np.subtract(flat, np.tile(self._offset, w), out=flat)
            if self.color == "bgr":
                out = out[..., ::-1]
        return np.ascontiguousarray(out, dtype=self.input_dtype)

    def _forward(self, feed: np.ndarray) -> np.ndarray:
        n = feed.shape[0]
        if self.fixed_batch is not None and n < self.fixed_batch:
            pad = np.repeat(feed[-1:], self.fixed_batch - n, axis=0)
            feed = np.concatenate([feed, pad], axis=0)
        try:
            out = self._session.run([self.output_name], {self.input_name: feed})[0]
        except Exception as exc:  # onnxruntime's run-time failures (bad index, shape, ...)
            raise ModelError(
                f"{self.path.name}: onnxruntime failed on a batch of {feed.shape[0]} images "
                f"({_short(exc)}); the model does not run on every input. Fix or re-export the model."
            ) from None
        out = np.asarray(out)
        if out.ndim != 2 or out.shape[0] != feed.shape[0]:
            raise ModelError(
                f"{self.path.name}: output {self.output_name!r} has shape {tuple(out.shape)} for "
                f"a batch of {feed.shape[0]}; the tool needs (N, K), one score per class. "
                "Export the model with its class scores as a 2-D output."
            )
        return out[:n].astype(np.float32, copy=False)

    def _step(self, n: int, *, warn: bool) -> int:
        """Images per session call for a batch of ``n``."""
        if self.fixed_batch == 1:
            if warn and n > 1 and not self._warned_slow:
                self._warned_slow = True
                warnings.warn(
                    f"{self.path.name} has a fixed batch of 1, so images run one at a time, "
                    "which is slow; export the model with a dynamic batch dimension.",
                    stacklevel=4,
                )
            return 1
        return self.fixed_batch or getattr(self, "batch_size", _TEST_IMAGES)

    def _run(self, batch: Any, *, warn: bool, check_shape: bool = True, prepared: bool = False) -> np.ndarray:
        x = batch if prepared else (self._as_batch(batch) if check_shape else batch)
        n = x.shape[0]
        if n == 0:
            return np.empty((0, getattr(self, "n_classes", 0)), np.float32)
        step = self._step(n, warn=warn)
        parts = [
            self._forward(x[start:start + step] if prepared else self._prepare(x[start:start + step]))
            for start in range(0, n, step)
        ]
        return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=0)

    def prepare(self, batch: np.ndarray) -> np.ndarray:
        """Pixels to the session's input tensor (layout, channels, scaling, dtype).

        Each pixel's values depend on that pixel alone, so a region pasted into a prepared
        image equals the prepared image of the pasted pixels (:meth:`pixel_view`).

        Parameters
        ----------
        batch : ndarray (N, H, W, C)
            Pixels in 0..255 at the model's size.

        Returns
        -------
        ndarray
            ``(N, C, H, W)`` or ``(N, H, W, C)`` in the model's dtype.
        """
        return self._prepare(self._as_batch(batch))

    def pixel_view(self, prepared: np.ndarray) -> np.ndarray:
        """A view of prepared rows indexed (image, row, column, channel), for pasting."""
        return prepared.transpose(0, 2, 3, 1) if self.layout == "nchw" else prepared

    def score_prepared(self, prepared: np.ndarray, *, score: str = "prob") -> np.ndarray:
        """Scores of rows made by :meth:`prepare`: probabilities (``"prob"``, as
        :meth:`predict`) or ``"logit"`` (as :meth:`logits`)."""
        raw = self._run(prepared, warn=True, prepared=True)
        return self._to_probs(raw) if score == "prob" else self._raw_to_logits(raw)

    def run_raw(self, batch: np.ndarray) -> np.ndarray:
        """The model's raw scores after preprocessing.

        Parameters
        ----------
        batch : ndarray (N, H, W, C)
            Pixels in 0..255 (rows, columns, channels) at the model's size.

        Returns
        -------
        ndarray (N, K) float32
            The score output as the model gives it (probabilities, logits or sigmoids).

        Raises
        ------
        UsageError
            The batch does not have the model's size.
        """
        return self._run(batch, warn=True)

    def predict(self, batch: np.ndarray) -> np.ndarray:
        """Class probabilities for a batch of images.

        Softmax of the scores for a logit model, the scores themselves for a
        probability model, and the per-class sigmoid values (rows need not sum to 1)
        for a sigmoid model. A row is NaN where the model gave NaN for that image.

        Parameters
        ----------
        batch : ndarray (N, H, W, C)
            float32 pixels in 0..255.

        Returns
        -------
        ndarray (N, K) float32
        """
        return self._to_probs(self._run(batch, warn=True))

    def logits(self, batch: np.ndarray) -> np.ndarray:
        """Log-odds style scores for a batch of images.

        The raw logits of a logit model, ``log(max(p, 1e-12))`` for a probability model,
        and ``log(p / (1 - p))`` with ``p`` clipped to ``[1e-7, 1 - 1e-7]`` for a sigmoid
        model.

        Returns
        -------
        ndarray (N, K) float32
        """
        return self._raw_to_logits(self._run(batch, warn=True))

    def _raw_to_logits(self, raw: np.ndarray) -> np.ndarray:
        if self.output_kind == "logits":
            return raw
        if self.output_kind == "probs":
            return np.log(np.clip(raw, _LOG_FLOOR, None)).astype(np.float32)
        p = np.clip(raw.astype(np.float64), _LOGIT_EPS, 1.0 - _LOGIT_EPS)
        return np.log(p / (1.0 - p)).astype(np.float32)

    def probs_from_logits(self, scores: np.ndarray) -> np.ndarray:
        """Probabilities from scores made by :meth:`logits`, without another pass.

        Exactly :meth:`predict` for a logit model (the same softmax of the same raw
        scores). For a probability or sigmoid model, the inverse of the log (or log-odds)
        that :meth:`logits` took, equal to :meth:`predict` within float32 rounding except
        where :meth:`logits` clipped: probabilities below 1e-12 come back as 1e-12, and
        sigmoid values stay within [1e-7, 1 - 1e-7].

        Parameters
        ----------
        scores : ndarray (N, K)

        Returns
        -------
        ndarray (N, K) float32
        """
        scores = np.asarray(scores, dtype=np.float32)
        if self.output_kind == "logits":
            return self._to_probs(scores)
        if self.output_kind == "probs":
            return np.exp(scores.astype(np.float64)).astype(np.float32)
        return (1.0 / (1.0 + np.exp(-scores.astype(np.float64)))).astype(np.float32)

    def _to_probs(self, raw: np.ndarray) -> np.ndarray:
        if self.output_kind != "logits":
            return raw.astype(np.float32, copy=False)
        with np.errstate(invalid="ignore", over="ignore"):
            z = raw - raw.max(axis=1, keepdims=True)
            e = np.exp(z)
            return (e / e.sum(axis=1, keepdims=True)).astype(np.float32, copy=False)

    def measure_throughput(self, *, seconds: float = 1.0, batch_size: int | None = None) -> float:
        """Images per second through :meth:`predict` on seeded random batches.

        Parameters
        ----------
        seconds : float
            How long to run (at least one batch runs, after one warm-up batch).
        batch_size : int, optional
            Images per batch; default :attr:`batch_size`.

        Returns
        -------
        float
            Forward passes (images) per second.
        """
        if not (_is_number(seconds) and math.isfinite(seconds) and seconds > 0):
            raise UsageError(f"seconds must be a positive number; got {seconds!r}.")
        size = self.batch_size if batch_size is None else _check_field("batch_size", batch_size, "batch_size")
        rng = np.random.default_rng(2)
        batch = rng.uniform(0, 255, size=(size, self.height, self.width, self.channels)).astype(np.float32)
        self._to_probs(self._run(batch, warn=False))
        count = 0
        start = time.perf_counter()
        while True:
            self._to_probs(self._run(batch, warn=False))
            count += size
            elapsed = time.perf_counter() - start
            if elapsed >= seconds:
                return count / elapsed

    @property
    def measured_rate(self) -> float:
        """The session's passes per second at :attr:`batch_size`.

        The mean rate of the timed runs when the batch size was chosen (the choice itself
        takes their best, which a busy machine rarely sustains); when the size was given
        (or the batch is fixed), one timed batch of random images after a warm-up, once;
        0 when the model fails on it (the scan then reports the failure on real images).
        """
        rates = getattr(self, "batch_rates", None) or {}
        if self.batch_size not in rates:
            rng = np.random.default_rng(1)
            images = rng.uniform(0, 255, size=(self.batch_size, self.height, self.width, self.channels))
            try:
                feed = self._prepare(images.astype(np.float32))
                self._session.run([self.output_name], {self.input_name: feed})     # warm-up (allocates)
                start = time.perf_counter()
                self._session.run([self.output_name], {self.input_name: feed})
                rates[self.batch_size] = self.batch_size / max(time.perf_counter() - start, 1e-9)
            except Exception:   # a model that fails on random input: the rate stays unknown (0)
                rates[self.batch_size] = 0.0
            self.batch_rates = rates
        return float(rates[self.batch_size])

    def describe(self) -> dict:
        """What the tool understood of the model, as JSON-able data.

        Returns
        -------
        dict
            ``path`` (file name), ``sha256``, ``input`` (name, layout, size [h, w],
            channels, color, dtype, dynamic_batch, fixed_batch, scale, mean, std,
            resize), ``output`` (name, kind, n_classes), ``labels``, ``batch_size``,
            ``threads``.
        """
        return {
            "path": self.path.name,
            "sha256": self.sha256,
            "input": {
                "name": self.input_name,
                "layout": self.layout,
                "size": [self.height, self.width],
                "channels": self.channels,
                "color": self.color,
                "dtype": np.dtype(self.input_dtype).name,
                "dynamic_batch": self.dynamic_batch,
                "fixed_batch": self.fixed_batch,
                "scale": self.scale,
                "mean": list(self.mean),
                "std": list(self.std),
                "resize": self.resize,
            },
            "output": {
                "name": self.output_name,
                "kind": self.output_kind,
                "n_classes": self.n_classes,
            },
            "labels": list(self.labels),
            "batch_size": self.batch_size,
            "threads": self.config.threads,
        }

    def __repr__(self) -> str:
        return (
            f"OnnxClassifier({self.path.name!r}, {self.layout} {self.height}x{self.width}x"
            f"{self.channels} {self.color}, {self.output_kind}, {self.n_classes} classes)"
        )
