"""The sufficiency scan: patches of a class's images that turn other images into the class.

Occlusion measures necessity: hiding a region that the model needs moves its answer.
A sticker that the model reads *as well as* the object (the object alone would do
too) moves nothing when hidden, and once the scores saturate the heatmap is flat; no
rule of findings.py sees it. This scan asks the converse question, whether a region
*suffices*: a patch of a correctly predicted image of the class, pasted at the same
place into images of other classes, turns them into the class.

For each class scanned (:func:`sufficiency_job`): up to :data:`SOURCES` of its
correctly predicted images with an object mask; on each, a grid of square patches
(side about twice the occlusion patch, the motif crop's side; stride half a side)
whose centre lies on the object; each patch pasted into :data:`RECEIVERS` images of
other classes at the same place. A patch's *pull* is the share of its receivers
predicted as the class after. The best patch of a source that pulls at least
``sufficiency_pull`` is narrowed once: its nine half-size sub-patches (stride a quarter
side; sixteen when the side does not split evenly) are pasted the same way and the best
one is kept if it still pulls as much. The crop to cluster is then centred on the
gain-weighted centre of the sub-patches, kept inside the image, one and a half sub-patch
sides wide. A receiver whose scores are not finite counts as not pulled.

A small part of the object itself (a fin, a handle, a whole small object) suffices
too, for a model that reads the object well. So a pulling patch is not a finding:
confirm.py clusters the crops around the sources' best patches with the motif search
(motifs.py), and only crops that look alike across the class's images (a sticker is
the same sticker on every piece; a part of a varied object is not) become a
``recurring-motif`` finding, which its transplant test then confirms or clears.

Cost, per class scanned: at most ``SOURCES * (P + 9) * RECEIVERS`` passes, ``P`` the
grid places on the object (at most 49 with the default plan; about 10 to 20 for an
object covering a tenth to a fifth of the image): 160 to 470 passes a class on the
demo, against 225 passes an image for the default grid scan (for 20 images a class,
4% to 10% more; at most about 30%). Receivers' own scores are not needed (they are
correctly predicted as another class), so nothing else is scored.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .engine import Job
from .errors import UsageError
from .occlusion import GridPlan, paste_into, patch_boxes

__all__ = ["SOURCES", "RECEIVERS", "sufficiency_job", "grid_places"]

#: Correctly predicted images of a class scanned, at most.
SOURCES = 8
#: Other classes' images each patch is pasted into.
RECEIVERS = 3


def grid_places(mask: np.ndarray, side: int, stride: int) -> list[tuple[int, int]]:
    """Top-left corners (row, column) of ``side`` x ``side`` patches on a grid of
    ``stride`` whose centre pixel lies on the object.

    The last row and column of places touch the image's edge.

    >>> m = np.zeros((8, 8), bool); m[:4, :4] = True
    >>> grid_places(m, 4, 2)
    [(0, 0)]
    >>> len(grid_places(np.ones((8, 8), bool), 4, 2))
    9
    """
    if mask is None:
        raise UsageError("the sufficiency scan needs an object mask for each source image.")
    h, w = mask.shape
    if not (1 <= side <= min(h, w)) or stride < 1:
        raise UsageError(f"patch side must be between 1 and {min(h, w)} and stride at least 1; "
                         f"got {side} and {stride}.")
    boxes = patch_boxes(GridPlan(patch=int(side), stride=int(stride)), h, w)
    return [(int(r), int(c)) for r, _, c, _ in boxes if mask[r + side // 2, c + side // 2]]


def sufficiency_job(*, sources: Sequence[tuple[np.ndarray, np.ndarray]],
                    receivers: Sequence[Sequence[np.ndarray]], suspect: int, side: int,
                    min_pull: float) -> Job:
    """A job that pastes patches of a class's images into other classes' images.

    Parameters
    ----------
    sources : sequence of (pixels (H, W, C), mask (H, W) bool)
        Correctly predicted images of the class ``suspect`` with their object masks.
    receivers : sequence of sequences of (H, W, C) arrays
        For each source, the other classes' images its patches are pasted into (each
        correctly predicted as a class other than ``suspect``).
    suspect : int
    side : int
        Patch side in pixels; the stride is half of it.
    min_pull : float
        A source's best patch is narrowed only when it pulls at least this share.

    Returns
    -------
    Job
        Its result is a list with one dict per source: ``box`` ([x0, y0, x1, y1],
        fractions: the best patch, narrowed when a sub-patch pulls as much), ``pull``
        (its share of receivers turned into ``suspect``), ``gain`` (their mean
        probability of ``suspect`` after), ``places`` and ``passes``; None for a
        source with no place on its object.
    """
    if isinstance(suspect, bool) or not isinstance(suspect, (int, np.integer)) or suspect < 0:
        raise UsageError(f"suspect must be a class index >= 0; got {suspect!r}.")
    if len(receivers) != len(sources):
        raise UsageError(f"receivers must give one list per source ({len(sources)}); got {len(receivers)}.")
    if not (0.0 <= float(min_pull) <= 1.0):
        raise UsageError(f"min_pull must be a share in [0, 1]; got {min_pull}.")
    srcs = [(np.asarray(p, np.float32), np.asarray(m, bool)) for p, m in sources]
    recs = [[np.asarray(r, np.float32) for r in rs] for rs in receivers]
    shapes = {p.shape for p, _ in srcs} | {r.shape for rs in recs for r in rs}
    if len(shapes) > 1:
        raise UsageError(f"images must all have the model's input shape; got shapes {sorted(shapes)}.")
    return _scan(srcs, recs, int(suspect), int(side), float(min_pull))


def _paste_all(src: np.ndarray, recs: list[np.ndarray], places, side: int) -> np.ndarray:
    """Each receiver with the ``side`` patch of ``src`` at each place, place by place."""
    boxes = np.array([[r, r + side, c, c + side] for r, c in places], dtype=np.int64)
    out = np.empty((len(places) * len(recs),) + src.shape, dtype=np.float32)
    for j, rec in enumerate(recs):
        rows = out[j::len(recs)]            # a view: receiver j under every place
        rows[...] = rec
        paste_into(rows, boxes, src)
    return out


def _pulls(scores: np.ndarray, n_places: int, n_recs: int, suspect: int) -> tuple[np.ndarray, np.ndarray]:
    s = np.asarray(scores, np.float64)
    if not (0 <= suspect < s.shape[1]):
        raise UsageError(f"suspect class {suspect} is out of range for a model with {s.shape[1]} classes.")
    s = s.reshape(n_places, n_recs, -1)
    ok = np.all(np.isfinite(s), axis=2)
    hit = (np.argmax(np.where(np.isfinite(s), s, -np.inf), axis=2) == suspect) & ok
    # a receiver whose scores are not finite counts as not pulled
    pull = hit.sum(axis=1) / n_recs
    gain = np.where(ok, s[:, :, suspect], 0.0).sum(axis=1) / n_recs
    return pull, gain


def _centre(subs, gains: np.ndarray, half: int) -> tuple[float, float, float]:
    """Where the pulling thing sits, finer than the sub-patches' stride, and the crop
    side that holds it: the sub-patches' centres weighted by how far their gain exceeds
    half the best one's (the best alone when none does), and one and a half times the
    sub-patch side (a quarter of it each way for the centre's uncertainty).

    >>> _centre([(0, 0), (0, 4)], np.array([0.2, 0.9]), 8)
    (4.0, 8.0, 12.0)
    >>> _centre([(0, 0), (0, 4)], np.array([0.9, 0.9]), 8)
    (4.0, 6.0, 12.0)
    """
    wts = np.clip(np.asarray(gains, np.float64) - 0.5 * float(np.max(gains)), 0.0, None)
    if not wts.sum() > 0:
        wts = (np.asarray(gains) == np.max(gains)).astype(np.float64)
    cy = float(np.sum(wts * np.array([a + half / 2 for a, _ in subs])) / wts.sum())
    cx = float(np.sum(wts * np.array([b + half / 2 for _, b in subs])) / wts.sum())
    return cy, cx, float(half + half // 2)


def _scan(srcs, recs, suspect: int, side: int, min_pull: float) -> Job:
    out = []
    for (px, mask), rs in zip(srcs, recs):
        h, w = mask.shape
        places = grid_places(mask, side, max(1, side // 2))
        if not places or not rs:
            out.append(None)
            continue
        pull, gain = _pulls((yield _paste_all(px, rs, places, side)), len(places), len(rs), suspect)
        passes = len(places) * len(rs)
        best = max(range(len(places)), key=lambda i: (pull[i], gain[i], -i))
        (r, c), size, p, g = places[best], side, float(pull[best]), float(gain[best])
        cy, cx, crop = r + side / 2, c + side / 2, side
        half = side // 2
        if p >= min_pull and half >= 2:
            # the half-size sub-patches of the patch: a grid inside it, reaching its edges
            inner = patch_boxes(GridPlan(patch=half, stride=max(1, half // 2)), side, side)
            subs = [(r + int(dr), c + int(dc)) for dr, _, dc, _ in inner]
            sp, sg = _pulls((yield _paste_all(px, rs, subs, half)), len(subs), len(rs), suspect)
            passes += len(subs) * len(rs)
            j = max(range(len(subs)), key=lambda i: (sp[i], sg[i], -i))
            if sp[j] >= p:
                (r, c), size, p, g = subs[j], half, float(sp[j]), float(sg[j])
                cy, cx, crop = _centre(subs, sg, half)
        # the crop stays inside the image, so that it is centred on what it holds
        cy, cx = min(max(cy, crop / 2), h - crop / 2), min(max(cx, crop / 2), w - crop / 2)
        out.append({"box": [c / w, r / h, (c + size) / w, (r + size) / h],
                    "focus": [(cx - crop / 2) / w, (cy - crop / 2) / h, (cx + crop / 2) / w, (cy + crop / 2) / h],
                    "pull": p, "gain": g, "places": len(places), "passes": passes})
    return out
