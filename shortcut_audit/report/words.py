"""Plain words for findings, shared by the HTML report and the evidence pack.

Pure functions over the dicts of audit.json; they return plain text (the HTML templates
escape it, the pack's Markdown writer escapes it for Markdown).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

__all__ = [
    "KIND_TITLES",
    "STATUS_TITLES",
    "STATISTIC_NAMES",
    "where",
    "plural",
    "pct",
    "num",
    "pval",
    "statistic_name",
    "finding_sentence",
    "status_sentence",
    "p_value_of",
    "test_of",
    "motif_of",
    "motif_boxes",
    "test_sentence",
]

KIND_TITLES = {
    "localized": "hinges on a small region",
    "fixed-position": "a region at a fixed place",
    "recurring-motif": "a recurring motif",
    "background": "read from the background",
    "image-wide": "read from the whole picture",
}
STATUS_TITLES = {"suspect": "suspect", "confirmed": "confirmed", "not-confirmed": "not confirmed"}
STATISTIC_NAMES = {
    "box_agreement": "decisive boxes agreeing on one place",
    "small_area_rate": "decision moved by hiding at most 5%",
    "median_background_share": "heat outside the object (median)",
    "background_reliance": "answers kept with the object erased, beyond the empty-scene rate",
    "motif_coverage": "images in the motif's cluster",
    "coverage": "images in the motif's cluster",
}


#: Survival of erasing the object within this many points of the empty-scene rate is
#: not stated as a reliance on the backdrop (the background_reliance_margin default).
EMPTY_SCENE_MARGIN = 0.25


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def pct(x, digits: int = 0) -> str:
    """A fraction as a percentage (``0.5`` -> ``"50%"``); ``"–"`` when missing."""
    if not _finite(x):
        return "–"
    return f"{100 * x:.{digits}f}%"


def num(x, digits: int = 2) -> str:
    """A number with ``digits`` decimals (integers as they are); ``"–"`` when missing."""
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    if not _finite(x):
        return "–"
    return f"{x:.{digits}f}"


def pval(p) -> str:
    """A p-value for reading: three decimals, or two significant digits below 0.001."""
    if not _finite(p):
        return "–"
    if p < 0.001:
        return f"{p:.1e}"
    return f"{p:.3f}"


def where(box: Sequence[float] | None) -> str:
    """Where a box (fractions ``[x0, y0, x1, y1]``) sits, in words.

    >>> where([0.8, 0.8, 1.0, 1.0])
    'lower-right corner'
    >>> where([0.4, 0.0, 0.6, 0.2])
    'top edge'
    >>> where([0.3, 0.3, 0.7, 0.7])
    'centre'
    """
    if not box or len(box) != 4:
        return "region shown in the examples"
    cx, cy = (box[0] + box[2]) / 2, (box[1] + box[3]) / 2
    col = "left" if cx < 1 / 3 else ("right" if cx > 2 / 3 else "centre")
    row = "upper" if cy < 1 / 3 else ("lower" if cy > 2 / 3 else "middle")
    if row == "middle":
        return "centre" if col == "centre" else f"{col} side"
    if col == "centre":
        return "top edge" if row == "upper" else "bottom edge"
    return f"{row}-{col} corner"


def plural(name: str) -> str:
    """A class name in the plural, by the common English endings (``vase`` -> ``vases``).

    >>> [plural(n) for n in ("vase", "glass", "dish", "tray", "berry")]
    ['vases', 'glasses', 'dishes', 'trays', 'berries']
    """
    n = str(name)
    low = n.lower()
    if not low or not low[-1].isalpha():
        return f"images of {n}"
    if low.endswith(("s", "x", "z", "ch", "sh")):
        return n + "es"
    if low.endswith("y") and len(low) > 1 and low[-2] not in "aeiou":
        return n[:-1] + "ies"
    return n + "s"


def statistic_name(key: str) -> str:
    """A plain name for a statistic of the evidence."""
    return STATISTIC_NAMES.get(key, str(key).replace("_", " "))


def test_of(finding: dict) -> dict | None:
    """The counterfactual test of a finding (``evidence["test"]``), or None."""
    test = (finding.get("evidence") or {}).get("test")
    return test if isinstance(test, dict) and test else None


def p_value_of(finding: dict):
    """The finding's p-value: ``evidence["p_value"]`` or the test's, else None."""
    ev = finding.get("evidence") or {}
    p = ev.get("p_value")
    if not _finite(p):
        p = (test_of(finding) or {}).get("p_value")
    return p if _finite(p) else None


def finding_sentence(finding: dict) -> str:
    """What the finding means, in one plain sentence."""
    ev = finding.get("evidence") or {}
    cls = str(finding.get("class", "?"))
    kind = finding.get("kind")
    images = ev.get("images")
    if kind == "fixed-position":
        agreeing = ev.get("agreeing_images")
        small = ev.get("small_images")
        count = (f"In {agreeing} of {images} correctly recognised images of {cls}"
                 if isinstance(agreeing, int) and isinstance(images, int)
                 else f"In {pct(ev.get('value'))} of the correctly recognised images of {cls}")
        if isinstance(small, int) and isinstance(agreeing, int):
            count += f" ({agreeing} of the {small} whose answer hinges on a small region)"
        return (f"{count}, the few pixels that decide the answer sit at the same place "
                f"({where(finding.get('region'))}): the model may be reading something that "
                f"is always there, such as a mark or a label, rather than the object.")
    if kind == "localized":
        return (f"Hiding at most 5% of the picture changes the model's answer for "
                f"{pct(ev.get('value'))} of the correctly recognised images of {cls}, against "
                f"{pct(ev.get('others_median'))} for the other classes: the model leans on a "
                f"small detail rather than on the whole object.")
    if kind == "recurring-motif" and ev.get("found_in") == "sufficiency scan":
        suff = ev.get("sufficiency") or {}
        pulling, sources = suff.get("pulling"), suff.get("sources")
        count = (f" ({pulling} of {sources} {cls} images scanned had such a patch)"
                 if isinstance(pulling, int) and isinstance(sources, int) else "")
        removal = (ev.get("test") or {}).get("removal") or {}
        drop, n = removal.get("drop"), removal.get("images")
        hidden = (f" Hidden where they were found, they change the answer for {pct(drop)} of "
                  f"those {n} images." if _finite(drop) and isinstance(n, int) else "")
        return (f"A small patch of the {cls} objects, pasted at the same place onto other "
                f"images, turns them into {cls}{count}, and these patches look the same from "
                f"image to image wherever they sit: the model takes them on their own as a "
                f"sign of {cls}.{hidden} A repeated mark such as a sticker or a stamp, or a "
                f"part of the object that looks the same on every piece: look at the crops.")
    if kind == "recurring-motif":
        return (f"The small region that decides many answers for {cls} looks the same from "
                f"image to image wherever it sits: a repeated mark, such as a sticker or a "
                f"stamp, that the model may have learned in place of the object.")
    if kind == "background":
        survival = ev.get("object_erased_survival")
        default = ev.get("erased_default_rate")
        share = ev.get("median_background_share", ev.get("value") if ev.get("statistic") == "median_background_share" else None)
        if ev.get("statistic") == "background_reliance":
            return (f"Erase the object and the model still answers {cls} for {pct(survival)} of "
                    f"the images, while only {pct(default)} of other classes' images with their "
                    f"object erased become {cls}: the model reads the surroundings, not the piece "
                    f"(heat outside the object: {pct(share)}, a backdrop spread everywhere moves "
                    f"little when one patch of it is hidden).")
        head = (f"Most of what moves the model's answer for {cls} lies outside the object "
                f"({pct(share)} of the heat)")
        if _finite(survival) and _finite(default) and survival - default < EMPTY_SCENE_MARGIN:
            # Survival that the empty-scene answer explains says nothing of this class's
            # backgrounds: say so instead of stating a reliance.
            return (f"{head}. With the object erased the answer stays {cls} in {pct(survival)} "
                    f"of the images, but {pct(default)} of other classes' images also become "
                    f"{cls} once their object is erased: {cls} is what the model answers for an "
                    f"empty scene, which says nothing about its own backgrounds.")
        tail = (f", and the answer stays {cls} in {pct(survival)} of the images once the object "
                f"is erased" + (f" (against {pct(default)} of other classes' images once theirs "
                                f"is)" if _finite(default) else "")
                if _finite(survival) else "")
        return f"{head}{tail}: the model may read the surroundings, not the piece."
    if kind == "image-wide":
        share = ev.get("median_background_share")
        return (f"The model reads {cls} from something spread over the whole picture: the "
                f"backgrounds of {cls} images turn other objects into {cls}, and so does the fine "
                f"texture cut from the {cls} objects themselves, spread over other images (heat "
                f"outside the object: {pct(share)}). A grain, a noise or a processing look shared "
                f"by the {cls} photos, rather than the piece or its backdrop.")
    return f"The model's answers for {cls} depend on a pattern the rules flagged ({kind})."


def status_sentence(finding: dict) -> str:
    """How sure the audit is, in one sentence."""
    status = finding.get("status")
    p = p_value_of(finding)
    if status == "confirmed":
        return ("Confirmed: a counterfactual test bore it out"
                + (f" (p = {pval(p)})." if p is not None else "."))
    if status == "not-confirmed":
        return ("Not confirmed: the counterfactual test did not bear it out"
                + (f" (p = {pval(p)}); treat it as a lead, not a result." if p is not None
                   else "; treat it as a lead, not a result."))
    if test_of(finding) is not None:
        return ("Suspect: seen in the heatmaps; a test was run but did not decide it"
                + (f" (p = {pval(p)})." if p is not None else "."))
    return "Suspect: seen in the heatmaps, not tested yet."


def _motif_evidence(finding: dict) -> dict | None:
    """The evidence that describes a finding's motif: its own for a recurring-motif, the
    ``motif`` entry of another kind's (None when it has none)."""
    ev = finding.get("evidence") or {}
    if finding.get("kind") == "recurring-motif":
        return ev
    return ev.get("motif") if isinstance(ev.get("motif"), dict) else None


