"""The scan report: ``report.html`` beside ``audit.json``.

Three steps, so that rendering stays a pure function:

1. :func:`report_plan` decides, from audit.json alone, what the page shows: the gallery
   of each finding, the examples of each class, and the name of every figure.
2. :func:`build_figures` draws those figures from the audit's files (the per-image store
   and the images, through :class:`~shortcut_audit.report.sources.AuditFiles`).
3. :func:`render_report` turns audit.json and the figures into the HTML text; it reads
   no file and no clock. A figure it does not get is shown as "not available".

:func:`write_scan_report` does all three for a finished scan and writes ``figures/``
and ``report.html`` atomically.

The audit dict may carry, per ``images[]`` entry, the store's ``decisive_score`` (the
label score with the decisive region hidden); :func:`with_store_numbers` adds it.
"""

from __future__ import annotations

import os
from pathlib import Path, PurePosixPath

import numpy as np

from ..findings import THRESHOLD_TABLE
from ..maps import box_pixels
from ..options import some_names
from ..store import ResultStore, dumps, write_bytes_atomic
from . import figures as fg
from .html import data_uri, render
from .sources import AuditFiles
from .words import (KIND_TITLES, STATUS_TITLES, finding_sentence, motif_boxes, motif_of, num, p_value_of,
                    pct, pval, statistic_name, status_sentence, test_of, test_sentence, where)

__all__ = [
    "GALLERY_SIZE",
    "CLASS_EXAMPLES",
    "report_plan",
    "gallery_scale",
    "build_figures",
    "with_store_numbers",
    "render_report",
    "write_scan_report",
]

#: Examples shown per finding.
GALLERY_SIZE = 6
#: Examples shown per class.
CLASS_EXAMPLES = 3
#: Member crops in a motif's strip.
MOTIF_MEMBERS = 10
#: Skipped images listed one by one (the rest are counted).
SKIPPED_SHOWN = 300
#: Rows of a test's example table.
TEST_EXAMPLES = 12


# ------------------------------------------------------------------------ plan

#: Model labels spelled out in the report's model table; a 1,000-class model's are cut.
LABELS_SHOWN = 20

def tile_name(group: str, path: str) -> str:
    """The figure name of image ``path``'s tile in gallery ``group``."""
    return f"tile-{group}-{ResultStore.key(path)[:16]}"


def _evenly(items: list, k: int) -> list:
    if len(items) <= k:
        return list(items)
    idx = sorted({round(j * (len(items) - 1) / (k - 1)) for j in range(k)}) if k > 1 else [0]
    return [items[i] for i in idx]


def _class_index(audit: dict, name) -> int | None:
    for i, c in enumerate(audit.get("classes") or []):
        if c.get("name") == name:
            return i
    return None


def report_plan(audit: dict) -> dict:
    """What the report shows, decided from audit.json alone.

    Returns
    -------
    dict
        ``{"findings": [...], "classes": [...]}``; each finding has ``group``,
        ``paths`` (its gallery), ``tiles``, ``scale``, ``mean``, ``box``, ``class_index``
        and ``motif`` (``{"medoid", "members", "figure"}`` or None); each class has
        ``group``, ``name``, ``paths``, ``tiles``, ``scale`` and ``mean``.
        Figure names are file-system safe and unique.
    """
    images = [im for im in audit.get("images") or [] if isinstance(im, dict) and isinstance(im.get("path"), str)]
    out = {"findings": [], "classes": []}
    for k, f in enumerate(audit.get("findings") or []):
        group = f"f{k + 1}"
        paths = [p for p in f.get("examples") or [] if isinstance(p, str)]
        paths = list(dict.fromkeys(paths))[:GALLERY_SIZE]
        motif = motif_of(f)
        if motif is not None:
            medoid = motif["medoid"] or (motif["members"][0] if motif["members"] else None)
            motif = {"medoid": medoid, "members": [m for m in motif["members"] if m != medoid][:MOTIF_MEMBERS],
                     "all_members": len(motif["members"]) + (1 if motif["medoid"] else 0),
                     "figure": f"motif-{group}"}
        out["findings"].append({
            "group": group, "paths": paths, "tiles": [tile_name(group, p) for p in paths],
            "scale": f"scale-{group}", "mean": f"mean-{group}", "box": f.get("region"),
            "class_index": _class_index(audit, f.get("class")), "motif": motif})
    for i, c in enumerate(audit.get("classes") or []):
        group = f"c{i + 1}"
        members = sorted((im for im in images if im.get("label") == c.get("name")), key=lambda im: im["path"])
        right = [im for im in members if im.get("predicted") == im.get("label")] or members
        paths = [im["path"] for im in _evenly(right, CLASS_EXAMPLES)]
        out["classes"].append({
            "group": group, "name": c.get("name"), "paths": paths,
            "tiles": [tile_name(group, p) for p in paths], "scale": f"scale-{group}",
            "mean": f"mean-{group}"})
    return out


