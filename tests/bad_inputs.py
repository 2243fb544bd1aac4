"""Builders of bad and unusual image files, for tests of every stage that reads images.

Every builder writes into a folder it is given (a pytest ``tmp_path``), makes its
file(s) with code (Pillow for ordinary formats; hand-written PNG chunks where Pillow
would refuse to write the file), and returns what it wrote. Nothing binary is shipped.

Each builder's docstring states the outcome ``shortcut_audit.dataset`` promises for it:
"ok" (decoded, maybe after conversion) or "skip" with a keyword of the Skip reason.
:func:`build_mixed_folder` puts all of them in one folder-per-class tree.

Import from a test file in ``tests/`` as ``import bad_inputs`` (pytest puts the test
folder on ``sys.path``).
"""

from __future__ import annotations

import os
import struct
import zlib
from pathlib import Path

import numpy as np
from PIL import Image

RED = (255, 0, 0)
GREEN = (0, 255, 0)
BLUE = (0, 0, 255)
WHITE = (255, 255, 255)

NON_UTF8_NAME = os.fsdecode(b"\xff\xfe.png")
"""A file name whose bytes are not UTF-8 (surrogate-escaped str on POSIX)."""

NON_UTF8_SHOWN = "\\xff\\xfe.png"
"""How ``ImageEntry.path`` shows :data:`NON_UTF8_NAME` (backslashreplace)."""


# ------------------------------------------------------------------------ helpers


def quadrant_pattern(width: int = 32, height: int = 16) -> np.ndarray:
    """An asymmetric (height, width, 3) uint8 pattern: quadrants red, green / blue, white.

    Top-left red, top-right green, bottom-left blue, bottom-right white, so every
    rotation and mirror of it is distinguishable. Quadrant sides that are multiples of
    8 keep JPEG blocks single-coloured.
    """
    out = np.empty((height, width, 3), np.uint8)
    h2, w2 = height // 2, width // 2
    out[:h2, :w2] = RED
    out[:h2, w2:] = GREEN
    out[h2:, :w2] = BLUE
    out[h2:, w2:] = WHITE
    return out


def noise_image(rng: np.random.Generator, width: int = 24, height: int = 16) -> Image.Image:
    """A random RGB image (incompressible, so truncating its file cuts pixel data)."""
    return Image.fromarray(rng.integers(0, 256, (height, width, 3), dtype=np.uint8))


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    """One PNG chunk: length, type, data, CRC-32 of type + data (PNG spec, section 5.3)."""
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def write_manifest(file: Path, header: tuple[str, ...], rows: list[tuple[str, ...]]) -> Path:
    """Write a CSV manifest (header row, then rows) and return its path."""
    lines = [",".join(header)] + [",".join(r) for r in rows]
    file.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return file


# ----------------------------------------------------------------- bad image files


def make_zero_byte(folder: Path, name: str = "empty.png") -> Path:
    """A file of 0 bytes. Outcome: skip, reason "file is empty"."""
    path = folder / name
    path.write_bytes(b"")
    return path


def make_truncated_png(folder: Path, name: str = "truncated.png", *, seed: int = 0) -> Path:
    """A noise PNG cut to its first half (header intact, pixel data cut).

    Outcome: skip, reason starting "cannot decode".
    """
    path = folder / name
    noise_image(np.random.default_rng(seed), 64, 64).save(path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return path


def make_truncated_jpeg(folder: Path, name: str = "truncated.jpg", *, seed: int = 0) -> Path:
    """A noise JPEG cut to its first half. Outcome: skip, reason starting "cannot decode"."""
    path = folder / name
    noise_image(np.random.default_rng(seed), 64, 64).save(path, quality=95)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return path


def make_text_as_png(folder: Path, name: str = "notes.png") -> Path:
    """A text file named .png. Outcome: skip, "cannot decode: not a recognised image format"."""
    path = folder / name
    path.write_text("glaze recipe: 40 feldspar, 30 silica, 20 whiting, 10 kaolin\n")
    return path


def make_png_bomb(folder: Path, name: str = "bomb.png", *, width: int = 50_000, height: int = 50_000) -> Path:
    """A PNG whose IHDR declares ``width`` x ``height`` 8-bit gray pixels but holds a few bytes.

    Chunks written by hand with correct CRCs, so Pillow accepts the header. With the
    default 50000 x 50000 (2500 MP) Pillow itself refuses on open; with a size just over
    ``MAX_PIXELS`` (e.g. 10000 x 9000) only the tool's own header check refuses. Outcome:
    skip, reason containing "decompression bomb". Decoding it would fail differently
    (the data is far too short), so that reason proves nothing was decoded.
    """
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)  # 8-bit gray, no interlace
    idat = zlib.compress(b"\x00" * 64)
    data = (
        b"\x89PNG\r\n\x1a\n"
        + _png_chunk(b"IHDR", ihdr)
        + _png_chunk(b"IDAT", idat)
        + _png_chunk(b"IEND", b"")
    )
    path = folder / name
    path.write_bytes(data)
    return path


