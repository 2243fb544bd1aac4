"""Decode labelled images safely at the model's input size (finding them on disk is
:mod:`shortcut_audit.listing`'s).

This is the only module of the tool's core that imports Pillow. Everything after it
receives numpy arrays: pixels as ``(H, W, C)`` float32 in 0..255 with ``C`` = 3 (RGB)
or 1 (gray), object masks as ``(H, W)`` bool, both already at the model's size.

Two steps, so that a large image set never sits in memory:

1. :func:`~shortcut_audit.listing.list_images` walks a folder-per-class tree (or reads a CSV manifest) and
   returns :class:`ImageEntry` values (paths and labels, nothing decoded) together with
   a :class:`Skip` for every file that cannot take part, with the reason.
2. :func:`iter_records` decodes the entries one at a time (optionally a few ahead, in
   threads) and yields an :class:`ImageRecord` per image, or a :class:`Skip` for an
   image that cannot be decoded. It never raises for a bad image.

Decoding (:func:`load_image`) refuses decompression bombs from the header alone, applies
the EXIF orientation, takes the first frame of an animation, composites transparency on
a background colour, maps 16-bit values to 0..255 by dividing by 257, and converts
CMYK, palette and grayscale images to the channels the model wants. One resize
(:func:`fit`) serves pixels and masks, so both always share the same geometry.
Colours are not colour-managed: embedded ICC profiles are ignored.

Paths in results (``ImageEntry.path``, ``Skip.path``) are relative to the dataset root,
with ``/`` separators, and are always valid UTF-8 text: bytes of a file name that are
not UTF-8 are shown as ``\\xff`` escapes. ``ImageEntry.file`` keeps the real path.
"""

from __future__ import annotations

import os
import re
from collections import deque
from collections.abc import Iterable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from shortcut_audit.errors import ImageSkip, UsageError
from shortcut_audit.options import RESIZES

__all__ = [
    "ImageEntry",
    "ImageRecord",
    "Skip",
    "MAX_PIXELS",
    "RESIZE_MODES",
    "IMAGE_EXTENSIONS",
    "PIXEL_RESAMPLE",
    "MASK_RESAMPLE",
    "load_image",
    "load_mask",
    "fit",
    "iter_records",
]

MAX_PIXELS: int = 89_478_485
"""Largest image, in pixels (width x height), that is decoded at all.

Pillow's own default decompression-bomb limit (``PIL.Image.MAX_IMAGE_PIXELS``, about
a 9459 x 9459 image, 256 MB as RGB at 24 bits). Larger images are refused from the
header, before any pixel is decoded.
"""

RESIZE_MODES: tuple[str, ...] = RESIZES
"""How an image meets the model's input size; see :func:`fit`."""

IMAGE_EXTENSIONS: tuple[str, ...] = (
    ".png", ".jpg", ".jpeg", ".bmp", ".gif", ".webp", ".tif", ".tiff",
)
"""File name endings (case-insensitive) that :func:`list_images` treats as images."""

PIXEL_RESAMPLE = Image.Resampling.BILINEAR
"""Resampling filter for pixels: bilinear, the common choice of image-classifier
preprocessing. Pillow's bilinear filter widens with the scale when it shrinks an image,
so downscaling is antialiased."""

MASK_RESAMPLE = Image.Resampling.NEAREST
"""Resampling filter for masks: nearest neighbour, so a mask stays two-valued."""

PREFETCH_WORKERS: int = 2
"""Threads that decode ahead when ``iter_records(..., prefetch=N)`` has ``N > 0``.
Pillow releases the GIL while it decodes and resizes, so two threads overlap decoding
with the model's work without taking every core."""

_SIXTEEN_BIT_MODES = ("I;16", "I;16L", "I;16B", "I;16N", "I")
_ALPHA_MODES = ("RGBA", "LA", "PA", "La", "RGBa")


# --------------------------------------------------------------------------- values