# --------------------------------------------------------------------- figures

def _box_of(im: dict | None) -> tuple[list[float] | None, str]:
    if im is None:
        return None, "none"
    if im.get("decisive_box"):
        return im["decisive_box"], "decisive"
    if im.get("peak_box"):
        return im["peak_box"], "peak"
    return None, "none"


def _mean_heatmaps(audit: dict, files: AuditFiles) -> dict[str, np.ndarray]:
    """Class-mean heatmaps streamed from the store (one heatmap in memory at a time)."""
    sums: dict[str, np.ndarray] = {}
    counts: dict[str, int] = {}
    for im in audit.get("images") or []:
        heat = files.arrays(im.get("path", "")).get("heatmap")
        if heat is None:
            continue
        name = im.get("label")
        if name in sums and sums[name].shape != heat.shape:
            continue
        sums[name] = sums.get(name, 0) + heat.astype(np.float64)
        counts[name] = counts.get(name, 0) + 1
    return {name: (sums[name] / counts[name]).astype(np.float32) for name in sums}


#: The percentile of a gallery's positive heat that tops its colour scale: a few extreme
#: pixels would otherwise leave every other tile dark. Heat above it shows at the top colour.
GALLERY_TOP_PERCENTILE = 99.5


def gallery_scale(heatmaps: list[np.ndarray]) -> float:
    """The one ``vmax`` of a gallery: the :data:`GALLERY_TOP_PERCENTILE` percentile of the
    pooled positive heat (the largest value when fewer than 200 pixels are positive).

    >>> gallery_scale([np.array([[0.0, 1.0], [2.0, -1.0]])])
    2.0
    """
    pooled = np.concatenate([np.asarray(h, dtype=np.float64).ravel() for h in heatmaps]) if heatmaps else np.zeros(0)
    pos = pooled[np.isfinite(pooled) & (pooled > 0)]
    if pos.size < 200:
        return fg.positive_max(*heatmaps) if heatmaps else 1e-12
    return max(float(np.percentile(pos, GALLERY_TOP_PERCENTILE)), 1e-12)


def _motif_crop(files: AuditFiles, path: str, boxes: dict[str, list]) -> np.ndarray | None:
    """The motif's crop in image ``path``: cut at its box when the evidence gives one (a motif
    found by pasting is not where the image's decisive region is), else the stored crop."""
    box = boxes.get(path)
    pixels = files.pixels(path) if box is not None else None
    if pixels is None:
        return files.arrays(path).get("crop")
    r0, r1, c0, c1 = box_pixels(box, pixels.shape[0], pixels.shape[1])
    return pixels[r0:r1, c0:c1]


