"""The per-image half of an audit: decode, estimate a mask, run the image job.

:func:`analyse_entries` is the same wherever it runs: in the audit's own process
(scan.py) or on a Dask worker (cluster.py). Both import it from here, so scan.py and
cluster.py do not import each other both ways. ``settings`` is a
:class:`~shortcut_audit.scan.ScanSettings` (plan, fill, score, tolerance are read).
"""

from __future__ import annotations

import dataclasses
import hashlib
from typing import Sequence

import numpy as np

from .dataset import ImageEntry, ImageRecord, Skip, iter_records
from .engine import PassEngine
from .errors import AuditError, ImageSkip
from .maps import estimate_object_mask
from .sensitivity import ImageStats, image_job

__all__ = ["analyse_entries", "curve_sample"]


#: What an image's record keeps of its ImageStats: every measured field but the
#: heatmap (stored as an array), the scores (kept as probabilities) and the scratch.
_NOT_STORED = frozenset({"target", "predicted", "base_scores", "heatmap", "extra"})


def _record_from_stats(path: str, label: int, stats: ImageStats, probs: np.ndarray) -> dict:
    """The JSON-able record of one image: the one place an ImageStats becomes what the
    store keeps (:meth:`~shortcut_audit.classes.ImageSummary.from_record` reads it back)."""
    predicted = int(np.argmax(probs))
    record = {"label": label, "predicted": predicted, "confidence": float(probs[predicted]),
              "label_score": float(stats.base_scores[stats.target]), "probs": probs}
    record.update({f.name: getattr(stats, f.name) for f in dataclasses.fields(stats)
                   if f.name not in _NOT_STORED})
    return record


def _crop(pixels: np.ndarray, box: list[float] | None) -> np.ndarray:
    if box is None:
        return np.zeros((0, 0, pixels.shape[2]), np.float32)
    h, w = pixels.shape[:2]
    r0, r1 = int(np.floor(box[1] * h)), int(np.ceil(box[3] * h))
    c0, c1 = int(np.floor(box[0] * w)), int(np.ceil(box[2] * w))
    return pixels[r0:r1, c0:c1].astype(np.float32)


def curve_sample(entries: Sequence[ImageEntry], per_class: int | None) -> frozenset[str] | None:
    """The paths of the images whose deletion and insertion curves are measured:
    ``per_class`` images of each label (None: every image).

    Within a label the images are taken in the order of a hash of their paths: a sample
    that does not follow how the files happen to be named (a catalogue's first files are
    often one shoot), and that depends on the listing alone, so a resumed audit or a
    cluster's shards make the same one.

    >>> from pathlib import Path
    >>> es = [ImageEntry(path=p, file=Path(p), label=p[0], mask_file=None) for p in ("a1", "a2", "b1", "a3")]
    >>> chosen = curve_sample(es, 2)
    >>> len(chosen), "b1" in chosen, len(chosen & {"a1", "a2", "a3"})
    (3, True, 2)
    """
    if per_class is None:
        return None
    by_label: dict = {}
    for e in entries:
        by_label.setdefault(e.label, []).append(e.path)
    chosen: list[str] = []
    for paths in by_label.values():
        paths.sort(key=lambda p: hashlib.blake2b(p.encode("utf-8", "surrogateescape"), digest_size=8).digest())
        chosen += paths[:per_class]
    return frozenset(chosen)


def analyse_entries(entries: Sequence[ImageEntry], classifier, settings, *,
                    label_index: dict[str, int], estimate_masks: bool = True,
                    engine: PassEngine | None = None, curve_paths: frozenset[str] | None = None):
    """Yield ``(path, record, arrays)`` for each entry, in the engine's finishing order.

    This is the per-image half of a scan, the same wherever it runs: decode, estimate a
    mask where allowed, run the image job through one engine. ``record`` is JSON-able
    (with ``"skipped"`` for an image that could not be analysed); ``arrays`` holds the
    heatmap, the decisive crop and the mask. ``AuditError`` other than a skip stops it.
    ``engine`` defaults to a new one over the classifier (pass one to read its counters).
    ``curve_paths`` are the images whose curves are measured (:func:`curve_sample`;
    None: every image).
    """
    shape = (classifier.height, classifier.width)
    batch = classifier.batch_size
    if engine is None:
        engine = PassEngine.for_classifier(classifier, settings.score)
    # patches pasted in the session's input form when the engine prepares with this classifier
    prepared_by = classifier if (engine.prepare is not None
                                 and engine.prepare == getattr(classifier, "prepare", None)) else None

    def jobs():
        for rec in iter_records(entries, size=shape, channels=classifier.channels,
                                resize=classifier.resize, prefetch=8):
            if isinstance(rec, Skip):
                yield rec.path, _skip_job(rec.reason)
                continue
            mask, source = rec.mask, ("given" if rec.mask is not None else None)
            if mask is None and estimate_masks:
                mask = estimate_object_mask(rec.pixels)
                source = "estimated" if mask is not None else None
            curves = curve_paths is None or rec.path in curve_paths
            yield rec.path, _scan_job(rec, label_index[rec.label], mask, source, settings,
                                      batch, classifier, prepared_by, curves)

    for path, result in engine.run(jobs()):
        if isinstance(result, ImageSkip):
            yield path, {"skipped": result.reason}, {}
        elif isinstance(result, AuditError):
            raise result
        elif isinstance(result, Exception):
            yield path, {"skipped": f"analysis failed: {type(result).__name__}: {result}"}, {}
        else:
            yield (path,) + tuple(result)


def _skip_job(reason: str):
    raise ImageSkip(reason)
    yield  # pragma: no cover  (makes this a generator)


def _scan_job(rec: ImageRecord, label: int, mask, source, settings, batch: int,
              classifier, prepared_by=None, curves: bool = True):
    stats: ImageStats = yield from image_job(
        rec.pixels, plan=settings.plan, fill=settings.fill, target=label, mask=mask,
        mask_source=source, chunk=batch, tolerance=settings.tolerance, prepared_by=prepared_by,
        curves=curves)
    if settings.score == "prob":
        probs = stats.base_scores
    elif hasattr(classifier, "probs_from_logits"):   # no extra pass for the probabilities
        probs = np.asarray(classifier.probs_from_logits(stats.base_scores[None])[0], dtype=np.float32)
    else:
        probs = np.asarray(classifier.predict(rec.pixels[None])[0], dtype=np.float32)
    record = _record_from_stats(rec.path, label, stats, probs)
    box = stats.decisive_box or stats.peak_box
    arrays = {"heatmap": stats.heatmap.values.astype(np.float32), "crop": _crop(rec.pixels, box)}
    if mask is not None:
        arrays["mask"] = mask
    return record, arrays
