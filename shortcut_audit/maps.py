"""What a heatmap job returns (:class:`Heatmap`), the checks every heatmap job makes
of its input and of the model's scores, and what is measured on a map (its
concentration, Gini coefficient, heat order, boxes, the share outside an object) and on
an image with its object mask (erasing the object or the backdrop, estimating a mask).

:mod:`~shortcut_audit.sensitivity` (patch and random plans) and
:mod:`~shortcut_audit.adaptive` (the coarse-to-fine plan) both build on it:
sensitivity.py hands an adaptive plan to adaptive.py, and adaptive.py needs only
this module, so the arrow between the two goes one way.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .errors import ImageSkip, UsageError

__all__ = ["Heatmap", "check_image", "check_finite", "concentration", "gini", "heat_order", "box_of", "box_pixels", "box_share", "box_iou", "boxes_overlap",
           "peak_box", "curve_area", "background_share", "erase_object", "erase_background",
           "estimate_object_mask"]


@dataclass(frozen=True, kw_only=True)
class Heatmap:
    """A heatmap at model-input resolution and what it was made from.

    Attributes
    ----------
    values : (H, W) float32
        Score drop of ``target`` when the pixel is hidden (positive = the pixel supports
        the class).
    target : int
        The class index explained.
    base_scores : (K,) float32
        Scores of the unperturbed image.
    passes : int
        Forward passes used, the unperturbed one included.
    coverage : float
        Share of pixels hidden by at least one patch (1.0 for grids and smooth masks).
    tolerance : float or None
        The early-stopping tolerance of a random plan (None when it ran to its count);
        ``passes - 1`` is then the number of masks used.
    error_estimate : float or None
        With early stopping: the estimated relative error of the map when it stopped
        (see :func:`heatmap_job`).
    """

    values: np.ndarray
    target: int
    base_scores: np.ndarray
    passes: int
    coverage: float = 1.0
    tolerance: float | None = None
    error_estimate: float | None = None

    @property
    def base_score(self) -> float:
        return float(self.base_scores[self.target])

    @property
    def predicted(self) -> int:
        return int(np.argmax(self.base_scores))


def check_image(image: np.ndarray) -> np.ndarray:
    image = np.asarray(image, dtype=np.float32)
    if image.ndim != 3 or image.shape[2] not in (1, 3):
        raise UsageError(f"image must be an (H, W, C) array with C = 1 or 3; got shape {image.shape}.")
    return image


def check_finite(scores: np.ndarray, what: str) -> None:
    if not np.all(np.isfinite(scores)):
        raise ImageSkip(f"the model returned NaN or infinity for {what}; image skipped")


# ---------------------------------------------------------------- map statistics

def concentration(values: np.ndarray, *, top: float = 0.05) -> float:
    """Share of the positive heat mass held by the top ``top`` share of pixels.

    >>> concentration(np.array([[4.0, 0.0], [0.0, 0.0]]), top=0.25)
    1.0
    """
    pos = np.clip(np.asarray(values, dtype=np.float64).ravel(), 0.0, None)
    total = pos.sum()
    if total <= 0:
        return 0.0
    k = max(1, int(math.ceil(top * pos.size)))
    return float(np.sort(pos)[::-1][:k].sum() / total)


def gini(values: np.ndarray) -> float:
    """Gini coefficient of the positive part of a map.

    ``G = sum_i sum_j |x_i - x_j| / (2 n^2 mean(x))``, computed from the sorted values as
    ``(2 sum_i i x_(i)) / (n sum x) - (n + 1) / n``. A uniform map gives 0; all mass on
    one of ``n`` pixels gives ``(n - 1) / n``. An all-zero map gives 0.

    >>> gini(np.ones((2, 2)))
    0.0
    >>> gini(np.array([0.0, 0.0, 0.0, 5.0]))
    0.75
    """
    x = np.sort(np.clip(np.asarray(values, dtype=np.float64).ravel(), 0.0, None))
    n = x.size
    total = x.sum()
    if n == 0 or total <= 0:
        return 0.0
    i = np.arange(1, n + 1)
    return float(2.0 * np.sum(i * x) / (n * total) - (n + 1.0) / n)


def heat_order(values: np.ndarray) -> np.ndarray:
    """Flat pixel indices, hottest first; ties by index (stable), so results are repeatable."""
    return np.argsort(-np.asarray(values, dtype=np.float64).ravel(), kind="stable")


def _top_mask(order: np.ndarray, share: float, shape: tuple[int, int]) -> np.ndarray:
    n = order.size
    k = int(round(share * n))
    mask = np.zeros(n, dtype=bool)
    mask[order[:k]] = True
    return mask.reshape(shape)


def box_of(mask: np.ndarray) -> list[float] | None:
    """Bounding box ``[x0, y0, x1, y1]`` of a boolean mask, as fractions of width and height.

    >>> m = np.zeros((4, 4), bool); m[1:3, 2:4] = True
    >>> box_of(m)
    [0.5, 0.25, 1.0, 0.75]
    """
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    if rows.size == 0:
        return None
    h, w = mask.shape
    return [float(cols[0] / w), float(rows[0] / h), float((cols[-1] + 1) / w), float((rows[-1] + 1) / h)]


def box_pixels(box: Sequence[float], height: int, width: int) -> tuple[int, int, int, int]:
    """A box in fractions as half-open pixel bounds ``(row0, row1, col0, col1)``.

    Bounds are rounded to the nearest pixel, clipped to the image, and at least one
    pixel wide; boxes from :func:`box_of` map back exactly.

    >>> box_pixels([0.5, 0.25, 1.0, 0.75], 4, 4)
    (1, 3, 2, 4)
    """
    if len(box) != 4:
        raise UsageError(f"a box must be [x0, y0, x1, y1] in fractions; got {list(box)!r}.")
    x0, y0, x1, y1 = (float(v) for v in box)
    if not all(math.isfinite(v) for v in (x0, y0, x1, y1)) or x1 < x0 or y1 < y0:
        raise UsageError(
            f"a box must be [x0, y0, x1, y1] with x0 <= x1 and y0 <= y1; got {list(box)!r}.")
    r0 = min(max(int(round(y0 * height)), 0), height - 1)
    c0 = min(max(int(round(x0 * width)), 0), width - 1)
    r1 = min(max(int(round(y1 * height)), r0 + 1), height)
    c1 = min(max(int(round(x1 * width)), c0 + 1), width)
    return r0, r1, c0, c1


def box_share(mask: np.ndarray, box: Sequence[float]) -> float:
    """Share of the pixels of ``box`` (fractions, as :func:`box_pixels` maps it) on ``mask``.

    >>> m = np.zeros((4, 4), bool); m[:, :2] = True
    >>> box_share(m, [0.25, 0.0, 0.75, 1.0])
    0.5
    """
    h, w = np.shape(mask)
    r0, r1, c0, c1 = box_pixels(box, h, w)
    return float(np.asarray(mask)[r0:r1, c0:c1].mean())


def boxes_overlap(a, b) -> bool:
    """Whether two boxes ``[x0, y0, x1, y1]`` share any area (False when either is None).

    >>> boxes_overlap([0, 0, 0.5, 0.5], [0.25, 0.25, 1, 1]), boxes_overlap([0, 0, 0.5, 0.5], None)
    (True, False)
    """
    if a is None or b is None:
        return False
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def box_iou(a, b) -> float | None:
    """Intersection over union of two boxes ``[x0, y0, x1, y1]`` (None when either is).

    >>> box_iou([0, 0, 0.5, 0.5], [0.25, 0.25, 0.75, 0.75])  # 1/16 over 7/16
    0.14285714285714285
    """
    if a is None or b is None:
        return None
    ix = max(0.0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    union = (a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter
    return inter / union if union > 0 else 0.0


def peak_box(values: np.ndarray, *, share: float = 0.05) -> list[float] | None:
    """Box of the largest connected blob among the hottest ``share`` of pixels."""
    mask = _top_mask(heat_order(values), share, values.shape) & (np.asarray(values) > 0)
    if not mask.any():
        return None
    labels, n = ndimage.label(mask)
    if n > 1:
        sizes = ndimage.sum_labels(mask, labels, index=np.arange(1, n + 1))
        mask = labels == (int(np.argmax(sizes)) + 1)
    return box_of(mask)


def curve_area(xs: np.ndarray, ys: np.ndarray) -> float:
    """Area under a curve by the trapezoid rule (the area of the deletion/insertion curves)."""
    xs = np.asarray(xs, dtype=np.float64)
    ys = np.asarray(ys, dtype=np.float64)
    return float(np.sum((xs[1:] - xs[:-1]) * (ys[1:] + ys[:-1]) / 2.0))


def background_share(values: np.ndarray, mask: np.ndarray) -> float | None:
    """Share of the positive heat mass outside the object ``mask`` (None when no heat)."""
    pos = np.clip(np.asarray(values, dtype=np.float64), 0.0, None)
    total = pos.sum()
    if total <= 0:
        return None
    return float(pos[~mask].sum() / total)


def erase_object(image: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """The image with the object filled in from its surroundings.

    Each object pixel takes the colour of the nearest background pixel (Euclidean
    distance transform), then the filled region is smoothed so no copied edge remains.
    """
    if mask.all() or not mask.any():
        return image.copy()
    _, (ri, ci) = ndimage.distance_transform_edt(mask, return_indices=True)
    out = image[ri, ci]
    smooth = ndimage.gaussian_filter(out, sigma=(2.0, 2.0, 0), mode="nearest")
    out = np.where(mask[..., None], smooth, image)
    return out.astype(np.float32)


def erase_background(image: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """The object alone, on a flat backdrop of the background's mean colour."""
    if mask.all() or not mask.any():
        return image.copy()
    colour = image[~mask].mean(axis=0)
    return np.where(mask[..., None], image, colour[None, None, :]).astype(np.float32)