def _gallery(files: AuditFiles, images: dict, paths: list[str], names: list[str], scale: str,
             *, masks: bool, figures: dict[str, bytes]) -> None:
    loaded = []
    for path, name in zip(paths, names):
        heat = None
        arrays = files.arrays(path)
        heat = arrays.get("heatmap")
        pixels = files.pixels(path)
        if heat is None or pixels is None or pixels.shape[:2] != heat.shape:
            continue
        loaded.append((name, pixels, heat, arrays.get("mask") if masks else None, images.get(path)))
    if not loaded:
        return
    vmax = gallery_scale([h for _, _, h, _, _ in loaded])
    for name, pixels, heat, mask, im in loaded:
        box, _ = _box_of(im)
        figures[name] = fg.overlay_tile_png(pixels, heat, vmax=vmax, box=box, mask=mask)
    figures[scale] = fg.scale_bar_png(vmax, label="score drop when hidden (one scale for these tiles)")


def _mean_curves(audit: dict, files: AuditFiles) -> list[tuple[str, list[float], list[float]]]:
    by_class: dict[str, list[tuple[list[float], list[float]]]] = {}
    for im in audit.get("images") or []:
        rec = files.record(im.get("path", "")) or {}
        d, i = rec.get("deletion"), rec.get("insertion")
        if isinstance(d, list) and isinstance(i, list) and len(d) == len(i) and len(d) >= 2:
            by_class.setdefault(im.get("label"), []).append((d, i))
    out = []
    for c in audit.get("classes") or []:
        rows = by_class.get(c.get("name"))
        if not rows:
            continue
        n = len(rows[0][0])
        rows = [r for r in rows if len(r[0]) == n]
        dels = np.array([[np.nan if v is None else v for v in r[0]] for r in rows], dtype=np.float64)
        ins = np.array([[np.nan if v is None else v for v in r[1]] for r in rows], dtype=np.float64)
        out.append((str(c.get("name")), list(np.nanmean(dels, axis=0)), list(np.nanmean(ins, axis=0))))
    return out


def build_figures(audit: dict, files: AuditFiles, *,
                  means: dict[str, np.ndarray] | None = None) -> dict[str, bytes]:
    """Every figure of :func:`report_plan`, as ``{name: PNG bytes}``.

    Parameters
    ----------
    audit : dict
        audit.json.
    files : AuditFiles
        The store and the images behind it.
    means : dict of name -> (H, W) array, optional
        Class-mean heatmaps already at hand (a scan's); streamed from the store otherwise.

    Returns
    -------
    dict of str -> bytes
        Figures that cannot be drawn (an image gone from the dataset, a missing store
        entry) are left out; the report says so where they would be.
    """
    plan = report_plan(audit)
    images = {im.get("path"): im for im in audit.get("images") or [] if isinstance(im, dict)}
    means = dict(means) if means is not None else _mean_heatmaps(audit, files)
    classes = audit.get("classes") or []
    figures: dict[str, bytes] = {}
    overview = [(str(c.get("name")), means[c.get("name")]) for c in classes if c.get("name") in means]
    if overview:
        figures["class-means"] = fg.class_means_png(overview)
    for entry, c in zip(plan["classes"], classes):
        if c.get("name") in means:
            figures[entry["mean"]] = fg.class_mean_png(means[c["name"]])
        _gallery(files, images, entry["paths"], entry["tiles"], entry["scale"], masks=False, figures=figures)
    for entry, f in zip(plan["findings"], audit.get("findings") or []):
        if f.get("class") in means:
            figures[entry["mean"]] = fg.class_mean_png(means[f["class"]], box=f.get("region"))
        _gallery(files, images, entry["paths"], entry["tiles"], entry["scale"],
                 masks=f.get("kind") in ("background", "image-wide"), figures=figures)
        motif = entry["motif"]
        if motif and motif["medoid"]:
            boxes = motif_boxes(f)
            medoid = _motif_crop(files, motif["medoid"], boxes)
            crops = [_motif_crop(files, p, boxes) for p in motif["members"]]
            if medoid is not None and medoid.size:
                figures[motif["figure"]] = fg.crops_strip_png(medoid, [c for c in crops if c is not None])
    curves = _mean_curves(audit, files)
    if curves:
        figures["curves"] = fg.curves_png(curves)
    return figures


