"""The comparison of two audits of the same images, from their audit.json dicts.

:func:`compare_audits` lines up, class by class, every statistic the findings read,
image by image, estimates each difference (after minus before) with a paired bootstrap
over images (:mod:`~shortcut_audit.intervals`), matches the two audits' findings by class
and kind and gives each a verdict (:data:`VERDICTS`). Pure: dicts in, a
:class:`CompareResult` out; :mod:`~shortcut_audit.compare` runs the audits or reads them
and writes compare.json. See :mod:`~shortcut_audit.compare` for the statistics.
"""

from __future__ import annotations

import dataclasses
import json
import warnings
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from ._version import __version__
from .classes import BOX_MAX_AREA, SMALL_AREA, place_map
from .errors import UsageError
from .intervals import (CONFIDENCE, NEGLIGIBLE, Interval, _stat,  # noqa: F401 (re-exported)
                        binomial_bootstrap, paired_bootstrap)
from .maps import box_of

__all__ = [
    "Interval",
    "Difference",
    "ClassComparison",
    "FindingComparison",
    "CompareResult",
    "compare_audits",
    "paired_bootstrap",
    "binomial_bootstrap",
    "STATISTICS",
    "VERDICTS",
    "FAIL_ON",
    "NEGLIGIBLE",
]

SCHEMA = 1
FAIL_ON = ("new", "persists", "never")

#: name -> (what a reader sees, what is resampled and how it is summarised).
STATISTICS: dict[str, str] = {
    "accuracy": "accuracy",
    "mean_confidence": "mean confidence",
    "small_area_rate": f"decisive-area rate (decision moves with <= {SMALL_AREA:.0%} hidden)",
    "box_agreement": "box agreement (decisive box covers the place)",
    "median_background_share": "median background share",
    "object_erased_survival": "survives the object erased",
    "motif_coverage": "motif coverage",
    "test_rate": "transplant rate",
    "control_rate": "control rate",
}

#: verdict -> meaning (the order is the order of the verdict table).
VERDICTS: dict[str, str] = {
    "new": "absent before, present after",
    "persists": "present before and after, its statistic not clearly lower",
    "weakened": "present before and after, its statistic clearly lower",
    "unclear": "absent after, but its statistic is not clearly lower: it may only have slipped under the threshold",
    "resolved": "present before, absent after (or cleared by its counterfactual test after, "
                "with a clearly lower test rate), and its statistic or test rate clearly lower",
    "cleared": "never confirmed: its counterfactual test cleared it before, and after it is "
               "absent or cleared again",
}

_KIND_STATISTIC = {"localized": "small_area_rate", "fixed-position": "box_agreement",
                   "background": "median_background_share", "recurring-motif": "motif_coverage",
                   "image-wide": "median_background_share"}


# --------------------------------------------------------------------------- results

@dataclass(frozen=True, kw_only=True)
class Difference:
    """One statistic before and after, and the interval of after minus before.

    ``images`` is the number of items resampled (paired images, or trials);
    ``before_images`` / ``after_images`` the number each side's statistic is taken over
    (e.g. the correctly predicted images for a rate among them).
    """

    name: str
    label: str
    before: float | None
    after: float | None
    difference: float | None
    low: float | None
    high: float | None
    images: int
    before_images: int
    after_images: int
    method: str
    resamples: int = 0

    @property
    def verdict(self) -> str:
        return "change" if self.changed else "no clear change"

    @property
    def changed(self) -> bool:
        return self.low is not None and (self.low > NEGLIGIBLE or self.high < -NEGLIGIBLE)

    @property
    def clearly_lower(self) -> bool:
        return self.low is not None and self.high < -NEGLIGIBLE

    @property
    def contains_zero(self) -> bool:
        return self.low is not None and self.low <= NEGLIGIBLE and self.high >= -NEGLIGIBLE

    def to_dict(self) -> dict:
        return {"name": self.name, "label": self.label, "before": self.before, "after": self.after,
                "difference": self.difference,
                "interval": None if self.low is None else [self.low, self.high],
                "confidence": CONFIDENCE, "verdict": self.verdict, "images": self.images,
                "before_images": self.before_images, "after_images": self.after_images,
                "method": self.method, "resamples": self.resamples}


