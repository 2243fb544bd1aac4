"""Counterfactual tests that confirm or clear a suspected shortcut.

A heatmap says where a class's decisions hinge; it does not say that the region *is*
the class for the model. Three tests ask the model directly:

- **transplant** (:func:`transplant_job`): paste the suspect region onto other classes'
  images, at the same place (a fixed-position suspect) or at a random place on the
  object (a roaming motif), and count how often the prediction moves *to* the suspect
  class. The control pastes a same-size patch cut from another, non-decisive place of
  the same source image at the very same place of the very same target, so the two
  arms differ only in what the patch shows.
- **removal** (:func:`removal_job`): hide the region in the class's own images and
  measure the accuracy before and after.
- **background swap** (:func:`background_swap_job`): the mixed-background tests of
  Xiao, Engstrom, Ilyas and Madry ("Noise or Signal: The Role of Image Backgrounds in
  Object Recognition", ICLR 2021): other classes' objects in front of the suspect
  class's backgrounds, against other classes' objects in front of backgrounds of their
  own class.

Each arm's hits are compared with its control's by a one-sided Fisher's exact test; a
test confirms when ``p < alpha`` and the hit rate beats the control's by at least
``min_effect`` (outcomes.py: :func:`~shortcut_audit.outcomes.fisher_greater`,
:meth:`~shortcut_audit.outcomes.ProbeResult.status`; the thresholds live in findings.py).

Every test is a *job* for :class:`~shortcut_audit.engine.PassEngine`: it validates its
arguments when called, draws every random choice from ``seed`` up front, then yields
all its images in one request, so the result does not depend on the batch size. The
scores received are taken to be class probabilities (``Classifier.predict``).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence

import numpy as np
from .engine import Job
from .errors import UsageError
from .occlusion import Fill, box_weights, fill_image, perturb
from .maps import box_pixels, erase_object
from .outcomes import fisher_greater, tally_arms

__all__ = [
    "PLACEMENTS",
    "paste",
    "transplant_job",
    "removal_job",
    "background_swap_job",
]

PLACEMENTS = ("same", "on-object")


# ----------------------------------------------------------------- checking input

def _image(value, what: str) -> np.ndarray:
    img = np.asarray(value, dtype=np.float32)
    if img.ndim != 3 or img.shape[2] not in (1, 3):
        raise UsageError(f"{what} must be an (H, W, C) array with C = 1 or 3; got shape {img.shape}.")
    return img


def _same_shape(images: list[np.ndarray], what: str) -> tuple[int, int, int]:
    shapes = {im.shape for im in images}
    if len(shapes) != 1:
        raise UsageError(f"{what} must all have the model's input shape; got shapes "
                         f"{sorted(shapes)}. Resize them to the model's size first.")
    return next(iter(shapes))


def _mask(value, shape: tuple[int, int], what: str) -> np.ndarray:
    m = np.asarray(value)
    if m.shape != shape:
        raise UsageError(f"{what} must be an (H, W) mask of shape {shape}; got shape {m.shape}.")
    return m.astype(bool)


def _label(value, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise UsageError(f"{what} must be a class index >= 0; got {value!r}.")
    return int(value)


def _trials(value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise UsageError(f"trials must be a whole number of at least 1; got {value!r}.")
    return int(value)


def _check_scores(scores: np.ndarray, suspect: int) -> np.ndarray:
    scores = np.asarray(scores, dtype=np.float64)
    if not (0 <= suspect < scores.shape[1]):
        raise UsageError(f"suspect class {suspect} is out of range for a model with "
                         f"{scores.shape[1]} classes.")
    return scores


def _known(value, n: int, what: str) -> np.ndarray | None:
    """Scores already made of ``n`` unperturbed images, as an (n, K) array, or None."""
    if value is None:
        return None
    rows = [np.asarray(v, dtype=np.float64) for v in value]
    if len(rows) != n or any(r.ndim != 1 for r in rows) or len({r.shape for r in rows}) > 1:
        raise UsageError(f"{what} must give one score vector (K,) per image ({n}); "
                         f"got {len(rows)} of shapes {sorted({r.shape for r in rows})}.")
    return np.stack(rows) if rows else np.zeros((0, 0))


def _unperturbed(images: list[np.ndarray], known: np.ndarray | None, rows: list[int]) -> list[np.ndarray]:
    """The unperturbed images a request must hold: none when their scores are known."""
    return [] if known is not None else [images[j] for j in rows]


def _cycle(rng: np.random.Generator, n: int, count: int) -> np.ndarray:
    """``count`` indices in 0..n-1: shuffled rounds of all of them, so each is used evenly."""
    rounds = -(-count // n)
    return np.concatenate([rng.permutation(n) for _ in range(rounds)])[:count]


def _usable(rows: np.ndarray) -> np.ndarray:
    return np.all(np.isfinite(rows), axis=1)


# --------------------------------------------------------------------- transplant

def paste(target: np.ndarray, patch: np.ndarray, box_px: tuple[int, int, int, int]) -> np.ndarray:
    """A copy of ``target`` with ``patch`` in the half-open box ``(row0, row1, col0, col1)``.

    Parameters
    ----------
    target : (H, W, C) float32
    patch : (row1 - row0, col1 - col0, C) float32
    box_px : (row0, row1, col0, col1)
        Inside the target.

    Returns
    -------
    (H, W, C) float32

    >>> paste(np.zeros((3, 3, 1), np.float32), np.ones((1, 2, 1), np.float32), (1, 2, 0, 2))[..., 0].tolist()
    [[0.0, 0.0, 0.0], [1.0, 1.0, 0.0], [0.0, 0.0, 0.0]]
    """
    target = np.asarray(target, dtype=np.float32)
    patch = np.asarray(patch, dtype=np.float32)
    r0, r1, c0, c1 = (int(v) for v in box_px)
    h, w = target.shape[:2]
    if not (0 <= r0 < r1 <= h and 0 <= c0 < c1 <= w):
        raise UsageError(f"paste box (row0, row1, col0, col1) = {tuple(box_px)} must lie inside "
                         f"the {h}x{w} image.")
    if patch.shape != (r1 - r0, c1 - c0, target.shape[2]):
        raise UsageError(f"patch of shape {patch.shape} does not fit the box {tuple(box_px)} "
                         f"of a {target.shape[2]}-channel image; cut the patch at the box's size.")
    out = target.copy()
    out[r0:r1, c0:c1] = patch
    return out


def _far_positions(region: tuple[int, int, int, int], ph: int, pw: int,
                   h: int, w: int) -> np.ndarray:
    """Top-left corners (k, 2) of ph x pw boxes away from ``region``.

    First choice: boxes clear of the region grown by half the patch on each side; then
    boxes that merely do not overlap it; failing both, the one box whose centre lies
    farthest from the region's centre.
    """
    r0, r1, c0, c1 = region
    rr, cc = np.meshgrid(np.arange(h - ph + 1), np.arange(w - pw + 1), indexing="ij")
    rr, cc = rr.ravel(), cc.ravel()
    for g in (max(ph, pw) // 2, 0):
        clear = ((rr + ph <= r0 - g) | (rr >= r1 + g) | (cc + pw <= c0 - g) | (cc >= c1 + g))
        if clear.any():
            return np.stack([rr[clear], cc[clear]], axis=1)
    dist = np.hypot(rr + ph / 2 - (r0 + r1) / 2, cc + pw / 2 - (c0 + c1) / 2)
    k = int(np.argmax(dist))
    return np.array([[rr[k], cc[k]]])


def _positions(shape: tuple[int, int], mask: np.ndarray | None, ph: int, pw: int) -> np.ndarray:
    """Top-left corners (k, 2) of ph x pw boxes inside the image whose centre pixel is in
    ``mask``; every box inside the image when there is no mask or none qualifies."""
    h, w = shape
    rr, cc = np.meshgrid(np.arange(h - ph + 1), np.arange(w - pw + 1), indexing="ij")
    rr, cc = rr.ravel(), cc.ravel()
    if mask is not None:
        inside = mask[rr + ph // 2, cc + pw // 2]
        if inside.any():
            rr, cc = rr[inside], cc[inside]
    return np.stack([rr, cc], axis=1)


def _centred(box: Sequence[float], ph: int, pw: int, h: int, w: int) -> tuple[int, int]:
    """Top-left corner of a ph x pw box centred on ``box`` and kept inside the image."""
    r0, r1, c0, c1 = box_pixels(box, h, w)
    top = int(math.floor((r0 + r1) / 2 - ph / 2))
    left = int(math.floor((c0 + c1) / 2 - pw / 2))
    return min(max(top, 0), h - ph), min(max(left, 0), w - pw)


def transplant_job(*, sources: Sequence[tuple[np.ndarray, Sequence[float]]],
                   targets: Sequence[tuple[np.ndarray, np.ndarray | None, int]],
                   suspect: int, placement: str,
                   control_boxes: Sequence[Sequence[float]] | None = None,
                   control_masks: Sequence[np.ndarray | None] | None = None,
                   trials: int = 40, seed: int = 0,
                   target_scores: Sequence[np.ndarray] | None = None) -> Job:
    """A job that pastes the suspect region onto other classes' images.

    Trial ``i`` takes source ``i mod len(sources)``, a target (shuffled rounds over all
    targets, so each is used evenly) and a place on it: the region's own place
    (``placement="same"``, for a fixed-position suspect) or a random place whose centre
    is on the target's object (``"on-object"``, anywhere when its mask is None, for a
    motif). The control pastes a patch of the same size, cut from another place of the
    same source image, at the same place of the same target.

    Parameters
    ----------
    sources : sequence of (pixels (H, W, C), box [x0, y0, x1, y1])
        Images of the suspect class and the region of each (fractions). For a motif,
        pass only the medoid crop's image and its box.
    targets : sequence of (pixels (H, W, C), mask (H, W) bool or None, label)
        Other classes' images.
    suspect : int
    placement : {"same", "on-object"}
    control_boxes : sequence of boxes, optional
        One per source: the centre of each gives the control patch of that source (the
        patch keeps the region's size). By default each trial draws a place clear of
        the region (grown by half the patch), from ``seed``.
    control_masks : sequence of (H, W) bool arrays or None, optional
        One per source: the control patch is drawn with its centre on this mask (the
        source's object), still clear of the region; None, or no such place, draws
        anywhere. With the object's mask the control asks whether the region carries
        the class *more than another piece of the same object* does: a shortcut
        (a sticker on the object) does, a part the model rightly reads the object by
        (a handle, a fin) does not much more than the rest of the object.
    trials : int
    seed : int
    target_scores : sequence of (K,) arrays, optional
        The targets' unperturbed scores when they are already known (a scan has them);
        they are then not scored again.

    Returns
    -------
    Job
        Its result is a :class:`ProbeResult` with ``test="transplant"``. A hit is a
        perturbed target predicted as ``suspect`` whose unperturbed image was not;
        targets already predicted as ``suspect`` do not count in either arm
        (``extra["ineligible"]``).

    Raises
    ------
    UsageError
        No sources or targets, shapes that differ, a bad placement, mask, label,
        count of control boxes or of trials.

    Notes
    -----
    One request holds every target used, unperturbed (the "before" scores; left out
    when ``target_scores`` gives them), then the transplants, then the controls:
    ``unique targets + 2 * trials`` images.
    """
    if len(sources) == 0:
        raise UsageError("transplant needs at least one source (an image of the suspect class and its region).")
    if len(targets) == 0:
        raise UsageError("transplant needs at least one target image from another class.")
    if placement not in PLACEMENTS:
        raise UsageError(f"placement must be one of {', '.join(PLACEMENTS)}; got {placement!r}.")
    suspect = _label(suspect, "suspect")
    trials = _trials(trials)
    src_px = [_image(p, f"source {i}") for i, (p, _b) in enumerate(sources)]
    tgt_px = [_image(t[0], f"target {i}") for i, t in enumerate(targets)]
    h, w, _c = _same_shape(src_px + tgt_px, "sources and targets")
    regions = [box_pixels(b, h, w) for _p, b in sources]
    masks = [None if t[1] is None else _mask(t[1], (h, w), f"target {i}'s mask")
             for i, t in enumerate(targets)]
    for i, t in enumerate(targets):
        _label(t[2], f"target {i}'s label")
    known = _known(target_scores, len(targets), "target_scores")
    if control_masks is not None and len(control_masks) != len(sources):
        raise UsageError(f"control_masks must give one mask (or None) per source ({len(sources)}); "
                         f"got {len(control_masks)}.")
    if control_boxes is not None and len(control_boxes) != len(sources):
        raise UsageError(f"control_boxes must give one box per source ({len(sources)}); "
                         f"got {len(control_boxes)}.")

    # every random choice, drawn up front in a fixed order
    rng = np.random.default_rng(seed)
    tgt_of = _cycle(rng, len(targets), trials)
    far = {}
    plan = []   # (source, target, place (r, c), control (r, c))
    for i in range(trials):
        s, t = i % len(sources), int(tgt_of[i])
        r0, r1, c0, c1 = regions[s]
        ph, pw = r1 - r0, c1 - c0
        if placement == "same":
            place = (r0, c0)
        else:
            pos = _positions((h, w), masks[t], ph, pw)
            place = tuple(int(v) for v in pos[int(rng.integers(len(pos)))])
        if control_boxes is not None:
            ctrl = _centred(control_boxes[s], ph, pw, h, w)
        else:
            if s not in far:
                far[s] = _far_positions(regions[s], ph, pw, h, w)
                cm = None if control_masks is None else control_masks[s]
                if cm is not None:
                    cm = _mask(cm, (h, w), f"source {s}'s control mask")
                    on = cm[far[s][:, 0] + ph // 2, far[s][:, 1] + pw // 2]
                    if on.any():
                        far[s] = far[s][on]
            ctrl = tuple(int(v) for v in far[s][int(rng.integers(len(far[s])))])
        plan.append((s, t, place, ctrl))
    return _transplant(src_px, tgt_px, regions, plan, suspect, placement, h, w, trials, known)


def _transplant(src_px, tgt_px, regions, plan, suspect, placement, h, w, requested, known) -> Job:
    used = sorted({t for _s, t, _p, _c in plan})
    row_of = {t: k for k, t in enumerate(used)}
    moved, controls, boxes = [], [], []
    for s, t, (pr, pc), (cr, cc) in plan:
        r0, r1, c0, c1 = regions[s]
        ph, pw = r1 - r0, c1 - c0
        where = (pr, pr + ph, pc, pc + pw)
        moved.append(paste(tgt_px[t], src_px[s][r0:r1, c0:c1], where))
        controls.append(paste(tgt_px[t], src_px[s][cr:cr + ph, cc:cc + pw], where))
        boxes.append([pc / w, pr / h, (pc + pw) / w, (pr + ph) / h])
    batch = np.stack(_unperturbed(tgt_px, known, used) + moved + controls)
    scores = _check_scores((yield batch), suspect)
    n_used, n = (0 if known is not None else len(used)), len(plan)
    base = known[used] if known is not None else scores[:n_used]
    after, ctrl = scores[n_used:n_used + n], scores[n_used + n:]
    trials = [(base[row_of[t]], {"source": s, "target": t, "box": boxes[i]})
              for i, (s, t, _p, _c) in enumerate(plan)]
    return tally_arms("transplant", suspect, trials, after, ctrl,
                      extra={"placement": placement, "requested": requested, "sources": len(src_px)})


# ------------------------------------------------------------------------ removal

def removal_job(*, images: Sequence[tuple[np.ndarray, int]], boxes: Sequence[Sequence[float]],
                fill_fn: Callable[[np.ndarray], np.ndarray] | Fill, suspect: int,
                image_scores: Sequence[np.ndarray] | None = None) -> Job:
    """A job that hides the suspect region in the class's own images.

    Parameters
    ----------
    images : sequence of (pixels (H, W, C), label)
        The suspect class's images (their labels, normally ``suspect``).
    boxes : sequence of [x0, y0, x1, y1]
        The region to hide in each image (fractions), or a single box for all.
    fill_fn : callable or Fill
        ``fill_fn(image) -> (H, W, C)`` the pixels the region takes, e.g.
        ``lambda im: fill_image(im, Fill(kind="blur"))``; a :class:`Fill` is used so.
    suspect : int
    image_scores : sequence of (K,) arrays, optional
        The images' unperturbed scores when they are already known; they are then not
        scored again.

    Returns
    -------
    Job
        Its result is a dict ``{"images", "accuracy_before", "accuracy_after", "drop",
        "suspect_before", "suspect_after"}``: accuracy is the share predicted as the
        image's label, ``suspect_*`` the share predicted as ``suspect``, ``drop`` is
        ``accuracy_before - accuracy_after``. Merge it into a transplant result with
        ``dataclasses.replace(result, removal=...)``.

    Notes
    -----
    One request: the images (unless ``image_scores`` gives their scores), then the same
    images with the region hidden
    (:func:`~shortcut_audit.occlusion.perturb` with a box of weight 1).
    """
    if len(images) == 0:
        raise UsageError("removal needs at least one image of the suspect class.")
    suspect = _label(suspect, "suspect")
    if len(boxes) not in (1, len(images)):
        raise UsageError(f"boxes must give one box per image ({len(images)}) or one for all; "
                         f"got {len(boxes)}.")
    if isinstance(fill_fn, Fill):
        fill = fill_fn
        fill_fn = lambda im: fill_image(im, fill)  # noqa: E731
    if not callable(fill_fn):
        raise UsageError(f"fill_fn must be a function image -> filled image or a Fill; got {fill_fn!r}.")
    pixels = [_image(p, f"image {i}") for i, (p, _l) in enumerate(images)]
    labels = [_label(l, f"image {i}'s label") for i, (_p, l) in enumerate(images)]
    h, w, c = _same_shape(pixels, "images")
    known = _known(image_scores, len(pixels), "image_scores")
    hidden = []
    for i, img in enumerate(pixels):
        box = boxes[0] if len(boxes) == 1 else boxes[i]
        weights = box_weights(np.array([box_pixels(box, h, w)]), h, w)
        filled = np.asarray(fill_fn(img), dtype=np.float32)
        if filled.shape != img.shape:
            raise UsageError(f"fill_fn returned shape {filled.shape} for an image of shape "
                             f"{img.shape}; it must return an image of the same shape.")
        hidden.append(perturb(img, weights, filled)[0])
    return _removal(pixels, hidden, labels, suspect, known)


def _removal(pixels, hidden, labels, suspect, known) -> Job:
    n = len(pixels)
    scores = _check_scores((yield np.stack(_unperturbed(pixels, known, list(range(n))) + hidden)), suspect)
    if known is not None:
        scores = np.concatenate([known, scores], axis=0)
    ok = _usable(scores[:n]) & _usable(scores[n:])
    pred = np.argmax(scores, axis=1)
    lab = np.asarray(labels)
    before = (pred[:n] == lab)[ok]
    after = (pred[n:] == lab)[ok]
    m = int(ok.sum())
    acc_b = float(before.mean()) if m else 0.0
    acc_a = float(after.mean()) if m else 0.0
    return {"images": m, "accuracy_before": acc_b, "accuracy_after": acc_a,
            "drop": acc_b - acc_a,
            "suspect_before": float((pred[:n][ok] == suspect).mean()) if m else 0.0,
            "suspect_after": float((pred[n:][ok] == suspect).mean()) if m else 0.0}


# -------------------------------------------------------------- background swap

def background_swap_job(*, own: Sequence[tuple[np.ndarray, np.ndarray, int]],
                        others: Sequence[tuple[np.ndarray, np.ndarray, int]],
                        suspect: int, trials: int = 40, seed: int = 0,
                        own_scores: Sequence[np.ndarray] | None = None,
                        others_scores: Sequence[np.ndarray] | None = None) -> Job:
    """A job that puts objects in front of other images' backgrounds.

    In the manner of the mixed-background tests of Xiao et al. (ICLR 2021). A
    *background* is an image with its own object erased
    (:func:`~shortcut_audit.sensitivity.erase_object`); a composite is the recipient's
    object pixels (mask True) over a donor's background, both at model size.

    - Test arm ("to"): other classes' objects over the suspect class's backgrounds; a
      hit is a prediction that moves *to* ``suspect``.
    - Control: the same recipients over the background of an image of a third class
      (neither ``suspect`` nor their own); a hit there is a move to ``suspect`` that
      any unfamiliar background causes. This control tells a class whose backgrounds
      carry it from a *sink*: a clean class the model falls back on whenever a
      recipient loses its own background (and with it, say, a mark of its own class).
      With only two classes there is no third: the control then uses another image of
      the recipient's own class.
    - "Away" arm (in ``extra``): the suspect class's objects over other classes'
      backgrounds; a hit is a prediction that moves *away* from ``suspect``; its
      control uses backgrounds of other images of the suspect class.

    Parameters
    ----------
    own : sequence of (pixels (H, W, C), mask (H, W) bool, label)
        The suspect class's images with their object masks.
    others : sequence of (pixels, mask, label)
        Other classes' images with their masks.
    suspect : int
    trials : int
        Composites in each arm.
    seed : int
    own_scores, others_scores : sequences of (K,) arrays, optional
        Unperturbed scores of ``own`` and ``others`` when already known; those images
        are then not scored again.

    Returns
    -------
    Job
        Its result is a :class:`ProbeResult` with ``test="background-swap"``; the
        status is decided by the "to" arm. ``extra`` holds ``away_trials``,
        ``away_hits``, ``away_rate``, ``away_control_trials``, ``away_control_hits``,
        ``away_control_rate``, ``away_p_value``, ``ineligible`` (recipients already
        predicted as ``suspect``) and ``away_ineligible`` (own images not predicted as
        ``suspect``, which cannot move away). Examples name the
        background donor (``source``, an index into ``own``) and the recipient
        (``target``, an index into ``others``).

    Raises
    ------
    UsageError
        Images or masks of different shapes, or no image in ``own`` or ``others`` whose
        mask holds both object and background.

    Notes
    -----
    Two requests of about ``trials * 2`` images each: the recipients used, unperturbed
    (unless ``others_scores`` gives their scores), with the test composites and their
    controls; then the suspect class's images used, unperturbed (unless ``own_scores``
    gives them), with the "away" composites and their controls. Images whose mask is
    empty or full are not drawn.
    """
    suspect = _label(suspect, "suspect")
    trials = _trials(trials)
    own_px = [_image(p, f"own image {i}") for i, (p, _m, _l) in enumerate(own)]
    oth_px = [_image(p, f"other image {i}") for i, (p, _m, _l) in enumerate(others)]
    if not own_px or not oth_px:
        raise UsageError("background swap needs images of the suspect class and of other classes, with masks.")
    h, w, _c = _same_shape(own_px + oth_px, "images")
    own_m = [_mask(m, (h, w), f"own image {i}'s mask") for i, (_p, m, _l) in enumerate(own)]
    oth_m = [_mask(m, (h, w), f"other image {i}'s mask") for i, (_p, m, _l) in enumerate(others)]
    oth_l = [_label(l, f"other image {i}'s label") for i, (_p, _m, l) in enumerate(others)]
    known = (_known(own_scores, len(own_px), "own_scores"), _known(others_scores, len(oth_px), "others_scores"))
    own_ok = [i for i, m in enumerate(own_m) if m.any() and not m.all()]
    oth_ok = [i for i, m in enumerate(oth_m) if m.any() and not m.all()]
    if not own_ok or not oth_ok:
        raise UsageError("background swap needs, in both the suspect class and the other classes, "
                         "an image whose mask holds both object and background; pass object masks.")
    rng = np.random.default_rng(seed)
    # "to" arm and its control
    rec = [oth_ok[k] for k in _cycle(rng, len(oth_ok), trials)]
    donor = [own_ok[int(rng.integers(len(own_ok)))] for _ in range(trials)]
    ctrl = []
    for r in rec:
        third = [j for j in oth_ok if oth_l[j] != oth_l[r]]
        same = [j for j in oth_ok if j != r and oth_l[j] == oth_l[r]]
        pool = third or same or [r]
        ctrl.append(pool[int(rng.integers(len(pool)))])
    # "away" arm and its control
    obj = [own_ok[k] for k in _cycle(rng, len(own_ok), trials)]
    away_donor = [oth_ok[int(rng.integers(len(oth_ok)))] for _ in range(trials)]
    away_ctrl = []
    for o in obj:
        pool = [j for j in own_ok if j != o] or [o]
        away_ctrl.append(pool[int(rng.integers(len(pool)))])
    plan = (rec, donor, ctrl, obj, away_donor, away_ctrl)
    return _swap(own_px, own_m, oth_px, oth_m, plan, suspect, known)


def _swap(own_px, own_m, oth_px, oth_m, plan, suspect, known) -> Job:
    rec, donor, ctrl, obj, away_donor, away_ctrl = plan
    backgrounds: dict[tuple[str, int], np.ndarray] = {}

    def background(side: str, j: int) -> np.ndarray:
        key = (side, j)
        if key not in backgrounds:
            px, m = (own_px[j], own_m[j]) if side == "own" else (oth_px[j], oth_m[j])
            backgrounds[key] = erase_object(px, m)
        return backgrounds[key]

    def composite(px: np.ndarray, m: np.ndarray, bg: np.ndarray) -> np.ndarray:
        return np.where(m[..., None], px, bg).astype(np.float32)

    # two requests, each about half the images: the "to" arm, then the "away" arm
    used_oth, used_own = sorted(set(rec)), sorted(set(obj))
    n = len(rec)
    known_own, known_oth = known
    first = _unperturbed(oth_px, known_oth, used_oth)
    first += [composite(oth_px[r], oth_m[r], background("own", d)) for r, d in zip(rec, donor)]
    first += [composite(oth_px[r], oth_m[r], background("oth", d)) for r, d in zip(rec, ctrl)]
    scores = _check_scores((yield np.stack(first)), suspect)
    del first
    k0 = 0 if known_oth is not None else len(used_oth)
    base_oth = {j: (known_oth[j] if known_oth is not None else scores[i]) for i, j in enumerate(used_oth)}
    to, to_c = scores[k0:k0 + n], scores[k0 + n:]
    second = _unperturbed(own_px, known_own, used_own)
    second += [composite(own_px[o], own_m[o], background("oth", d)) for o, d in zip(obj, away_donor)]
    second += [composite(own_px[o], own_m[o], background("own", d)) for o, d in zip(obj, away_ctrl)]
    scores = _check_scores((yield np.stack(second)), suspect)
    del second
    k1 = 0 if known_own is not None else len(used_own)
    base_own = {j: (known_own[j] if known_own is not None else scores[i]) for i, j in enumerate(used_own)}
    aw, aw_c = scores[k1:k1 + n], scores[k1 + n:]

    to_arm = tally_arms("background-swap", suspect,
                        [(base_oth[r], {"source": d, "target": r, "box": None}) for r, d in zip(rec, donor)],
                        to, to_c, extra={"requested": n})
    a_hits, a_c_hits = [], []
    away_ineligible = 0
    for i, o in enumerate(obj):
        b = base_own[o]
        if not (np.all(np.isfinite(b)) and _usable(aw[i:i + 1])[0] and _usable(aw_c[i:i + 1])[0]):
            continue
        if int(np.argmax(b)) != suspect:
            away_ineligible += 1
            continue
        a_hits.append(int(np.argmax(aw[i])) != suspect)
        a_c_hits.append(int(np.argmax(aw_c[i])) != suspect)
    na, ha, hac = len(a_hits), int(np.sum(a_hits)), int(np.sum(a_c_hits))
    return dataclasses.replace(to_arm, extra=dict(
        to_arm.extra,
        away_trials=na, away_hits=ha, away_rate=ha / na if na else 0.0,
        away_control_trials=na, away_control_hits=hac, away_control_rate=hac / na if na else 0.0,
        away_p_value=fisher_greater(ha, na - ha, hac, na - hac) if na else None,
        away_ineligible=away_ineligible))
