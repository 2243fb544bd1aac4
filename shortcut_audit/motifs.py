"""Recurring motifs: decisive regions that look alike across a class's images.

A class may hinge on a mark that moves from image to image (a sticker stuck anywhere
on the piece). Its decisive boxes then disagree on *where*, but the pixels inside them
agree on *what*. This module cuts each image's decisive region (:func:`cut_crop`),
describes its appearance (:func:`describe_crop`) and clusters the descriptors
hierarchically (:func:`find_motifs`); a cluster that covers a stated share of the
class's images is a :class:`Motif`.

The idea of clustering explanations to find a class's strategies follows SpRAy
(Lapuschkin et al., "Unmasking Clever Hans predictors and assessing what machines
really learn", Nature Communications 2019); here the crops' appearance is clustered
rather than the heatmaps, so that a mark is found wherever it sits.

Pure: numpy arrays and frozen dataclasses in, new ones out; nothing is printed or opened.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from scipy.cluster.hierarchy import fcluster, linkage
from scipy.spatial.distance import cdist, squareform
from skimage.feature import hog
from skimage.transform import resize

from .errors import UsageError
from .maps import box_pixels

__all__ = [
    "Crop",
    "Motif",
    "DEFAULT_MAX_DISTANCE",
    "DESCRIPTOR_SHIFT",
    "box_pixels",
    "cut_crop",
    "describe_crop",
    "crop_distances",
    "find_motifs",
]

#: Default cut of the average-linkage tree (see :func:`find_motifs`, Notes).
DEFAULT_MAX_DISTANCE = 0.6
#: Pixels (at descriptor resolution, in each direction) by which crops may be offset
#: and still be compared at their best alignment.
DESCRIPTOR_SHIFT = 2
#: Bins per channel of the colour histogram.
HIST_BINS = 4
#: Smoothing (pixels at descriptor resolution) after resizing, against sub-pixel offsets.
DESCRIPTOR_BLUR = 0.5
#: Width of the centre weighting, as a share of the descriptor window's side.
CENTRE_SIGMA = 0.2


@dataclass(frozen=True, kw_only=True)
class Crop:
    """One image's decisive region, at model resolution.

    Attributes
    ----------
    index : int
        The image's index in the caller's list.
    pixels : (h, w, C) float32
        0..255, cut from the image at ``box``.
    box : list of float
        ``[x0, y0, x1, y1]``, fractions of width and height: where ``pixels`` were cut.

    >>> Crop(index=0, pixels=np.zeros((2, 2, 1), np.float32), box=[0, 0, 0.5, 0.5]).index
    0
    """

    index: int
    pixels: np.ndarray
    box: list[float]

    def __post_init__(self) -> None:
        if isinstance(self.index, bool) or not isinstance(self.index, (int, np.integer)):
            raise UsageError(f"Crop index must be a whole number; got {self.index!r}.")
        px = np.asarray(self.pixels)
        if px.ndim != 3 or px.shape[2] not in (1, 3) or px.shape[0] < 1 or px.shape[1] < 1:
            raise UsageError(
                f"Crop pixels must be an (h, w, C) array with C = 1 or 3; got shape {px.shape}.")
        if len(self.box) != 4:
            raise UsageError(f"Crop box must be [x0, y0, x1, y1]; got {self.box!r}.")


@dataclass(frozen=True, kw_only=True)
class Motif:
    """A cluster of near-alike decisive crops.

    Attributes
    ----------
    members : tuple of int
        Image indices (``Crop.index``) in the cluster: the medoid first, then the others
        by their distance to it (ties by index).
    medoid : int
        ``Crop.index`` of the member with the least summed distance to the others.
    coverage : float
        ``len(members) / n_images``.
    spread : float
        Mean distance of the members' box centres from their mean centre, in fractions
        of the image side: near 0 for a mark at one place, large for a roaming one.
    cohesion : float
        Mean pairwise descriptor distance within the cluster (smaller = more alike).
    boxes : tuple of list of float
        The members' boxes, in the order of ``members``.
    """

    members: tuple[int, ...]
    medoid: int
    coverage: float
    spread: float
    cohesion: float
    boxes: tuple[list[float], ...]

    def to_dict(self) -> dict:
        """A JSON-able copy."""
        return {"members": [int(m) for m in self.members], "medoid": int(self.medoid),
                "coverage": float(self.coverage), "spread": float(self.spread),
                "cohesion": float(self.cohesion),
                "boxes": [[float(v) for v in b] for b in self.boxes]}


# ------------------------------------------------------------------------ crops

def _side_pixels(value: int | float, side: int, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or value <= 0:
        raise UsageError(f"{name} must be a positive number of pixels or a fraction of the side; "
                         f"got {value!r}.")
    if isinstance(value, float):
        if value > 1.0:
            raise UsageError(f"{name} as a fraction of the side must be at most 1; got {value}.")
        return max(1, int(round(value * side)))
    return int(value)


def cut_crop(image: np.ndarray, box: Sequence[float], *, index: int,
             min_side: int | float = 0.125, square: bool = True) -> Crop:
    """The :class:`Crop` of ``image`` around a decisive ``box``.

    A decisive box can be a sliver: hiding a few pixels of a mark is enough to move a
    decision. So the box is widened about its centre to a square (``square``) at least
    ``min_side`` on a side. About twice the occlusion patch is a good ``min_side``: the
    heatmap resolves places only to about one patch.

    The crop stays centred on the region even at the image's edge, so that a mark near
    an edge is described like the same mark elsewhere: the part of the square that
    falls outside the image repeats the nearest edge pixels (``numpy.pad`` mode
    ``"edge"``), and ``box`` is the part inside the image.

    Parameters
    ----------
    image : (H, W, C) float32
        0..255, at model size.
    box : [x0, y0, x1, y1]
        Fractions of width and height.
    index : int
        The image's index in the caller's list.
    min_side : int or float
        Smallest side of the crop, in pixels (int) or as a fraction of the shorter
        image side (float).
    square : bool
        Widen the shorter side of the box to the longer one.

    Returns
    -------
    Crop
        ``pixels`` of the widened square (at most the image's size), ``box`` the part
        of it inside the image (fractions).

    >>> img = np.arange(64, dtype=np.float32).reshape(8, 8, 1)
    >>> c = cut_crop(img, [0.375, 0.375, 0.5, 0.5], index=3, min_side=4)
    >>> c.pixels.shape, c.box
    ((4, 4, 1), [0.125, 0.125, 0.625, 0.625])
    >>> cut_crop(img, [0.0, 0.0, 0.125, 0.125], index=3, min_side=4).box
    [0.0, 0.0, 0.25, 0.25]
    """
    image = np.asarray(image, dtype=np.float32)
    if image.ndim != 3 or image.shape[2] not in (1, 3):
        raise UsageError(f"image must be an (H, W, C) array with C = 1 or 3; got shape {image.shape}.")
    h, w, _ = image.shape
    r0, r1, c0, c1 = box_pixels(box, h, w)
    least = _side_pixels(min_side, min(h, w), "min_side")
    bh, bw = r1 - r0, c1 - c0
    if square:
        bh = bw = max(bh, bw)
    bh, bw = min(max(bh, least), h), min(max(bw, least), w)
    top = int(math.floor((r0 + r1) / 2.0 - bh / 2.0))
    left = int(math.floor((c0 + c1) / 2.0 - bw / 2.0))
    pad = ((max(0, -top), max(0, top + bh - h)), (max(0, -left), max(0, left + bw - w)), (0, 0))
    inside = image[max(top, 0):min(top + bh, h), max(left, 0):min(left + bw, w)]
    pixels = np.pad(inside, pad, mode="edge") if any(p != (0, 0) for p in pad) else inside.copy()
    return Crop(index=int(index), pixels=pixels,
                box=[max(left, 0) / w, max(top, 0) / h, min(left + bw, w) / w, min(top + bh, h) / h])


# ------------------------------------------------------------------- descriptor

def _windows(pixels: np.ndarray, size: int, shift: int) -> list[np.ndarray]:
    """The central ``size`` x ``size`` window of the resized crop, then the shifted ones."""
    px = np.asarray(pixels, dtype=np.float64)
    c = px.shape[2]
    big = size + 2 * shift
    img = resize(px, (big, big, c), order=1, mode="edge", anti_aliasing=True,
                 preserve_range=True)
    img = ndimage.gaussian_filter(img, sigma=(DESCRIPTOR_BLUR, DESCRIPTOR_BLUR, 0), mode="nearest")
    offsets = [(0, 0)] + [(dy, dx) for dy in range(-shift, shift + 1)
                          for dx in range(-shift, shift + 1) if (dy, dx) != (0, 0)]
    return [img[shift + dy:shift + dy + size, shift + dx:shift + dx + size] for dy, dx in offsets]


def _unit(v: np.ndarray) -> np.ndarray:
    n = float(np.linalg.norm(v))
    return v / n if n > 1e-9 else np.zeros_like(v)


def _centre_weight(coords_r: np.ndarray, coords_c: np.ndarray, size: int) -> np.ndarray:
    """Gaussian weight, peak 1 at the window's centre, sigma ``CENTRE_SIGMA * size``."""
    mid = (size - 1) / 2.0
    s = CENTRE_SIGMA * size
    return np.exp(-((coords_r[:, None] - mid) ** 2 + (coords_c[None, :] - mid) ** 2) / (2.0 * s * s))


def _soft_histogram(win: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """Per-channel weighted histograms with linear (soft) binning, L1-normalised.

    Bin ``b`` is centred at ``(b + 0.5) * 256 / HIST_BINS``; a value between two centres
    is shared between them in proportion to its nearness, so a colour near a bin edge
    does not jump from one bin to the next. Each pixel counts with its ``weight``.
    """
    c = win.shape[2]
    wts = weight.ravel()
    pos = np.clip(win.reshape(-1, c) / (256.0 / HIST_BINS) - 0.5, 0.0, HIST_BINS - 1.0)
    lo = np.minimum(np.floor(pos).astype(int), HIST_BINS - 2)
    frac = pos - lo
    out = np.zeros((c, HIST_BINS))
    for k in range(c):
        np.add.at(out[k], lo[:, k], (1.0 - frac[:, k]) * wts)
        np.add.at(out[k], lo[:, k] + 1, frac[:, k] * wts)
    out = out.ravel()
    return out / out.sum()


def _describe_window(win: np.ndarray, size: int) -> np.ndarray:
    c = win.shape[2]
    grid = np.arange(size, dtype=np.float64)
    weight = _centre_weight(grid, grid, size)                    # (size, size)
    flat = win.reshape(-1, c)
    wts = weight.ravel()[:, None]
    mean = float((flat * wts).sum() / (wts.sum() * c))
    part_pixels = _unit(((flat - mean) * np.sqrt(wts)).ravel())
    part_hist = _unit(_soft_histogram(win, weight))
    cell = max(2, size // 4)
    blocks = hog(win.mean(axis=2), orientations=9, pixels_per_cell=(cell, cell),
                 cells_per_block=(2, 2), block_norm="L2-Hys", feature_vector=False)
    centres = (np.arange(blocks.shape[0]) + 1.0) * cell - 0.5   # a block spans cells b, b+1
    block_weight = _centre_weight(centres, centres[:blocks.shape[1]], size)
    part_hog = _unit((blocks * np.sqrt(block_weight)[:, :, None, None, None]).ravel())
    parts = [part_pixels, part_hist, part_hog]
    return (np.concatenate(parts) / math.sqrt(len(parts))).astype(np.float32)


def _check_size(size: int) -> None:
    if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or size < 8:
        raise UsageError(f"descriptor size must be a whole number of at least 8 pixels; got {size!r}.")


def _descriptors(pixels: np.ndarray, size: int, shift: int) -> np.ndarray:
    """((2 shift + 1)^2, D) descriptors: the central window first."""
    return np.stack([_describe_window(w, size) for w in _windows(pixels, size, shift)])


def describe_crop(pixels: np.ndarray, *, size: int = 16) -> np.ndarray:
    """The appearance descriptor of a crop.

    The crop is resized to ``size + 4`` pixels square (``skimage.transform.resize``,
    bilinear, with anti-aliasing when it shrinks) and smoothed by a Gaussian of 0.5 px;
    its central ``size`` x ``size`` window is described by three parts, each weighted
    towards the centre by a Gaussian of sigma ``0.2 * size`` (a decisive crop is centred
    on what decided; its rim is context that changes from image to image):

    (a) the pixels, all channels, minus their weighted mean, times the square root of
        the weight, scaled to unit length (what the crop looks like, whatever its
        brightness and contrast);
    (b) a colour histogram, 4 bins per channel over 0..255 with linear (soft) binning,
        each pixel counted with its weight, L1-normalised;
    (c) HOG (``skimage.feature.hog``: 9 orientations, cells of ``size // 4`` pixels,
        2 x 2 blocks, L2-Hys) of the channel mean, each block times the square root of
        the weight at its centre (its edges, tolerant to small shifts).

    Each part is then scaled to unit length and weighted by ``1 / sqrt(3)``, so each
    counts alike in the squared Euclidean distance, the whole has unit length (zero
    parts of a flat crop stay zero), and distances lie in [0, 2].

    Tolerance to shifts: :func:`crop_distances` also describes the 24 windows up to two
    pixels off the centre (the margin of the ``size + 4`` resample, an eighth of the
    window each side) and compares two crops at their best alignment; the 0.5 px
    smoothing absorbs sub-pixel offsets.

    Parameters
    ----------
    pixels : (h, w, C) float32
        0..255, C = 1 or 3.
    size : int
        Side of the described window, at least 8.

    Returns
    -------
    (D,) float32
        ``D = size^2 C + 4 C + HOG length`` (1104 for ``size=16``, C = 3).

    >>> d = describe_crop(np.random.default_rng(0).random((10, 12, 3)) * 255)
    >>> d.shape, round(float(np.linalg.norm(d)), 3)
    ((1104,), 1.0)
    """
    _check_size(size)
    px = np.asarray(pixels, dtype=np.float32)
    if px.ndim != 3 or px.shape[2] not in (1, 3):
        raise UsageError(f"crop pixels must be an (h, w, C) array with C = 1 or 3; got shape {px.shape}.")
    return _describe_window(_windows(px, size, DESCRIPTOR_SHIFT)[0], size)


def crop_distances(crops: Sequence[Crop], *, size: int = 16) -> np.ndarray:
    """Pairwise descriptor distances of crops, at their best alignment.

    ``d(i, j) = min over shifts s of |desc_i - desc_j(s)|``, where ``desc(s)`` describes
    the window shifted by ``s`` (one of the 25 offsets of at most
    :data:`DESCRIPTOR_SHIFT` = 2 pixels in each direction, at descriptor resolution),
    then symmetrised by the smaller of ``d(i, j)`` and ``d(j, i)``.

    Returns
    -------
    (n, n) float64
        Zero on the diagonal, in the order of ``crops``.
    """
    _check_size(size)
    n = len(crops)
    if n == 0:
        return np.zeros((0, 0))
    stacks = np.stack([_descriptors(c.pixels, size, DESCRIPTOR_SHIFT) for c in crops])  # (n, S, D)
    centre = stacks[:, 0].astype(np.float64)
    dist = np.full((n, n), np.inf)
    for s in range(stacks.shape[1]):
        dist = np.minimum(dist, cdist(centre, stacks[:, s].astype(np.float64)))
    dist = np.minimum(dist, dist.T)
    np.fill_diagonal(dist, 0.0)
    return dist


# --------------------------------------------------------------------- clustering

def find_motifs(crops: Sequence[Crop], *, n_images: int, min_coverage: float = 0.3,
                max_distance: float | None = None, size: int = 16) -> list[Motif]:
    """Clusters of near-alike crops that cover at least ``min_coverage`` of a class.

    Parameters
    ----------
    crops : sequence of Crop
        One crop per image at most (distinct ``index``), all with the same channel count.
    n_images : int
        Images of the class (the denominator of coverage; at least ``len(crops)``).
    min_coverage : float
        Share of ``n_images`` a cluster must hold; never fewer than 3 members.
    max_distance : float, optional
        Where the average-linkage tree is cut; :data:`DEFAULT_MAX_DISTANCE` (0.6) when
        omitted.
    size : int
        Descriptor window, as in :func:`describe_crop`.

    Returns
    -------
    list of Motif
        Largest first (then the most cohesive, then the lowest medoid index).

    Raises
    ------
    UsageError
        Bad ``n_images``, ``min_coverage`` or ``max_distance``, repeated indices, or
        crops with different channel counts.

    Notes
    -----
    Hierarchical clustering (``scipy.cluster.hierarchy.linkage``, average linkage) of
    :func:`crop_distances`, cut at ``max_distance`` (``fcluster``, criterion
    ``"distance"``): every cluster's mean pairwise distance is at most the cut.

    The default cut comes from the descriptor's geometry, not from the data, so that a
    class whose crops are *all* one motif is not split by a quantile. Two crops whose
    weighted pixels are uncorrelated are ``sqrt(2/3) = 0.82`` apart from the pixel part
    alone. Measured: crops of one 5 x 5 mark roaming over textures have a mean pairwise
    distance of 0.18 to 0.31 (tests/test_motifs.py); crops of the demo catalogue's price
    sticker, off-centre by up to 2 px, 0.37 to 0.59; crops of unrelated textures 0.97 to
    1.06 (no pair below 0.53). A cut at 0.6 sits between: with the other two parts
    equal, the members' weighted pixels must correlate at about 0.46 or more on
    average, and more when their colours or edges differ.

    Crops are sorted by index first, so the result does not depend on their order; the
    medoid is the member with the least summed distance to the others, ties by index.

    >>> rng = np.random.default_rng(0)
    >>> mark = rng.random((6, 6, 3)) * 255
    >>> crops = [Crop(index=i, pixels=mark + rng.normal(0, 5, mark.shape), box=[0, 0, .1, .1])
    ...          for i in range(4)]
    >>> [sorted(m.members) for m in find_motifs(crops, n_images=10)]
    [[0, 1, 2, 3]]
    """
    if isinstance(n_images, bool) or not isinstance(n_images, (int, np.integer)) or n_images < 1:
        raise UsageError(f"n_images must be a whole number of at least 1; got {n_images!r}.")
    if not (0.0 < float(min_coverage) <= 1.0):
        raise UsageError(f"min_coverage must be a share in (0, 1]; got {min_coverage!r}.")
    cut = DEFAULT_MAX_DISTANCE if max_distance is None else float(max_distance)
    if not (math.isfinite(cut) and cut > 0.0):
        raise UsageError(f"max_distance must be a positive number; got {max_distance!r}.")
    crops = sorted(crops, key=lambda c: int(c.index))
    indices = [int(c.index) for c in crops]
    if len(set(indices)) != len(indices):
        raise UsageError("crops must come from distinct images; two crops share an index. "
                         "Pass one crop per image.")
    if len(crops) > n_images:
        raise UsageError(f"n_images ({n_images}) must be at least the number of crops ({len(crops)}).")
    if len({np.asarray(c.pixels).shape[2] for c in crops}) > 1:
        raise UsageError("crops must all have the same channel count; cut them from images of one model size.")
    need = max(3, float(min_coverage) * n_images)
    if len(crops) < need:
        return []
    dist = crop_distances(crops, size=size)
    tree = linkage(squareform(dist, checks=False), method="average")
    labels = fcluster(tree, t=cut, criterion="distance")
    motifs: list[Motif] = []
    for lab in np.unique(labels):
        rows = np.flatnonzero(labels == lab)
        if len(rows) < need:
            continue
        sub = dist[np.ix_(rows, rows)]
        sums = sub.sum(axis=1)
        best = int(rows[int(np.argmin(sums))])   # first minimum: the lowest index on ties
        order = sorted(rows.tolist(), key=lambda r: (r != best, dist[best, r], indices[r]))
        boxes = tuple([float(v) for v in crops[r].box] for r in order)
        centres = np.array([[(b[0] + b[2]) / 2.0, (b[1] + b[3]) / 2.0] for b in boxes])
        spread = float(np.linalg.norm(centres - centres.mean(axis=0), axis=1).mean())
        k = len(rows)
        cohesion = float(sub[np.triu_indices(k, 1)].mean())
        motifs.append(Motif(members=tuple(indices[r] for r in order), medoid=indices[best],
                            coverage=k / n_images, spread=spread, cohesion=cohesion, boxes=boxes))
    motifs.sort(key=lambda m: (-len(m.members), m.cohesion, m.medoid))
    return motifs