def with_store_numbers(audit: dict, files: AuditFiles) -> dict:
    """A copy of ``audit`` whose ``images[]`` entries also carry the store's
    ``decisive_score`` (the label score with the decisive region hidden)."""
    out = dict(audit)
    rows = []
    for im in audit.get("images") or []:
        if isinstance(im, dict) and "decisive_score" not in im:
            rec = files.record(im.get("path", "")) or {}
            im = dict(im, decisive_score=rec.get("decisive_score"))
        rows.append(im)
    out["images"] = rows
    return out


# ------------------------------------------------------------------------ view

def _is_number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _stat(x) -> str:
    """A statistic: a share as a percentage, another number with two decimals."""
    if _is_number(x) and isinstance(x, float) and 0.0 <= x <= 1.0:
        return pct(x)
    return num(x) if _is_number(x) else ("–" if x is None else str(x))


def _value(key: str, x) -> str:
    if x is None:
        return "–"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if _is_number(x):
        if "p_value" in key or key in ("p", "pvalue"):
            return pval(x)
        if any(w in key for w in ("rate", "share", "survival", "coverage", "agreement", "fraction")):
            return pct(x, 1) if isinstance(x, float) and 0 <= x <= 1 else num(x)
        return f"{x:.4g}" if isinstance(x, float) else str(x)
    if isinstance(x, (list, tuple)):
        if len(x) == 4 and all(_is_number(v) for v in x):
            return "[" + ", ".join(f"{float(v):.2f}" for v in x) + "]"
        return ", ".join(_value(key, v) for v in x[:12]) + (" …" if len(x) > 12 else "")
    if isinstance(x, dict):
        return "; ".join(f"{k}: {_value(str(k), v)}" for k, v in x.items())
    return str(x)


def _flatten(d: dict, prefix: str = "") -> dict[str, object]:
    out: dict[str, object] = {}
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(_flatten(v, key + " "))
        else:
            out[key] = v
    return out


def _label(key: str) -> str:
    return key.replace("_", " ")


#: Keys shown first, in this order; the others follow sorted (so a dict's key order,
#: which differs between a scan's result and its audit.json, never changes the page).
_KEY_ORDER = ("kind", "name", "description", "statistic", "value", "threshold", "images", "n",
              "hits", "rate", "control_n", "control_hits", "control_rate", "effect", "p_value")


def _ordered(keys) -> list[str]:
    keys = list(keys)
    first = [k for k in _KEY_ORDER if k in keys]
    return first + sorted((k for k in keys if k not in _KEY_ORDER), key=str)


def _prediction(x, labels) -> str | None:
    """``{"pred": k, "p": score}`` as ``"name (0.71)"``; None when ``x`` is not one."""
    if not isinstance(x, dict) or "pred" not in x:
        return None
    k = x.get("pred")
    name = labels[k] if isinstance(k, int) and 0 <= k < len(labels) else str(k)
    return f"{name} ({num(x.get('p'))})" if _is_number(x.get("p")) else name


