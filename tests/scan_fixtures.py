"""Small labelled image sets and planted-shortcut linear models for the scan tests.

Every model here is linear over the scaled input (x / 255), so what it reads is known
exactly: that is the ground truth the audit's findings are checked against.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from onnx_builders import linear_model, save

SIZE = 32          # model input
FILE_SIZE = 48     # files are larger, so the resize is exercised
CORNER = 6         # the planted square, in model pixels (top-left)
CLASSES = ("alpha", "beta", "gamma")


def _image(kind: str, rng: np.random.Generator, *, corner: bool, plain: bool,
           bright: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """(rgb uint8 FILE_SIZE^2, object mask bool) for one synthetic item; ``bright``
    gives it the brighter backdrop that border_model reads."""
    s = FILE_SIZE
    level = 215.0 if bright else 150.0
    if plain:
        img = np.full((s, s, 3), level)
    else:
        img = level + 25 * rng.standard_normal((s, s, 3))
    mask = np.zeros((s, s), bool)
    r0, c0 = rng.integers(12, 22, size=2)
    mask[r0:r0 + 16, c0:c0 + 16] = True
    colour = {"alpha": (128, 128, 128), "beta": (220, 60, 60), "gamma": (60, 60, 220)}[kind]
    img[mask] = colour
    if corner:
        k = CORNER * FILE_SIZE // SIZE
        img[:k, :k] = 255.0
    return np.clip(img, 0, 255).astype(np.uint8), mask


def make_dataset(root: Path, *, n: int = 8, seed: int = 0, plain: bool = False,
                 corner_class: str | None = "alpha", backdrop_class: str | None = None,
                 masks_root: Path | None = None) -> Path:
    """root/<class>/<i>.png, and masks mirroring it when ``masks_root`` is given.

    ``corner_class`` images carry the bright corner square; ``backdrop_class`` images
    stand on a brighter backdrop."""
    rng = np.random.default_rng(seed)
    for kind in CLASSES:
        (root / kind).mkdir(parents=True, exist_ok=True)
        if masks_root is not None:
            (masks_root / kind).mkdir(parents=True, exist_ok=True)
        for i in range(n):
            img, mask = _image(kind, rng, corner=(kind == corner_class), plain=plain,
                               bright=(kind == backdrop_class))
            Image.fromarray(img).save(root / kind / f"{kind}_{i:02d}.png")
            if masks_root is not None:
                Image.fromarray(mask.astype(np.uint8) * 255).save(masks_root / kind / f"{kind}_{i:02d}.png")
    return root


def _colour_weights(strength: float = 30.0) -> np.ndarray:
    """beta and gamma read the red-minus-blue balance of the whole image."""
    d = SIZE * SIZE
    w = np.zeros((3, 3 * d), np.float32)
    w[1, 0:d] = strength / d
    w[1, 2 * d:3 * d] = -strength / d
    w[2, 0:d] = -strength / d
    w[2, 2 * d:3 * d] = strength / d
    return w


def corner_model(path: Path) -> Path:
    """alpha's logit is driven by the brightness of the top-left CORNER x CORNER square
    (all channels); beta and gamma by the colour balance of the whole image."""
    w = _colour_weights()
    d = SIZE * SIZE
    for c in range(3):
        plane = np.zeros((SIZE, SIZE), np.float32)
        plane[:CORNER, :CORNER] = 24.0 / (3 * CORNER * CORNER)
        w[0, c * d:(c + 1) * d] = plane.ravel()
    b = np.array([-18.0, 0.0, 0.0], np.float32)
    return save(linear_model(w, b, height=SIZE, width=SIZE), path,
                metadata={"labels": list(CLASSES)})


def clean_model(path: Path, *, scale: float = 1.0) -> Path:
    """alpha reads the grey-ness of the whole image (G - (R + B) / 2), beta and gamma
    its colour balance: no small region carries any class. A small ``scale`` makes
    every decision a near tie, so any small perturbation moves it: a model fragile
    everywhere, with no shortcut."""
    w = _colour_weights()
    d = SIZE * SIZE
    w[0, d:2 * d] = 8.0 / d
    w[0, 0:d] = -4.0 / d
    w[0, 2 * d:3 * d] = -4.0 / d
    b = np.array([1.0, 0.0, 0.0], np.float32)
    return save(linear_model(w * scale, b * scale, height=SIZE, width=SIZE), path,
                metadata={"labels": list(CLASSES)})


def border_model(path: Path) -> Path:
    """alpha's logit reads the brightness of a 4-pixel border ring (the backdrop); beta
    and gamma the colour balance of the centre only."""
    d = SIZE * SIZE
    ring = np.ones((SIZE, SIZE), bool)
    ring[4:-4, 4:-4] = False
    centre = ~ring
    w = np.zeros((3, 3 * d), np.float32)
    for c in range(3):
        w[0, c * d:(c + 1) * d] = (ring * (24.0 / (3 * ring.sum()))).ravel()
    w[1, 0:d] = (centre * 10.0 / centre.sum()).ravel()
    w[1, 2 * d:] = (centre * -10.0 / centre.sum()).ravel()
    w[2, 0:d] = (centre * -10.0 / centre.sum()).ravel()
    w[2, 2 * d:] = (centre * 10.0 / centre.sum()).ravel()
    b = np.array([-18.0, 0.0, 0.0], np.float32)
    return save(linear_model(w, b, height=SIZE, width=SIZE), path,
                metadata={"labels": list(CLASSES)})

