"""How stable is the exhaustive grid's own decisive area? The floor under any cheaper plan.

A plan that runs fewer patches than the grid estimates the drops of the patches it skips,
so its heatmap differs from the grid's by some error on those patches. This module asks
how much of the grid's answer survives a small error of that kind: it recomputes the
grid's patch drops of every audited image (the same patches, fill and target as the
scan), adds Gaussian noise of ``relative`` times the image's largest absolute drop to
every patch, rebuilds the heatmap the way the scan does (each pixel the mean drop of the
patches covering it) and climbs the decisive-area ladder on it. The share of images whose
first decision-moving step stays within one step of the exact map's is the reference's own
stability: no plan that skips patches can be expected to agree with the grid better than
the grid agrees with itself under an error smaller than the skipped patches' error.

The exact map's steps are checked against the scan's own decisive areas, so the numbers
are the scan's and not a reimplementation's (``reproduces``).

    stability(audit_set, reference_audit, relative=0.005)   # bench/agreement.py calls this
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from shortcut_audit.adaptive import grid_heatmap
from shortcut_audit.classes import SMALL_AREA
from shortcut_audit.dataset import load_image
from shortcut_audit.maps import _top_mask, heat_order
from shortcut_audit.model import ModelConfig, OnnxClassifier
from shortcut_audit.engine import make_scorer
from shortcut_audit.occlusion import GridPlan, fill_image, hidden_image, paste_boxes, patch_boxes
from shortcut_audit.sensitivity import DECISIVE_LADDER

#: Noise levels reported: a share of each image's largest absolute patch drop.
RELATIVE = 0.005



@dataclass(frozen=True)
class Stability:
    images: int
    relative: float
    within_step: float      # noisy map's step within one step of the exact map's
    same_step: float
    small_call: float       # "decisive area <= SMALL_AREA" the same on both
    reproduces: float       # exact map's step equal to the scan's


def first_step(scorer, image: np.ndarray, hidden: np.ndarray, values: np.ndarray, target: int,
               order_of=heat_order) -> int:
    """First step of the decisive-area ladder whose hiding moves the decision away from
    ``target`` (``len(DECISIVE_LADDER)`` when none does), hiding the hottest pixels of
    ``values`` as the scan does (:func:`shortcut_audit.maps.heat_order`; ``order_of``
    replaces that order, for studies of other orders)."""
    order = order_of(values)
    masks = np.stack([_top_mask(order, s, values.shape) for s in DECISIVE_LADDER])
    scores = scorer(np.where(masks[..., None], hidden[None], image[None]))
    moved = np.argmax(scores, axis=1) != target
    return int(np.argmax(moved)) if moved.any() else len(DECISIVE_LADDER)


def grid_drops(scorer, image: np.ndarray, filled: np.ndarray, boxes: np.ndarray, target: int,
               chunk: int = 64) -> np.ndarray:
    """Score drop of ``target`` for every box of ``boxes`` filled from ``filled`` (the
    scan's grid heatmap is each pixel's mean of these over the boxes covering it). The
    unperturbed image goes in the first request with the first ``chunk - 1`` boxes, as
    the scan sends it."""
    first = max(1, chunk - 1)
    got = scorer(np.concatenate([image[None], paste_boxes(image, boxes[:first], filled)]))
    base, parts = got[0, target], [got[1:, target]]
    parts += [scorer(paste_boxes(image, boxes[i:i + chunk], filled))[:, target]
              for i in range(first, len(boxes), chunk)]
    return float(base) - np.concatenate(parts).astype(np.float64)


def scan_step(area: float | None) -> int:
    """The ladder step a scan's decisive area lies on (bisection stays within a step; the
    step after the last when None: no move within the ladder's top share)."""
    if area is None:
        return len(DECISIVE_LADDER)
    return int(np.searchsorted(DECISIVE_LADDER, area - 1e-12))


def stability(model: Path, images: Path, reference, *, config: ModelConfig | None = None,
              relative: float = RELATIVE, seed: int = 0, chunk: int = 64) -> Stability:
    """The grid's decisive steps on ``reference`` (a finished audit of ``images`` with a
    grid plan), exact and with patch drops perturbed by ``relative`` of each image's
    largest absolute drop. The plan, fill and score are the audit's own; ``config``
    should be the model configuration the audit ran with."""
    settings = reference.settings
    if not isinstance(settings.plan, GridPlan):
        raise ValueError(f"stability needs an audit made with a grid plan; got {settings.plan.kind!r}")
    clf = OnnxClassifier(model, config)     # the output order is all it needs of the labels
    scorer = make_scorer(clf, settings.score)
    h, w = clf.height, clf.width
    boxes = patch_boxes(settings.plan, h, w)
    exact, noisy, scanned = [], [], []
    rng = np.random.default_rng(seed)
    for im in reference.images:
        p = Path(im.path)
        p = p if p.is_absolute() else Path(images) / p
        x = load_image(p, size=(h, w), channels=clf.channels, resize=clf.resize)
        filled = fill_image(x, settings.fill)
        hid = hidden_image(x, filled)
        t = int(im.label)
        drops = grid_drops(scorer, x, filled, boxes, t, chunk)
        peak = float(np.max(np.abs(drops))) if drops.size else 0.0
        for drops_now, out in ((drops, exact), (drops + rng.normal(0.0, relative * peak, drops.shape), noisy)):
            values, _ = grid_heatmap(h, w, boxes, drops_now)
            out.append(first_step(scorer, x, hid, values.astype(np.float32), t))
        scanned.append(scan_step(im.decisive_area))
    exact, noisy, scanned = map(np.asarray, (exact, noisy, scanned))
    small = scan_step(SMALL_AREA)     # the small-area rule's call: on this step or before
    n = len(exact)
    if n == 0:
        nan = float("nan")
        return Stability(0, relative, nan, nan, nan, nan)
    return Stability(
        images=n, relative=relative,
        within_step=float(np.mean(np.abs(exact - noisy) <= 1)),
        same_step=float(np.mean(exact == noisy)),
        small_call=float(np.mean((exact <= small) == (noisy <= small))),
        reproduces=float(np.mean(exact == scanned)),
    )
