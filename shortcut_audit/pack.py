"""The evidence pack: what a data-collection request needs, per finding.

``make_pack(AUDIT_DIR, OUT)`` reads a finished scan (audit.json, the per-image store
``results/`` and the images under the dataset root audit.json names) and writes, per
finding, a folder::

    <finding-id>-<kind>-<class>/
        request.md         what was found, how sure we are, what to collect (with counts)
        manifest.csv       one row per flagged image (columns: MANIFEST_COLUMNS)
        contact_sheet.png  thumbnails with the decisive region outlined
        images/            the flagged original images, copied from the dataset root
        overlays/          each image with its heatmap and decisive region

plus ``README.md`` (what the pack holds) and ``pack.json`` (the list of files, which
lets a later pack into the same folder replace this one). ``OUT`` is a folder, or a
path ending in ``.zip`` for one zip file whose members all sit under one top folder.

Nothing is written outside ``OUT`` (a zip goes through a temporary file beside it,
renamed into place). Names that come from the data are made file-system safe
(:func:`~shortcut_audit.report.figures.safe_name` plus a hash of the original path, so
two images never share a name); zip members are relative, with no ``..``; CSV cells
that a spreadsheet would run as a formula are quoted; Markdown text is escaped.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import os
import zipfile
from pathlib import Path, PurePosixPath

from .errors import DataError, UsageError
from .report.figures import contact_sheet_png, heatmap_overlay_png, plain_label, safe_name
from .report.sources import AuditFiles, read_audit
from .report.words import (KIND_TITLES, STATUS_TITLES, finding_sentence, motif_boxes, motif_of, num,
                           p_value_of, pct, plural, pval, statistic_name, status_sentence, test_of, test_sentence,
                           where)
from .store import inside, write_bytes_atomic

__all__ = ["make_pack", "pack_members", "is_lead", "MANIFEST_COLUMNS", "MIN_REQUEST"]

#: Columns of every manifest.csv.
MANIFEST_COLUMNS = ("file", "original", "class", "predicted", "confidence", "decisive_region",
                    "region_source", "score_before", "score_hidden", "score_drop", "overlay",
                    "test_outcome")
#: The fewest photos a request asks for in one line (fewer says little about a class).
MIN_REQUEST = 30
#: The fewest photos asked of each other class.
MIN_PER_OTHER = 10
_MARKER = "pack.json"
_IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".bmp", ".gif", ".tif", ".tiff", ".webp"}


# ------------------------------------------------------------------- helpers

def _csv_cell(value) -> str:
    """A cell as text; text a spreadsheet would run as a formula is quoted with ``'``."""
    if value is None:
        return ""
    text = str(value)
    if text and text[0] in "=+-@\t\r" and not _is_number_text(text):
        return "'" + text
    return text


def _is_number_text(text: str) -> bool:
    try:
        float(text)
        return True
    except ValueError:
        return False


def _md(text, *, limit: int = 2000) -> str:
    """``text`` for Markdown: one line, control characters gone, markup characters escaped."""
    s = plain_label(str(text), limit=limit)
    out = []
    for ch in s:
        if ch in "\\`*_[]<>|#!~&":
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def _code(text, *, limit: int = 80) -> str:
    """``text`` as a Markdown code span (backticks removed; code spans need no escapes)."""
    return "`" + (plain_label(str(text), limit=limit).replace("`", "'") or " ") + "`"


def _key(path: str) -> str:
    return hashlib.sha256(path.encode("utf-8", "surrogatepass")).hexdigest()[:8]


def _file_name(path: str, suffix: str | None = None) -> str:
    """A safe, unique file name for dataset path ``path``."""
    pure = PurePosixPath(path)
    ext = suffix if suffix is not None else pure.suffix.lower()
    if ext not in _IMAGE_SUFFIXES and suffix is None:
        ext = ".img"
    return f"{safe_name(pure.stem, limit=48)}-{_key(path)}{ext}"


def _box_text(box) -> str:
    if not box or len(box) != 4:
        return ""
    return " ".join(f"{float(v):.4f}" for v in box)


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _round_up(n: float, step: int = 10) -> int:
    return int(math.ceil(n / step) * step)


def _flagged_paths(finding: dict) -> list[str]:
    """The finding's examples, then its motif's medoid and members, each once."""
    paths = [p for p in finding.get("examples") or [] if isinstance(p, str)]
    motif = motif_of(finding)
    if motif is not None:
        paths += ([motif["medoid"]] if motif["medoid"] else []) + motif["members"]
    return list(dict.fromkeys(paths))


