"""Occlusion plans and fills: which parts of an image to hide, and with what.

A *plan* says where to hide: a sliding grid of square patches, randomly placed patches,
random smooth masks in the manner of RISE (Petsiuk, Das and Saenko, BMVC 2018), or an
adaptive coarse-to-fine grid (:class:`AdaptivePlan`, run by :mod:`.adaptive`). A
*fill* says what to put there: a constant value, the image's mean colour, a Gaussian
blur of the image, or seeded noise.

Every perturbation is described by an *occlusion weight* ``m`` in [0, 1] per pixel,
1 meaning fully hidden, and made as ``x * (1 - m) + fill * m``. Weights are produced in
chunks (:func:`iter_weights`), never all at once, so memory stays flat whatever the
number of passes.

This module is pure: numpy arrays and frozen dataclasses in, arrays out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterator, Union

import numpy as np
from scipy import ndimage

from .errors import UsageError

__all__ = [
    "GridPlan",
    "RandomPatchPlan",
    "SmoothMaskPlan",
    "AdaptivePlan",
    "Plan",
    "Fill",
    "FILL_KINDS",
    "PLAN_KINDS",
    "plan_from_dict",
    "fill_from_dict",
    "patch_boxes",
    "pass_count",
    "iter_weights",
    "box_weights",
    "fill_image",
    "perturb",
    "paste_boxes",
    "hidden_image",
    "paste_into",
]


def _check_size(value, name: str) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise UsageError(f"{name} must be a number of pixels or a fraction of the side; got {value!r}.")
    if isinstance(value, float) and not (0.0 < value <= 1.0):
        raise UsageError(
            f"{name} as a fraction of the side must be in (0, 1]; got {value}. "
            f"Pass a fraction such as 0.125 or a whole number of pixels."
        )
    if isinstance(value, int) and value < 1:
        raise UsageError(f"{name} in pixels must be at least 1; got {value}.")


def _pixels(value: int | float, side: int) -> int:
    """A size given in pixels (int) or as a fraction of ``side`` (float), in pixels."""
    if isinstance(value, float):
        return max(1, int(round(value * side)))
    return int(value)


@dataclass(frozen=True, kw_only=True)
class GridPlan:
    """A sliding grid of square patches with edge-complete coverage.

    ``patch`` and ``stride`` are pixels (int) or fractions of each side (float).
    The default stride is half the patch. The last row and column of patches are
    placed flush with the bottom and right edges, so every pixel is covered.

    >>> GridPlan(patch=2, stride=2)
    GridPlan(patch=2, stride=2)
    """

    patch: int | float = 0.125
    stride: int | float | None = None

    def __post_init__(self) -> None:
        _check_size(self.patch, "--patch")
        if self.stride is not None:
            _check_size(self.stride, "--stride")

    kind = "grid"

    def to_dict(self) -> dict:
        return {"kind": self.kind, "patch": self.patch, "stride": self.stride}


@dataclass(frozen=True, kw_only=True)
class RandomPatchPlan:
    """``count`` square patches of random size and place, from ``seed``.

    Sizes are drawn uniformly between ``min_size`` and ``max_size`` (pixels or
    fractions of the shorter side); places uniformly over the image.
    """

    count: int = 400
    min_size: int | float = 0.08
    max_size: int | float = 0.25
    seed: int = 0

    def __post_init__(self) -> None:
        if not isinstance(self.count, int) or self.count < 1:
            raise UsageError(f"--count must be a whole number of at least 1; got {self.count!r}.")
        _check_size(self.min_size, "--min-size")
        _check_size(self.max_size, "--max-size")
        if type(self.min_size) is type(self.max_size) and self.min_size > self.max_size:
            raise UsageError(
                f"--min-size ({self.min_size}) must not exceed --max-size ({self.max_size}); swap them."
            )

    kind = "random"

    def to_dict(self) -> dict:
        return {"kind": self.kind, "count": self.count, "min_size": self.min_size,
                "max_size": self.max_size, "seed": self.seed}


@dataclass(frozen=True, kw_only=True)
class SmoothMaskPlan:
    """Random smooth masks in the manner of RISE (Petsiuk et al. 2018).

    Each mask is a ``cells`` x ``cells`` grid of independent keep/hide draws (keep with
    probability ``keep``), upsampled bilinearly to ``(cells + 1)`` cell sizes and cropped
    at a random shift of less than one cell. The kept weight is that smooth map; the
    occlusion weight is one minus it. ``cells=0`` means one cell per pixel with no
    upsampling and no shift (independent pixels), which has a closed-form expectation.
    """

    count: int = 1000
    cells: int = 8
    keep: float = 0.5
    seed: int = 0

    def __post_init__(self) -> None:
        if not isinstance(self.count, int) or self.count < 1:
            raise UsageError(f"--count must be a whole number of at least 1; got {self.count!r}.")
        if not isinstance(self.cells, int) or self.cells < 0:
            raise UsageError(f"--cells must be a whole number >= 0; got {self.cells!r}.")
        if not (0.0 < float(self.keep) < 1.0):
            raise UsageError(f"--keep must be a probability strictly between 0 and 1; got {self.keep}.")

    kind = "rise"

    def to_dict(self) -> dict:
        return {"kind": self.kind, "count": self.count, "cells": self.cells,
                "keep": self.keep, "seed": self.seed}


@dataclass(frozen=True, kw_only=True)
class AdaptivePlan:
    """A coarse grid first, then fine patches only where the coarse map says the score moves.

    The fine patches are those of ``GridPlan(patch=fine, stride=fine_stride)``; the
    heatmap has the units and the smoothing of that exhaustive grid, with the drops of
    the patches never run estimated from the coarse map (see :mod:`.adaptive`).

    Parameters
    ----------
    coarse, coarse_stride : int or float
        Coarse patch and stride (pixels, or fractions of each side); the stride
        defaults to the patch (a tiling).
    fine, fine_stride : int or float
        Fine patch and stride: the exhaustive grid the heatmap stands for.
    budget : int, optional
        Forward passes per image at most, the unperturbed one included; by default a
        quarter of the exhaustive fine grid's passes.
    keep_top : float
        Share of the fine patches that may be run at most, hottest first.
    tolerance : float
        Refinement stops once no fine patch left is predicted to move the score by
        more than ``tolerance`` times the largest move measured; 0 (the default)
        spends the whole budget.

    >>> AdaptivePlan(budget=40).to_dict()["kind"]
    'adaptive'
    """

    coarse: int | float = 0.25
    coarse_stride: int | float | None = None
    fine: int | float = 0.125
    fine_stride: int | float = 0.0625
    budget: int | None = None
    keep_top: float = 0.5
    tolerance: float = 0.0

    def __post_init__(self) -> None:
        _check_size(self.coarse, "--coarse")
        if self.coarse_stride is not None:
            _check_size(self.coarse_stride, "--coarse-stride")
        _check_size(self.fine, "--fine")
        _check_size(self.fine_stride, "--fine-stride")
        if self.budget is not None and (isinstance(self.budget, bool) or not isinstance(self.budget, int)
                                        or self.budget < 2):
            raise UsageError(
                f"--budget must be a whole number of passes per image, at least 2; got {self.budget!r}. "
                "Leave it out for a quarter of the exhaustive grid's passes."
            )
        if isinstance(self.keep_top, bool) or not isinstance(self.keep_top, (int, float)) or not (
                0.0 < float(self.keep_top) <= 1.0):
            raise UsageError(f"--keep-top must be a share of the fine patches in (0, 1]; got {self.keep_top!r}.")
        if isinstance(self.tolerance, bool) or not isinstance(self.tolerance, (int, float)) or not (
                0.0 <= float(self.tolerance) < 1.0):
            raise UsageError(f"--tolerance must be in [0, 1); got {self.tolerance!r}. Pass e.g. 0.02, or 0 to "
                             "spend the whole budget.")

    kind = "adaptive"

    def to_dict(self) -> dict:
        return {"kind": self.kind, "coarse": self.coarse, "coarse_stride": self.coarse_stride,
                "fine": self.fine, "fine_stride": self.fine_stride, "budget": self.budget,
                "keep_top": self.keep_top, "tolerance": self.tolerance}

    def coarse_plan(self) -> GridPlan:
        """The coarse grid, as a :class:`GridPlan`."""
        return GridPlan(patch=self.coarse, stride=self.coarse if self.coarse_stride is None else self.coarse_stride)

    def fine_plan(self) -> GridPlan:
        """The exhaustive grid this plan stands for, as a :class:`GridPlan`."""
        return GridPlan(patch=self.fine, stride=self.fine_stride)

    def max_passes(self, height: int, width: int) -> int:
        """Forward passes per image at most, the unperturbed one included.

        >>> AdaptivePlan().max_passes(64, 64)    # 225 fine patches + 1, a quarter
        56
        """
        if self.budget is not None:
            return self.budget
        exhaustive = len(patch_boxes(self.fine_plan(), height, width)) + 1
        return max(2, exhaustive // 4)


Plan = Union[GridPlan, RandomPatchPlan, SmoothMaskPlan, AdaptivePlan]

FILL_KINDS = ("constant", "mean", "blur", "noise")
#: The plans' ``kind`` names, as in ``to_dict()`` and ``--plan``.
PLAN_KINDS = ("grid", "random", "rise", "adaptive")


@dataclass(frozen=True, kw_only=True)
class Fill:
    """What hidden pixels become.

    - ``constant``: ``value`` (0..255) in every channel;
    - ``mean``: the image's mean colour;
    - ``blur``: the image blurred with a Gaussian of ``sigma`` (fraction of the longer side);
    - ``noise``: uniform noise in 0..255 drawn from ``seed``.

    >>> Fill(kind="constant", value=0.0).kind
    'constant'
    """

    kind: str = "blur"
    value: float = 127.5
    sigma: float = 0.08
    seed: int = 0

    def __post_init__(self) -> None:
        if self.kind not in FILL_KINDS:
            raise UsageError(f"--fill must be one of {', '.join(FILL_KINDS)}; got {self.kind!r}.")
        if not (0.0 <= float(self.value) <= 255.0):
            raise UsageError(f"--fill-value must be in 0..255; got {self.value}.")
        if not (0.0 < float(self.sigma) <= 1.0):
            raise UsageError(f"--blur-sigma must be a fraction of the side in (0, 1]; got {self.sigma}.")

    def to_dict(self) -> dict:
        out: dict = {"kind": self.kind}
        if self.kind == "constant":
            out["value"] = self.value
        elif self.kind == "blur":
            out["sigma"] = self.sigma
        elif self.kind == "noise":
            out["seed"] = self.seed
        return out


def plan_from_dict(data: dict) -> Plan:
    """The plan described by ``to_dict()`` output (as stored in audit.json)."""
    data = dict(data)
    kind = data.pop("kind", None)
    classes = dict(zip(PLAN_KINDS, (GridPlan, RandomPatchPlan, SmoothMaskPlan, AdaptivePlan)))
    if kind not in classes:
        raise UsageError(f"plan kind must be one of {', '.join(classes)}; got {kind!r}.")
    return classes[kind](**data)


def fill_from_dict(data: dict) -> Fill:
    """The fill described by ``to_dict()`` output."""
    return Fill(**data)


# --------------------------------------------------------------------------- patches

def _axis_starts(side: int, patch: int, stride: int) -> np.ndarray:
    if patch >= side:
        return np.array([0])
    starts = list(range(0, side - patch + 1, stride))
    if starts[-1] != side - patch:
        starts.append(side - patch)
    return np.asarray(starts)


def patch_boxes(plan: Plan, height: int, width: int) -> np.ndarray:
    """The patches of a grid or random plan as pixel boxes.

    Parameters
    ----------
    plan : GridPlan or RandomPatchPlan
    height, width : int
        The image size in pixels (rows, columns).

    Returns
    -------
    boxes : (P, 4) int array
        ``[row0, row1, col0, col1]`` per patch, half-open.

    Raises
    ------
    UsageError
        If the patch is larger than the image.

    >>> patch_boxes(GridPlan(patch=2, stride=2), 4, 4).tolist()
    [[0, 2, 0, 2], [0, 2, 2, 4], [2, 4, 0, 2], [2, 4, 2, 4]]
    """
    if isinstance(plan, GridPlan):
        ph, pw = _pixels(plan.patch, height), _pixels(plan.patch, width)
        stride = plan.stride
        if stride is None:
            sh, sw = max(1, ph // 2), max(1, pw // 2)
        else:
            sh, sw = _pixels(stride, height), _pixels(stride, width)
        if ph > height or pw > width:
            raise UsageError(
                f"--patch must be at most the image side ({min(height, width)}); got {max(ph, pw)}. "
                f"Pass a smaller --patch."
            )
        rows = _axis_starts(height, ph, sh)
        cols = _axis_starts(width, pw, sw)
        r, c = np.meshgrid(rows, cols, indexing="ij")
        r, c = r.ravel(), c.ravel()
        return np.stack([r, r + ph, c, c + pw], axis=1).astype(np.int64)
    if isinstance(plan, RandomPatchPlan):
        side = min(height, width)
        lo, hi = _pixels(plan.min_size, side), _pixels(plan.max_size, side)
        if lo > side:
            raise UsageError(
                f"--min-size must be at most the image side ({side}); got {lo}. Pass a smaller --min-size."
            )
        hi = min(hi, side)
        rng = np.random.default_rng(plan.seed)
        sizes = rng.integers(lo, hi + 1, size=plan.count)
        r0 = np.floor(rng.random(plan.count) * (height - sizes + 1)).astype(np.int64)
        c0 = np.floor(rng.random(plan.count) * (width - sizes + 1)).astype(np.int64)
        return np.stack([r0, r0 + sizes, c0, c0 + sizes], axis=1).astype(np.int64)
    raise UsageError(f"patch_boxes needs a grid or random plan; got {type(plan).__name__}.")


def pass_count(plan: Plan, height: int, width: int) -> int:
    """How many perturbed images the plan makes for one image (at most, for an adaptive plan)."""
    if isinstance(plan, SmoothMaskPlan):
        return plan.count
    if isinstance(plan, AdaptivePlan):
        return plan.max_passes(height, width) - 1
    return len(patch_boxes(plan, height, width))


def box_weights(boxes: np.ndarray, height: int, width: int) -> np.ndarray:
    """Occlusion weights (k, H, W) float32 that are 1 inside each box, 0 elsewhere."""
    boxes = np.asarray(boxes)
    rows = np.arange(height)
    cols = np.arange(width)
    in_r = (rows[None, :] >= boxes[:, 0:1]) & (rows[None, :] < boxes[:, 1:2])
    in_c = (cols[None, :] >= boxes[:, 2:3]) & (cols[None, :] < boxes[:, 3:4])
    return (in_r[:, :, None] & in_c[:, None, :]).astype(np.float32)


# ------------------------------------------------------------------------ RISE masks

def _interp_matrix(n_out: int, n_in: int, cell: float) -> np.ndarray:
    """Linear interpolation from ``n_in`` samples spaced ``cell`` apart to ``n_out`` pixels.

    Sample j sits at pixel coordinate ``j * cell``; output pixel i is at ``i + 0.5``
    measured from the first sample (the half-pixel convention of image resizing).
    """
    pos = (np.arange(n_out) + 0.5) / cell
    j0 = np.clip(np.floor(pos).astype(int), 0, n_in - 2)
    t = np.clip(pos - j0, 0.0, 1.0)
    mat = np.zeros((n_out, n_in), dtype=np.float64)
    mat[np.arange(n_out), j0] = 1.0 - t
    mat[np.arange(n_out), j0 + 1] = t
    return mat


def _smooth_keep(plan: SmoothMaskPlan, index: int, height: int, width: int) -> np.ndarray:
    """Kept weight (H, W) of mask number ``index``; depends only on seed and index."""
    rng = np.random.default_rng([plan.seed, index])
    if plan.cells == 0:
        return (rng.random((height, width)) < plan.keep).astype(np.float32)
    s = plan.cells
    grid = (rng.random((s, s)) < plan.keep).astype(np.float64)
    ch, cw = math.ceil(height / s), math.ceil(width / s)
    big_h, big_w = (s + 1) * ch, (s + 1) * cw
    dy, dx = int(rng.integers(0, ch)), int(rng.integers(0, cw))
    # Upsample the s x s grid to (s+1) cells: samples at cell corners, padded by
    # repeating the edge so the shifted crop stays inside.
    padded = np.pad(grid, ((0, 1), (0, 1)), mode="edge")
    ay = _interp_matrix(big_h, s + 1, ch)
    ax = _interp_matrix(big_w, s + 1, cw)
    big = ay @ padded @ ax.T
    return big[dy:dy + height, dx:dx + width].astype(np.float32)


# ------------------------------------------------------------------------ streaming

def iter_weights(plan: Plan, height: int, width: int, *, chunk: int) -> Iterator[np.ndarray]:
    """Yield occlusion weights in chunks of at most ``chunk`` masks.

    Parameters
    ----------
    plan : Plan
    height, width : int
    chunk : int
        The largest number of masks held at once.

    Yields
    ------
    weights : (k, H, W) float32 array in [0, 1], 1 = hidden

    Notes
    -----
    Memory is ``chunk * H * W * 4`` bytes whatever the number of passes. Masks of the
    random plans depend only on the seed and their index, never on ``chunk``.
    """
    if chunk < 1:
        raise UsageError(f"chunk must be at least 1; got {chunk}.")
    if isinstance(plan, SmoothMaskPlan):
        for start in range(0, plan.count, chunk):
            stop = min(plan.count, start + chunk)
            keep = np.stack([_smooth_keep(plan, i, height, width) for i in range(start, stop)])
            yield 1.0 - keep
        return
    boxes = patch_boxes(plan, height, width)
    for start in range(0, len(boxes), chunk):
        yield box_weights(boxes[start:start + chunk], height, width)


def fill_image(image: np.ndarray, fill: Fill) -> np.ndarray:
    """The image every hidden pixel is taken from, for ``image`` (H, W, C) float32.

    >>> img = np.zeros((2, 2, 1), np.float32); img[0, 0] = 4
    >>> fill_image(img, Fill(kind="mean"))[..., 0].tolist()
    [[1.0, 1.0], [1.0, 1.0]]
    """
    image = np.asarray(image, dtype=np.float32)
    h, w, c = image.shape
    if fill.kind == "constant":
        return np.full_like(image, fill.value)
    if fill.kind == "mean":
        return np.broadcast_to(image.reshape(-1, c).mean(axis=0), image.shape).astype(np.float32)
    if fill.kind == "blur":
        sigma = fill.sigma * max(h, w)
        return ndimage.gaussian_filter(image, sigma=(sigma, sigma, 0), mode="reflect").astype(np.float32)
    rng = np.random.default_rng(fill.seed)
    return (rng.random(image.shape) * 255.0).astype(np.float32)


def perturb(image: np.ndarray, weights: np.ndarray, filled: np.ndarray) -> np.ndarray:
    """Perturbed images ``image * (1 - m) + filled * m`` for each weight map ``m``.

    Parameters
    ----------
    image : (H, W, C) float32
    weights : (k, H, W) float32 in [0, 1]
    filled : (H, W, C) float32, from :func:`fill_image`

    Returns
    -------
    batch : (k, H, W, C) float32
    """
    delta = (filled - image)[None]
    return image[None] + weights[..., None] * delta


def hidden_image(image: np.ndarray, filled: np.ndarray) -> np.ndarray:
    """What :func:`perturb` gives a pixel at weight 1: ``image + (filled - image)``.

    In float32 this is not always ``filled`` itself (it differs by a rounding step on
    some pixels), so every path that hides pixels by copying takes it from here.
    """
    image = np.asarray(image, dtype=np.float32)
    return image + (np.asarray(filled, dtype=np.float32) - image)


def paste_into(rows: np.ndarray, boxes: np.ndarray, hidden: np.ndarray, *, start: int = 0) -> None:
    """Copy box ``i`` of ``hidden`` into row ``start + i`` of ``rows``, in place.

    ``rows`` is indexed (image, row, column, channel), e.g. a view of prepared model
    input; ``hidden`` (row, column, channel) the same form of :func:`hidden_image`.
    """
    for i, (r0, r1, c0, c1) in enumerate(np.asarray(boxes), start=start):
        rows[i, r0:r1, c0:c1] = hidden[r0:r1, c0:c1]


def paste_boxes(image: np.ndarray, boxes: np.ndarray, filled: np.ndarray) -> np.ndarray:
    """Perturbed images for box patches, the same numbers as :func:`perturb` with
    :func:`box_weights`, made by pasting.

    ``perturb`` computes ``image + m * (filled - image)``; with ``m`` 0 or 1 that is
    ``image`` outside a box and ``image + (filled - image)`` inside, which this function
    writes directly, without the (k, H, W) weights or the (k, H, W, C) products.

    Parameters
    ----------
    image : (H, W, C) float32
    boxes : (k, 4) int array
        ``[row0, row1, col0, col1]`` per patch, half-open (from :func:`patch_boxes`).
    filled : (H, W, C) float32, from :func:`fill_image`

    Returns
    -------
    batch : (k, H, W, C) float32

    >>> img = np.zeros((2, 2, 1), np.float32); f = np.full_like(img, 9.0)
    >>> paste_boxes(img, np.array([[0, 1, 0, 2]]), f)[0, ..., 0].tolist()
    [[9.0, 9.0], [0.0, 0.0]]
    """
    image = np.asarray(image, dtype=np.float32)
    boxes = np.asarray(boxes)
    out = np.empty((len(boxes),) + image.shape, dtype=np.float32)
    out[...] = image
    paste_into(out, boxes, hidden_image(image, filled))
    return out
