"""Adaptive occlusion: a coarse grid first, fine patches only where the score moves.

An exhaustive occlusion heatmap costs one forward pass per fine patch: 225 for 8-pixel
patches at stride 4 on a 64-pixel image. Most of those patches hide something the model
ignores. The adaptive plan (:class:`~shortcut_audit.occlusion.AdaptivePlan`) spends its
passes where they matter, in the spirit of the approximate occlusion of Nakandala, Kumar
and Papakonstantinou (SIGMOD 2019):

1. **Coarse pass.** The unperturbed image and a coarse grid (by default a 4 x 4 tiling of
   quarter-side patches, 16 passes) in one request.
2. **Prediction.** Each coarse patch's drop is shared among its pixels in proportion to
   how much the fill changes them (``|image - filled|``, so a pixel the fill leaves as it
   was gets nothing): a density of score drop per pixel. The predicted drop of every
   fine patch is that density summed over the patch. The prediction is exact when, in
   each coarse cell, every pixel's part of the drop is proportional to that change.
3. **Refinement.** The fine patches with the largest predicted drop (in absolute value)
   are run, in ``ROUNDS`` requests; after each one the errors of the prediction where it was
   measured are spread to the neighbouring fine patches (a Gaussian kernel over the fine
   grid, shrunk towards zero where few measurements are near), and the next round is
   chosen on the corrected prediction. It stops at the pass budget, at ``keep_top`` of
   the fine patches, or when no fine patch left is predicted to move the score by more
   than ``tolerance`` times the largest move measured.
4. **Heatmap.** Every fine patch has a drop, measured or predicted; each pixel gets the
   mean over the fine patches that cover it, exactly as the exhaustive grid's heatmap
   is made (:func:`~shortcut_audit.sensitivity.heatmap_job`). So the result has the
   exhaustive heatmap's units, resolution and smoothing, and equals it where every
   covering patch was run.

The job returns a :class:`~shortcut_audit.maps.Heatmap`, so it stands wherever
``heatmap_job`` does; ``heatmap_job`` hands an adaptive plan to :func:`adaptive_job`.
This module is pure: arrays in, arrays out.

>>> import numpy as np
>>> from shortcut_audit.engine import run_job
>>> from shortcut_audit.occlusion import Fill
>>> img = np.zeros((16, 16, 1), np.float32); img[12:, 12:] = 255
>>> f = lambda b: b.reshape(len(b), -1).sum(axis=1, keepdims=True).repeat(2, axis=1)
>>> hm = run_job(f, adaptive_job(img, plan=AdaptivePlan(budget=20), fill=Fill(kind="constant", value=0.0)))
>>> hm.passes <= 20, bool(hm.values[12:, 12:].min() > hm.values[:10, :10].max())
(True, True)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .engine import Job
from .errors import UsageError
from .occlusion import AdaptivePlan, Fill, fill_image, paste_boxes, patch_boxes
from .maps import Heatmap, check_finite as _check_finite, check_image as _check_image

__all__ = ["AdaptivePlan", "AdaptiveLayout", "adaptive_layout", "adaptive_job",
           "coarse_density", "predict_drops", "grid_heatmap"]

#: Refinement rounds (requests after the coarse one); the refinement budget is split
#: evenly between them. This and the two below were chosen on the demo model's images.
ROUNDS = 4
#: Width of the Gaussian that spreads prediction errors, in fine-grid steps.
SPREAD_SIGMA = 0.7
#: Shrinkage of the spread errors: with kernel weight ``s`` of measurements nearby (1 for
#: one measurement right there) a fine patch takes ``s / (s + SPREAD_SHRINK)`` of their
#: mean error.
SPREAD_SHRINK = 1.0


@dataclass(frozen=True, kw_only=True)
class AdaptiveLayout:
    """The patches of an adaptive plan on one image size.

    Attributes
    ----------
    coarse : (Pc, 4) int array
        Coarse boxes ``[row0, row1, col0, col1]``.
    fine : (Pf, 4) int array
        Fine boxes, row-major over ``grid``.
    grid : (int, int)
        Rows and columns of fine-patch positions.
    budget : int
        Passes per image at most, the unperturbed one included.
    refine : int
        Fine patches that may be run (after the coarse grid).
    """

    coarse: np.ndarray
    fine: np.ndarray
    grid: tuple[int, int]
    budget: int
    refine: int

    @property
    def exhaustive(self) -> bool:
        """True when the budget covers every fine patch: the plan is then the fine grid."""
        return self.budget >= len(self.fine) + 1


def _boxes(grid, height: int, width: int, option: str) -> np.ndarray:
    try:
        return patch_boxes(grid, height, width)
    except UsageError:
        raise UsageError(
            f"{option} must be at most the image side ({min(height, width)} pixels); got {grid.patch!r}. "
            f"Pass a smaller {option}."
        ) from None


def adaptive_layout(plan: AdaptivePlan, height: int, width: int) -> AdaptiveLayout:
    """Where the coarse and fine patches of ``plan`` lie on a ``height`` x ``width`` image.

    Raises
    ------
    UsageError
        A patch is larger than the image, or the budget leaves no pass for refinement.

    >>> lay = adaptive_layout(AdaptivePlan(), 64, 64)
    >>> len(lay.coarse), len(lay.fine), lay.grid, lay.budget, lay.refine
    (16, 225, (15, 15), 56, 39)
    """
    fine = _boxes(plan.fine_plan(), height, width, "--fine")
    rows = len(np.unique(fine[:, 0]))
    cols = len(np.unique(fine[:, 2]))
    coarse = _boxes(plan.coarse_plan(), height, width, "--coarse")
    budget = plan.max_passes(height, width)
    if budget >= len(fine) + 1:
        return AdaptiveLayout(coarse=coarse[:0], fine=fine, grid=(rows, cols), budget=len(fine) + 1,
                              refine=len(fine))
    room = budget - 1 - len(coarse)
    if room < 1:
        raise UsageError(
            f"--budget ({budget} passes) leaves nothing beyond the coarse grid's {len(coarse)} patches "
            f"and the unperturbed image; pass a --budget above {len(coarse) + 1} or a larger --coarse."
        )
    refine = min(room, max(1, int(math.ceil(plan.keep_top * len(fine)))))
    return AdaptiveLayout(coarse=coarse, fine=fine, grid=(rows, cols), budget=budget, refine=refine)


def grid_heatmap(height: int, width: int, boxes: np.ndarray, drops: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each pixel's mean drop over the boxes that cover it, and the cover counts.

    The heatmap of a patch plan by its definition (Zeiler and Fergus 2014), as
    :func:`~shortcut_audit.sensitivity.heatmap_job` makes it; uncovered pixels are 0.

    Returns
    -------
    values : (H, W) float64
    cover : (H, W) float64
        Number of boxes covering each pixel.

    >>> v, c = grid_heatmap(2, 3, np.array([[0, 2, 0, 2], [0, 2, 1, 3]]), np.array([2.0, 4.0]))
    >>> v.tolist(), c.tolist()
    ([[2.0, 3.0, 4.0], [2.0, 3.0, 4.0]], [[1.0, 2.0, 1.0], [1.0, 2.0, 1.0]])
    """
    acc = np.zeros((height, width), dtype=np.float64)
    cover = np.zeros((height, width), dtype=np.float64)
    for (r0, r1, c0, c1), d in zip(np.asarray(boxes), np.asarray(drops, dtype=np.float64)):
        acc[r0:r1, c0:c1] += d
        cover[r0:r1, c0:c1] += 1.0
    values = np.zeros((height, width), dtype=np.float64)
    covered = cover > 0
    values[covered] = acc[covered] / cover[covered]
    return values, cover