def estimate_object_mask(image: np.ndarray, *, tolerance: float = 28.0) -> np.ndarray | None:
    """An object mask for an image on a plain or simple backdrop, or None.

    The backdrop colour is the median of the border pixels; pixels within ``tolerance``
    (Euclidean distance in 0..255 RGB) of it that connect to the border are backdrop,
    the rest (holes filled) is the object. Returns None when the border is not plain
    (its pixels spread more than ``tolerance``) or when the object found covers less
    than 3% or more than 85% of the image: then no honest estimate exists.
    """
    img = np.asarray(image, dtype=np.float32)
    h, w, c = img.shape
    border = np.concatenate([img[0], img[-1], img[:, 0], img[:, -1]], axis=0)
    colour = np.median(border, axis=0)
    spread = np.sqrt(((border - colour) ** 2).sum(axis=1))
    if np.median(spread) > tolerance / 2 or np.quantile(spread, 0.9) > tolerance:
        return None
    near = np.sqrt(((img - colour) ** 2).sum(axis=2)) <= tolerance
    labels, _ = ndimage.label(near)
    edge = np.unique(np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]]))
    edge = edge[edge > 0]
    backdrop = np.isin(labels, edge)
    obj = ndimage.binary_fill_holes(~backdrop)
    share = float(obj.mean())
    if share < 0.03 or share > 0.85:
        return None
    return obj
