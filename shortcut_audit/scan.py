"""The audit of a labelled image set: ``scan``.

``scan`` lists and decodes the images (dataset.py), runs one job per image through the
batching engine (heatmap, decisive area, deletion and insertion curves, mask tests),
keeps each image's results in the store as soon as they exist, then aggregates per
class, applies the finding rules, looks for recurring motifs, runs the counterfactual
tests, and writes audit.json. The figures and report.html are the caller's to write
(``shortcut_audit.report.write_scan_report``; the command line does it).

An interrupted scan keeps every finished image; the same command resumes it and gives
the same audit.json.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from ._version import __version__
from .confirm import add_motif_findings, confirm_findings
from .classes import ClassAccumulator, ClassSummary, ImageSummary, summarise_classes
from .dataset import ImageEntry, Skip
from .engine import SCORES, PassEngine, make_scorer
from .errors import DataError, UsageError
from .findings import FAIL_ON, Finding, Thresholds, judge, not_judged, object_part_note
from .listing import class_names, list_images
from .model import ModelConfig, OnnxClassifier
from .options import some_names
from .occlusion import Fill, GridPlan, Plan, RandomPatchPlan, SmoothMaskPlan
from .sensitivity import CURVE_IMAGES
from .perimage import analyse_entries, curve_sample
from .store import ResultStore, remove_stale_temporaries, write_json

__all__ = ["ScanSettings", "AuditResult", "audit", "analyse_entries", "DEFAULT_PLAN", "DEFAULT_FILL", "make_scorer"]

#: 8-pixel patches at stride 4 on a 64-pixel input: 225 passes an image.
DEFAULT_PLAN = GridPlan(patch=0.125, stride=0.0625)
DEFAULT_FILL = Fill(kind="mean")
SCHEMA = 1


@dataclass(frozen=True, kw_only=True)
class ScanSettings:
    """Everything that decides an audit's numbers (written into audit.json)."""

    plan: Plan = DEFAULT_PLAN
    fill: Fill = DEFAULT_FILL
    seed: int = 0
    score: str = "prob"
    thresholds: Thresholds = field(default_factory=Thresholds)
    confirm: bool = True
    test_budget: int = 40
    per_class: int | None = None
    tolerance: float | None = None
    curve_images: int | None = CURVE_IMAGES

    def __post_init__(self) -> None:
        if self.tolerance is not None and not isinstance(self.plan, (RandomPatchPlan, SmoothMaskPlan)):
            raise UsageError("--tolerance applies to --plan random or rise; leave it out for a grid "
                             "or adaptive plan.")
        if self.score not in SCORES:
            raise UsageError(f"--score must be {' or '.join(SCORES)}; got {self.score!r}.")
        if not isinstance(self.seed, int) or isinstance(self.seed, bool):
            raise UsageError(f"--seed must be a whole number; got {self.seed!r}.")
        if not isinstance(self.test_budget, int) or self.test_budget < 4:
            raise UsageError(f"--test-budget must be a whole number of at least 4; got {self.test_budget!r}.")
        if self.per_class is not None and (not isinstance(self.per_class, int) or self.per_class < 1):
            raise UsageError(f"--per-class must be a whole number of at least 1; got {self.per_class!r}.")
        if self.curve_images is not None and (isinstance(self.curve_images, bool)
                                              or not isinstance(self.curve_images, int) or self.curve_images < 1):
            raise UsageError(f"--curve-images must be a whole number of at least 1; got {self.curve_images!r}. "
                             f"Leave it out for the default of {CURVE_IMAGES} images a class.")
        # One seed for everything random: the plan's and the noise fill's follow it.
        if isinstance(self.plan, (RandomPatchPlan, SmoothMaskPlan)) and self.plan.seed != self.seed:
            object.__setattr__(self, "plan", dataclasses.replace(self.plan, seed=self.seed))
        if self.fill.kind == "noise" and self.fill.seed != self.seed:
            object.__setattr__(self, "fill", dataclasses.replace(self.fill, seed=self.seed))

    def to_dict(self) -> dict:
        return {"plan": self.plan.to_dict(), "fill": self.fill.to_dict(), "seed": self.seed,
                "score": self.score, "thresholds": self.thresholds.to_dict(),
                "confirm": self.confirm, "test_budget": self.test_budget,
                "per_class": self.per_class, "tolerance": self.tolerance, "curve_images": self.curve_images}