@dataclass(frozen=True, kw_only=True)
class ImageEntry:
    """One labelled image on disk, not yet decoded.

    Parameters
    ----------
    path : str
        Relative to the dataset root, ``/`` separators, valid UTF-8 (bytes of the file
        name that are not UTF-8 appear as ``\\xNN``). For display and JSON.
    label : str or None
        Class name; None for an unlabelled image (an empty label in a manifest).
    file : Path
        Absolute path on disk (the real name, which may not be UTF-8).
    mask_file : Path or None
        Absolute path of the object mask, or None when the image has none.

    Examples
    --------
    >>> ImageEntry(path="mug/a.png", label="mug", file=Path("/data/mug/a.png"), mask_file=None).label
    'mug'
    """

    path: str
    label: str | None
    file: Path
    mask_file: Path | None

    def __post_init__(self) -> None:
        if not self.path:
            raise ValueError("ImageEntry.path must not be empty")


@dataclass(frozen=True, kw_only=True)
class ImageRecord:
    """One decoded image at the model's input size.

    Parameters
    ----------
    path : str
        As :attr:`ImageEntry.path`.
    label : str or None
        As :attr:`ImageEntry.label`.
    pixels : ndarray, shape (H, W, C), float32
        Values in 0..255; ``C`` is 3 (RGB) or 1 (gray).
    mask : ndarray, shape (H, W), bool, or None
        True where the object is; resized with the same geometry as ``pixels``.
    """

    path: str
    label: str | None
    pixels: np.ndarray
    mask: np.ndarray | None

    def __post_init__(self) -> None:
        p = self.pixels
        if p.ndim != 3 or p.shape[2] not in (1, 3) or p.dtype != np.float32:
            raise ValueError(
                f"ImageRecord.pixels must be (H, W, 1|3) float32; got {p.shape} {p.dtype}"
            )
        if self.mask is not None and (
            self.mask.shape != p.shape[:2] or self.mask.dtype != np.bool_
        ):
            raise ValueError(
                f"ImageRecord.mask must be {p.shape[:2]} bool; got {self.mask.shape} {self.mask.dtype}"
            )


@dataclass(frozen=True, kw_only=True)
class Skip:
    """An image (or a class folder, path ending in ``/``) left out of the audit, and why.

    Parameters
    ----------
    path : str
        As :attr:`ImageEntry.path`; ``"<class>/"`` for an empty class folder,
        ``"manifest line N"`` for a manifest row without a usable path.
    reason : str
        One line saying what was wrong, e.g. ``"file is empty"``.

    Examples
    --------
    >>> Skip(path="mug/a.png", reason="file is empty").reason
    'file is empty'
    """

    path: str
    reason: str

    def __post_init__(self) -> None:
        if not self.reason or "\n" in self.reason:
            raise ValueError(f"Skip.reason must be one non-empty line; got {self.reason!r}")


# ------------------------------------------------------------------ option checks


@dataclass(frozen=True, kw_only=True)
class _Options:
    size: tuple[int, int]
    channels: int
    resize: str
    background: tuple[int, int, int]


def _check_options(size, channels, resize, background) -> _Options:
    """Validate the decoding options once, at the entrance; one message per parameter."""
    if (
        not isinstance(size, Sequence)
        or len(size) != 2
        or not all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v > 0 for v in size)
    ):
        raise UsageError(
            f"size must be two positive integers (height, width); got {size!r}. "
            "Pass e.g. size=(224, 224) or --size 224x224."
        )
    if channels not in (1, 3):
        raise UsageError(
            f"channels must be 1 (gray) or 3 (RGB); got {channels!r}. Pass channels=1 or channels=3."
        )
    if resize not in RESIZE_MODES:
        raise UsageError(
            f"resize must be one of {', '.join(RESIZE_MODES)}; got {resize!r}. Pass e.g. resize='stretch'."
        )
    if (
        not isinstance(background, Sequence)
        or len(background) != 3
        or not all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) and 0 <= v <= 255 for v in background)
    ):
        raise UsageError(
            f"background must be three integers in 0..255 (R, G, B); got {background!r}. "
            "Pass e.g. background=(255, 255, 255)."
        )
    return _Options(
        size=(int(size[0]), int(size[1])),
        channels=int(channels),
        resize=resize,
        background=(int(background[0]), int(background[1]), int(background[2])),
    )


