"""Model options: what the tool must know of a model's input and output, from the
command line, a TOML file (``--model-config``) or the ONNX file's metadata.

:class:`ModelConfig` holds them (every field optional; :meth:`ModelConfig.merged_over`
layers the sources), and the parsers here turn text into checked values:
:func:`parse_size`, :func:`parse_numbers`, :func:`read_labels`,
:func:`read_model_config`. No model is opened here: :mod:`shortcut_audit.model` reads
the graph and applies these options. Errors are one-line
:class:`~shortcut_audit.errors.UsageError` (or the error type the caller passes).

Examples
--------
>>> parse_size("224x224")
(224, 224)
>>> ModelConfig(mean=0.5).merged_over(ModelConfig(mean=(0.1, 0.2, 0.3), std=0.25)).mean
(0.5,)
"""

from __future__ import annotations

import dataclasses
import math
import os
import re
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .errors import UsageError

__all__ = [
    "METADATA_KEY",
    "CONFIG_KEYS",
    "LAYOUTS",
    "COLORS",
    "RESIZES",
    "OUTPUT_KINDS",
    "ModelConfig",
    "parse_size",
    "parse_numbers",
    "read_labels",
    "read_model_config",
    "some_names",
]

#: Key of the ONNX ``metadata_props`` entry that holds the model's settings as JSON.
METADATA_KEY = "shortcut_audit"

#: Keys a ``--model-config`` TOML file (and the metadata JSON, less ``labels_file``) may use.
CONFIG_KEYS = (
    "labels", "labels_file", "layout", "size", "scale", "mean", "std",
    "channels", "resize", "output", "threads", "batch_size",
)


LAYOUTS = ("nchw", "nhwc")
COLORS = ("rgb", "bgr", "gray")
RESIZES = ("stretch", "crop", "pad")
OUTPUT_KINDS = ("probs", "logits", "sigmoid")
DEFAULT_SCALE = 1.0 / 255.0
DEFAULT_RESIZE = "stretch"


# --------------------------------------------------------------------------- options

def _cli_name(field: str) -> str:
    return "--" + field.replace("_", "-")


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(
        value, (bool, np.bool_)
    )


def _is_whole(value: Any) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


def _choice(value: Any, choices: tuple[str, ...], opt: str, error: type[Exception]) -> str:
    if isinstance(value, str) and value.strip().lower() in choices:
        return value.strip().lower()
    raise error(f"{opt} must be one of {', '.join(choices)}; got {value!r}. Pass one of those.")


def _numbers(value: Any, opt: str, error: type[Exception], *, positive: bool) -> tuple[float, ...]:
    what = "positive number" if positive else "number"
    fix = (
        f"{opt} must be one {what} or 3 (one per channel, in RGB order), "
        f"e.g. 0.5 or 0.485,0.456,0.406"
    )
    if isinstance(value, str):
        try:
            value = parse_numbers(value, name=opt)
        except UsageError:
            raise error(f"{fix}; got {value!r}.") from None
    items = (value,) if _is_number(value) else value
    if not isinstance(items, (tuple, list, np.ndarray)) or not all(_is_number(v) for v in items):
        raise error(f"{fix}; got {value!r}.")
    out = tuple(float(v) for v in items)
    if len(out) not in (1, 3) or not all(math.isfinite(v) for v in out):
        raise error(f"{fix}; got {value!r}.")
    if positive and not all(v > 0 for v in out):
        raise error(f"{fix}; got {value!r}.")
    return out


def _check_field(field: str, value: Any, opt: str, error: type[Exception] = UsageError) -> Any:
    """Validate one :class:`ModelConfig` field and return it in canonical form.

    ``opt`` is how the message names the setting (``--mean``, ``'mean' in model.toml``).
    """
    if field == "labels":
        if isinstance(value, str) or not isinstance(value, (tuple, list)):
            raise error(
                f"{opt} must be a list of class names; got {value!r}. "
                "Give one name per output, in output order."
            )
        names = []
        for i, name in enumerate(value):
            if not isinstance(name, str) or not name.strip():
                raise error(
                    f"{opt} has an empty or non-text name at position {i + 1} ({name!r}); "
                    "give one non-empty name per output, in output order."
                )
            names.append(name.strip())
        if not names:
            raise error(f"{opt} has no names; give one name per output, in output order.")
        seen: set[str] = set()
        for name in names:
            if name in seen:
                raise error(f"{opt} names {name!r} twice; give each output its own name.")
            seen.add(name)
        return tuple(names)
    if field == "layout":
        return _choice(value, LAYOUTS, opt, error)
    if field == "channels":
        return _choice(value, COLORS, opt, error)
    if field == "resize":
        return _choice(value, RESIZES, opt, error)
    if field == "output":
        return _choice(value, OUTPUT_KINDS, opt, error)
    if field == "size":
        if isinstance(value, str):
            try:
                return parse_size(value)
            except UsageError:
                pass
        elif (
            isinstance(value, (tuple, list))
            and len(value) == 2
            and all(_is_whole(v) and v > 0 for v in value)
        ):
            return (int(value[0]), int(value[1]))
        raise error(
            f"{opt} must be HxW, two positive whole numbers (height x width), "
            f"e.g. 224x224; got {value!r}."
        )
    if field == "scale":
        if _is_number(value) and math.isfinite(value) and value > 0:
            return float(value)
        raise error(
            f"{opt} must be a positive number (the factor applied to 0..255 pixels, "
            f"e.g. 0.00392156862745098 for 1/255); got {value!r}."
        )
    if field == "mean":
        return _numbers(value, opt, error, positive=False)
    if field == "std":
        return _numbers(value, opt, error, positive=True)
    if field in ("threads", "batch_size"):
        if _is_whole(value) and value >= 1:
            return int(value)
        raise error(
            f"{opt} must be a whole number of at least 1; got {value!r}. "
            "Pass e.g. 2, or leave it out to let the tool choose."
        )
    raise error(f"unknown model setting {field!r}; allowed: {', '.join(CONFIG_KEYS)}.")