def coarse_density(height: int, width: int, boxes: np.ndarray, drops: np.ndarray,
                   energy: np.ndarray | None = None) -> np.ndarray:
    """Score drop per pixel implied by coarse patches.

    Each patch's drop is shared among its pixels in proportion to ``energy`` (uniformly
    when None); a pixel covered by several patches takes the mean of its shares. With
    ``energy`` the size of the perturbation at each pixel, a pixel the fill leaves as it
    was gets no share: hiding it cannot move the score.

    Parameters
    ----------
    height, width : int
    boxes : (P, 4) int array
        ``[row0, row1, col0, col1]`` per patch.
    drops : (P,) array
        Score drop of each patch.
    energy : (H, W) array, optional
        Non-negative weights, e.g. ``|image - filled|`` per pixel.

    Returns
    -------
    density : (H, W) float64
        Sums to each patch's drop over a patch that no other patch overlaps.

    >>> coarse_density(1, 4, np.array([[0, 1, 0, 4]]), np.array([8.0]), np.array([[1, 1, 0, 2.0]])).tolist()
    [[2.0, 2.0, 0.0, 4.0]]
    """
    boxes = np.asarray(boxes)
    energy = np.ones((height, width)) if energy is None else np.asarray(energy, dtype=np.float64)
    acc = np.zeros((height, width), dtype=np.float64)
    cover = np.zeros((height, width), dtype=np.float64)
    for (r0, r1, c0, c1), d in zip(boxes, np.asarray(drops, dtype=np.float64)):
        e = energy[r0:r1, c0:c1]
        total = e.sum()
        if total > 0:
            acc[r0:r1, c0:c1] += d * e / total
        cover[r0:r1, c0:c1] += 1.0
    out = np.zeros((height, width), dtype=np.float64)
    covered = cover > 0
    out[covered] = acc[covered] / cover[covered]
    return out