# ------------------------------------------------------------------------ decoding


def _display(text: str) -> str:
    """A file name as valid UTF-8 text: undecodable bytes become ``\\xNN``."""
    return os.fsencode(text).decode("utf-8", "backslashreplace")


def _one_line(text: str) -> str:
    return " ".join(str(text).split()) or "unknown error"


def _bomb_reason(pixels: int, dims: tuple[int, int] | None = None) -> str:
    shape = f"{dims[0]}x{dims[1]} ({pixels / 1e6:.1f} MP)" if dims else f"{pixels / 1e6:.1f} MP"
    return f"declared size {shape} exceeds the {MAX_PIXELS / 1e6:.1f} MP limit (decompression bomb guard)"


#: A JPEG is decoded at a reduced scale (1/2, 1/4 or 1/8, by its DCT: Pillow's draft
#: mode) only when the result keeps at least this many times the model's input on each
#: side, so the bilinear resize that follows still averages several pixels per output.
DRAFT_MARGIN = 2


def _draft(im: Image.Image, size: tuple[int, int]) -> None:
    """Ask a JPEG's decoder for the smallest DCT scale that keeps ``DRAFT_MARGIN`` times
    ``size`` = (height, width), the model's input in display orientation."""
    height, width = size
    if im.getexif().get(0x0112, 1) in (5, 6, 7, 8):
        height, width = width, height      # stored turned by 90 degrees: rows are columns
    im.draft(im.mode, (DRAFT_MARGIN * width, DRAFT_MARGIN * height))


def _decode(file: str | os.PathLike, size: tuple[int, int] | None = None) -> Image.Image:
    """Open, refuse bombs from the header, decode the first frame, apply EXIF orientation.

    With ``size`` (the model input, height and width), a JPEG much larger than it is
    decoded at a reduced scale (:data:`DRAFT_MARGIN`); the image is then smaller than
    the file's declared size.

    Raises
    ------
    ImageSkip
        For every reason the file cannot give an image. The reason is one line.
    """
    try:
        if os.stat(file).st_size == 0:
            raise ImageSkip("file is empty")
    except FileNotFoundError:
        raise ImageSkip("file not found") from None
    except OSError as exc:
        raise ImageSkip(f"cannot read: {_one_line(exc.strerror or exc)}") from None
    try:
        with Image.open(file) as im:
            # Image.open has read only the header. Pillow itself raises above twice its
            # limit (DecompressionBombError) and warns above it; the check below refuses
            # at MAX_PIXELS whatever Pillow's global setting or warning filter is.
            width, height = im.size
            if width * height > MAX_PIXELS:
                raise ImageSkip(_bomb_reason(width * height, (width, height)))
            if size is not None and im.format == "JPEG":
                _draft(im, size)
            im.load()  # first frame of an animation: Image.open starts there
            return ImageOps.exif_transpose(im)  # a copy, detached from the file
    except ImageSkip:
        raise
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        found = re.search(r"\((\d+) pixels\)", str(exc))
        raise ImageSkip(_bomb_reason(int(found.group(1))) if found else _one_line(exc)) from None
    except UnidentifiedImageError:
        raise ImageSkip("cannot decode: not a recognised image format") from None
    except IsADirectoryError:
        raise ImageSkip("cannot read: is a directory, not an image file") from None
    except PermissionError:
        raise ImageSkip("cannot read: permission denied") from None
    except Exception as exc:  # noqa: BLE001 - Pillow's decoders raise many types on bad data
        raise ImageSkip(f"cannot decode: {_one_line(exc)}") from None


def _gray_of(background: tuple[int, int, int]) -> int:
    """The background as Pillow's own RGB -> L conversion sees it (ITU-R 601-2 luma)."""
    return Image.new("RGB", (1, 1), background).convert("L").getpixel((0, 0))