@dataclass(frozen=True, kw_only=True)
class ModelConfig:
    """Settings of a model; ``None`` means "not set here" (detected or defaulted later).

    Parameters
    ----------
    labels : tuple of str, optional
        One class name per output, in output order.
    layout : {"nchw", "nhwc"}, optional
        Detected from the graph when not set.
    size : (int, int), optional
        (height, width) of the input; required when the graph leaves it dynamic.
    scale : float, optional
        Factor applied to 0..255 pixels; default 1/255.
    mean, std : tuple of float, optional
        One number, or one per channel in RGB order, applied after ``scale`` as
        ``(x * scale - mean) / std``; defaults 0 and 1. A single number may be given.
    channels : {"rgb", "bgr", "gray"}, optional
        Channel order the model expects; default rgb for 3 channels, gray for 1.
    resize : {"stretch", "crop", "pad"}, optional
        How images are brought to the input size (applied by ``dataset.py``).
    output : {"probs", "logits", "sigmoid"}, optional
        What the model's scores are; detected by a test forward pass when not set.
    threads : int, optional
        onnxruntime intra-op threads; onnxruntime's default when not set.
    batch_size : int, optional
        Images per session run; measured when not set.

    Raises
    ------
    UsageError
        A field has a value the tool cannot use (the message names the option).

    Examples
    --------
    >>> ModelConfig(layout="NHWC", size="64x48", std=0.5)
    ModelConfig(labels=None, layout='nhwc', size=(64, 48), scale=None, mean=None, std=(0.5,), channels=None, resize=None, output=None, threads=None, batch_size=None)
    """

    labels: tuple[str, ...] | None = None
    layout: str | None = None
    size: tuple[int, int] | None = None
    scale: float | None = None
    mean: tuple[float, ...] | None = None
    std: tuple[float, ...] | None = None
    channels: str | None = None
    resize: str | None = None
    output: str | None = None
    threads: int | None = None
    batch_size: int | None = None

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if value is not None:
                object.__setattr__(self, f.name, _check_field(f.name, value, _cli_name(f.name)))

    def merged_over(self, other: ModelConfig) -> ModelConfig:
        """A copy of ``other`` with every field that is set in ``self`` taken from ``self``.

        Examples
        --------
        >>> ModelConfig(layout="nchw").merged_over(ModelConfig(layout="nhwc", scale=1.0))
        ModelConfig(labels=None, layout='nchw', size=None, scale=1.0, mean=None, std=None, channels=None, resize=None, output=None, threads=None, batch_size=None)
        """
        mine = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        return dataclasses.replace(other, **{k: v for k, v in mine.items() if v is not None})

    def is_empty(self) -> bool:
        """True when no field is set."""
        return all(getattr(self, f.name) is None for f in dataclasses.fields(self))


def parse_size(text: str) -> tuple[int, int]:
    """Parse ``--size`` text ``"HxW"`` into (height, width).

    Raises
    ------
    UsageError
        The text is not two positive whole numbers joined by ``x``.

    Examples
    --------
    >>> parse_size("224x160")
    (224, 160)
    """
    match = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", text) if isinstance(text, str) else None
    if match is None or int(match[1]) < 1 or int(match[2]) < 1:
        raise UsageError(
            "--size must be HxW, two positive whole numbers (height x width), "
            f"e.g. 224x224; got {text!r}."
        )
    return int(match[1]), int(match[2])


