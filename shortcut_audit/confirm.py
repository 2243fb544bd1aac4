"""After the heatmaps: recurring motifs and the counterfactual tests of each finding.

This is the second half of a scan. It re-decodes the few images it needs (a class's
images with small decisive areas, and a seeded sample of the other classes' images),
so no pixels are kept from the first half:

1. **Motifs.** For each class whose small-area rate stands out from the other classes
   (``motif_margin``), the decisive crops are clustered by appearance
   (:func:`~shortcut_audit.motifs.find_motifs`). A cluster covering ``motif_coverage``
   of the class's correct images becomes a ``recurring-motif`` finding (replacing a
   ``localized`` one for that class: it says more), or, for a ``fixed-position``
   class, evidence added to that finding. Every other judged class gets the
   sufficiency scan (sufficiency.py): patches of its objects pasted into other classes'
   images; the crops of those that pull are clustered the same way, so a sticker the
   model reads as well as the object (hiding it moves nothing) is found too.
2. **Tests.** Each finding gets the test that fits its kind: a transplant at the same
   place (fixed-position), a transplant of the medoid crop onto other objects
   (recurring-motif), a transplant of each image's own decisive region (localized),
   a background swap (background), and beside it a residual transplant that tells an
   image-wide cast from a backdrop (imagewide.py); plus the removal test for regions. The status
   becomes ``confirmed`` or ``not-confirmed`` by the thresholds ``confirm_alpha`` and
   ``confirm_effect``; counts, rates, the p-value and the images used go into the
   finding's evidence.
"""

from __future__ import annotations

import dataclasses
from typing import Callable, Sequence

import numpy as np

from .classes import ClassSummary, ImageSummary
from .dataset import ImageEntry, ImageRecord, iter_records
from .engine import PassEngine
from .errors import UsageError
from .findings import MIN_MOTIF_IMAGES, Finding, Thresholds, motif_candidates
from .imagewide import residual_transplant_job
from .sufficiency import RECEIVERS, SOURCES, sufficiency_job
from .motifs import cut_crop, find_motifs
from .probes import background_swap_job, removal_job, transplant_job
from .regions import tighten_region
from .maps import box_share, estimate_object_mask

__all__ = ["add_motif_findings", "confirm_findings", "crop_side"]