def predict_drops(density: np.ndarray, boxes: np.ndarray) -> np.ndarray:
    """The drop of each box predicted from a density: its sum over the box.

    >>> predict_drops(np.ones((4, 4)), np.array([[0, 2, 0, 2], [1, 4, 0, 4]])).tolist()
    [4.0, 12.0]
    """
    s = np.zeros((density.shape[0] + 1, density.shape[1] + 1), dtype=np.float64)
    s[1:, 1:] = np.cumsum(np.cumsum(density, axis=0), axis=1)
    b = np.asarray(boxes)
    r0, r1, c0, c1 = b[:, 0], b[:, 1], b[:, 2], b[:, 3]
    return s[r1, c1] - s[r0, c1] - s[r1, c0] + s[r0, c0]


def _spread(residual: np.ndarray, measured: np.ndarray, grid: tuple[int, int]) -> np.ndarray:
    """Prediction errors where measured, spread over the fine grid (0 where none are near)."""
    r = np.zeros(grid, dtype=np.float64)
    m = np.zeros(grid, dtype=np.float64)
    r.flat[measured] = residual
    m.flat[measured] = 1.0
    num = ndimage.gaussian_filter(r, SPREAD_SIGMA, mode="constant", truncate=3.0)
    den = ndimage.gaussian_filter(m, SPREAD_SIGMA, mode="constant", truncate=3.0)
    # the filter's weights sum to 1; the centre weight of a unit impulse is the scale of "one
    # measurement right here"
    unit = ndimage.gaussian_filter(np.pad([[1.0]], 3), SPREAD_SIGMA, mode="constant", truncate=3.0)[3, 3]
    return (num / unit) / (den / unit + SPREAD_SHRINK)


@dataclass(frozen=True, kw_only=True)
class _Refined:
    values: np.ndarray      # (Pf,) drop of every fine patch, measured or predicted
    measured: np.ndarray    # (Pf,) the measured drop, NaN where predicted


def _area(boxes: np.ndarray) -> float:
    return float(np.mean((boxes[:, 1] - boxes[:, 0]) * (boxes[:, 3] - boxes[:, 2])))