# ------------------------------------------------------------- unusual, still ok


SIXTEEN_BIT_VALUES = np.array([[0, 1, 257, 1000], [30000, 32768, 65534, 65535]], np.uint16)
"""The pixels of :func:`make_png_16bit` (2 rows, 4 columns)."""


def make_png_16bit(folder: Path, name: str = "gray16.png") -> Path:
    """A 16-bit grayscale PNG (Pillow mode I;16) holding :data:`SIXTEEN_BIT_VALUES`.

    Outcome: ok; pixel values are value / 257 (65535 -> 255).
    """
    path = folder / name
    Image.fromarray(SIXTEEN_BIT_VALUES).save(path)
    return path


def make_palette_png_transparent(folder: Path, name: str = "palette.png") -> Path:
    """A 4x4 palette PNG: index 0 (transparent) on the left half, index 1 (red) on the right.

    Outcome: ok; the left half takes the background colour, the right half is red.
    """
    im = Image.new("P", (4, 4), 0)
    im.putpalette([0, 0, 0, *RED] + [0, 0, 0] * 254)
    for y in range(4):
        for x in (2, 3):
            im.putpixel((x, y), 1)
    path = folder / name
    im.save(path, transparency=0)
    return path


def make_rgba_png(folder: Path, name: str = "rgba.png", *, alpha: int = 128) -> Path:
    """A 4x4 RGBA PNG, red at opacity ``alpha``. Outcome: ok, composited on the background."""
    path = folder / name
    Image.new("RGBA", (4, 4), (*RED, alpha)).save(path)
    return path


def make_la_png(folder: Path, name: str = "la.png", *, gray: int = 0, alpha: int = 64) -> Path:
    """A 4x4 gray + alpha (LA) PNG. Outcome: ok, composited on the background."""
    path = folder / name
    Image.new("LA", (4, 4), (gray, alpha)).save(path)
    return path


def make_cmyk_jpeg(folder: Path, name: str = "cmyk.jpg") -> Path:
    """A 16x16 CMYK JPEG with four flat ink quadrants. Outcome: ok, converted to RGB."""
    im = Image.new("CMYK", (16, 16), (0, 0, 0, 0))
    im.paste((255, 0, 0, 0), (0, 0, 8, 8))
    im.paste((0, 255, 0, 0), (8, 0, 16, 8))
    im.paste((0, 0, 255, 0), (0, 8, 8, 16))
    im.paste((0, 0, 0, 128), (8, 8, 16, 16))
    path = folder / name
    im.save(path, quality=95)
    return path


def make_exif_rotated_jpeg(folder: Path, name: str = "rotated.jpg") -> Path:
    """A JPEG storing :func:`quadrant_pattern` (32 wide, 16 tall) with EXIF orientation 6.

    Orientation 6 means "rotate 90 degrees clockwise to display" (EXIF 2.3, tag 0x0112).
    Outcome: ok; the decoded image is 16 wide, 32 tall, equal to
    ``np.rot90(pattern, k=-1)`` up to JPEG error.
    """
    exif = Image.Exif()
    exif[0x0112] = 6
    path = folder / name
    Image.fromarray(quadrant_pattern()).save(path, quality=95, subsampling=0, exif=exif)
    return path