def parse_numbers(text: str, *, name: str) -> tuple[float, ...]:
    """Parse one number or comma-separated numbers, e.g. for ``--mean`` and ``--std``.

    Parameters
    ----------
    text : str
    name : str
        The option's name for the message (``"mean"`` is shown as ``--mean``).

    Raises
    ------
    UsageError
        A piece is empty or not a finite number.

    Examples
    --------
    >>> parse_numbers("0.485, 0.456,0.406", name="mean")
    (0.485, 0.456, 0.406)
    """
    opt = name if name.startswith("-") or " " in name else _cli_name(name)
    try:
        if not isinstance(text, str):
            raise ValueError
        values = tuple(float(piece) for piece in text.split(","))
        if not all(math.isfinite(v) for v in values):
            raise ValueError
    except ValueError:
        raise UsageError(
            f"{opt} must be one number or comma-separated numbers, e.g. 0.485,0.456,0.406; "
            f"got {text!r}."
        ) from None
    return values


def read_labels(path: str | os.PathLike) -> tuple[str, ...]:
    """Read class names, one a line in output order, from a UTF-8 text file.

    Blank lines are ignored and surrounding whitespace is stripped.

    Raises
    ------
    UsageError
        The file does not exist, is not UTF-8 text, or has no names.
    """
    path = Path(path)
    if not path.is_file():
        raise UsageError(
            f"labels file {str(path)!r} does not exist; pass a text file with one class name a line."
        )
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise UsageError(
            f"labels file {str(path)!r} is not UTF-8 text; save it as UTF-8, one class name a line."
        ) from None
    except OSError as exc:
        raise UsageError(
            f"labels file {str(path)!r} cannot be read ({exc.strerror}); check its permissions."
        ) from None
    names = tuple(line.strip() for line in text.splitlines() if line.strip())
    if not names:
        raise UsageError(f"labels file {str(path)!r} has no names; write one class name a line.")
    return names


def _config_from_mapping(
    data: Any,
    *,
    source: str,
    base_dir: Path | None,
    error: type[Exception],
) -> ModelConfig:
    """Build a :class:`ModelConfig` from a TOML table or metadata JSON object.

    ``base_dir`` is the folder ``labels_file`` is relative to; None (metadata) forbids
    ``labels_file``, so metadata never names a file.
    """
    if not isinstance(data, Mapping):
        raise error(f"{source} must be a table of model settings; got {type(data).__name__}.")
    allowed = CONFIG_KEYS if base_dir is not None else tuple(k for k in CONFIG_KEYS if k != "labels_file")
    unknown = [k for k in data if k not in allowed]
    if unknown:
        raise error(
            f"{source} has unknown key{'s' if len(unknown) > 1 else ''} "
            f"{', '.join(repr(k) for k in unknown)}; allowed keys: {', '.join(allowed)}."
        )
    values = dict(data)
    if "labels_file" in values:
        if "labels" in values:
            raise error(f"{source} sets both 'labels' and 'labels_file'; keep one of them.")
        file = values.pop("labels_file")
        if not isinstance(file, str) or not file:
            raise error(f"'labels_file' in {source} must be a file path (text); got {file!r}.")
        assert base_dir is not None
        values["labels"] = read_labels(base_dir / file)
    checked = {
        key: _check_field(key, value, f"'{key}' in {source}", error)
        for key, value in values.items()
    }
    return ModelConfig(**checked)


def read_model_config(path: str | os.PathLike) -> ModelConfig:
    """Read model settings from a TOML file (``--model-config``).

    Keys: ``labels`` (a list) or ``labels_file`` (relative to the TOML file's folder),
    ``layout``, ``size`` (``"64x64"`` or ``[64, 64]``), ``scale``, ``mean``, ``std``
    (a number, a list, or ``"0.485,0.456,0.406"``), ``channels``, ``resize``,
    ``output``, ``threads``, ``batch_size``.

    Raises
    ------
    UsageError
        The file does not exist, is not TOML, has an unknown key, or a bad value.

    Examples
    --------
    A file with ``size = "64x64"`` and ``mean = [0.5, 0.5, 0.5]`` gives
    ``ModelConfig(size=(64, 64), mean=(0.5, 0.5, 0.5))``.
    """
    path = Path(path)
    if not path.is_file():
        raise UsageError(
            f"--model-config file {str(path)!r} does not exist; pass the path of a TOML file."
        )
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8-sig"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UsageError(
            f"--model-config file {path.name} is not valid UTF-8 TOML ({exc}); fix the file."
        ) from None
    return _config_from_mapping(data, source=path.name, base_dir=path.parent, error=UsageError)


def some_names(names: Sequence[str], k: int = 8, *, note: str = "") -> str:
    """The first ``k`` names and how many more, for one line (a 1,000-class model's labels).

    >>> some_names(["a", "b", "c"], 2)
    'a, b, ... and 1 more'
    """
    names = [str(n) for n in names]
    more = f", ... and {len(names) - k:,} more{note}" if len(names) > k else ""
    return ", ".join(names[:k]) + more
