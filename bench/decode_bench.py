"""Decode time of a big camera JPEG at a model's input size: full decode against the
JPEG draft decode that dataset.py uses (a reduced DCT scale keeping twice the input).

    python bench/decode_bench.py [--repeat 5]

Prints seconds per photo for both ways, measured in this one run, and their ratio.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

from shortcut_audit.dataset import PIXEL_RESAMPLE, load_image


def make_photo(path: Path) -> None:
    """4000x3000, EXIF orientation 6, gradients and texture, quality 90."""
    h, w = 3000, 4000
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    rng = np.random.default_rng(0)
    img = np.stack([90 + 100 * x / w, 60 + 120 * y / h, 140 + 60 * np.sin(x / 300.0)], axis=-1)
    img += rng.normal(0, 6, (h, w, 1))
    exif = Image.Exif()
    exif[0x0112] = 6
    Image.fromarray(np.clip(img, 0, 255).astype(np.uint8)).save(path, quality=90, exif=exif.tobytes())


def full_decode(path: Path, size: tuple[int, int]) -> np.ndarray:
    """What dataset.py did before: decode every pixel, turn, one bilinear resize."""
    with Image.open(path) as im:
        im.load()
        im = ImageOps.exif_transpose(im).convert("RGB")
    return np.asarray(im.resize((size[1], size[0]), PIXEL_RESAMPLE, reducing_gap=None), np.float32)


def timed(fn, repeat: int) -> float:
    fn()                                    # warm-up
    t = time.perf_counter()
    for _ in range(repeat):
        fn()
    return (time.perf_counter() - t) / repeat


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "camera.jpg"
        make_photo(path)
        print(f"photo: 4000x3000 JPEG, EXIF orientation 6, {path.stat().st_size / 1e6:.1f} MB")
        for size in ((224, 224), (384, 384), (64, 64)):
            before = timed(lambda: full_decode(path, size), args.repeat)
            after = timed(lambda: load_image(path, size=size), args.repeat)
            diff = np.abs(full_decode(path, size) - load_image(path, size=size))
            print(f"input {size[0]}x{size[1]}: full decode {before * 1000:.0f} ms/photo, "
                  f"draft decode {after * 1000:.0f} ms/photo, ratio {before / after:.1f}x "
                  f"(pixels differ by {diff.mean():.2f} on average, {diff.max():.0f} at most)")


if __name__ == "__main__":
    main()