def _test_view(finding: dict, labels: list[str], th: dict) -> dict | None:
    """A finding's counterfactual test as a sentence, rows and an example table.

    Any dict is shown; the keys of outcomes.ProbeResult get plain names. Example trials
    refer to images by their index in the test's own lists, which are not shown.
    """
    test = test_of(finding)
    if test is None:
        return None
    hidden = {"examples", "images", "ran", "reason", "suspect"}
    scalars = _flatten({k: v for k, v in test.items() if k not in hidden and v is not None})
    rows = [(_label(k), _value(k, scalars[k])) for k in _ordered(scalars)]
    images = test.get("images") if isinstance(test.get("images"), dict) else {}
    for side, words_ in (("own", "images of the class sampled"), ("others", "images of other classes sampled")):
        if isinstance(images.get(side), list):
            rows.append((words_, str(len(images[side]))))
    rule = None
    if test.get("ran") is not False and _is_number(th.get("confirm_alpha")):
        rule = (f"Confirmed when p < {num(th['confirm_alpha'], 3)} and the rate beats the control "
                f"by at least {pct(th.get('confirm_effect'))}.")
    columns: list[str] = []
    table = []
    examples = [e for e in test.get("examples") or [] if isinstance(e, dict)][:TEST_EXAMPLES]
    if examples:
        keys = _ordered(dict.fromkeys(k for e in examples for k in e if k not in ("source", "target")))
        order = [k for k in ("before", "after", "control", "hit") if k in keys] + \
            [k for k in keys if k not in ("before", "after", "control", "hit")]
        names = {"before": "before (predicted, score)", "after": "after", "control": "control",
                 "hit": "moved to the class", "box": "region"}
        columns = [names.get(k, _label(k)) for k in order]
        for e in examples:
            table.append([_prediction(e.get(k), labels) or _value(k, e.get(k)) for k in order])
    return {"summary": test_sentence(finding, labels=labels), "rule": rule, "rows": rows,
            "columns": columns, "examples": table}


_EVIDENCE_SHOWN_ELSEWHERE = {"statistic", "value", "threshold", "others_median", "margin_required",
                             "test", "members", "medoid", "boxes", "p_value", "member_paths",
                             "member_boxes", "medoid_box"}


def _evidence_rows(ev: dict) -> list[tuple[str, str]]:
    rows = []
    for key in _ordered(ev):
        if key in _EVIDENCE_SHOWN_ELSEWHERE:
            continue
        v = ev[key]
        if isinstance(v, dict):
            inner = {k: x for k, x in v.items() if k not in _EVIDENCE_SHOWN_ELSEWHERE and not isinstance(x, (dict, list))}
            rows += [(f"{_label(key)}: {_label(k)}", _value(k, inner[k])) for k in _ordered(inner)]
        else:
            rows.append((_label(key), _value(key, v)))
    return rows


def _tile_view(path: str, name: str, im: dict | None, figures: dict) -> dict:
    box, source = _box_of(im)
    im = im or {}
    before, after, area = im.get("label_score"), im.get("decisive_score"), im.get("decisive_area")
    if _is_number(area) and _is_number(before) and _is_number(after):
        change = f"label score {num(before)} → {num(after)} with {pct(area, 1)} hidden"
    elif _is_number(area) and _is_number(before):
        change = f"label score {num(before)}; the answer changes with {pct(area, 1)} hidden"
    elif _is_number(before):
        change = f"label score {num(before)}; the answer holds with up to 25% hidden"
    else:
        change = "no numbers for this image"
    outline = {"decisive": "outline: the decisive region",
               "peak": "outline: the hottest 5% (no decisive region)",
               "none": "no region to outline"}[source]
    return {"uri": data_uri(figures[name]) if name in figures else None,
            "file": PurePosixPath(path).name or path, "path": path,
            "label": im.get("label"), "predicted": im.get("predicted"),
            "wrong": im.get("predicted") is not None and im.get("predicted") != im.get("label"),
            "confidence": pct(im.get("confidence")), "change": change, "outline": outline,
            "box": box}


def _uri(figures: dict, name: str | None) -> str | None:
    return data_uri(figures[name]) if name and name in figures else None


def _statistic_view(ev: dict) -> dict:
    key = str(ev.get("statistic", ""))
    value, threshold = ev.get("value"), ev.get("threshold")
    line = f"{statistic_name(key)}: {_stat(value)}"
    if threshold is not None:
        line += f" (flags at {_stat(threshold)}"
        if ev.get("others_median") is not None:
            line += f"; other classes {_stat(ev.get('others_median'))}"
            if ev.get("margin_required") is not None:
                line += f", margin {_stat(ev.get('margin_required'))} required"
        line += ")"
    return {"key": key, "name": statistic_name(key), "value": _stat(value), "threshold": _stat(threshold),
            "line": line}