@dataclass(frozen=True, kw_only=True)
class AuditResult:
    """The outcome of a scan; ``to_dict()`` is audit.json."""

    model: dict
    dataset: dict
    settings: ScanSettings
    classes: list[ClassSummary]
    findings: list[Finding]
    images: list[ImageSummary]
    skipped: list[Skip]
    run: dict
    out: Path | None = None

    def to_dict(self) -> dict:
        labels = self.model.get("labels", [])
        return {
            "schema": SCHEMA,
            "tool_version": __version__,
            "model": self.model,
            "dataset": self.dataset,
            "settings": self.settings.to_dict(),
            "classes": [{"name": c.name, "images": c.images, "correct": c.correct,
                         "accuracy": c.accuracy, "mean_confidence": c.mean_confidence,
                         "place_box": c.place_box, "metrics": c.metrics,
                         "not_judged": list(c.not_judged), "notes": list(c.notes),
                         "peak_place_box": c.peak_place_box} for c in self.classes],
            "findings": [f.to_dict() for f in self.findings],
            "images": [_image_dict(im, labels) for im in self.images],
            "skipped": [{"path": s.path, "reason": s.reason} for s in self.skipped],
            "run": self.run,
        }

    def at_or_above(self, gate: str) -> list[Finding]:
        """Findings at or above ``gate`` (``suspect`` < ``confirmed``; ``never`` = none)."""
        if gate == "never":
            return []
        if gate == "suspect":
            return [f for f in self.findings if f.status in ("suspect", "confirmed")]
        if gate == "confirmed":
            return [f for f in self.findings if f.status == "confirmed"]
        raise UsageError(f"--fail-on must be one of {', '.join(FAIL_ON)}; got {gate!r}.")


def _label_key(name: str) -> str:
    return " ".join(name.replace("_", " ").replace("-", " ").casefold().split())


def match_labels(dataset_names: Sequence[str], labels: Sequence[str]) -> dict[str, int]:
    """Dataset class name -> model output index.

    A name equal to a label matches it; otherwise a name that equals exactly one label
    once case, underscores and hyphens are ignored (a folder ``Egyptian_cat`` for the
    label ``Egyptian cat``) matches that one. Names that match nothing are left out.
    """
    index = {name: i for i, name in enumerate(labels)}
    loose: dict[str, list[int]] = {}
    for i, name in enumerate(labels):
        loose.setdefault(_label_key(name), []).append(i)
    out = {}
    for name in dataset_names:
        if name in index:
            out[name] = index[name]
        elif len(loose.get(_label_key(name), ())) == 1:
            out[name] = loose[_label_key(name)][0]
    return out


def _image_dict(im: ImageSummary, labels: Sequence[str]) -> dict:
    d = dataclasses.asdict(im)
    d["label"] = labels[im.label] if 0 <= im.label < len(labels) else None
    d["predicted"] = labels[im.predicted] if 0 <= im.predicted < len(labels) else None
    return d


def _fingerprint(classifier: OnnxClassifier, settings: ScanSettings, masks: Any) -> dict:
    s = settings.to_dict()
    # Thresholds and confirmation do not change per-image results: they stay out.
    for key in ("thresholds", "confirm", "test_budget", "per_class"):
        s.pop(key)
    return {"schema": SCHEMA, "model_sha256": classifier.sha256,
            "model": _model_description(classifier), "settings": s, "masks": bool(masks)}


def _model_description(classifier) -> dict:
    """What decides the numbers: the machine-dependent batch size and threads stay out."""
    d = dict(classifier.describe())
    d.pop("batch_size", None)
    d.pop("threads", None)
    return d


def _source(e: ImageEntry) -> list:
    """What a stored result was made from: size and modification time of the image (and mask)."""
    sig = []
    for f in (e.file, e.mask_file):
        try:
            st = os.stat(f) if f is not None else None
        except OSError:
            st = None
        sig.append(None if st is None else [st.st_size, st.st_mtime_ns])
    return sig