@dataclass(frozen=True, kw_only=True)
class ClassComparison:
    """One class: its paired images and every statistic side by side."""

    name: str
    images: int
    place_box: list[float] | None
    place_from: str | None            # "before", "after" or None (no small boxes anywhere)
    statistics: tuple[Difference, ...]

    def get(self, name: str) -> Difference | None:
        return next((d for d in self.statistics if d.name == name), None)

    def to_dict(self) -> dict:
        return {"name": self.name, "images": self.images,
                "place": {"box": self.place_box, "from": self.place_from},
                "statistics": [d.to_dict() for d in self.statistics]}


@dataclass(frozen=True, kw_only=True)
class FindingComparison:
    """One (class, kind) found by either audit."""

    class_name: str
    kind: str
    verdict: str
    before_id: str | None
    after_id: str | None
    before_status: str                # suspect | confirmed | not-confirmed | absent
    after_status: str
    statistic: Difference
    tests: tuple[Difference, ...] = ()
    region_before: list[float] | None = None
    region_after: list[float] | None = None
    examples: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {"class": self.class_name, "kind": self.kind, "verdict": self.verdict,
                "meaning": VERDICTS[self.verdict],
                "before": {"id": self.before_id, "status": self.before_status, "region": self.region_before},
                "after": {"id": self.after_id, "status": self.after_status, "region": self.region_after},
                "statistic": self.statistic.to_dict(), "tests": [t.to_dict() for t in self.tests],
                "examples": list(self.examples)}


@dataclass(frozen=True, kw_only=True)
class CompareResult:
    """The outcome of :func:`compare`; ``to_dict()`` is compare.json."""

    mode: str                               # "models" or "audits"
    before: dict                            # {"audit": folder, "model": {...}, "findings": n}
    after: dict
    before_dir: Path | None
    after_dir: Path | None
    image_root: Path | None
    input: dict                             # the before model's input (size, channels, resize)
    images: dict                            # {"paired", "only_before", "only_after"}
    classes: tuple[ClassComparison, ...]
    findings: tuple[FindingComparison, ...]
    settings: dict
    notes: tuple[str, ...] = ()
    out: Path | None = None

    def counts(self) -> dict[str, int]:
        return {v: sum(1 for f in self.findings if f.verdict == v) for v in VERDICTS}

    def exit_code(self, fail_on: str) -> int:
        """1 when a finding is at or above the gate, else 0.

        ``new``: any new finding. ``persists``: any finding still present after
        (``persists``, ``weakened``), absent but not shown lower (``unclear``), or
        ``new``. ``never``: 0.

        Raises
        ------
        UsageError
            ``fail_on`` is not one of :data:`FAIL_ON`.
        """
        if fail_on not in FAIL_ON:
            raise UsageError(f"--fail-on must be new, persists or never; got {fail_on!r}.")
        if fail_on == "never":
            return 0
        gate = {"new"} if fail_on == "new" else {"new", "persists", "weakened", "unclear"}
        return int(any(f.verdict in gate for f in self.findings))

    def to_dict(self) -> dict:
        return {"schema": SCHEMA, "tool_version": __version__, "mode": self.mode,
                "before": self.before, "after": self.after, "images": self.images,
                "settings": self.settings, "notes": list(self.notes),
                "verdicts": self.counts(), "verdict_meanings": VERDICTS,
                "findings": [f.to_dict() for f in self.findings],
                "classes": [c.to_dict() for c in self.classes]}



# --------------------------------------------------------------------------- matching

def _listed(audit: dict) -> dict[str, str | None]:
    """path -> label of every image the audit listed (audited or skipped)."""
    out: dict[str, str | None] = {s["path"]: None for s in audit.get("skipped", [])}
    out.update({im["path"]: im.get("label") for im in audit["images"]})
    return out


def _check_same_images(before: dict, after: dict) -> None:
    lb, la = _listed(before), _listed(after)
    only_b, only_a = sorted(set(lb) - set(la)), sorted(set(la) - set(lb))
    if only_b or only_a:
        def some(paths: list[str]) -> str:
            return ", ".join(paths[:3]) + (", ..." if len(paths) > 3 else "")
        parts = []
        if only_b:
            parts.append(f"{len(only_b)} only in the before audit ({some(only_b)})")
        if only_a:
            parts.append(f"{len(only_a)} only in the after audit ({some(only_a)})")
        raise UsageError("the two audits are not of the same images: " + "; ".join(parts)
                         + ". Compare audits of one image set, or pass IMAGES with --before and "
                           "--after to scan both models on the same images.")
    relabelled = sorted(p for p in lb if lb[p] is not None and la[p] is not None and lb[p] != la[p])
    if relabelled:
        p = relabelled[0]
        raise UsageError(f"the two audits label {len(relabelled)} image(s) differently (e.g. {p}: "
                         f"{lb[p]!r} before, {la[p]!r} after); compare audits of one labelled image set.")