def make_tiny(folder: Path, name: str = "one_pixel.png", *, width: int = 1, height: int = 1,
              color: tuple[int, int, int] = BLUE) -> Path:
    """A flat image of ``width`` x ``height`` (1x1 by default; 5x3 is smaller than a patch).

    Outcome: ok; upscaled to the model size, every pixel ``color``.
    """
    path = folder / name
    Image.new("RGB", (width, height), color).save(path)
    return path


def make_animated_gif(folder: Path, name: str = "animated.gif") -> Path:
    """A 2-frame 8x8 GIF, red then green. Outcome: ok, first frame (red)."""
    path = folder / name
    first, second = Image.new("RGB", (8, 8), RED), Image.new("RGB", (8, 8), GREEN)
    first.save(path, save_all=True, append_images=[second], duration=100, loop=0)
    return path


def make_animated_png(folder: Path, name: str = "animated_apng.png") -> Path:
    """A 2-frame 8x8 animated PNG, red then green. Outcome: ok, first frame (red)."""
    path = folder / name
    first, second = Image.new("RGB", (8, 8), RED), Image.new("RGB", (8, 8), GREEN)
    first.save(path, save_all=True, append_images=[second], duration=100, loop=0)
    return path


def make_non_utf8_name(folder: Path) -> Path | None:
    """A good 4x4 PNG named with the bytes ``b"\\xff\\xfe.png"`` (:data:`NON_UTF8_NAME`).

    Returns None where the file system refuses such names. Outcome: ok, and its
    ``ImageEntry.path`` ends in :data:`NON_UTF8_SHOWN`.
    """
    path = folder / NON_UTF8_NAME
    try:
        Image.new("RGB", (4, 4), GREEN).save(path, format="PNG")
    except (OSError, UnicodeError):
        return None
    return path


def make_symlink_outside(folder: Path, outside: Path, name: str = "link.png") -> Path | None:
    """A symlink ``folder/name`` to a good PNG written in ``outside`` (a folder outside the root).

    Returns None where symlinks cannot be made. Outcome: skip, reason
    "symlink points outside the dataset root".
    """
    outside.mkdir(parents=True, exist_ok=True)
    target = outside / "secret.png"
    Image.new("RGB", (4, 4), RED).save(target)
    link = folder / name
    try:
        link.symlink_to(target)
    except (OSError, NotImplementedError):
        return None
    return link


def make_empty_class(root: Path, name: str = "plate") -> Path:
    """An empty class folder ``root/name``. Outcome: Skip with path "plate/", reason "class folder is empty"."""
    path = root / name
    path.mkdir(parents=True, exist_ok=True)
    return path


# ------------------------------------------------------------------------ manifests


def _two_good(root: Path) -> None:
    for cls, color in (("mug", RED), ("bowl", BLUE)):
        (root / cls).mkdir(parents=True, exist_ok=True)
        Image.new("RGB", (4, 4), color).save(root / cls / "a.png")


def make_manifest_missing_columns(root: Path) -> Path:
    """``root/manifest.csv`` with header ``file,class``. Outcome: DataError naming both sets of columns."""
    _two_good(root)
    return write_manifest(root / "manifest.csv", ("file", "class"), [("mug/a.png", "mug")])


def make_manifest_missing_file(root: Path) -> Path:
    """A manifest of one good row and ``mug/nope.png`` (no such file). Outcome: Skip "file not found"."""
    _two_good(root)
    return write_manifest(root / "manifest.csv", ("path", "label"),
                          [("mug/a.png", "mug"), ("mug/nope.png", "mug")])


def make_manifest_duplicate_rows(root: Path) -> Path:
    """Rows at lines 2, 3, 4: ``mug/a.png``, ``bowl/a.png``, ``mug/a.png`` again (other label).

    Outcome: the first row is kept (label mug); Skip "duplicate row in manifest (first at line 2)".
    """
    _two_good(root)
    return write_manifest(root / "manifest.csv", ("path", "label"),
                          [("mug/a.png", "mug"), ("bowl/a.png", "bowl"), ("mug/a.png", "vase")])