def _model_rows(model: dict) -> list[tuple[str, str]]:
    desc = model.get("input") or {}
    spec = desc.get("input", {}) if isinstance(desc, dict) else {}
    output = desc.get("output", {}) if isinstance(desc, dict) else {}
    path = str(model.get("path", "–"))
    rows = [("file", PurePosixPath(path.replace("\\", "/")).name or path), ("path", path),
            ("SHA-256", str(model.get("sha256", "–")))]
    if spec:
        size = spec.get("size") or ["?", "?"]
        rows.append(("input", f"{spec.get('name', '?')}: {size[0]} × {size[1]} pixels, "
                              f"{spec.get('channels', '?')} channel(s) {spec.get('color', '')}, "
                              f"{str(spec.get('layout', '?')).upper()}, {spec.get('dtype', '?')}"))
        rows.append(("preprocessing", f"scale {_scale(spec.get('scale'))}, mean {_value('', spec.get('mean'))}, "
                                      f"std {_value('', spec.get('std'))}, resize {spec.get('resize', '?')}"))
    if output:
        rows.append(("output", f"{output.get('name', '?')}: {output.get('kind', '?')}, "
                               f"{output.get('n_classes', '?')} classes"))
    labels = model.get("labels") or []
    rows.append(("labels", some_names(labels, LABELS_SHOWN, note=" (audit.json lists them)") if labels else "–"))
    return rows


def _scale(x) -> str:
    if _is_number(x) and x > 0 and abs(1 / x - round(1 / x)) < 1e-3 * (1 / x) and round(1 / x) > 1:
        return f"1/{round(1 / x)}"
    return _value("", x)


def _dataset_rows(ds: dict) -> list[tuple[str, str]]:
    rows = [("root", str(ds.get("root", "–")))]
    if ds.get("masks"):
        rows.append(("object masks", str(ds["masks"])))
    if ds.get("manifest"):
        rows.append(("manifest", str(ds["manifest"])))
    for key in ("listed", "audited", "skipped"):
        if key in ds:
            rows.append((f"images {key}", str(ds[key])))
    return rows


def _class_stats(c: dict, th: dict) -> list[str]:
    m = c.get("metrics") or {}
    out = [f"decision moved by hiding ≤5%: {pct(m.get('small_area_rate'))} (flags at {pct(th.get('localized_rate'))})",
           f"boxes agreeing on one place: {pct(m.get('box_agreement'))} (flags at {pct(th.get('fixed_agreement'))})"]
    if m.get("median_background_share") is not None:
        out.append(f"heat outside the object: {pct(m.get('median_background_share'))} "
                   f"(flags at {pct(th.get('background_share'))})")
    return out


def _metric_rows(m: dict) -> list[tuple[str, str]]:
    names = [("small_area_rate", "decision moved by hiding at most 5%"),
             ("decisive_rate", "decision moved within the 25% cap"),
             ("box_agreement", "decisive boxes agreeing on one place"),
             ("median_decisive_area", "median decisive area"),
             ("mean_concentration", "heat in the top 5% of pixels (mean)"),
             ("median_background_share", "heat outside the object (median)"),
             ("object_erased_survival", "answer kept with the object erased"),
             ("background_erased_survival", "answer kept with the background erased"),
             ("masked_images", "images with an object mask"),
             ("estimated_masks", "of which masks estimated")]
    rows = []
    for key, label in names:
        if key in m and m[key] is not None:
            v = m[key]
            rows.append((label, pct(v, 1) if isinstance(v, float) else str(v)))
    return rows