def _refine(image, filled, lay: AdaptiveLayout, coarse_drops, base_score, t, tolerance, chunk):
    """Steps 2 and 3: predict every fine drop from the coarse ones, run the most telling."""
    h, w, _ = image.shape
    energy = np.sqrt(((image - filled).astype(np.float64) ** 2).sum(axis=2))
    prior = predict_drops(coarse_density(h, w, lay.coarse, coarse_drops, energy), lay.fine)
    drops = prior.copy()
    measured = np.full(len(lay.fine), np.nan)
    # the largest move so far, in fine-patch units (a coarse drop scaled by the area ratio)
    scale = float(np.max(np.abs(coarse_drops))) * _area(lay.fine) / _area(lay.coarse)
    left = lay.refine
    per_round = int(math.ceil(lay.refine / ROUNDS))
    while left > 0:
        candidates = np.flatnonzero(np.isnan(measured))
        order = candidates[np.argsort(-np.abs(drops[candidates]), kind="stable")]
        pick = order[:min(per_round, left)]
        pick = pick[np.abs(drops[pick]) > tolerance * scale]
        if pick.size == 0:
            break
        got = []
        for start in range(0, len(pick), chunk):
            scores = yield paste_boxes(image, lay.fine[pick[start:start + chunk]], filled)
            _check_finite(scores, "a perturbed image")
            got.append(base_score - scores[:, t].astype(np.float64))
        measured[pick] = np.concatenate(got)
        left -= len(pick)
        scale = max(scale, float(np.max(np.abs(measured[pick]))))
        # the patches not run take their prior, corrected by the errors measured nearby
        done = np.flatnonzero(~np.isnan(measured))
        correction = _spread(measured[done] - prior[done], done, lay.grid).ravel()
        drops = np.where(np.isnan(measured), prior + correction, measured)
    return _Refined(values=drops, measured=measured)


def adaptive_job(image: np.ndarray, *, plan: AdaptivePlan, fill: Fill, target: int | None = None,
                 chunk: int = 64) -> Job:
    """A job that returns the adaptive :class:`~shortcut_audit.maps.Heatmap` of ``image``.

    Parameters
    ----------
    image : (H, W, C) float32, 0..255
    plan : AdaptivePlan
    fill : Fill
    target : int, optional
        Class to explain; the unperturbed prediction when omitted.
    chunk : int
        Most images in one request.

    Returns
    -------
    Job
        Its result is a ``Heatmap`` at full resolution whose ``passes`` counts the
        passes used (the unperturbed one included), at most the plan's budget.

    Raises
    ------
    UsageError
        A patch larger than the image, a budget with no room to refine, a bad target.
    ImageSkip
        The model returned NaN or infinity.
    """
    if not isinstance(plan, AdaptivePlan):
        raise UsageError(f"adaptive_job needs an AdaptivePlan; got {type(plan).__name__}.")
    image = _check_image(image)
    h, w, _ = image.shape
    lay = adaptive_layout(plan, h, w)
    filled = fill_image(image, fill)
    first = lay.fine if lay.exhaustive else lay.coarse

    # The unperturbed image and the first boxes (all fine boxes when the budget allows).
    scores_first = []
    base = None
    t = target
    for start in range(0, len(first), chunk):
        batch = paste_boxes(image, first[start:start + chunk], filled)
        if base is None:
            scores = yield np.concatenate([image[None], batch], axis=0)
            base, scores = scores[0], scores[1:]
            _check_finite(base, "the unperturbed image")
            if t is None:
                t = int(np.argmax(base))
            if not (0 <= t < len(base)):
                raise UsageError(f"target class {t} is out of range for a model with {len(base)} classes.")
        else:
            scores = yield batch
        _check_finite(scores, "a perturbed image")
        scores_first.append(base[t] - scores[:, t].astype(np.float64))
    drops_first = np.concatenate(scores_first) if scores_first else np.zeros(0)
    passes = 1 + len(first)

    if lay.exhaustive:
        fine_drops = drops_first
    else:
        refined = yield from _refine(image, filled, lay, drops_first, base[t], t, plan.tolerance, chunk)
        passes += int(np.sum(~np.isnan(refined.measured)))
        fine_drops = refined.values
    values, _ = grid_heatmap(h, w, lay.fine, fine_drops)
    return Heatmap(values=values.astype(np.float32), target=int(t), base_scores=np.asarray(base, np.float32),
                   passes=passes, coverage=1.0)