def make_manifest_leaving_root(root: Path, outside: Path) -> Path:
    """Rows ``mug/a.png`` (good), ``../outside/secret.png`` and an absolute path to it.

    ``outside`` must be a sibling of ``root`` (``root.parent / "outside"``). Outcome: the
    two leaving rows are Skips "path leaves the dataset root".
    """
    _two_good(root)
    outside.mkdir(parents=True, exist_ok=True)
    secret = outside / "secret.png"
    Image.new("RGB", (4, 4), RED).save(secret)
    rel = f"../{outside.name}/secret.png"
    return write_manifest(root / "manifest.csv", ("path", "label"),
                          [("mug/a.png", "mug"), (rel, "mug"), (str(secret), "mug")])


# ------------------------------------------------------------------- mixed folder


def build_mixed_folder(root: Path, n_good: int, rng: np.random.Generator) -> dict[str, tuple[str, str]]:
    """A folder-per-class tree of ``n_good`` good images mixed with every kind above.

    Classes mug, bowl and vase get the good images (round robin, random noise PNGs and
    JPEGs) and the unusual and bad files; ``plate`` is an empty class folder; a sibling
    folder ``<root.name>_outside`` holds the symlink target.

    Returns
    -------
    dict
        Expected outcome per ``ImageEntry.path``-style relative path (``"plate/"`` for
        the empty class): ``("ok", "")`` or ``("skip", keyword)``, where ``keyword`` is
        a substring of the Skip reason.
    """
    classes = ("mug", "bowl", "vase")
    for cls in classes:
        (root / cls).mkdir(parents=True, exist_ok=True)
    expected: dict[str, tuple[str, str]] = {}
    for i in range(n_good):
        cls = classes[i % len(classes)]
        ext = ".jpg" if i % 2 else ".png"
        noise_image(rng, 20 + i % 7, 12 + i % 5).save(root / cls / f"good_{i:03d}{ext}")
        expected[f"{cls}/good_{i:03d}{ext}"] = ("ok", "")

    def put(cls: str, path: Path | None, outcome: str, keyword: str = "") -> None:
        if path is not None:
            expected[f"{cls}/{path.relative_to(root / cls).as_posix()}"] = (outcome, keyword)

    mug, bowl, vase = (root / c for c in classes)
    put("mug", make_zero_byte(mug), "skip", "file is empty")
    put("mug", make_truncated_png(mug), "skip", "cannot decode")
    put("mug", make_truncated_jpeg(mug), "skip", "cannot decode")
    put("mug", make_text_as_png(mug), "skip", "not a recognised image format")
    put("bowl", make_png_bomb(bowl), "skip", "decompression bomb")
    put("bowl", make_png_bomb(bowl, "bomb_small.png", width=10_000, height=9_000), "skip", "decompression bomb")
    put("bowl", make_symlink_outside(bowl, root.parent / f"{root.name}_outside"), "skip", "outside the dataset root")
    put("bowl", make_png_16bit(bowl), "ok")
    put("bowl", make_palette_png_transparent(bowl), "ok")
    put("vase", make_rgba_png(vase), "ok")
    put("vase", make_la_png(vase), "ok")
    put("vase", make_cmyk_jpeg(vase), "ok")
    put("vase", make_exif_rotated_jpeg(vase), "ok")
    put("vase", make_tiny(vase), "ok")
    put("vase", make_tiny(vase, "small_5x3.png", width=5, height=3), "ok")
    put("vase", make_animated_gif(vase), "ok")
    put("vase", make_animated_png(vase), "ok")
    nested = vase / "studio_b"
    nested.mkdir()
    put("vase", make_tiny(nested, "nested.png"), "ok")
    if make_non_utf8_name(mug) is not None:
        expected[f"mug/{NON_UTF8_SHOWN}"] = ("ok", "")
    # Passed over silently: hidden files (even with an image extension) and other extensions.
    Image.new("RGB", (4, 4)).save(mug / ".hidden.png")
    (mug / "readme.txt").write_text("not an image\n")
    make_empty_class(root, "plate")
    expected["plate/"] = ("skip", "class folder is empty")
    return expected