def render_report(audit: dict, figures: dict[str, bytes], *, timestamp: str | None = None) -> str:
    """The scan report as one self-contained HTML page.

    Pure: reads no file and no clock; the same arguments give the same text.

    Parameters
    ----------
    audit : dict
        audit.json (schema 1); ``images[]`` entries may carry ``decisive_score``.
    figures : dict of str -> bytes
        PNGs by the names of :func:`report_plan` (``build_figures`` draws them), embedded
        as ``data:`` URIs; a missing one is shown as "not available".
    timestamp : str, optional
        Printed in the footer when given.

    Returns
    -------
    str
        HTML5, autoescaped, no script, no network.
    """
    plan = report_plan(audit)
    images = {im.get("path"): im for im in audit.get("images") or [] if isinstance(im, dict)}
    classes = audit.get("classes") or []
    findings = audit.get("findings") or []
    labels = [str(x) for x in (audit.get("model") or {}).get("labels") or []]
    settings = audit.get("settings") or {}
    th = settings.get("thresholds") or {}
    model = audit.get("model") or {}
    dataset = audit.get("dataset") or {}

    finding_views = []
    by_class: dict[str, list[dict]] = {}
    for k, (f, entry) in enumerate(zip(findings, plan["findings"])):
        ev = f.get("evidence") or {}
        ci = entry["class_index"]
        view = {
            "id": str(f.get("id", f"#{k + 1}")), "anchor": f"finding-{k + 1}", "cls": f.get("class"),
            "cls_anchor": f"class-{ci + 1}" if ci is not None else None,
            "kind": f.get("kind"), "kind_title": KIND_TITLES.get(f.get("kind"), str(f.get("kind"))),
            "status": f.get("status") if f.get("status") in STATUS_TITLES else "suspect",
            "status_title": STATUS_TITLES.get(f.get("status"), str(f.get("status"))),
            "sentence": finding_sentence(f), "status_sentence": status_sentence(f),
            "statistic": _statistic_view(ev), "p_value": pval(p_value_of(f)),
            "region": f.get("region"), "region_words": where(f.get("region")) if f.get("region") else None,
            "region_text": (_value("", f.get("region")) + " (" + where(f.get("region")) + ")")
            if f.get("region") else None,
            "evidence": _evidence_rows(ev),
            "mean": _uri(figures, entry["mean"]),
            "scale": _uri(figures, entry["scale"]),
            "tiles": [_tile_view(p, n, images.get(p), figures) for p, n in zip(entry["paths"], entry["tiles"])],
            "n_examples": len(f.get("examples") or []),
            "motif": None, "test": _test_view(f, labels, th),
        }
        if entry["motif"]:
            mo = entry["motif"]
            view["motif"] = {"uri": _uri(figures, mo["figure"]), "medoid": mo["medoid"],
                             "members": mo["all_members"], "shown": len(mo["members"])}
        finding_views.append(view)
        by_class.setdefault(f.get("class"), []).append(view)

    class_views = []
    for i, (c, entry) in enumerate(zip(classes, plan["classes"])):
        mine = by_class.get(c.get("name"), [])
        class_views.append({
            "name": c.get("name"), "anchor": f"class-{i + 1}", "images": c.get("images", "–"),
            "accuracy": pct(c.get("accuracy")), "confidence": pct(c.get("mean_confidence")),
            "findings": mine, "stats": [v["statistic"]["line"] for v in mine] or _class_stats(c, th),
            "metrics": _metric_rows(c.get("metrics") or {}),
            "mean": _uri(figures, entry["mean"]), "scale": _uri(figures, entry["scale"]),
            "tiles": [_tile_view(p, n, images.get(p), figures) for p, n in zip(entry["paths"], entry["tiles"])],
            "not_judged": [str(r) for r in c.get("not_judged") or []],
            "notes": [str(n) for n in c.get("notes") or []],
            # no rule ran at all (too few correct images), as opposed to one rule not running
            "unjudged": any("min_correct_images" in str(r) for r in c.get("not_judged") or []),
            "deletion_area": num((c.get("metrics") or {}).get("mean_deletion_area")),
            "insertion_area": num((c.get("metrics") or {}).get("mean_insertion_area")),
        })

    skipped = [s for s in audit.get("skipped") or [] if isinstance(s, dict)]
    reasons: dict[str, int] = {}
    for s in skipped:
        reasons[str(s.get("reason", "?"))] = reasons.get(str(s.get("reason", "?")), 0) + 1
    statuses = {key: sum(1 for f in finding_views if f["status"] == key) for key in STATUS_TITLES}
    reasons_known = {name: reason for name, _, reason in THRESHOLD_TABLE}
    model_file = _model_rows(model)[0][1]
    context = {
        "title": f"Shortcut audit of {model_file}",
        "model_file": model_file,
        "model_rows": _model_rows(model),
        "dataset_rows": _dataset_rows(dataset),
        "audited": dataset.get("audited", len(images)),
        "n_skipped": len(skipped),
        "skip_reasons": sorted(reasons.items(), key=lambda kv: (-kv[1], kv[0])),
        "skipped": [(str(s.get("path", "?")), str(s.get("reason", "?"))) for s in skipped[:SKIPPED_SHOWN]],
        "skipped_more": max(0, len(skipped) - SKIPPED_SHOWN),
        "findings": finding_views,
        "statuses": statuses,
        "flagged_classes": sum(1 for c in class_views if c["findings"]),
        "unjudged_classes": [c for c in class_views if c["not_judged"]],
        "noted_classes": [c for c in class_views if c["notes"] and not c["findings"]],
        "classes": class_views,
        "class_means": _uri(figures, "class-means"),
        "curves": _uri(figures, "curves"),
        "curve_sample": (f"measured on {settings['curve_images']} images a class, chosen by a hash of their paths"
                         if isinstance(settings.get("curve_images"), int) else "measured on every image"),
        "settings_rows": [(_label(k), _value(k, settings[k])) for k in sorted(settings) if k != "thresholds"],
        "threshold_rows": [(k, _value("", th[k]), reasons_known.get(k, ""))
                           for k in [n for n in reasons_known if n in th] + sorted(set(th) - set(reasons_known))],
        "settings_json": dumps(settings).strip(),
        "tool_version": str(audit.get("tool_version", "?")),
        "schema": str(audit.get("schema", "?")),
        "timestamp": timestamp,
    }
    return render("scan.html.j2", **context)


