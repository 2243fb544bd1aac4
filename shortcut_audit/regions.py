"""Where a fixed-position region really sits: the heat's box, tightened by the pixels.

An occlusion heatmap is blurred by its patches: a mark of side ``s`` hidden by patches of
side ``P`` heats a square of side about ``s + P``, so the box that the decisive regions
agree on is loose around a mark smaller than a patch. A mark the model can learn at a
fixed place is, by that very fact, pixels that the class's images share at that place
and other classes' images do not. :func:`tighten_region` finds those pixels inside the
loose box: per pixel, the difference between the class's mean and the other classes'
mean, in units of their spread (a two-sample contrast, as in a t statistic), and keeps
the connected blob around the strongest contrast.

Pure: arrays in, a box out.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from scipy import ndimage

from .maps import box_of

__all__ = ["contrast_map", "tighten_region", "CONTRAST_KEEP", "MIN_CONTRAST", "CONTRAST_OVER_ELSEWHERE"]

#: Pixels whose contrast is at least this share of the strongest one are the mark's.
CONTRAST_KEEP = 0.5
#: The strongest contrast inside the box, averaged over 3 x 3 pixels (a mark spans
#: several pixels, chance contrasts do not), must be this many times the 99th
#: percentile of the same elsewhere: a class that differs everywhere (a colour cast,
#: another object) or nowhere has no mark to tighten to.
CONTRAST_OVER_ELSEWHERE = 2.5
#: And at least this much in absolute terms (difference of means over summed spreads).
MIN_CONTRAST = 0.5


def contrast_map(own: Sequence[np.ndarray], others: Sequence[np.ndarray]) -> np.ndarray:
    """Per pixel, ``|mean(own) - mean(others)| / (std(own) + std(others) + 1)``.

    Parameters
    ----------
    own, others : sequences of (H, W, C) arrays
        Images of the class and of other classes, at the same size (0..255).

    Returns
    -------
    (H, W) float64
        The largest contrast over the channels.

    >>> a = [np.full((2, 2, 1), 10.0), np.full((2, 2, 1), 10.0)]
    >>> b = [np.full((2, 2, 1), 40.0), np.full((2, 2, 1), 40.0)]
    >>> float(contrast_map(a, b)[0, 0])
    30.0
    """
    a = np.stack([np.asarray(x, np.float64) for x in own])
    b = np.stack([np.asarray(x, np.float64) for x in others])
    diff = np.abs(a.mean(axis=0) - b.mean(axis=0))
    spread = a.std(axis=0) + b.std(axis=0) + 1.0
    return (diff / spread).max(axis=-1)


def tighten_region(region: Sequence[float], own: Sequence[np.ndarray], others: Sequence[np.ndarray],
                   *, pad: float = 0.0) -> list[float] | None:
    """The box of the pixels that set the class apart inside ``region`` (grown by ``pad``).

    Parameters
    ----------
    region : [x0, y0, x1, y1], fractions of width and height
        The loose box (where the class's decisive regions agree).
    own, others : sequences of (H, W, C) arrays
        At least two images each: the class's, and other classes'.
    pad : float
        Grow the search area by this fraction of the side on every edge (a patch's
        blur can also shift the heat's box off the mark).

    Returns
    -------
    list of 4 floats or None
        None when nothing inside the area contrasts by :data:`MIN_CONTRAST` and by
        :data:`CONTRAST_OVER_ELSEWHERE` times the contrast elsewhere (3 x 3 means): keep
        the loose box then.
    """
    if len(own) < 2 or len(others) < 2:
        return None
    cmap = contrast_map(own, others)
    smooth = ndimage.uniform_filter(cmap, 3)
    h, w = cmap.shape
    x0, y0, x1, y1 = region
    r0, r1 = max(0, int(np.floor((y0 - pad) * h))), min(h, int(np.ceil((y1 + pad) * h)))
    c0, c1 = max(0, int(np.floor((x0 - pad) * w))), min(w, int(np.ceil((x1 + pad) * w)))
    inside = np.zeros((h, w), bool)
    inside[r0:r1, c0:c1] = True
    if inside.all() or not inside.any():
        return None
    peak = float(smooth[inside].max())
    if peak < max(MIN_CONTRAST, CONTRAST_OVER_ELSEWHERE * float(np.percentile(smooth[~inside], 99))):
        return None
    values = np.where(inside, cmap, 0.0)
    keep = values >= CONTRAST_KEEP * float(values.max())
    labels, _ = ndimage.label(keep)
    at = np.unravel_index(int(np.argmax(values)), values.shape)
    return box_of(labels == labels[at])