def _to_working(im: Image.Image, opts: _Options) -> tuple[Image.Image, float | tuple[int, ...]]:
    """Convert a decoded image to the mode it is resized in, with its padding fill.

    8-bit images become "RGB" or "L" (``opts.channels``); 16-bit images become "F"
    holding value / 257, so 65535 -> 255 and no precision is lost before the resize.
    """
    mode = im.mode
    if mode in _SIXTEEN_BIT_MODES:
        values = np.asarray(im).astype(np.float32) / np.float32(257.0)
        values = np.clip(values, 0.0, 255.0)  # mode "I" is 32-bit: clip values outside 0..65535
        # A gray image padded for an RGB model needs a coloured pad, which one "F" band
        # cannot hold: pad with NaN (never a pixel value) and colour it in _to_array.
        return Image.fromarray(values), (float(_gray_of(opts.background)) if opts.channels == 1 else float("nan"))
    if mode == "F":
        raise ImageSkip(
            "unsupported image: 32-bit float pixels (mode F) have no known value range; "
            "save it as 8- or 16-bit"
        )
    try:
        if mode in _ALPHA_MODES or "transparency" in im.info:
            rgba = im.convert("RGBA")
            ground = Image.new("RGBA", rgba.size, (*opts.background, 255))
            im = Image.alpha_composite(ground, rgba).convert("RGB")
        elif mode == "1":
            im = im.convert("L")
        elif mode not in ("L", "RGB"):  # CMYK, YCbCr, HSV, LAB, palette without transparency
            im = im.convert("RGB")
        if opts.channels == 1 and im.mode != "L":
            im = im.convert("L")
        elif opts.channels == 3 and im.mode != "RGB":
            im = im.convert("RGB")
    except (ValueError, OSError) as exc:
        raise ImageSkip(f"unsupported colour mode {mode}: {_one_line(exc)}") from None
    return im, (_gray_of(opts.background) if opts.channels == 1 else opts.background)


def _to_array(im: Image.Image, opts: _Options) -> np.ndarray:
    arr = np.asarray(im, dtype=np.float32)
    if arr.ndim == 2:
        arr = arr[:, :, None]
    if opts.channels == 3 and arr.shape[2] == 1:
        pad = np.isnan(arr[:, :, 0])
        arr = np.repeat(arr, 3, axis=2)
        arr[pad] = np.asarray(opts.background, dtype=np.float32)
    return np.ascontiguousarray(arr)


