"""Bootstrap intervals for the differences a comparison reports.

A comparison puts the same images through two models; the per-image values pair up, so
:func:`paired_bootstrap` resamples images (the same draw for both sides) and gives a
percentile interval for the difference of a statistic (mean or median), in the manner
of ``scipy.stats.bootstrap(..., paired=True, method="percentile")``, which a test
checks it against. Rates that come as counts (a test's hits of its trials) get
:func:`binomial_bootstrap`. Pure: numbers in, an :class:`Interval` out; seeded.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import UsageError

__all__ = ["Interval", "paired_bootstrap", "binomial_bootstrap", "CONFIDENCE"]

CONFIDENCE = 0.95
#: Differences within this distance of zero are float rounding (batch sizes), not change.
NEGLIGIBLE = 1e-6
#: Fewest paired images for an interval.
MIN_IMAGES = 2


def _stat(x: np.ndarray, statistic: str) -> np.ndarray:
    """Row-wise mean or median over the finite entries of ``x`` (R, n); NaN when none."""
    if statistic == "median":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmedian(x, axis=-1)
    valid = np.isfinite(x)
    total = np.where(valid, x, 0.0).sum(axis=-1)
    count = valid.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return total / count


@dataclass(frozen=True, kw_only=True)
class Interval:
    """A bootstrap estimate of ``after - before``."""

    difference: float | None
    low: float | None
    high: float | None
    resamples: int           # resamples with a value on both sides

    @property
    def changed(self) -> bool:
        return self.low is not None and (self.low > NEGLIGIBLE or self.high < -NEGLIGIBLE)


def paired_bootstrap(before: Sequence[float], after: Sequence[float], *, statistic: str = "mean",
                     resamples: int = 2000, seed: Any = 0, confidence: float = CONFIDENCE) -> Interval:
    """Percentile bootstrap interval of ``stat(after) - stat(before)`` over paired items.

    Items (images) are resampled with replacement, the same items for both samples.
    NaN marks an item that is not in a sample's denominator (a rate among correctly
    predicted images: NaN where the image is wrong); such items are resampled like the
    others and left out of that sample's statistic, which is then a ratio estimate.

    Parameters
    ----------
    before, after : array_like, shape (n,)
        One value per item, in the same order; NaN for "not counted".
    statistic : {"mean", "median"}
    resamples : int
        Bootstrap resamples (at least 100).
    seed : int or numpy.random.SeedSequence
        Passed to :func:`numpy.random.default_rng`.
    confidence : float
        Central coverage of the interval (0.95: the 2.5th and 97.5th percentiles).

    Returns
    -------
    Interval
        ``difference`` on the full sample; ``low`` and ``high`` None when fewer than
        :data:`MIN_IMAGES` items or no resample has a value on both sides.

    Notes
    -----
    Vectorised: the resampled indices come as an (R, n) matrix, in blocks of at most
    about two million entries, so memory stays bounded for large classes.

    Examples
    --------
    >>> iv = paired_bootstrap([0, 0, 0, 0], [1, 1, 1, 1], resamples=200)
    >>> (iv.difference, iv.low, iv.high)
    (1.0, 1.0, 1.0)
    """
    b = np.asarray(before, dtype=np.float64).ravel()
    a = np.asarray(after, dtype=np.float64).ravel()
    if b.shape != a.shape:
        raise UsageError(f"paired samples must have the same length; got {b.size} and {a.size}.")
    if statistic not in ("mean", "median"):
        raise UsageError(f"statistic must be mean or median; got {statistic!r}.")
    if not isinstance(resamples, (int, np.integer)) or isinstance(resamples, bool) or resamples < 100:
        raise UsageError(f"resamples must be a whole number of at least 100; got {resamples!r}.")
    if not (0.5 <= confidence < 1.0):
        raise UsageError(f"confidence must be in [0.5, 1); got {confidence!r}.")
    n = b.size
    observed = float(_stat(a[None], statistic)[0] - _stat(b[None], statistic)[0]) if n else float("nan")
    observed_out = observed if np.isfinite(observed) else None
    if n < MIN_IMAGES:
        return Interval(difference=observed_out, low=None, high=None, resamples=0)
    rng = np.random.default_rng(seed)
    block = max(1, 2_000_000 // n)
    diffs = []
    for start in range(0, int(resamples), block):
        idx = rng.integers(0, n, size=(min(block, int(resamples) - start), n))
        diffs.append(_stat(a[idx], statistic) - _stat(b[idx], statistic))
    d = np.concatenate(diffs)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return Interval(difference=observed_out, low=None, high=None, resamples=0)
    tail = 100.0 * (1.0 - confidence) / 2.0
    low, high = np.percentile(d, [tail, 100.0 - tail])
    return Interval(difference=observed_out, low=float(low), high=float(high), resamples=int(d.size))


def binomial_bootstrap(before: tuple[float, int], after: tuple[float, int], *, resamples: int = 2000,
                       seed: Any = 0, confidence: float = CONFIDENCE) -> Interval:
    """Parametric percentile bootstrap of a difference of two rates, drawn independently.

    For rates known only as (rate, trials), without the outcome of each trial: each
    resample draws ``Binomial(trials, rate) / trials`` on both sides. It ignores any
    pairing, so its interval is wider than a paired one would be.

    Examples
    --------
    >>> binomial_bootstrap((0.0, 10), (0.0, 10), resamples=200).high
    0.0
    """
    (pb, nb), (pa, na) = before, after
    if nb < 1 or na < 1:
        return Interval(difference=None, low=None, high=None, resamples=0)
    rng = np.random.default_rng(seed)
    draws_b = rng.binomial(int(nb), float(np.clip(pb, 0, 1)), size=int(resamples)) / nb
    draws_a = rng.binomial(int(na), float(np.clip(pa, 0, 1)), size=int(resamples)) / na
    d = draws_a - draws_b
    tail = 100.0 * (1.0 - confidence) / 2.0
    low, high = np.percentile(d, [tail, 100.0 - tail])
    return Interval(difference=float(pa - pb), low=float(low), high=float(high), resamples=int(resamples))