def motif_boxes(finding: dict) -> dict[str, list]:
    """Where a finding's motif crop was cut in each of its images (path -> box
    ``[x0, y0, x1, y1]``), from its evidence; empty when it gives none."""
    ev = _motif_evidence(finding) or {}
    out = {p: b for p, b in zip(ev.get("member_paths") or [], ev.get("member_boxes") or [])
           if isinstance(p, str) and isinstance(b, (list, tuple)) and len(b) == 4}
    if isinstance(ev.get("medoid"), str) and isinstance(ev.get("medoid_box"), (list, tuple)):
        out.setdefault(ev["medoid"], ev["medoid_box"])
    return out


def motif_of(finding: dict) -> dict | None:
    """The motif behind a finding, ``{"medoid": path | None, "members": [paths]}``.

    A recurring-motif finding carries it in its evidence (``medoid`` and ``member_paths``,
    or ``members``); a fixed-position finding whose region also looks alike from image to
    image carries it under ``evidence["motif"]``. None when there is no motif.
    """
    ev = _motif_evidence(finding)
    if ev is None:
        return None
    medoid = ev.get("medoid") if isinstance(ev.get("medoid"), str) else None
    raw = ev.get("member_paths", ev.get("members")) or []
    members = [m for m in raw if isinstance(m, str)]
    if medoid is None and not members:
        return None
    return {"medoid": medoid, "members": list(dict.fromkeys(m for m in members if m != medoid))}