def fit(
    image: Image.Image,
    size: tuple[int, int],
    mode: str,
    *,
    resample: Image.Resampling = PIXEL_RESAMPLE,
    fill: float | tuple[int, ...] = 0,
) -> Image.Image:
    """Resize an image to ``size`` = (height, width); the one resize for pixels and masks.

    Parameters
    ----------
    image : PIL.Image.Image
        Any mode Pillow can resize ("RGB", "L", "F").
    size : (int, int)
        Target (height, width), rows then columns.
    mode : {"stretch", "crop", "pad"}
        "stretch" resizes to the target ignoring the aspect ratio. "crop" scales so the
        shorter side fits and cuts the centre out of the longer side. "pad" scales so the
        longer side fits and centres the result on ``fill``.
    resample : PIL.Image.Resampling
        :data:`PIXEL_RESAMPLE` (bilinear) for pixels, :data:`MASK_RESAMPLE` (nearest)
        for masks. Pillow's ``reducing_gap`` is off, so the filter is exact.
    fill : number or tuple
        Colour of the padding in the image's mode (``mode="pad"`` only).

    Returns
    -------
    PIL.Image.Image
        Same mode, ``size[1]`` wide and ``size[0]`` tall.

    Examples
    --------
    >>> fit(Image.new("L", (40, 20)), (20, 20), "pad").size
    (20, 20)
    """
    height, width = size
    w, h = image.size
    if mode == "stretch":
        return image.resize((width, height), resample, reducing_gap=None)
    if mode == "crop":
        scale = max(width / w, height / h)
        box_w, box_h = width / scale, height / scale
        left, top = (w - box_w) / 2, (h - box_h) / 2
        box = (left, top, left + box_w, top + box_h)
        return image.resize((width, height), resample, box=box, reducing_gap=None)
    if mode == "pad":
        scale = min(width / w, height / h)
        new_w = min(width, max(1, round(w * scale)))
        new_h = min(height, max(1, round(h * scale)))
        scaled = image.resize((new_w, new_h), resample, reducing_gap=None)
        canvas = Image.new(image.mode, (width, height), fill)
        canvas.paste(scaled, ((width - new_w) // 2, (height - new_h) // 2))
        return canvas
    raise UsageError(f"resize mode must be one of {', '.join(RESIZE_MODES)}; got {mode!r}.")


def _pixels(im: Image.Image, opts: _Options) -> np.ndarray:
    working, fill = _to_working(im, opts)
    return _to_array(fit(working, opts.size, opts.resize, fill=fill), opts)


def _mask(im: Image.Image, opts: _Options) -> np.ndarray:
    try:
        gray = im.convert("L")  # 16-bit values above 255 clip to 255: non-zero stays non-zero
    except (ValueError, OSError) as exc:
        raise ImageSkip(f"unsupported colour mode {im.mode}: {_one_line(exc)}") from None
    fitted = fit(gray, opts.size, opts.resize, resample=MASK_RESAMPLE, fill=0)
    return np.asarray(fitted) != 0


def load_image(
    file: str | os.PathLike,
    *,
    size: tuple[int, int],
    channels: int = 3,
    resize: str = "stretch",
    background: tuple[int, int, int] = (255, 255, 255),
) -> np.ndarray:
    """Decode one image safely and bring it to the model's input size.

    Parameters
    ----------
    file : str or os.PathLike
        The image file.
    size : (int, int)
        Model input (height, width).
    channels : {3, 1}
        3 for RGB (grayscale is repeated), 1 for gray (Pillow's RGB -> L luma).
    resize : {"stretch", "crop", "pad"}
        See :func:`fit`.
    background : (int, int, int)
        RGB colour that transparent pixels are composited on and that "pad" fills with.

    Returns
    -------
    ndarray, shape (H, W, channels), float32
        Values in 0..255.

    Raises
    ------
    ImageSkip
        With ``reason`` and ``path`` (the file as given), when the file cannot give
        an image: missing, empty, not an image, truncated, larger
        than :data:`MAX_PIXELS` (checked from the header, before decoding), or a pixel
        format without a known value range.
    UsageError
        An option has a wrong value.

    Notes
    -----
    The EXIF orientation is applied; an animated GIF/PNG or multi-page TIFF gives its
    first frame; palette, LA and RGBA images are composited on ``background``; 16-bit
    values are divided by 257 (65535 -> 255); CMYK goes through Pillow's ``convert("RGB")``.

    Examples
    --------
    >>> import tempfile
    >>> path = Path(tempfile.mkdtemp()) / "red.png"
    >>> Image.new("RGB", (4, 2), (255, 0, 0)).save(path)
    >>> load_image(path, size=(2, 2))[0, 0].tolist()
    [255.0, 0.0, 0.0]
    """
    opts = _check_options(size, channels, resize, background)
    try:
        return _pixels(_decode(file, opts.size), opts)
    except ImageSkip as exc:
        raise ImageSkip(exc.reason, _display(os.fsdecode(file))) from None


def load_mask(
    file: str | os.PathLike,
    *,
    size: tuple[int, int],
    resize: str = "stretch",
) -> np.ndarray:
    """Decode an object mask: any non-zero pixel (after conversion to gray) is object.

    Parameters
    ----------
    file : str or os.PathLike
        The mask image (any mode; colour masks are converted with Pillow's luma).
    size : (int, int)
        Model input (height, width).
    resize : {"stretch", "crop", "pad"}
        The same geometry as the pixels (:func:`fit` with nearest neighbour); padding
        is not object.

    Returns
    -------
    ndarray, shape (H, W), bool
        True where the object is.

    Raises
    ------
    ImageSkip
        As :func:`load_image`.

    Examples
    --------
    >>> import tempfile
    >>> path = Path(tempfile.mkdtemp()) / "m.png"
    >>> Image.fromarray(np.array([[0, 0], [0, 9]], np.uint8)).save(path)
    >>> load_mask(path, size=(2, 2)).tolist()
    [[False, False], [False, True]]
    """
    opts = _check_options(size, 3, resize, (0, 0, 0))
    try:
        return _mask(_decode(file), opts)
    except ImageSkip as exc:
        raise ImageSkip(exc.reason, _display(os.fsdecode(file))) from None


# ------------------------------------------------------------------------ records


def _record(entry: ImageEntry, opts: _Options) -> ImageRecord | Skip:
    """Decode one entry; every reason it cannot be used becomes a Skip."""
    try:
        # a mask is checked against the image's full size, so only a maskless JPEG is drafted
        image = _decode(entry.file, opts.size if entry.mask_file is None else None)
        mask = None
        if entry.mask_file is not None:
            try:
                mask_image = _decode(entry.mask_file)
            except ImageSkip as exc:
                raise ImageSkip(f"mask: {exc.reason}") from None
            if mask_image.size != image.size:
                raise ImageSkip(
                    "mask: size {}x{} differs from the image's {}x{}; a mask must match its image".format(
                        *mask_image.size, *image.size
                    )
                )
            mask = _mask(mask_image, opts)
        return ImageRecord(path=entry.path, label=entry.label, pixels=_pixels(image, opts), mask=mask)
    except ImageSkip as exc:
        return Skip(path=entry.path, reason=_one_line(exc.reason))


def iter_records(
    entries: Iterable[ImageEntry],
    *,
    size: tuple[int, int],
    channels: int = 3,
    resize: str = "stretch",
    background: tuple[int, int, int] = (255, 255, 255),
    prefetch: int = 0,
) -> Iterator[ImageRecord | Skip]:
    """Decode entries one at a time, in order; a bad image yields a Skip, never raises.

    Parameters
    ----------
    entries : iterable of ImageEntry
        Usually the first result of :func:`list_images`.
    size, channels, resize, background
        As :func:`load_image`; masks follow ``size`` and ``resize``.
    prefetch : int
        0 decodes in the caller's thread. N > 0 decodes up to N images ahead in
        :data:`PREFETCH_WORKERS` threads, so decoding overlaps the model's work; the
        order and the results are the same.

    Yields
    ------
    ImageRecord or Skip
        One per entry, in the order of ``entries``. A mask that cannot be decoded or
        whose size differs from its image's makes a Skip (reason starting ``"mask: "``).

    Raises
    ------
    UsageError
        An option has a wrong value (raised at the call, before any decoding).

    Examples
    --------
    >>> e = ImageEntry(path="gone.png", label="mug", file=Path("/nonexistent/gone.png"), mask_file=None)
    >>> list(iter_records([e], size=(8, 8)))
    [Skip(path='gone.png', reason='file not found')]
    """
    opts = _check_options(size, channels, resize, background)
    if not isinstance(prefetch, (int, np.integer)) or isinstance(prefetch, bool) or prefetch < 0:
        raise UsageError(f"prefetch must be an integer >= 0; got {prefetch!r}. Pass e.g. prefetch=8.")
    if prefetch == 0:
        return (_record(entry, opts) for entry in entries)
    return _prefetched(entries, opts, int(prefetch))


def _prefetched(entries: Iterable[ImageEntry], opts: _Options, ahead: int) -> Iterator[ImageRecord | Skip]:
    pending: deque = deque()
    pool = ThreadPoolExecutor(max_workers=PREFETCH_WORKERS, thread_name_prefix="decode")
    try:
        for entry in entries:
            if len(pending) >= ahead:
                yield pending.popleft().result()
            pending.append(pool.submit(_record, entry, opts))
        while pending:
            yield pending.popleft().result()
    finally:  # also when the caller stops early: drop queued work, do not decode it
        pool.shutdown(wait=True, cancel_futures=True)
