"""Per-class aggregates of the per-image statistics.

A class is summarised from the images whose label it is. Statistics about how the
decision can be moved (decisive area, decisive boxes) are taken over the images the
model gets right: an image already misclassified has no decision of its own to move.

Pure: numpy arrays in, a frozen dataclass out. The class-mean heatmap is accumulated
image by image (:class:`ClassAccumulator`), so no class's heatmaps are held at once.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from .maps import box_of, boxes_overlap

__all__ = [
    "ImageSummary",
    "ClassSummary",
    "ClassAccumulator",
    "SMALL_AREA",
    "BOX_MAX_AREA",
    "summarise_classes",
    "place_map",
]

#: The decisive area at or below which an image's decision "hinges on a small region".
SMALL_AREA = 0.05
#: Decisive boxes larger than this share of the image say little about a place.
BOX_MAX_AREA = 0.25


@dataclass(frozen=True, kw_only=True)
class ImageSummary:
    """The per-image numbers the class aggregates and findings use (no heatmap)."""

    path: str
    label: int
    predicted: int
    confidence: float              # probability of the predicted class
    label_score: float             # score of the label class (the heatmap's target)
    concentration: float
    gini: float
    decisive_area: float | None
    decisive_box: list[float] | None
    peak_box: list[float] | None
    deletion_area: float
    insertion_area: float
    background_share: float | None = None
    mask_source: str | None = None
    survives_object_erased: bool | None = None
    survives_background_erased: bool | None = None
    object_erased_prediction: int | None = None
    decisive_on_object: float | None = None   # share of the decisive pixels on the object
    decisive_object_cover: float | None = None  # share of the object the decisive pixels cover
    peak_on_object: float | None = None       # share of the peak box on the object

    @classmethod
    def from_record(cls, record: dict) -> "ImageSummary":
        """The summary of an image's stored record (the fields it names; extra keys such
        as the probabilities and the curves stay in the store)."""
        names = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in record.items() if k in names})

    @property
    def correct(self) -> bool:
        return self.predicted == self.label

    @property
    def small(self) -> bool:
        return self.correct and self.decisive_area is not None and self.decisive_area <= SMALL_AREA


def _box_area(box: list[float] | None) -> float:
    if box is None:
        return 1.0
    return max(0.0, box[2] - box[0]) * max(0.0, box[3] - box[1])


def place_map(boxes: list[list[float]], shape: tuple[int, int]) -> np.ndarray:
    """How many of ``boxes`` cover each pixel of an image of ``shape`` (rows, columns)."""
    h, w = shape
    out = np.zeros((h, w), dtype=np.float64)
    for x0, y0, x1, y1 in boxes:
        r0, r1 = int(np.floor(y0 * h)), int(np.ceil(y1 * h))
        c0, c1 = int(np.floor(x0 * w)), int(np.ceil(x1 * w))
        out[r0:r1, c0:c1] += 1.0
    return out


@dataclass(frozen=True, kw_only=True)
class ClassSummary:
    """One class's aggregates.

    ``metrics`` holds every number the findings read, by name, so audit.json, the
    report and compare see the same values.
    """

    name: str
    index: int
    images: int
    correct: int
    accuracy: float
    mean_confidence: float
    mean_heatmap: np.ndarray | None
    metrics: dict = field(default_factory=dict)
    place_box: list[float] | None = None      # where decisive boxes agree most
    not_judged: tuple[str, ...] = ()          # why rules could not judge it (findings.not_judged)
    peak_place_box: list[float] | None = None  # where the heat's peaks agree most
    notes: tuple[str, ...] = ()               # what the rules saw that is not a shortcut finding


class ClassAccumulator:
    """Streams heatmaps into per-class sums (the only heatmap state of a scan)."""

    def __init__(self, n_classes: int, shape: tuple[int, int]):
        # Sums only for the classes that have images: a 1,000-output model audited on a
        # few of its classes holds a few maps, not 1,000 (400 MB at 224 x 224).
        self.n_classes = n_classes
        self.shape = tuple(shape)
        self.sums: dict[int, np.ndarray] = {}
        self.counts: dict[int, int] = {}

    def add(self, label: int, heatmap: np.ndarray) -> None:
        if label not in self.sums:
            self.sums[label] = np.zeros(self.shape, dtype=np.float64)
            self.counts[label] = 0
        self.sums[label] += heatmap
        self.counts[label] += 1

    def mean(self, label: int) -> np.ndarray | None:
        if not self.counts.get(label):
            return None
        return (self.sums[label] / self.counts[label]).astype(np.float32)


def _place(pm: np.ndarray, top: float) -> list[float] | None:
    """Box of the connected blob, around the most covered pixel, of the pixels covered
    at least half as often (and at least once): one place, not every box's union."""
    keep = pm >= max(1.0, 0.5 * top)
    labels, _ = ndimage.label(keep)
    at = np.unravel_index(int(np.argmax(pm)), pm.shape)
    return box_of(labels == labels[at])


def _median(values: list[float]) -> float | None:
    return float(np.median(values)) if values else None


def _rate(flags: list[bool]) -> float | None:
    return float(np.mean(flags)) if flags else None


def _measured_mean(values: list) -> float | None:
    """Mean over the images that have the value (curves are measured on a sample)."""
    kept = [float(v) for v in values if v is not None and np.isfinite(v)]
    return float(np.mean(kept)) if kept else None