def test_sentence(finding: dict, *, labels: Sequence[str] = ()) -> str | None:
    """What the finding's counterfactual test did and found, in plain words (None: no test)."""
    test = test_of(finding)
    if test is None:
        return None
    cls = str(finding.get("class", "?"))
    if test.get("ran") is False:
        return f"The test could not run: {test.get('reason', 'no reason given')}."
    n, hits, rate = test.get("trials"), test.get("hits"), test.get("rate")
    cn, chits, crate = test.get("control_trials"), test.get("control_hits"), test.get("control_rate")
    counts = (isinstance(n, int) and isinstance(hits, int) and isinstance(cn, int)
              and isinstance(chits, int))
    kind = test.get("test")
    if counts and kind == "transplant":
        text = (f"Pasting the suspect region onto {n} images of other classes turned {hits} of them "
                f"({pct(rate)}) into {cls}; a control patch of the same size, cut from elsewhere, "
                f"turned {chits} of {cn} ({pct(crate)}).")
    elif counts and kind == "background-swap":
        text = (f"Putting {n} objects of other classes onto backgrounds of {cls} images turned {hits} "
                f"of them ({pct(rate)}) into {cls}; onto backgrounds of a third class (neither "
                f"{cls} nor their own), {chits} of {cn} ({pct(crate)}).")
    elif counts and kind == "residual-transplant":
        text = (f"Adding the fine texture (noise residual) of {cls} objects over {n} images of other "
                f"classes turned {hits} of them ({pct(rate)}) into {cls}; the same texture cut from "
                f"a third class's objects turned {chits} of {cn} ({pct(crate)}).")
        swap = (finding.get("evidence") or {}).get("background_test")
        if isinstance(swap, dict) and isinstance(swap.get("hits"), int):
            text += (f" Their backgrounds alone turned {swap['hits']} of {swap.get('trials')} "
                     f"({pct(swap.get('rate'))}) into {cls}, against {pct(swap.get('control_rate'))} "
                     f"for a third class's backgrounds.")
    elif _finite(rate) and _finite(crate):
        text = (f"{pct(rate)} of the test images moved to {cls}, against {pct(crate)} in the "
                f"control arm.")
    else:
        text = "The test ran; its numbers are below."
    p = test.get("p_value")
    if _finite(p):
        text += f" Fisher's exact test, one-sided: p = {pval(p)}."
    removal = test.get("removal")
    if isinstance(removal, dict) and _finite(removal.get("accuracy_before")) and _finite(removal.get("accuracy_after")):
        text += (f" Hiding the region in {removal.get('images', 'the')} images of {cls} took their "
                 f"accuracy from {pct(removal['accuracy_before'])} to {pct(removal['accuracy_after'])}.")
    return text