def _settings_notes(before: dict, after: dict) -> list[str]:
    notes = []
    sb, sa = before.get("settings", {}), after.get("settings", {})
    for key in ("plan", "fill", "seed", "score"):
        if sb.get(key) != sa.get(key):
            notes.append(f"the audits' {key} differ ({json.dumps(sb.get(key), sort_keys=True)} before, "
                         f"{json.dumps(sa.get(key), sort_keys=True)} after): part of each difference "
                         f"may come from the settings, not the model.")
    if sb.get("thresholds") != sa.get("thresholds"):
        notes.append("the audits' thresholds differ: a finding may appear or vanish through the "
                     "thresholds alone; the intervals of the statistics are not affected.")
    if _size(before) != _size(after):
        notes.append(f"the models' input sizes differ ({_size(before)} before, {_size(after)} after): "
                     f"places and heatmaps are compared in fractions of the image.")
    return notes


def _size(audit: dict) -> tuple[int, int]:
    try:
        h, w = audit["model"]["input"]["input"]["size"]
        return int(h), int(w)
    except (KeyError, TypeError, ValueError):
        return (64, 64)


def _model_info(audit: dict, folder: Path | None) -> dict:
    m = audit.get("model", {})
    return {"audit": str(folder) if folder is not None else None,
            "model": {"path": m.get("path"), "sha256": m.get("sha256")},
            "findings": len(audit.get("findings", []))}


# --------------------------------------------------------------------------- statistics

def _area(box: Sequence[float] | None) -> float:
    if box is None:
        return 1.0
    return max(0.0, box[2] - box[0]) * max(0.0, box[3] - box[1])


def _correct(im: dict) -> bool:
    return im.get("predicted") is not None and im.get("predicted") == im.get("label")


def _small_box(im: dict) -> list[float] | None:
    """The image's decisive box when it counts for a place, as in classes.summarise_classes:
    a correct image whose decision moves with at most SMALL_AREA hidden, box <= BOX_MAX_AREA."""
    box, area = im.get("decisive_box"), im.get("decisive_area")
    if (not _correct(im) or box is None or area is None or area > SMALL_AREA
            or _area(box) > BOX_MAX_AREA):
        return None
    return box


def _place(images: list[dict], shape: tuple[int, int]) -> tuple[tuple[float, float], list[float]] | None:
    """The centre of the pixel most small decisive boxes cover (fractions x, y) and the place box."""
    boxes = [b for b in (_small_box(im) for im in images) if b is not None]
    if not boxes:
        return None
    pm = place_map(boxes, shape)
    peak = pm.max()
    r, c = np.unravel_index(int(np.argmax(pm)), pm.shape)
    centre = ((c + 0.5) / shape[1], (r + 0.5) / shape[0])
    return centre, box_of(pm >= max(1.0, 0.5 * peak))


def _covers(box: Sequence[float], point: tuple[float, float], shape: tuple[int, int]) -> bool:
    """Whether ``box`` covers the pixel holding ``point``, with the pixel rule of place_map."""
    h, w = shape
    r, c = min(int(point[1] * h), h - 1), min(int(point[0] * w), w - 1)
    return (int(np.floor(box[1] * h)) <= r < int(np.ceil(box[3] * h))
            and int(np.floor(box[0] * w)) <= c < int(np.ceil(box[2] * w)))