def summarise_classes(images: list[ImageSummary], labels: tuple[str, ...], *,
                      accumulator: ClassAccumulator | None = None,
                      shape: tuple[int, int] | None = None) -> list[ClassSummary]:
    """Per-class aggregates for every class that has at least one image.

    Metrics (None where they cannot be computed):

    - ``small_area_rate``: share of correctly predicted images whose decisive area is
      at most :data:`SMALL_AREA`;
    - ``decisive_rate``: share whose decision moves within the 25% cap at all;
    - ``box_agreement``: among the correctly predicted images whose decision hinges on
      a small region, the largest share whose decisive boxes cover one common pixel;
      ``place_box`` is where;
    - ``median_decisive_area``, ``mean_concentration``, ``mean_gini``,
      ``mean_deletion_area``, ``mean_insertion_area``;
    - with masks: ``median_background_share``, ``object_erased_survival`` (share of
      images still predicted as the class with the object erased),
      ``erased_default_rate`` (share of the *other* classes' images predicted as this
      class once their object is erased), ``background_reliance`` (the first less the
      second),
      ``background_erased_survival``, ``masked_images`` and ``estimated_masks``.
    """
    shape = shape or (64, 64)
    out = []
    by_label: dict[int, list[ImageSummary]] = {}
    for im in images:                  # once: a model may have 1,000 labels
        by_label.setdefault(im.label, []).append(im)
    for index, name in enumerate(labels):
        members = by_label.get(index)
        if not members:
            continue
        right = [im for im in members if im.correct]
        areas = [im.decisive_area for im in right if im.decisive_area is not None]
        # Only the regions the decision hinges on (small decisive areas) say where a
        # shortcut sits; a large region is the object or the whole scene.
        boxes = [im.decisive_box for im in right
                 if im.small and _box_area(im.decisive_box) <= BOX_MAX_AREA]
        agreement, place_box = None, None
        n_small = sum(1 for im in right if im.small)
        if right:
            if boxes:
                pm = place_map(boxes, shape)
                peak = pm.max()
                agreement = float(peak / n_small)
                place_box = _place(pm, peak)
            else:
                agreement = 0.0
        # The same over the heat's peaks of every correct image: a mark that suffices for
        # the class without being needed (the object alone is enough too) moves no
        # decision when hidden, but it still draws the heat to one place.
        peaks = [im.peak_box for im in right
                 if im.peak_box is not None and _box_area(im.peak_box) <= BOX_MAX_AREA]
        peak_agreement, peak_place, peak_on = None, None, None
        if right:
            peak_agreement = 0.0
            if peaks:
                pm = place_map(peaks, shape)
                top = pm.max()
                peak_agreement = float(top / len(right))
                peak_place = _place(pm, top)
                at_peak = [im for im in right if im.peak_box is not None
                           and boxes_overlap(im.peak_box, peak_place) and im.peak_on_object is not None]
                peak_on = _median([im.peak_on_object for im in at_peak])
        masked = [im for im in members if im.background_share is not None]
        survival = _rate([bool(im.survives_object_erased) for im in right
                          if im.survives_object_erased is not None])
        # How often erasing the object of *another* class's image leaves this class:
        # a class the model names for an empty scene survives erasure for no reason
        # of its own, so that share is taken off its survival.
        erased_elsewhere = [im.object_erased_prediction == index for im in images
                            if im.label != index and im.object_erased_prediction is not None]
        default_rate = _rate(erased_elsewhere)
        metrics = {
            "small_area_rate": _rate([im.small for im in right]),
            "decisive_rate": _rate([im.decisive_area is not None for im in right]),
            "box_agreement": agreement,
            "median_decisive_area": _median(areas),
            "mean_concentration": float(np.mean([im.concentration for im in members])),
            "mean_gini": float(np.mean([im.gini for im in members])),
            "mean_deletion_area": _measured_mean([im.deletion_area for im in members]),
            "mean_insertion_area": _measured_mean([im.insertion_area for im in members]),
            "median_background_share": _median([im.background_share for im in masked]),
            "object_erased_survival": survival,
            "erased_default_rate": default_rate,
            "background_reliance": (survival - default_rate
                                    if survival is not None and default_rate is not None else None),
            "background_erased_survival": _rate([bool(im.survives_background_erased) for im in right
                                                 if im.survives_background_erased is not None]),
            "masked_images": len(masked),
            "estimated_masks": sum(1 for im in masked if im.mask_source == "estimated"),
            "correct_images": len(right),
            "peak_agreement": peak_agreement,
            "peak_on_object": peak_on,
            "decisive_on_object": _median([im.decisive_on_object for im in right
                                           if im.small and im.decisive_on_object is not None]),
            "decisive_object_cover": _median([im.decisive_object_cover for im in right
                                              if im.small and im.decisive_object_cover is not None]),
        }
        out.append(ClassSummary(
            name=name, index=index, images=len(members), correct=len(right),
            accuracy=len(right) / len(members),
            mean_confidence=float(np.mean([im.confidence for im in members])),
            mean_heatmap=accumulator.mean(index) if accumulator is not None else None,
            metrics=metrics, place_box=place_box, peak_place_box=peak_place,
        ))
    return out