# ----------------------------------------------------------------------- write

def write_scan_report(result, out_dir: str | os.PathLike, *, timestamp: str | None = None) -> Path:
    """Write ``figures/*.png`` and ``report.html`` for a finished scan into ``out_dir``.

    Parameters
    ----------
    result : AuditResult or dict
        The scan's result (its ``to_dict()`` is audit.json), or audit.json itself.
    out_dir : path
        The scan's output folder (holding ``results/``).
    timestamp : str, optional
        Printed in the report's footer.

    Returns
    -------
    Path
        ``out_dir / "report.html"``.

    Raises
    ------
    OutputError
        When the folder cannot be written.
    """
    out_dir = Path(out_dir)
    audit = result.to_dict() if hasattr(result, "to_dict") else dict(result)
    means = None
    if hasattr(result, "classes") and not isinstance(result, dict):
        means = {c.name: c.mean_heatmap for c in result.classes if c.mean_heatmap is not None}
    files = AuditFiles(out_dir, audit)
    view = with_store_numbers(audit, files)
    figures = build_figures(view, files, means=means)
    fig_dir = out_dir / "figures"
    if fig_dir.is_dir():
        for old in fig_dir.glob("*.png"):
            if old.stem not in figures and old.is_file():
                old.unlink()
    for name, png in figures.items():
        write_bytes_atomic(fig_dir / f"{fg.safe_name(name)}.png", png)
    page = out_dir / "report.html"
    write_bytes_atomic(page, render_report(view, figures, timestamp=timestamp).encode("utf-8"))
    return page