def crop_side(plan, side: int) -> int:
    """Side of a motif crop in pixels: about twice the occlusion patch (at least 8
    pixels, at most half the image), so a decisive sliver is seen with its context."""
    patch = getattr(plan, "patch", None)
    if patch is None:                       # random plans: their largest patch
        patch = getattr(plan, "max_size", 0.125)
    px = patch if isinstance(patch, int) else int(round(float(patch) * side))
    return int(max(8, min(side // 2, 2 * px)))


def _records(entries: Sequence[ImageEntry], classifier) -> dict[str, ImageRecord]:
    out = {}
    for rec in iter_records(entries, size=(classifier.height, classifier.width),
                            channels=classifier.channels, resize=classifier.resize):
        if isinstance(rec, ImageRecord):
            out[rec.path] = rec
    return out


def _mask_of(rec: ImageRecord) -> np.ndarray | None:
    if rec.mask is not None:
        return rec.mask
    return estimate_object_mask(rec.pixels)


def _motif(boxed: list, entries: dict[str, ImageEntry], classifier, *, th: Thresholds,
           side: int, n_images: int) -> dict | None:
    """The evidence of the best motif among the crops around ``(image, box)`` pairs (None:
    no cluster of near-alike crops covers ``motif_coverage`` of ``n_images``)."""
    recs = _records([entries[im.path] for im, _ in boxed], classifier)
    crops, paths = [], []
    for im, box in boxed:
        rec = recs.get(im.path)
        if rec is not None and box is not None:
            crops.append(cut_crop(rec.pixels, box, index=len(crops), min_side=side))
            paths.append(im.path)
    motifs = find_motifs(crops, n_images=n_images, min_coverage=th.motif_coverage) if crops else []
    if not motifs:
        return None
    motif = max(motifs, key=lambda m: (m.coverage, -m.cohesion))
    return {"statistic": "motif_coverage", "value": motif.coverage,
            "threshold": th.motif_coverage, "spread": motif.spread,
            "cohesion": motif.cohesion, "medoid": paths[motif.medoid],
            "medoid_box": crops[motif.medoid].box,
            "member_paths": [paths[i] for i in motif.members],
            "member_boxes": [list(b) for b in motif.boxes], "images": n_images}


def add_motif_findings(findings: list[Finding], classes: list[ClassSummary],
                       images: list[ImageSummary], entries: dict[str, ImageEntry], classifier, *,
                       thresholds: Thresholds, plan, max_examples: int = 8, seed: int = 0,
                       progress: Callable[[dict], None] | None = None) -> tuple[list[Finding], dict[int, str]]:
    """Findings with recurring motifs added (or merged into fixed-position ones): from the
    decisive crops, from the heat peaks off the object, and from the sufficiency scan; and,
    per class index, why the sufficiency scan did not run on a class it should have
    scanned (a reason for the class's ``not_judged``). ``progress`` receives
    ``{"phase": "sufficiency", "done": classes, "total": classes, ...}`` as the
    sufficiency scan goes."""
    th = thresholds
    out = list(findings)
    side = crop_side(plan, min(classifier.height, classifier.width))
    for cls in motif_candidates(classes, images, thresholds=th):
        small = sorted([im for im in images if im.label == cls.index and im.small],
                       key=lambda im: im.path)
        evidence = _motif([(im, im.decisive_box) for im in small], entries, classifier,
                          th=th, side=side, n_images=cls.correct)
        if evidence is None:
            continue
        member_paths = evidence["member_paths"]
        fixed = next((f for f in out if f.class_index == cls.index and f.kind == "fixed-position"), None)
        if fixed is not None:
            i = out.index(fixed)
            out[i] = dataclasses.replace(fixed, evidence=dict(fixed.evidence, motif=evidence))
            continue
        local = next((f for f in out if f.class_index == cls.index and f.kind == "localized"), None)
        finding = Finding(id="", class_name=cls.name, class_index=cls.index, kind="recurring-motif",
                          region=None, evidence=evidence,
                          examples=tuple(member_paths[:max_examples]))
        if local is not None:
            finding = dataclasses.replace(finding, evidence=dict(
                evidence, localized=local.evidence))
            out[out.index(local)] = finding
        else:
            out.append(finding)
    out = _small_things_in_backgrounds(out, classes, images, entries, classifier, th=th, side=side,
                                       max_examples=max_examples)
    out, unscanned = _sufficient_motifs(out, classes, images, entries, classifier, th=th, side=side,
                                        max_examples=max_examples, seed=seed, progress=progress)
    out.sort(key=lambda f: (f.class_index, ("fixed-position", "localized", "recurring-motif",
                                            "background", "image-wide").index(f.kind)))
    return out, unscanned


def _small_things_in_backgrounds(findings: list[Finding], classes: list[ClassSummary],
                                 images: list[ImageSummary], entries: dict[str, ImageEntry],
                                 classifier, *, th: Thresholds, side: int,
                                 max_examples: int) -> list[Finding]:
    """Background findings that may be a small recurring thing, not the backdrop.

    A sticker that lands anywhere in the picture puts the class's heat outside the
    object, so the background rule flags it. When the heat's peaks lie off the object
    (median share on it below ``object_share``) and the crops around them look alike
    (a motif covering ``motif_coverage``), the motif goes into the finding's evidence as
    ``motif_candidate``. A patterned backdrop looks alike everywhere too, so the tests
    decide: :func:`confirm_findings` runs the motif's transplant beside the background
    swap, and the finding becomes the recurring motif only when that transplant confirms.
    """
    by_index = {c.index: c for c in classes}
    out = list(findings)
    for f in findings:
        if f.kind != "background":
            continue
        cls = by_index[f.class_index]
        peak_on = cls.metrics.get("peak_on_object")
        if peak_on is None or peak_on >= th.object_share:
            continue
        mine = sorted([im for im in images if im.label == cls.index and im.correct
                       and im.peak_box is not None and im.peak_on_object is not None
                       and im.peak_on_object < th.object_share], key=lambda im: im.path)
        if len(mine) < MIN_MOTIF_IMAGES:
            continue
        evidence = _motif([(im, im.peak_box) for im in mine], entries, classifier,
                          th=th, side=side, n_images=cls.correct)
        if evidence is None:
            continue
        evidence.update(found_in="heat peaks off the object",
                        examples=evidence["member_paths"][:max_examples])
        out[out.index(f)] = dataclasses.replace(f, evidence=dict(f.evidence, motif_candidate=evidence))
    return out


#: Images in the sufficiency scan's shared pool of receivers, and classes at most that
#: contribute to it (a seeded choice of them when there are more).
_POOL = 4 * SOURCES * RECEIVERS
#: Classes whose sources the sufficiency scan decodes and scans at once.
_CLASSES_AT_ONCE = 8


def _sufficient_motifs(findings: list[Finding], classes: list[ClassSummary],
                       images: list[ImageSummary], entries: dict[str, ImageEntry], classifier, *,
                       th: Thresholds, side: int, max_examples: int, seed: int,
                       progress: Callable[[dict], None] | None = None) -> tuple[list[Finding], dict[int, str]]:
    """Recurring motifs among the patches that *suffice* for a class (sufficiency.py), and
    why the scan did not run on a class (by class index).

    Every judged class without a fixed-position or recurring-motif finding is scanned:
    up to ``SOURCES`` of its correct images with a mask, patches of the motif crop's
    side on the object, pasted into ``RECEIVERS`` other-class images each from one shared,
    seeded pool. The crops around the best patches that pull at least ``sufficiency_pull``
    are clustered; a motif covering ``motif_coverage`` of the sources scanned becomes a
    ``recurring-motif`` finding (replacing a ``localized`` one), tested like any motif.
    """
    out = list(findings)
    unscanned: dict[int, str] = {}
    marked = {f.class_index for f in out if f.kind in ("fixed-position", "recurring-motif")}
    todo = [c for c in classes if c.correct >= th.min_correct_images and c.index not in marked]
    if not todo:
        return out, unscanned
    rng = np.random.default_rng([int(seed), 7])
    by_index = {c.index: c for c in classes}
    correct = sorted([im for im in images if im.correct], key=lambda im: im.path)
    by_class: dict[int, list[ImageSummary]] = {}
    for im in correct:
        by_class.setdefault(im.label, []).append(im)
    # one pool of receivers for every class, decoded once: a few images a class, from at
    # most POOL classes (a seeded choice of them in a large label space)
    labels = sorted(by_class)
    if len(labels) > _POOL:
        labels = sorted(int(v) for v in rng.choice(labels, size=_POOL, replace=False))
    per = max(1, -(-SOURCES * RECEIVERS // max(1, len(labels) - 1)))
    pool = []
    for lab in labels:
        ims = by_class[lab]
        pool += [ims[i] for i in np.sort(rng.choice(len(ims), size=min(per, len(ims)), replace=False))]
    picks: dict[int, list[ImageSummary]] = {}
    for cls in todo:
        own = by_class.get(cls.index, [])
        idx = np.sort(rng.choice(len(own), size=min(SOURCES, len(own)), replace=False)) if own else []
        picks[cls.index] = [own[i] for i in idx]
    pool_recs = _records([entries[im.path] for im in pool], classifier)
    engine = PassEngine.for_classifier(classifier)

    def report(done: int) -> None:
        if progress is not None:
            progress({"phase": "sufficiency", "done": done, "total": len(todo),
                      "passes": engine.stats.passes, "passes_per_second": engine.stats.passes_per_second})

    report(0)
    # a few classes at a time, so that only their sources are decoded at once
    for start in range(0, len(todo), _CLASSES_AT_ONCE):
        chunk = todo[start:start + _CLASSES_AT_ONCE]
        recs = {**pool_recs, **_records([entries[im.path] for c in chunk for im in picks[c.index]
                                          if im.path not in pool_recs], classifier)}
        jobs, used = [], {}
        for cls in chunk:
            srcs = [(im, recs[im.path]) for im in picks[cls.index] if im.path in recs]
            srcs = [(im, r, _mask_of(r)) for im, r in srcs]
            srcs = [(im, r, m) for im, r, m in srcs if m is not None and m.any() and not m.all()]
            others = [im for im in pool if im.label != cls.index and im.path in recs]
            if len(srcs) < MIN_MOTIF_IMAGES:
                unscanned[cls.index] = (
                    f"sufficiency scan not run: {len(srcs)} of {len(picks[cls.index])} sampled correct "
                    f"images had a usable object mask (it needs {MIN_MOTIF_IMAGES}; give masks that outline "
                    f"the object with --masks)")
                continue
            if not others:
                unscanned[cls.index] = "sufficiency scan not run: no other class's image to paste into"
                continue
            receivers = []
            for _ in srcs:
                k = rng.choice(len(others), size=min(RECEIVERS, len(others)), replace=False)
                receivers.append([recs[others[i].path].pixels for i in np.sort(k)])
            used[cls.index] = srcs
            jobs.append((cls.index, sufficiency_job(sources=[(r.pixels, m) for _, r, m in srcs],
                                                    receivers=receivers, suspect=cls.index, side=side,
                                                    min_pull=th.sufficiency_pull)))
        for index, res in sorted(engine.run(jobs), key=lambda kv: kv[0]) if jobs else []:
            if isinstance(res, Exception):
                unscanned[index] = f"sufficiency scan failed: {(str(res).splitlines() or [type(res).__name__])[0]}"
                continue
            finding = _sufficient_motif(by_index[index], used[index], res, classifier, th=th,
                                        max_examples=max_examples)
            if finding is None:
                continue
            local = next((f for f in out if f.class_index == index and f.kind == "localized"), None)
            if local is not None:
                out[out.index(local)] = dataclasses.replace(finding, evidence=dict(finding.evidence,
                                                                                   localized=local.evidence))
            else:
                out.append(finding)
        report(min(start + _CLASSES_AT_ONCE, len(todo)))
    return out, unscanned


def _sufficient_motif(cls: ClassSummary, srcs: list, res: list, classifier, *, th: Thresholds,
                      max_examples: int) -> Finding | None:
    """The recurring-motif finding of one class's sufficiency scan (None: no motif)."""
    crops, paths = [], []
    for (im, rec, _m), r in zip(srcs, res):
        if r is not None and r["pull"] >= th.sufficiency_pull:
            focus = r["focus"]
            crops.append(cut_crop(rec.pixels, focus, index=len(crops),
                                  min_side=int(round((focus[2] - focus[0]) * classifier.width))))
            paths.append(im.path)
    motifs = find_motifs(crops, n_images=len(srcs), min_coverage=th.motif_coverage) if crops else []
    if not motifs:
        return None
    motif = max(motifs, key=lambda m: (m.coverage, -m.cohesion))
    # a thing stuck on the object lies on it; crops that straddle the outline read the
    # object's silhouette (a part of its shape), which is the object's own evidence
    masks_by_path = {im.path: m for im, _r, m in srcs}
    on = float(np.median([box_share(masks_by_path[paths[i]], crops[i].box) for i in motif.members]))
    if on < th.object_share:
        return None
    evidence = {"statistic": "motif_coverage", "value": motif.coverage, "on_object": on,
                "threshold": th.motif_coverage, "spread": motif.spread,
                "cohesion": motif.cohesion, "medoid": paths[motif.medoid],
                "medoid_box": crops[motif.medoid].box,
                "member_paths": [paths[i] for i in motif.members],
                "member_boxes": [list(b) for b in motif.boxes], "images": len(srcs),
                "found_in": "sufficiency scan",
                "sufficiency": {"sources": len(srcs), "pulling": len(crops),
                                "pulling_paths": paths, "pulling_boxes": [list(c.box) for c in crops],
                                "pulls": [None if r is None else r["pull"] for r in res],
                                "threshold": th.sufficiency_pull,
                                "passes": int(sum(r["passes"] for r in res if r is not None))}}
    return Finding(id="", class_name=cls.name, class_index=cls.index, kind="recurring-motif",
                   region=None, evidence=evidence, examples=tuple(evidence["member_paths"][:max_examples]))


def _with_motif_candidates(findings: list[Finding]) -> tuple[list[Finding], set[int]]:
    """The findings with, after each background finding that has a motif candidate, that
    motif as a finding of its own; and the positions of those added motifs."""
    out, added = [], set()
    for f in findings:
        out.append(f)
        cand = f.evidence.get("motif_candidate") if f.kind == "background" else None
        if cand:
            ev = {k: v for k, v in cand.items() if k != "examples"}
            ev["background"] = {k: v for k, v in f.evidence.items() if k != "motif_candidate"}
            added.add(len(out))
            out.append(Finding(id=f.id, class_name=f.class_name, class_index=f.class_index,
                               kind="recurring-motif", region=None, evidence=ev,
                               examples=tuple(cand.get("examples", ()))))
    return out, added


def _image_wide(f: Finding, result, skipped: str | None, target_paths: list[str],
                th: Thresholds) -> Finding:
    """A confirmed background finding becomes ``image-wide`` when the residual transplant
    confirms too: the object's own fine texture carries the class as well as the
    backdrop does, so the evidence is over the whole picture. Otherwise it stays a
    background finding, the residual test kept in its evidence (``image_wide_test``)."""
    if result is None or isinstance(result, Exception):
        reason = (f"test failed: {result}" if isinstance(result, Exception)
                  else skipped or "not enough images (or masks) to run its test")
        return dataclasses.replace(f, evidence=dict(f.evidence, image_wide_test={"ran": False, "reason": reason}))
    d = result.to_dict()
    d["ran"] = True
    for ex in d.get("examples", []):
        if isinstance(ex.get("target"), int) and ex["target"] < len(target_paths):
            ex["target_path"] = target_paths[ex["target"]]
    wide = result.status(alpha=th.confirm_alpha, min_effect=th.confirm_effect)
    if f.status != "confirmed" or wide != "confirmed":
        return dataclasses.replace(f, evidence=dict(f.evidence, image_wide_test=d))
    ev = {k: v for k, v in f.evidence.items() if k not in ("test", "p_value")}
    ev.update(test=d, p_value=result.p_value, background_test=f.evidence["test"],
              background_p_value=f.evidence.get("p_value"))
    return dataclasses.replace(f, kind="image-wide", evidence=ev)


def confirm_findings(findings: list[Finding], images: list[ImageSummary],
                     entries: dict[str, ImageEntry], classifier, *, thresholds: Thresholds,
                     fill, budget: int, seed: int,
                     progress: Callable[[dict], None] | None = None,
                     known_scores: dict[str, np.ndarray] | None = None) -> list[Finding]:
    """Each finding with its counterfactual test run and its status set.

    ``known_scores`` maps an image's path to the class probabilities the scan already
    computed for it, unperturbed; the tests then score only the images they change.
    """
    known_scores = known_scores or {}

    def known(paths: list[str]) -> list[np.ndarray] | None:
        return [known_scores[p] for p in paths] if all(p in known_scores for p in paths) else None

    if not findings:
        return findings
    findings, candidates = _with_motif_candidates(findings)
    rng = np.random.default_rng(seed)
    by_class: dict[int, list[ImageSummary]] = {}
    for im in sorted(images, key=lambda im: im.path):
        by_class.setdefault(im.label, []).append(im)

    def sample(pool: list, n: int) -> list:
        if len(pool) <= n:
            return list(pool)
        idx = np.sort(rng.choice(len(pool), size=n, replace=False))
        return [pool[i] for i in idx]

    # Decide every image each test needs, then decode them once.
    plans = []
    wanted: set[str] = set()
    for f in findings:
        own = [im for im in by_class.get(f.class_index, []) if im.correct]
        others = [im for lab, ims in by_class.items() if lab != f.class_index for im in ims
                  if im.correct]
        own_s, others_s = sample(own, budget), sample(others, budget)
        plans.append((f, own_s, others_s))
        wanted.update(im.path for im in own_s + others_s)
    recs = _records([entries[p] for p in sorted(wanted)], classifier)
    masks: dict[str, np.ndarray | None] = {}      # one mask per image, however many tests use it

    def mask_of(rec: ImageRecord) -> np.ndarray | None:
        if rec.path not in masks:
            masks[rec.path] = _mask_of(rec)
        return masks[rec.path]

    jobs = []
    results_skipped: dict[int, str] = {}        # per test: why its image-wide test did not run
    test_sources: dict[int, list[str]] = {}     # per test: the image path of each source index
    test_targets: dict[int, list[str]] = {}     # and of each target index
    for k, (f, own_s, others_s) in enumerate(plans):
        own_r = [(im, recs[im.path]) for im in own_s if im.path in recs]
        oth_r = [(im, recs[im.path]) for im in others_s if im.path in recs]
        job_seed = int(seed) * 1009 + k
        if not own_r or not oth_r:
            continue
        targets = [(r.pixels, mask_of(r), im.label) for im, r in oth_r]
        test_targets[k] = [im.path for im, _ in oth_r]
        if f.kind == "background":
            def usable(t):
                return t[1] is not None and t[1].any() and not t[1].all()
            own_all = [((r.pixels, mask_of(r), im.label), im.path) for im, r in own_r]
            oth_all = [(t, im.path) for t, (im, _) in zip(targets, oth_r)]
            own_m = [t for t, _ in own_all if usable(t)]
            oth_m = [t for t, _ in oth_all if usable(t)]
            test_sources[k] = [p for t, p in own_all if usable(t)]
            test_targets[k] = [p for t, p in oth_all if usable(t)]
            if len(own_m) >= 2 and len(oth_m) >= 2:
                jobs.append(((k, "test"), background_swap_job(
                    own=own_m, others=oth_m, suspect=f.class_index, trials=budget, seed=job_seed,
                    own_scores=known(test_sources[k]), others_scores=known(test_targets[k]))))
                try:
                    jobs.append(((k, "image-wide"), residual_transplant_job(
                        own=own_m, others=oth_m, suspect=f.class_index,
                        flat_share=thresholds.flat_tile_share, trials=budget, seed=job_seed + 1,
                        others_scores=known(test_targets[k]))))
                except UsageError as exc:
                    results_skipped[k] = str(exc)
            continue
        control_masks = None
        if f.kind == "fixed-position" and f.region is not None:
            tight = tighten_region(f.region, [r.pixels for _, r in own_r], [r.pixels for _, r in oth_r])
            if tight is not None and tight != f.region:
                f = dataclasses.replace(f, region=tight, evidence=dict(f.evidence, heat_region=f.region))
                plans[k] = (f, own_s, others_s)
            sources = [(r.pixels, f.region) for _, r in own_r]
            test_sources[k] = [im.path for im, _ in own_r]
            boxes = [f.region] * len(own_r)
            placement = "same"
        elif f.kind == "recurring-motif":
            medoid = recs.get(f.evidence["medoid"])
            if medoid is None:
                medoid = _records([entries[f.evidence["medoid"]]], classifier).get(f.evidence["medoid"])
            if medoid is None:
                continue
            sources = [(medoid.pixels, f.evidence["medoid_box"])]
            control_masks = [mask_of(medoid)]
            test_sources[k] = [f.evidence["medoid"]]
            boxed = [(im, r) for im, r in own_r if im.decisive_box is not None]
            boxes = [im.decisive_box for im, _ in boxed]
            if f.evidence.get("found_in") == "sufficiency scan":
                # hide the motif where the scan found it: is it needed, or only sufficient?
                suff = f.evidence["sufficiency"]
                members, member_boxes = suff["pulling_paths"], suff["pulling_boxes"]
                have = {**recs, **_records([entries[p] for p in members if p not in recs], classifier)}
                own_im = {im.path: im for im in by_class.get(f.class_index, []) if im.correct}
                boxed = [(own_im[p], have[p]) for p in members if p in have and p in own_im]
                boxes = [b for p, b in zip(members, member_boxes) if p in have and p in own_im]
            own_r = boxed
            placement = "on-object"
        else:
            boxed = [(im, r) for im, r in own_r if im.decisive_box is not None]
            if not boxed:
                continue
            sources = [(r.pixels, im.decisive_box) for im, r in boxed]
            control_masks = [mask_of(r) for _, r in boxed]
            test_sources[k] = [im.path for im, _ in boxed]
            boxes = [im.decisive_box for im, _ in boxed]
            own_r = boxed
            placement = "on-object"
        jobs.append(((k, "test"), transplant_job(sources=sources, targets=targets, suspect=f.class_index,
                                                 placement=placement, trials=budget, seed=job_seed,
                                                 control_masks=control_masks,
                                                 target_scores=known(test_targets[k]))))
        if own_r:
            jobs.append(((k, "removal"), removal_job(images=[(r.pixels, im.label) for im, r in own_r],
                                                     boxes=boxes, fill_fn=fill, suspect=f.class_index,
                                                     image_scores=known([im.path for im, _ in own_r]))))

    engine = PassEngine.for_classifier(classifier)
    results: dict = {}
    for key, res in engine.run(jobs):
        results[key] = res
        if progress is not None:
            progress({"phase": "tests", "done": len(results), "total": len(jobs),
                      "passes": engine.stats.passes, "passes_per_second": engine.stats.passes_per_second})

    out = []
    for k, (f, own_s, others_s) in enumerate(plans):
        test = results.get((k, "test"))
        removal = results.get((k, "removal"))
        if test is None or isinstance(test, Exception):
            reason = (f"test failed: {test}" if isinstance(test, Exception)
                      else "not enough images (or masks) to run its test")
            out.append(dataclasses.replace(f, status="not-confirmed", evidence=dict(
                f.evidence, test={"ran": False, "reason": reason}, p_value=None)))
            continue
        if isinstance(removal, dict):
            test = dataclasses.replace(test, removal=removal)
        status = test.status(alpha=thresholds.confirm_alpha, min_effect=thresholds.confirm_effect)
        d = test.to_dict()
        d["ran"] = True
        src_paths = test_sources.get(k, [])
        tgt_paths = test_targets.get(k, [])
        for ex in d.get("examples", []):
            if isinstance(ex.get("source"), int) and ex["source"] < len(src_paths):
                ex["source_path"] = src_paths[ex["source"]]
            if isinstance(ex.get("target"), int) and ex["target"] < len(tgt_paths):
                ex["target_path"] = tgt_paths[ex["target"]]
        d["images"] = {"own": [im.path for im in own_s], "others": [im.path for im in others_s]}
        f = dataclasses.replace(f, status=status, evidence=dict(f.evidence, test=d, p_value=test.p_value))
        if f.kind == "background":
            f = _image_wide(f, results.get((k, "image-wide")), results_skipped.get(k),
                            tgt_paths, thresholds)
        out.append(f)
    # A background finding and its motif candidate: the motif stands in for it only when
    # its own transplant confirms (a small recurring thing, not the backdrop).
    kept = []
    for i, f in enumerate(out):
        if i in candidates:
            if f.status == "confirmed":
                kept[-1] = f
            continue
        kept.append(f)
    return kept