def _values(name: str, images: list[dict], shape: tuple[int, int], *,
            point: tuple[float, float] | None = None, members: set[str] | None = None) -> np.ndarray:
    """One value per image for statistic ``name`` (NaN: not in its denominator)."""
    nan = float("nan")
    out = []
    for im in images:
        right = _correct(im)
        if name == "accuracy":
            v = float(right)
        elif name == "mean_confidence":
            v = float(im["confidence"])
        elif name == "small_area_rate":
            area = im.get("decisive_area")
            v = float(area is not None and area <= SMALL_AREA) if right else nan
        elif name == "box_agreement":
            box = _small_box(im)
            v = (float(box is not None and point is not None and _covers(box, point, shape))
                 if right else nan)
        elif name == "median_background_share":
            share = im.get("background_share")
            v = float(share) if share is not None else nan
        elif name == "object_erased_survival":
            s = im.get("survives_object_erased")
            v = float(bool(s)) if right and s is not None else nan
        elif name == "motif_coverage":
            v = float(im["path"] in (members or set()))
        else:  # pragma: no cover - guarded by the callers
            raise ValueError(name)
        out.append(v)
    return np.asarray(out, dtype=np.float64)


def _class_seed(seed: int, name: str, salt: str = "") -> np.random.SeedSequence:
    return np.random.SeedSequence([int(seed), zlib.crc32(f"{name}\x00{salt}".encode("utf-8"))])