def audit(images: str | os.PathLike, model: str | os.PathLike | OnnxClassifier, *,
         out: str | os.PathLike | None = None,
         masks: str | os.PathLike | None = None,
         manifest: str | os.PathLike | None = None,
         model_config: ModelConfig | None = None,
         settings: ScanSettings | None = None,
         estimate_masks: bool = True,
         progress: Callable[[dict], None] | None = None,
         cluster: str | None = None) -> AuditResult:
    """Audit a labelled image set.

    Parameters
    ----------
    images : path
        The dataset root (one folder per class, or the root a ``manifest`` is relative to).
    model : path or OnnxClassifier
    out : path, optional
        Output folder: audit.json and the per-image store ``results/``. Without it
        nothing is written and nothing resumes. Write figures/ and report.html into it
        with :func:`shortcut_audit.report.write_scan_report`.
    masks : path, optional
        A folder of object masks mirroring the image tree.
    manifest : path, optional
        A CSV ``path,label[,mask]``.
    model_config : ModelConfig, optional
        Model options (command line merged over a TOML file).
    settings : ScanSettings, optional
    estimate_masks : bool
        Estimate object masks on plain backdrops where none is given.
    progress : callable, optional
        Called with ``{"done", "total", "passes", "passes_per_second", "phase"}``.
    cluster : str, optional
        Run the per-image half on Dask: a scheduler address (``tcp://host:8786``) or
        ``local:N`` worker processes (cluster.py; needs the ``cluster`` extra).

    Returns
    -------
    AuditResult

    Raises
    ------
    UsageError, ModelError, DataError, OutputError
    """
    t_start = time.perf_counter()
    settings = settings or ScanSettings()
    if cluster is not None:
        from .cluster import check_cluster
        check_cluster(cluster)        # a malformed --cluster or a missing Dask fails first
    entries, skipped = list_images(images, manifest=manifest, masks=masks, per_class=settings.per_class)
    if out is not None:  # an output folder inside the image folder is not data
        out_real = Path(out).resolve()
        entries = [e for e in entries if not e.file.resolve().is_relative_to(out_real)]
        skipped = [s for s in skipped
                   if not (Path(images) / s.path.rstrip("/")).resolve().is_relative_to(out_real)]
    if not entries:
        raise DataError(f"no usable images under {images}; put images in one folder per class "
                        f"or pass --manifest.")
    names = class_names(entries)
    if isinstance(model, OnnxClassifier):
        classifier = model
    else:
        classifier = OnnxClassifier(model, model_config, dataset_labels=names)
    label_index = match_labels(names, classifier.labels)
    usable: list[ImageEntry] = []
    for e in entries:
        if e.label is None or e.label not in label_index:
            skipped.append(Skip(path=e.path, reason=(
                f"label {e.label!r} is not one of the model's labels ({some_names(classifier.labels)})"
                if e.label is not None else "no label")))
        else:
            usable.append(e)
    if not usable:
        raise DataError(
            f"none of the dataset's labels ({some_names(names)}) is one of the model's labels "
            f"({some_names(classifier.labels)}); pass --labels with the model's class names in output order.")

    out_dir = Path(out) if out is not None else None
    store = None
    if out_dir is not None:
        for folder in (out_dir, out_dir / "figures"):
            remove_stale_temporaries(folder)
        store = ResultStore(out_dir / "results", _fingerprint(classifier, settings, masks))
    shape = (classifier.height, classifier.width)
    batch = classifier.batch_size
    source = {e.path: _source(e) for e in usable}
    todo = [e for e in usable if store is None or not store.has(e.path, source[e.path])]
    done_count = len(usable) - len(todo)
    memory: dict[str, tuple[dict, dict]] = {}

    def report_progress(phase: str, engine: PassEngine | None = None) -> None:
        if progress is not None:
            progress({"phase": phase, "done": done_count, "total": len(usable),
                      "passes": engine.stats.passes if engine else 0,
                      "passes_per_second": engine.stats.passes_per_second if engine else 0.0})

    if progress is not None and todo and hasattr(classifier, "measured_rate"):   # the cost, before it is spent
        from .cost import estimate_cost
        counts: dict[str, int] = {}
        for e in todo:
            counts[e.label] = counts.get(e.label, 0) + 1
        progress({"phase": "estimate", "done": done_count, "total": len(usable), "passes": 0,
                  "passes_per_second": 0.0,
                  "estimate": estimate_cost(counts, settings.plan, *shape, rate=classifier.measured_rate,
                                            masks=bool(masks) or estimate_masks, per_class=(10, 50),
                                            curve_images=settings.curve_images)})
    engine = PassEngine.for_classifier(classifier, settings.score,
                                       on_batch=lambda n: report_progress("images", engine))
    report_progress("images", engine)
    curve_paths = curve_sample(usable, settings.curve_images)
    if cluster is None:
        results = analyse_entries(todo, classifier, settings, estimate_masks=estimate_masks,
                                  label_index=label_index, engine=engine, curve_paths=curve_paths)
    else:
        from .cluster import iter_cluster_results
        results = iter_cluster_results(todo, classifier.path, classifier.config, settings,
                                       label_index=label_index, estimate_masks=estimate_masks,
                                       address=cluster, sha256=classifier.sha256,
                                       stats=engine.stats, curve_paths=curve_paths)
    with contextlib.closing(results):   # an error below cancels the cluster's tasks at once
        for path, record, arrays in results:
            done_count += 1
            if store is not None:
                store.put(path, dict(record, source=source[path]), arrays)
            else:
                memory[path] = (record, arrays)
            report_progress("images", engine)

    # Aggregate from the store, image by image.
    acc = ClassAccumulator(len(classifier.labels), shape)
    summaries: list[ImageSummary] = []
    known_scores: dict[str, np.ndarray] = {}    # unperturbed probabilities, reused by the tests
    for e in usable:
        got = store.get(e.path) if store is not None else memory.get(e.path)
        if got is None:
            skipped.append(Skip(path=e.path, reason="result missing from the store; rerun the scan"))
            continue
        record, arrays = got
        if "skipped" in record:
            skipped.append(Skip(path=e.path, reason=record["skipped"]))
            continue
        record = dict(record, path=e.path)
        im = ImageSummary.from_record(record)
        summaries.append(im)
        if record.get("probs") is not None:
            known_scores[e.path] = np.asarray(record["probs"], dtype=np.float32)
        if "heatmap" in arrays:
            acc.add(im.label, arrays["heatmap"].astype(np.float64))
    skipped.sort(key=lambda s: s.path)
    classes = summarise_classes(summaries, classifier.labels, accumulator=acc, shape=shape)
    classes = [dataclasses.replace(c, not_judged=not_judged(c, settings.thresholds)) for c in classes]
    findings = judge(classes, summaries, thresholds=settings.thresholds)
    by_path = {e.path: e for e in usable}
    findings, unscanned = add_motif_findings(findings, classes, summaries, by_path, classifier,
                                             thresholds=settings.thresholds, plan=settings.plan,
                                             seed=settings.seed, progress=progress)
    classes = [dataclasses.replace(c, not_judged=c.not_judged + (unscanned[c.index],))
               if c.index in unscanned else c for c in classes]
    findings = [dataclasses.replace(f, id=f"F{i + 1}") for i, f in enumerate(findings)]
    if settings.confirm:
        findings = confirm_findings(findings, summaries, by_path, classifier,
                                    thresholds=settings.thresholds, fill=settings.fill,
                                    budget=settings.test_budget, seed=settings.seed,
                                    progress=progress, known_scores=known_scores)
    # the object-part note says a small decisive region on the object is not a shortcut by
    # this audit's evidence; a confirmed motif on that object says otherwise, so it wins
    motifs = {f.class_index for f in findings if f.kind == "recurring-motif" and f.status == "confirmed"}
    classes = [dataclasses.replace(c, notes=tuple(n for n in [object_part_note(c, classes, settings.thresholds)]
                                                  if n and c.index not in motifs))
               for c in classes]

    elapsed = time.perf_counter() - t_start
    model_info = {"path": str(classifier.path), "sha256": classifier.sha256,
                  "input": _model_description(classifier), "labels": list(classifier.labels)}
    dataset_info = {"root": str(images), "masks": str(masks) if masks else None,
                    "manifest": str(manifest) if manifest else None,
                    "listed": len(entries), "audited": len(summaries), "skipped": len(skipped)}
    result = AuditResult(
        model=model_info, dataset=dataset_info, settings=settings, classes=classes,
        findings=findings, images=sorted(summaries, key=lambda s: s.path), skipped=skipped,
        run={"elapsed_seconds": round(elapsed, 2), "passes_this_run": engine.stats.passes,
             "passes_per_second": round(engine.stats.passes_per_second, 1),
             "resumed_images": len(usable) - len(todo), "batch_size": batch,
             "threads": classifier.config.threads},
        out=out_dir)
    if out_dir is not None:
        write_json(out_dir / "audit.json", result.to_dict())
    return result
