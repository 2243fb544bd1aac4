"""What a heatmap job returns (:class:`Heatmap`) and the checks every heatmap job makes
of its input and of the model's scores.

:mod:`~shortcut_audit.sensitivity` (patch and random plans) and
:mod:`~shortcut_audit.adaptive` (the coarse-to-fine plan) both build on it:
sensitivity.py hands an adaptive plan to adaptive.py, and adaptive.py needs only
this module, so the arrow between the two goes one way.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import ImageSkip, UsageError

__all__ = ["Heatmap", "check_image", "check_finite"]


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
