"""Rules that turn per-class aggregates into findings, with one table of thresholds.

Each rule compares a class's statistic with an absolute bound *and* with the median
of the same statistic over the model's other classes, so that a model which is fragile
everywhere does not get every class flagged. Every finding starts as ``suspect``; the
counterfactual tests of probes.py make it ``confirmed`` or ``not-confirmed``.

The thresholds live in :data:`THRESHOLD_TABLE`, one line of reason each; the README
prints the same table. They can be overridden (:meth:`Thresholds.replace_from`) and
are written into audit.json.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .classes import SMALL_AREA, ClassSummary, ImageSummary
from .errors import UsageError
from .maps import boxes_overlap

__all__ = [
    "FAIL_ON",
    "THRESHOLD_TABLE",
    "Thresholds",
    "read_thresholds",
    "parse_threshold_overrides",
    "Finding",
    "FINDING_KINDS",
    "judge",
    "not_judged",
    "object_part_note",
    "motif_candidates",
    "MIN_MOTIF_IMAGES",
]

#: A motif is a cluster of at least this many near-alike crops (fewer is a coincidence).
MIN_MOTIF_IMAGES = 3

FINDING_KINDS = ("localized", "fixed-position", "recurring-motif", "background", "image-wide")
#: The gates of ``audit --fail-on``: a finding at least suspect, at least confirmed, or none.
FAIL_ON = ("suspect", "confirmed", "never")

#: name, default, reason. One place for every threshold of the rules.
THRESHOLD_TABLE: tuple[tuple[str, float, str], ...] = (
    ("min_correct_images", 5,
     "a class needs this many correctly predicted images before its rates mean anything"),
    ("localized_rate", 0.40,
     "share of a class's correct images whose decision moves when at most 5% of the image is hidden"),
    ("localized_margin", 0.25,
     "how far that share must exceed the median of the other classes (a fragile model is not a shortcut)"),
    ("fixed_agreement", 0.50,
     "share of a class's small decisive regions that cover one common place"),
    ("fixed_margin", 0.25,
     "how far that agreement must exceed the median of the other classes"),
    ("object_share", 0.50,
     "share of a region on the object from which it counts as a part of the object: a small decisive region mostly on the object is noted, not flagged; a fixed place must lie mostly off it"),
    ("background_share", 0.50,
     "median share of a class's positive heat that lies outside the object"),
    ("background_margin", 0.10,
     "how far that share must exceed the median of the other classes"),
    ("background_reliance", 0.40,
     "share of a class's images still predicted as the class with the object erased, less the share of other classes' erased images it gets"),
    ("background_reliance_margin", 0.25,
     "how far that reliance must exceed the median of the other classes"),
    ("motif_coverage", 0.30,
     "share of a class's images whose decisive crops fall in one cluster of near-alike crops"),
    ("motif_margin", 0.15,
     "how far a class's small-area rate must exceed the other classes' before its crops are clustered"),
    ("sufficiency_pull", 0.5,
     "share of other classes' images a patch of a class's image, pasted at the same place, must turn into the class for its crop to join the sufficiency scan's motif search"),
    ("flat_tile_share", 0.25,
     "share of an object's places, the flattest, whose noise residual the image-wide test spreads over other images (flat places hold a grain, not the object's edges)"),
    ("confirm_alpha", 0.01,
     "a counterfactual test confirms only below this one-sided p-value"),
    ("confirm_effect", 0.20,
     "and only when the test's rate beats its control by at least this much"),
)
_NAMES = tuple(name for name, _, _ in THRESHOLD_TABLE)


@dataclass(frozen=True, kw_only=True)
class Thresholds:
    """The thresholds in force; defaults from :data:`THRESHOLD_TABLE`.

    >>> Thresholds().localized_rate
    0.4
    >>> Thresholds.replace_from(Thresholds(), {"localized_rate": 0.5}).localized_rate
    0.5
    """

    min_correct_images: int = 5
    localized_rate: float = 0.40
    localized_margin: float = 0.25
    fixed_agreement: float = 0.50
    fixed_margin: float = 0.25
    object_share: float = 0.50
    background_share: float = 0.50
    background_margin: float = 0.10
    background_reliance: float = 0.40
    background_reliance_margin: float = 0.25
    motif_coverage: float = 0.30
    motif_margin: float = 0.15
    sufficiency_pull: float = 0.5
    flat_tile_share: float = 0.25
    confirm_alpha: float = 0.01
    confirm_effect: float = 0.20

    def __post_init__(self) -> None:
        for name in _NAMES:
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise UsageError(f"threshold {name} must be a number; got {value!r}.")
            if name == "min_correct_images":
                if int(value) != value or value < 1:
                    raise UsageError(f"threshold min_correct_images must be a whole number >= 1; got {value}.")
            elif not (0.0 <= float(value) <= 1.0):
                raise UsageError(f"threshold {name} must be between 0 and 1; got {value}.")

    @staticmethod
    def replace_from(base: "Thresholds", values: dict) -> "Thresholds":
        unknown = sorted(set(values) - set(_NAMES))
        if unknown:
            raise UsageError(
                f"unknown threshold {unknown[0]!r}; the thresholds are: {', '.join(_NAMES)}.")
        clean = {k: (int(v) if k == "min_correct_images" and isinstance(v, (int, float)) and not isinstance(v, bool) else v)
                 for k, v in values.items()}
        return dataclasses.replace(base, **clean)

    def to_dict(self) -> dict:
        return {name: getattr(self, name) for name in _NAMES}


def read_thresholds(path: str | Path) -> dict:
    """Threshold overrides from a TOML file (a ``[thresholds]`` table or top-level keys)."""
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UsageError(f"--thresholds file {p} does not exist; pass the path of a TOML file.") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UsageError(f"--thresholds file {p} is not valid TOML ({exc}); fix the file.") from None
    return dict(data.get("thresholds", data))


def parse_threshold_overrides(items: list[str]) -> dict:
    """``["localized_rate=0.5", ...]`` from ``--threshold`` options, as a dict."""
    out = {}
    for item in items:
        name, sep, value = item.partition("=")
        if not sep:
            raise UsageError(f"--threshold takes NAME=VALUE (e.g. localized_rate=0.5); got {item!r}.")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            raise UsageError(f"--threshold {name.strip()} needs a number; got {value!r}.") from None
    return out


@dataclass(frozen=True, kw_only=True)
class Finding:
    """One suspicion about one class, with the evidence behind it."""

    id: str
    class_name: str
    class_index: int
    kind: str
    status: str = "suspect"
    region: list[float] | None = None
    evidence: dict = field(default_factory=dict)
    examples: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.kind not in FINDING_KINDS:
            raise UsageError(f"finding kind must be one of {', '.join(FINDING_KINDS)}; got {self.kind!r}.")
        if self.status not in ("suspect", "confirmed", "not-confirmed"):
            raise UsageError(f"finding status {self.status!r} is not suspect, confirmed or not-confirmed.")

    def to_dict(self) -> dict:
        return {"id": self.id, "class": self.class_name, "kind": self.kind, "status": self.status,
                "region": self.region, "evidence": self.evidence, "examples": list(self.examples)}


def _others_median(classes: list[ClassSummary], me: ClassSummary, metric: str,
                   exclude: frozenset[int] = frozenset()) -> float:
    vals = [c.metrics.get(metric) for c in classes if c.index != me.index and c.index not in exclude]
    vals = [v for v in vals if v is not None]
    return float(np.median(vals)) if vals else 0.0


def _evidence(statistic: str, value: float, threshold: float, others: float, margin: float, **extra) -> dict:
    out = {"statistic": statistic, "value": value, "threshold": threshold,
           "others_median": others, "margin_required": margin}
    out.update(extra)
    return out


def _finding(cls: ClassSummary, kind: str, region: list[float] | None, members: list[ImageSummary],
             max_examples: int, evidence: dict) -> Finding:
    """A suspect finding on ``cls``, its first ``max_examples`` members as examples."""
    return Finding(id="", class_name=cls.name, class_index=cls.index, kind=kind, region=region,
                   evidence=evidence, examples=tuple(im.path for im in members[:max_examples]))


def judge(classes: list[ClassSummary], images: list[ImageSummary], *,
          thresholds: Thresholds | None = None, max_examples: int = 8) -> list[Finding]:
    """The suspect findings for each class (``recurring-motif`` is added by the scan, and a
    ``background`` finding becomes ``image-wide`` only by its tests, in confirm.py).

    Per class, in this order: ``fixed-position`` (a class whose decisions hinge on small
    regions that agree in place; it stands for ``localized`` too), else ``localized``;
    then, unless the class is fixed-position (whose heat outside the object is the mark
    itself), ``background``: by the heat outside the object, or by the decisions that
    survive erasing the object beyond what other classes' erased images give.
    """
    th = thresholds or Thresholds()
    found: list[Finding] = []
    fixed_classes: set[int] = set()
    for cls in classes:
        m = cls.metrics
        if cls.correct < th.min_correct_images:
            continue
        mine = [im for im in images if im.label == cls.index and im.correct]
        small_rate = m["small_area_rate"] or 0.0
        small_others = _others_median(classes, cls, "small_area_rate")
        agreement = m["box_agreement"] or 0.0
        agree_others = _others_median(classes, cls, "box_agreement")
        hinges = small_rate >= th.localized_rate
        localized = _localized(cls, classes, th) and object_part_note(cls, classes, th) is None
        fixed = (hinges and agreement >= th.fixed_agreement
                 and agreement - agree_others >= th.fixed_margin)
        # A mark that suffices without being needed moves no decision when hidden, but
        # still draws the heat's peak to one place, off the object. Only with masks
        # (given or estimated): a catalogue's objects often sit at one place too.
        peak_agree = m.get("peak_agreement") or 0.0
        peak_others = _others_median(classes, cls, "peak_agreement")
        peak_on = m.get("peak_on_object")
        by_peaks = (not fixed and cls.peak_place_box is not None
                    and peak_agree >= th.fixed_agreement
                    and peak_agree - peak_others >= th.fixed_margin
                    and peak_on is not None and peak_on < th.object_share)
        if fixed:
            members = [im for im in mine if im.small and boxes_overlap(im.decisive_box, cls.place_box)]
            members.sort(key=lambda im: (im.decisive_area, im.path))
            found.append(_finding(cls, "fixed-position", cls.place_box, members, max_examples, _evidence(
                "box_agreement", agreement, th.fixed_agreement, agree_others, th.fixed_margin,
                small_area_rate=small_rate, small_area_threshold=th.localized_rate,
                images=len(mine), agreeing_images=len(members),
                small_images=sum(1 for im in mine if im.small))))
        elif by_peaks:
            fixed = True
            members = [im for im in mine if boxes_overlap(im.peak_box, cls.peak_place_box)]
            members.sort(key=lambda im: (-(im.label_score or 0.0), im.path))
            found.append(_finding(cls, "fixed-position", cls.peak_place_box, members, max_examples, _evidence(
                "peak_agreement", peak_agree, th.fixed_agreement, peak_others, th.fixed_margin,
                peak_on_object=peak_on, object_share_threshold=th.object_share,
                small_area_rate=small_rate, images=len(mine), agreeing_images=len(members))))
        elif localized:
            members = sorted([im for im in mine if im.small], key=lambda im: (im.decisive_area, im.path))
            found.append(_finding(cls, "localized", None, members, max_examples, _evidence(
                "small_area_rate", small_rate, th.localized_rate, small_others, th.localized_margin,
                small_area=SMALL_AREA, images=len(mine), flipping_images=len(members),
                median_decisive_area=m["median_decisive_area"])))
        if fixed:
            fixed_classes.add(cls.index)
    # Backgrounds, judged after the marks: a fixed-position class's heat outside the
    # object is the mark itself (one finding, one cause), and such a class is no
    # reference for how much the other classes rely on their backdrops.
    marked = frozenset(fixed_classes)
    for cls in classes:
        m = cls.metrics
        if cls.correct < th.min_correct_images or cls.index in marked:
            continue
        mine = [im for im in images if im.label == cls.index and im.correct]
        share = m.get("median_background_share")
        reliance = m.get("background_reliance")
        if share is None and reliance is None:
            continue
        share_others = _others_median(classes, cls, "median_background_share", marked)
        reliance_others = _others_median(classes, cls, "background_reliance", marked)
        by_share = (share is not None and share >= th.background_share
                    and share - share_others >= th.background_margin)
        by_reliance = (reliance is not None and reliance >= th.background_reliance
                       and reliance - reliance_others >= th.background_reliance_margin)
        if by_share or by_reliance:
            members = sorted([im for im in mine if im.background_share is not None],
                             key=lambda im: (-(im.survives_object_erased or False),
                                             -im.background_share, im.path))
            if by_share:
                ev = _evidence("median_background_share", share, th.background_share,
                               share_others, th.background_margin)
            else:
                ev = _evidence("background_reliance", reliance, th.background_reliance,
                               reliance_others, th.background_reliance_margin)
            ev.update(median_background_share=share, background_reliance=reliance,
                      object_erased_survival=m.get("object_erased_survival"),
                      erased_default_rate=m.get("erased_default_rate"),
                      masked_images=m["masked_images"], estimated_masks=m["estimated_masks"],
                      mask="estimated" if m["estimated_masks"] == m["masked_images"]
                      else ("given" if m["estimated_masks"] == 0 else "given and estimated"))
            found.append(_finding(cls, "background", None, members, max_examples, ev))
    return found


def not_judged(cls: ClassSummary, thresholds: Thresholds | None = None) -> tuple[str, ...]:
    """Why the rules could not judge ``cls``, one reason each (empty: every rule ran).

    A class with no finding reads as clean; this says where that reading would be
    wrong: a class with too few correctly predicted images is judged by no rule, and
    without an object mask (given or estimated) the background rule cannot run.

    >>> from shortcut_audit.classes import ClassSummary
    >>> c = ClassSummary(name="kite", index=0, images=1, correct=1, accuracy=1.0,
    ...                  mean_confidence=0.9, mean_heatmap=None, metrics={"masked_images": 0})
    >>> not_judged(c)[0]
    'only 1 correctly predicted image (the rules need 5, min_correct_images)'
    """
    th = thresholds or Thresholds()
    if cls.correct < th.min_correct_images:
        n = cls.correct
        return (f"only {n} correctly predicted image{'' if n == 1 else 's'} (the rules need "
                f"{th.min_correct_images}, min_correct_images)",)
    if not cls.metrics.get("masked_images"):
        return ("background not judged: no object mask given or estimated (pass --masks)",)
    return ()


def _localized(cls: ClassSummary, classes: list[ClassSummary], th: Thresholds) -> bool:
    small_rate = cls.metrics.get("small_area_rate") or 0.0
    small_others = _others_median(classes, cls, "small_area_rate")
    return small_rate >= th.localized_rate and small_rate - small_others >= th.localized_margin


def object_part_note(cls: ClassSummary, classes: list[ClassSummary],
                     thresholds: Thresholds | None = None) -> str | None:
    """A note, not a finding, for a class whose decisions hinge on a small part of the
    object itself (None when that is not the case).

    The localized rule sees that hiding a small region moves the class's decisions.
    When the object masks show that region to be on the object (median share of the
    decisive pixels on it at least ``object_share``), the audit cannot tell a part of the
    object (a fin, a handle, a small object as a whole) from a thing stuck on it (a
    price sticker): pasted onto other images, both pull them to the class, and on the
    planted-shortcut suite small clean objects' own parts were confirmed that way. So
    the class gets this note, not a shortcut finding. A thing that recurs alike on the
    object is still found as a recurring motif, from the decisive crops or by the
    sufficiency scan (sufficiency.py); the audit drops the note when such a motif is
    confirmed on the class.
    """
    th = thresholds or Thresholds()
    if cls.correct < th.min_correct_images or not _localized(cls, classes, th):
        return None
    on = cls.metrics.get("decisive_on_object")
    if on is None or on < th.object_share:
        return None
    rate = cls.metrics.get("small_area_rate") or 0.0
    return (f"decisions hinge on a small part of the object itself: hiding at most 5% of the "
            f"image moves {rate:.0%} of its correct images, and {on:.0%} of those pixels (median) "
            f"lie on the object. A narrow reading of the object, not a shortcut by this audit's "
            f"evidence; worth a look if that part is not what should define the class.")


def motif_candidates(classes: list[ClassSummary], images: list[ImageSummary], *,
                     thresholds: Thresholds | None = None) -> list[ClassSummary]:
    """The classes whose decisive crops are worth clustering into motifs.

    The recurring-motif rule: a judged class whose small-area rate exceeds the median of
    the other classes' by ``motif_margin``, with at least :data:`MIN_MOTIF_IMAGES`
    correct images whose decision hinges on a small region. The clustering itself
    (motifs.py) and its test (confirm.py) follow.
    """
    th = thresholds or Thresholds()
    rates = {c.index: (c.metrics.get("small_area_rate") or 0.0) for c in classes}
    out = []
    for cls in classes:
        if cls.correct < th.min_correct_images:
            continue
        others = [r for i, r in rates.items() if i != cls.index]
        if rates[cls.index] - (float(np.median(others)) if others else 0.0) < th.motif_margin:
            continue
        if sum(1 for im in images if im.label == cls.index and im.small) < MIN_MOTIF_IMAGES:
            continue
        out.append(cls)
    return out