def _test_outcome(finding: dict, path: str, labels: list[str]) -> str:
    """The test's word on one image (an example trial that names it by ``path`` or
    ``source_path``), else the finding's state."""
    test = test_of(finding)
    if test is None:
        return "not tested"
    if test.get("ran") is False:
        return f"not run: {plain_label(str(test.get('reason', 'no reason given')), limit=100)}"
    p = p_value_of(finding)
    state = STATUS_TITLES.get(finding.get("status"), str(finding.get("status")))
    overall = f"{state} (p = {pval(p)})" if p is not None else state
    for ex in test.get("examples") or []:
        if isinstance(ex, dict) and path in (ex.get("path"), ex.get("source_path")):
            parts = []
            for side in ("before", "after"):
                v = ex.get(side)
                if isinstance(v, dict):
                    k = v.get("pred", v.get("predicted", v.get("label")))
                    v = labels[k] if isinstance(k, int) and 0 <= k < len(labels) else k
                if v is not None:
                    parts.append(str(v))
            if len(parts) == 2:
                onto = ex.get("target_path")
                where = f" on {plain_label(str(onto), limit=60)}" if onto else ""
                return f"{overall}; its region pasted{where}: {parts[0]} -> {parts[1]}"
    return overall


# ------------------------------------------------------------- the request