def _paired(name: str, vb: np.ndarray, va: np.ndarray, *, seed, resamples: int, label: str | None = None) -> Difference:
    statistic = "median" if name == "median_background_share" else "mean"
    iv = paired_bootstrap(vb, va, statistic=statistic, resamples=resamples, seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        b = _stat(vb[None], statistic)[0] if vb.size else np.nan
        a = _stat(va[None], statistic)[0] if va.size else np.nan
    return Difference(
        name=name, label=label or STATISTICS[name],
        before=float(b) if np.isfinite(b) else None, after=float(a) if np.isfinite(a) else None,
        difference=iv.difference, low=iv.low, high=iv.high, images=int(vb.size),
        before_images=int(np.isfinite(vb).sum()), after_images=int(np.isfinite(va).sum()),
        method=f"paired bootstrap over images, percentile, {statistic}", resamples=iv.resamples)


def _members(finding: dict | None) -> set[str] | None:
    """Paths of a motif's member images when the finding's evidence lists them."""
    if finding is None:
        return set()
    ev = finding.get("evidence", {})
    for key in ("member_paths", "members"):
        got = ev.get(key)
        if isinstance(got, list) and all(isinstance(p, str) for p in got):
            return set(got)
    return None


def _rate_of(ev: dict | None, key: str, trials_key: str = "trials") -> tuple[float, int] | None:
    if not ev or ev.get(key) is None:
        return None
    n = ev.get(trials_key) or ev.get("trials") or ev.get("images")
    if not isinstance(n, (int, float)) or n < 1:
        return None
    return float(ev[key]), int(n)


def _evidence_rates(name: str, label: str, before: tuple[float, int] | None, after: tuple[float, int] | None,
                    *, seed, resamples: int, outcomes: tuple[list, list] | None = None) -> Difference:
    """A rate known from the findings' evidence: paired over trials when each trial's outcome
    is listed on both sides, else an independent binomial bootstrap, else no interval."""
    if outcomes is not None:
        vb, va = (np.asarray(o, dtype=np.float64) for o in outcomes)
        return dataclasses.replace(_paired(name, vb, va, seed=seed, resamples=resamples, label=label),
                                   method="paired bootstrap over trials, percentile, mean")
    if before is not None and after is not None:
        iv = binomial_bootstrap(before, after, resamples=resamples, seed=seed)
        return Difference(name=name, label=label, before=before[0], after=after[0],
                          difference=iv.difference, low=iv.low, high=iv.high,
                          images=max(before[1], after[1]), before_images=before[1], after_images=after[1],
                          method="independent binomial bootstrap, percentile (trial outcomes not listed)",
                          resamples=iv.resamples)
    return Difference(name=name, label=label, before=before[0] if before else None,
                      after=after[0] if after else None, difference=None, low=None, high=None,
                      images=0, before_images=before[1] if before else 0,
                      after_images=after[1] if after else 0,
                      method="none (the test ran on one side only)")


def _tests(fb: dict | None, fa: dict | None, *, seed, resamples: int) -> tuple[Difference, ...]:
    tb = (fb or {}).get("evidence", {}).get("test") if fb else None
    ta = (fa or {}).get("evidence", {}).get("test") if fa else None
    tb = tb if isinstance(tb, dict) else None
    ta = ta if isinstance(ta, dict) else None
    if tb is None and ta is None:
        return ()
    out = []
    for key, outcome_key in (("rate", "outcomes"), ("control_rate", "control_outcomes")):
        name = "test_rate" if key == "rate" else "control_rate"
        ob, oa = (tb or {}).get(outcome_key), (ta or {}).get(outcome_key)
        paired = (ob, oa) if isinstance(ob, list) and isinstance(oa, list) and len(ob) == len(oa) and ob else None
        trials_key = "trials" if key == "rate" else "control_trials"
        out.append(_evidence_rates(name, STATISTICS[name], _rate_of(tb, key, trials_key),
                                   _rate_of(ta, key, trials_key), seed=seed, resamples=resamples,
                                   outcomes=paired))
    return tuple(out)


# --------------------------------------------------------------------------- the comparison

def _check_bootstrap(seed, resamples) -> None:
    if not isinstance(seed, (int, np.integer)) or isinstance(seed, bool) or seed < 0:
        raise UsageError(f"--seed must be a whole number >= 0; got {seed!r}.")
    if not isinstance(resamples, (int, np.integer)) or isinstance(resamples, bool) or resamples < 100:
        raise UsageError(f"--resamples must be a whole number of at least 100; got {resamples!r}. "
                         f"Pass e.g. 2000.")


def compare_audits(before: dict, after: dict, *, seed: int = 0, resamples: int = 2000,
                   before_dir: Path | None = None, after_dir: Path | None = None,
                   image_root: Path | None = None, mode: str = "audits",
                   notes: Sequence[str] = ()) -> CompareResult:
    """Compare two audit.json documents of the same images (pure: dicts in, a result out).

    Parameters
    ----------
    before, after : dict
        Parsed audit.json (schema 1).
    seed : int
        Seed of every bootstrap; each class draws from its own stream
        (``SeedSequence([seed, crc32(class)])``), so adding a class leaves the others' intervals.
    resamples : int
        Bootstrap resamples per interval.

    Returns
    -------
    CompareResult

    Raises
    ------
    UsageError
        The audits list different images, or label an image differently.
    """
    _check_bootstrap(seed, resamples)
    _check_same_images(before, after)
    ib = {im["path"]: im for im in before["images"]}
    ia = {im["path"]: im for im in after["images"]}
    paired = sorted(set(ib) & set(ia))
    shape_b, shape_a = _size(before), _size(after)
    notes = list(notes) + _settings_notes(before, after)
    only_b, only_a = sorted(set(ib) - set(ia)), sorted(set(ia) - set(ib))
    if only_b or only_a:
        notes.append(f"{len(only_b) + len(only_a)} image(s) were audited by one model only (skipped by "
                     f"the other) and are left out of every interval.")

    labels = list(before.get("model", {}).get("labels", []))
    names = [n for n in labels if any(ib[p]["label"] == n for p in paired)]
    names += sorted({ib[p]["label"] for p in paired} - set(names) - {None})
    by_key: dict[tuple[str, str], list[dict | None]] = {}
    for side, audit in ((0, before), (1, after)):
        for f in audit.get("findings", []):
            by_key.setdefault((f["class"], f["kind"]), [None, None])
            if by_key[(f["class"], f["kind"])][side] is None:
                by_key[(f["class"], f["kind"])][side] = f

    classes: list[ClassComparison] = []
    findings: list[FindingComparison] = []
    for name in names:
        paths = [p for p in paired if ib[p]["label"] == name]
        imb, ima = [ib[p] for p in paths], [ia[p] for p in paths]
        cseed = _class_seed(seed, name)
        place_b, place_a = _place(imb, shape_b), _place(ima, shape_a)
        place, place_from = (place_b, "before") if place_b else ((place_a, "after") if place_a else (None, None))
        rows: list[Difference] = []
        for stat in ("accuracy", "mean_confidence", "small_area_rate", "box_agreement",
                     "median_background_share", "object_erased_survival"):
            point = place[0] if place else None
            vb = _values(stat, imb, shape_b, point=point)
            va = _values(stat, ima, shape_a, point=point)
            if not (np.isfinite(vb).any() or np.isfinite(va).any()) and stat in (
                    "median_background_share", "object_erased_survival"):
                continue
            rows.append(_paired(stat, vb, va, seed=cseed, resamples=resamples))
        for (cname, kind), (fb, fa) in by_key.items():
            if cname != name:
                continue
            stat = _KIND_STATISTIC[kind]
            if stat == "box_agreement":
                # The place of the audit that has the finding (the before one when both do).
                own = place_b if fb is not None else place_a
                point = own[0] if own else None
                vb = _values(stat, imb, shape_b, point=point)
                va = _values(stat, ima, shape_a, point=point)
                sd = _paired(stat, vb, va, seed=cseed, resamples=resamples)
            elif stat == "motif_coverage":
                mb, ma = _members(fb), _members(fa)
                if mb is not None and ma is not None:
                    sd = _paired(stat, _values(stat, imb, shape_b, members=mb),
                                 _values(stat, ima, shape_a, members=ma), seed=cseed, resamples=resamples)
                else:
                    n = len(paths)
                    rb = (float(fb["evidence"].get("value", 0.0)), n) if fb else (0.0, n)
                    ra = (float(fa["evidence"].get("value", 0.0)), n) if fa else (0.0, n)
                    sd = _evidence_rates(stat, STATISTICS[stat], rb, ra, seed=cseed, resamples=resamples)
                rows.append(sd)
            else:
                sd = next(r for r in rows if r.name == stat) if any(r.name == stat for r in rows) else \
                    _paired(stat, _values(stat, imb, shape_b), _values(stat, ima, shape_a),
                            seed=cseed, resamples=resamples)
            tests = _tests(fb, fa, seed=_class_seed(seed, name, kind), resamples=resamples)
            rows.extend(dataclasses.replace(t, label=f"{t.label} ({kind} test)") for t in tests)
            findings.append(_finding(name, kind, fb, fa, sd, tests))
        classes.append(ClassComparison(
            name=name, images=len(paths), place_box=place[1] if place else None,
            place_from=place_from, statistics=tuple(rows)))

    lost = sorted({c for c, _ in by_key} - set(names))
    if lost:
        notes.append(f"findings of {', '.join(lost)} are not compared: no image of that class was "
                     f"audited by both models.")
    order = list(VERDICTS)
    findings.sort(key=lambda f: (order.index(f.verdict), f.class_name, f.kind))
    settings = {"bootstrap": {"method": "percentile", "paired_over": "images", "confidence": CONFIDENCE,
                              "resamples": int(resamples), "seed": int(seed),
                              "negligible": NEGLIGIBLE},
                "before": before.get("settings", {}), "after": after.get("settings", {})}
    return CompareResult(
        mode=mode, before=_model_info(before, before_dir), after=_model_info(after, after_dir),
        before_dir=before_dir, after_dir=after_dir, image_root=image_root,
        input=dict(before.get("model", {}).get("input", {}).get("input", {}), size=list(shape_b)),
        images={"paired": len(paired), "only_before": only_b, "only_after": only_a},
        classes=tuple(classes), findings=tuple(findings), settings=settings, notes=tuple(notes))


def _finding(name: str, kind: str, fb: dict | None, fa: dict | None, sd: Difference,
             tests: tuple[Difference, ...]) -> FindingComparison:
    test_lower = any(t.name == "test_rate" and t.clearly_lower for t in tests)
    cleared_after = fa is not None and fa.get("status") == "not-confirmed"
    if fb is not None and fb.get("status") == "not-confirmed" and (fa is None or cleared_after):
        verdict = "cleared"
    elif fb is None:
        verdict = "new"
    elif fa is None:
        verdict = "resolved" if sd.clearly_lower else "unclear"
    elif cleared_after and fb.get("status") == "confirmed" and test_lower:
        # The heatmap statistic may stay (a class can hinge on a small part of the
        # object itself), but the region no longer carries the class: the test says so.
        verdict = "resolved"
    else:
        verdict = "weakened" if sd.clearly_lower else "persists"
    examples: list[str] = []
    for f in (fb, fa):
        for p in (f or {}).get("examples", []):
            if p not in examples:
                examples.append(p)
    return FindingComparison(
        class_name=name, kind=kind, verdict=verdict,
        before_id=fb["id"] if fb else None, after_id=fa["id"] if fa else None,
        before_status=fb["status"] if fb else "absent", after_status=fa["status"] if fa else "absent",
        statistic=sd, tests=tests, region_before=fb.get("region") if fb else None,
        region_after=fa.get("region") if fa else None, examples=tuple(examples))