def _counts(finding: dict, n_flagged: int, n_class: int) -> int:
    ev = finding.get("evidence") or {}
    base = 0
    for key in ("agreeing_images", "flipping_images", "members_count", "masked_images", "images"):
        if isinstance(ev.get(key), int) and ev[key] > 0:
            base = ev[key]
            break
    if isinstance(ev.get("members"), list):
        base = max(base, len(ev["members"]))
    base = max(base, n_flagged, n_class // 2)
    return max(MIN_REQUEST, _round_up(base))


def request_text(finding: dict, audit: dict, *, n_images: int, folder: str) -> str:
    """The plain-words request of one finding (Markdown)."""
    cls = str(finding.get("class", "?"))
    kind = finding.get("kind")
    others = [str(c.get("name")) for c in audit.get("classes") or [] if c.get("name") != cls]
    n_class = next((int(c.get("images", 0)) for c in audit.get("classes") or []
                    if c.get("name") == cls and isinstance(c.get("images"), int)), 0)
    total = _counts(finding, n_images, n_class)
    each = max(MIN_PER_OTHER, math.ceil(total / max(1, len(others)))) if others else 0
    place = where(finding.get("region"))
    items = _md(plural(cls))
    other_list = ", ".join(_md(plural(o)) for o in others) if others else "other items"
    ev = finding.get("evidence") or {}

    if kind == "fixed-position":
        thing = f"the mark or detail in the {place}"
        asks = [f"At least **{total}** photos of {items} **without** anything in the {place} "
                f"(no mark, label or sticker there).",
                f"At least **{each}** photos each of other items ({other_list}) **with** the same "
                f"kind of mark in the {place}." if others else None]
    elif kind == "localized":
        thing = "the small detail outlined in contact_sheet.png"
        asks = [f"At least **{total}** photos of {items} **without** {thing}.",
                f"At least **{each}** photos each of other items ({other_list}) **with** that "
                f"detail." if others else None]
    elif kind == "recurring-motif":
        thing = "the recurring mark (the outlined crops in contact_sheet.png)"
        asks = [f"At least **{total}** photos of {items} **without** {thing}, anywhere on the piece.",
                f"At least **{each}** photos each of other items ({other_list}) **carrying** that "
                f"mark, at different places." if others else None]
    elif kind == "background":
        thing = "the surroundings of the flagged photos"
        asks = [f"At least **{total}** photos of {items} on **other** surfaces and backdrops than "
                f"in the flagged photos (see contact_sheet.png).",
                f"At least **{each}** photos each of other items ({other_list}) on the **same** "
                f"surface and backdrop as the flagged {items}." if others else None]
    elif kind == "image-wide":
        thing = "the look shared by the flagged photos (their grain, noise or processing)"
        asks = [f"At least **{total}** photos of {items} taken or processed **differently** from "
                f"the flagged photos (another camera, setting or export), on varied backdrops.",
                f"At least **{each}** photos each of other items ({other_list}) taken and "
                f"processed the **same** way as the flagged {items}." if others else None]
    else:
        thing = "the pattern shown in contact_sheet.png"
        asks = [f"At least **{total}** photos of {items} without {thing}."]
    asks = [a for a in asks if a]

    stat = ev.get("statistic")
    stat_line = ""
    if stat is not None and _finite(ev.get("value")):
        fmt = pct if isinstance(ev.get("value"), float) and 0 <= ev["value"] <= 1 else num
        stat_line = (f"The measure behind it, {statistic_name(str(stat))}, is {fmt(ev['value'])}; "
                     f"the audit flags at {fmt(ev.get('threshold'))}"
                     + (f" and the other classes are at {fmt(ev.get('others_median'))}."
                        if _finite(ev.get("others_median")) else "."))
    p = p_value_of(finding)
    lead = is_lead(finding)
    heading = "Lead for review" if lead else "Data request"
    lines = [
        f"# {heading}: {_md(finding.get('id', '?'))}, {_md(cls)} ({_md(KIND_TITLES.get(kind, kind))})",
        "",
        "## What was found",
        "",
        _md_sentence(finding_sentence(finding)),
        "",
        "## How sure we are",
        "",
        _md_sentence(status_sentence(finding))
        + ("" if p is not None else " A counterfactual test has not decided it; the counts below "
                                     "also serve to test it."),
        "",
    ]
    if stat_line:
        lines += [_md_sentence(stat_line), ""]
    told = test_sentence(finding, labels=[str(x) for x in (audit.get("model") or {}).get("labels") or []])
    if told:
        lines += [_md_sentence(told), ""]
    lines += [
        f"This folder holds {n_images} flagged image(s): `images/` (the originals), `overlays/` "
        f"(where the model looks), `contact_sheet.png` and `manifest.csv` (one row each).",
        "",
    ]
    if lead:
        lines += [
            "## What to collect",
            "",
            "Nothing yet. This is a lead, not a request: "
            + ("its counterfactual test did not bear it out" if finding.get("status") == "not-confirmed"
               else "no counterfactual test has decided it")
            + f", so the audit does not show that {_md(plural(cls))} rely on {thing}. Look at the "
            "flagged images; ask for photos only if a reviewer sees a pattern that should not "
            "decide the class, or run the audit with its tests to decide it.",
            "",
        ]
        return "\n".join(lines)
    lines += [
        "## What to collect",
        "",
        *[f"- {a}" for a in asks],
        "",
        "Keep everything else as usual (the same kind of light, camera and framing), so that the "
        "new photos differ from the old ones only in this. Each count is at least the number of "
        f"images that show the pattern now (and at least {MIN_REQUEST}), so that the pattern stops "
        "telling the classes apart.",
        "",
    ]
    return "\n".join(lines)


def _md_sentence(text: str) -> str:
    return _md(text).replace("\\*\\*", "**")


# --------------------------------------------------------------- members

def _finding_folder(finding: dict, used: set[str]) -> str:
    base = "-".join([safe_name(str(finding.get("id", "F")), limit=12),
                     safe_name(str(finding.get("kind", "finding")), limit=20),
                     safe_name(str(finding.get("class", "class")), limit=40)])
    name, k = base, 2
    while name.lower() in used:
        name, k = f"{base}-{k}", k + 1
    used.add(name.lower())
    return name


def _finding_members(finding: dict, audit: dict, files: AuditFiles, folder: str) -> dict[str, bytes]:
    images = {im.get("path"): im for im in audit.get("images") or [] if isinstance(im, dict)}
    labels = [str(x) for x in (audit.get("model") or {}).get("labels") or []]
    members: dict[str, bytes] = {}
    rows = []
    sheet = []
    # a motif's images are outlined where its crop was cut: the thing that recurs
    crop_boxes = motif_boxes(finding) if finding.get("kind") == "recurring-motif" else {}
    for path in _flagged_paths(finding):
        im = images.get(path) or {}
        rec = files.record(path) or {}
        original = files.original(path)
        file_rel = overlay_rel = ""
        if original is not None:
            try:
                data = original.read_bytes()
            except OSError:
                data = None
            if data is not None:
                file_rel = f"images/{_file_name(path)}"
                members[f"{folder}/{file_rel}"] = data
        box, source = im.get("decisive_box") or rec.get("decisive_box"), "decisive"
        if path in crop_boxes:
            box, source = list(crop_boxes[path]), "motif crop"
        if not box:
            box, source = im.get("peak_box") or rec.get("peak_box"), "hottest 5%"
        if not box:
            source = ""
        arrays = files.arrays(path)
        heat = arrays.get("heatmap")
        mask = arrays.get("mask") if finding.get("kind") in ("background", "image-wide") else None
        pixels = files.pixels(path)
        if pixels is not None and heat is not None and pixels.shape[:2] == heat.shape:
            overlay_rel = f"overlays/{_file_name(path, '.png')}"
            members[f"{folder}/{overlay_rel}"] = heatmap_overlay_png(
                pixels, heat, box=box, title=PurePosixPath(path).name,
                mask=mask if mask is not None and mask.shape == heat.shape else None)
        if pixels is not None:
            sheet.append((pixels, box, PurePosixPath(path).name))
        before = im.get("label_score", rec.get("label_score"))
        hidden = rec.get("decisive_score", im.get("decisive_score"))
        drop = before - hidden if _finite(before) and _finite(hidden) else None
        rows.append({
            "file": file_rel, "original": path, "class": im.get("label", finding.get("class")),
            "predicted": im.get("predicted", ""),
            "confidence": f"{im['confidence']:.4f}" if _finite(im.get("confidence")) else "",
            "decisive_region": _box_text(box), "region_source": source,
            "score_before": f"{before:.4f}" if _finite(before) else "",
            "score_hidden": f"{hidden:.4f}" if _finite(hidden) else "",
            "score_drop": f"{drop:.4f}" if drop is not None else "",
            "overlay": overlay_rel, "test_outcome": _test_outcome(finding, path, labels)})
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(MANIFEST_COLUMNS)
    for row in rows:
        writer.writerow([_csv_cell(row[c]) for c in MANIFEST_COLUMNS])
    members[f"{folder}/manifest.csv"] = buf.getvalue().encode("utf-8")
    title = (f"{finding.get('id', '?')} {finding.get('kind', '')}: {finding.get('class', '?')} "
             f"({STATUS_TITLES.get(finding.get('status'), finding.get('status'))})")
    note = ("dashed box: where the motif's crop was cut in each image" if crop_boxes else
            "dashed box: the region whose hiding changes the answer (or, where none does, the hottest 5%)")
    members[f"{folder}/contact_sheet.png"] = contact_sheet_png(sheet, title=title, note=note)
    members[f"{folder}/request.md"] = request_text(
        finding, audit, n_images=len(rows), folder=folder).encode("utf-8")
    return members


def pack_members(audit: dict, files: AuditFiles, findings: list[dict]) -> dict[str, bytes]:
    """Every file of the pack, as ``{relative posix path: bytes}`` (nothing written).

    Paths are built from safe names only: no absolute path, no ``..``, no hidden file.
    """
    members: dict[str, bytes] = {}
    used: set[str] = set()
    index = []
    for f in findings:
        folder = _finding_folder(f, used)
        members.update(_finding_members(f, audit, files, folder))
        index.append((folder, f))
    model = (audit.get("model") or {})
    readme = ["# Evidence pack", "",
              f"From the audit of {_code(PurePosixPath(str(model.get('path', '?')).replace(chr(92), '/')).name)} "
              f"(SHA-256 {_code(str(model.get('sha256', '?'))[:16] + '…')}), "
              f"{len(findings)} finding(s). Each folder holds `request.md` (start there), "
              "`manifest.csv`, `contact_sheet.png`, `images/` and `overlays/`.", ""]
    for folder, f in index:
        readme.append(f"- `{folder}/`: {_md(f.get('class', '?'))}, "
                      f"{_md(KIND_TITLES.get(f.get('kind'), f.get('kind')))} "
                      f"({_md(STATUS_TITLES.get(f.get('status'), f.get('status')))})"
                      + (": a lead for review, no photos requested" if is_lead(f) else ""))
    members["README.md"] = ("\n".join(readme) + "\n").encode("utf-8")
    for name in members:
        parts = PurePosixPath(name).parts
        assert not PurePosixPath(name).is_absolute() and ".." not in parts and all(
            not p.startswith(".") for p in parts), name
    marker = {"tool": "shortcut_audit", "findings": [str(f.get("id")) for f in findings],
              "files": sorted(members)}
    members[_MARKER] = (json.dumps(marker, indent=2, sort_keys=True) + "\n").encode("utf-8")
    return members


# ---------------------------------------------------------------- writing

def _check_out(out: Path, audit_dir: Path, files: AuditFiles) -> None:
    if files.root is not None and (inside(files.root, out) or inside(out, files.root)):
        raise UsageError(f"--out {out} overlaps the image set {files.root}; pass a folder outside "
                         f"it, or the next scan would read the pack as data.")
    if inside(audit_dir / "results", out):
        raise UsageError(f"--out {out} is inside the audit's results/ folder, which a new scan "
                         f"may clear; pass a folder outside it.")


def _earlier_pack(out: Path) -> list[str]:
    """The files of an earlier pack in folder ``out`` (empty when ``out`` is new or empty).

    Raises
    ------
    UsageError
        ``out`` is a file, or a non-empty folder that holds no earlier pack.
    """
    if out.exists() and not out.is_dir():
        raise UsageError(f"--out {out} is a file; pass a new folder, or a path ending in .zip.")
    if not out.is_dir() or not any(out.iterdir()):
        return []
    try:
        old = json.loads((out / _MARKER).read_text(encoding="utf-8"))
        files = [str(p) for p in old.get("files", [])] if old.get("tool") == "shortcut_audit" else None
    except (OSError, ValueError, AttributeError):
        files = None
    if files is None:
        raise UsageError(f"--out {out} is not empty and holds no earlier pack; pass a new or "
                         f"empty folder.")
    return files + [_MARKER]


def _write_folder(out: Path, members: dict[str, bytes], old_files: list[str]) -> None:
    if old_files:
        for rel in old_files:
            target = out / rel
            if inside(out, target) and target.is_file() and not target.is_symlink():
                target.unlink()
        for d in sorted({(out / rel).parent for rel in old_files}, key=lambda p: -len(p.parts)):
            while inside(out, d) and d != out and d.is_dir() and not any(d.iterdir()):
                d.rmdir()
                d = d.parent
    for rel, data in members.items():
        write_bytes_atomic(out.joinpath(*PurePosixPath(rel).parts), data)


def _zip_bytes(top: str, members: dict[str, bytes]) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for rel in sorted(members):
            info = zipfile.ZipInfo(f"{top}/{rel}", date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            zf.writestr(info, members[rel])
    return buf.getvalue()


def is_lead(finding: dict) -> bool:
    """A finding that no counterfactual test confirmed: a lead for review, not a request."""
    return finding.get("status") != "confirmed"


def make_pack(audit_dir: str | os.PathLike, out: str | os.PathLike, *, finding: str | None = None,
              images: str | os.PathLike | None = None, leads: bool = False) -> Path:
    """Write the evidence pack of an audit's findings.

    Parameters
    ----------
    audit_dir : path
        The ``--out`` folder of a scan (audit.json, results/).
    out : path
        A folder (created; an earlier pack in it is replaced), or a path ending in
        ``.zip`` for one zip file.
    finding : str, optional
        One finding's id (``"F2"``), whatever its status; by default every confirmed one.
    leads : bool
        Also pack the findings no test confirmed (suspect, or cleared by their test),
        each marked as a lead for review: its request.md asks for no photos.
    images : path, optional
        The dataset root, when it is no longer where audit.json says.

    Returns
    -------
    Path
        ``out``.

    Raises
    ------
    UsageError
        No audit.json in ``audit_dir``; an unknown ``finding``; an audit without findings
        (or, without ``leads``, without confirmed ones);
        an ``out`` that overlaps the image set or is a non-empty folder of other files.
    DataError
        audit.json is unreadable, or the images it refers to are not found.
    OutputError
        ``out`` cannot be written.
    """
    audit_dir = Path(audit_dir)
    out = Path(out)
    audit = read_audit(audit_dir)
    findings = [f for f in audit.get("findings") or [] if isinstance(f, dict)]
    if not findings:
        raise UsageError(f"the audit in {audit_dir} has no findings; there is nothing to pack.")
    if finding is not None:
        ids = [str(f.get("id")) for f in findings]
        chosen = [f for f in findings if str(f.get("id")) == str(finding)]
        if not chosen:
            raise UsageError(f"--finding {finding!r} is not a finding of this audit; "
                             f"its findings are: {', '.join(ids)}.")
        findings = chosen
    elif not leads:
        confirmed = [f for f in findings if not is_lead(f)]
        if not confirmed:
            raise UsageError(
                f"the audit in {audit_dir} has no confirmed finding, so there is nothing to ask "
                f"for yet; pass --leads to pack its {len(findings)} unconfirmed finding(s) for "
                f"review, marked as leads.")
        findings = confirmed
    files = AuditFiles(audit_dir, audit, images=images)
    if files.root is None:
        root = (audit.get("dataset") or {}).get("root")
        raise DataError(f"the images of the audit are not at {root}; pass --images with the "
                        f"folder the audit read.")
    _check_out(out, audit_dir, files)
    as_zip = out.suffix.lower() == ".zip"
    if as_zip and out.is_dir():
        raise UsageError(f"--out {out} is a folder; pass a path ending in .zip that is not a folder.")
    old_files = [] if as_zip else _earlier_pack(out)
    members = pack_members(audit, files, findings)
    if as_zip:
        write_bytes_atomic(out, _zip_bytes(safe_name(out.stem), members))
    else:
        _write_folder(out, members, old_files)
    return out
