"""Tests of shortcut_audit.pack: the evidence pack of an audit's findings.

The audits come from the planted-shortcut fixtures of scan_fixtures.py (class alpha's
answers are read from a bright top-left square), so the pack has a known finding F1.
"""

from __future__ import annotations

import csv
import hashlib
import json
import re
import shutil
import zipfile
from pathlib import Path

import onnx
import pytest

from onnx_builders import save
from scan_fixtures import corner_model, make_dataset
from shortcut_audit.errors import DataError, UsageError
from shortcut_audit.pack import MANIFEST_COLUMNS, _csv_cell, make_pack
from shortcut_audit.report.figures import safe_name
from shortcut_audit.report.words import STATUS_TITLES, pval, status_sentence
from shortcut_audit.scan import audit as run_audit

HOSTILE_CLASS = '"><img src=x onerror=alert(1)>'
HOSTILE_FILES = ('a..b & "q".png', "-rf $HOME.png", "CON.png", "ümlaut `x`.png")
SAFE_PART = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def tree(folder: Path) -> dict[str, float]:
    return {p.relative_to(folder).as_posix(): p.stat().st_mtime_ns
            for p in sorted(folder.rglob("*"))}


@pytest.fixture(scope="module")
def corner(tmp_path_factory) -> tuple[Path, Path]:
    tmp = tmp_path_factory.mktemp("corner")
    data = make_dataset(tmp / "data", n=8)
    out = tmp / "audit"
    run_audit(data, corner_model(tmp / "m.onnx"), out=out)
    return data, out


@pytest.fixture(scope="module")
def packed(corner, tmp_path_factory) -> dict:
    """The corner audit packed twice, as a zip and as a folder, side by side in a folder
    that already held a file; with the listings before and after."""
    _, audit_dir = corner
    place = tmp_path_factory.mktemp("place")
    (place / "keep.txt").write_text("x")
    before = sorted(p.name for p in place.iterdir())
    audit_before = tree(audit_dir)
    z = make_pack(audit_dir, place / "evidence.zip")
    after_zip = sorted(p.name for p in place.iterdir())
    folder = make_pack(audit_dir, place / "pack")
    return {"zip": z, "folder": folder, "before": before, "after_zip": after_zip,
            "after": sorted(p.name for p in place.iterdir()), "audit_before": audit_before,
            "audit_after": tree(audit_dir)}


@pytest.fixture(scope="module")
def more(corner, tmp_path_factory) -> tuple[Path, Path]:
    """The corner audit with two more findings, and its pack."""
    tmp = tmp_path_factory.mktemp("more")
    audit_dir = with_more_findings(corner[1], tmp / "audit")
    return audit_dir, make_pack(audit_dir, tmp / "pack", leads=True)


@pytest.fixture(scope="module")
def hostile(tmp_path_factory) -> tuple[Path, Path]:
    """A scan whose flagged class folder and file names are hostile to file systems."""
    tmp = tmp_path_factory.mktemp("hostile")
    base = make_dataset(tmp / "base", n=6)
    data = tmp / "data"
    data.mkdir()
    shutil.move(str(base / "alpha"), str(data / HOSTILE_CLASS))
    for name in ("beta", "gamma"):
        shutil.move(str(base / name), str(data / name))
    for k, name in enumerate(HOSTILE_FILES):
        (data / HOSTILE_CLASS / f"alpha_{k:02d}.png").rename(data / HOSTILE_CLASS / name)
    model = corner_model(tmp / "m.onnx")
    save(onnx.load(str(model)), model, metadata={"labels": [HOSTILE_CLASS, "beta", "gamma"]})
    out = tmp / "audit"
    run_audit(data, model, out=out)
    return data, out


def with_more_findings(audit_dir: Path, dest: Path) -> Path:
    """A copy of the audit with two hand-added findings: a tested background one on
    beta and a recurring motif on gamma."""
    shutil.copytree(audit_dir, dest)
    audit = json.loads((dest / "audit.json").read_text())
    beta = [im["path"] for im in audit["images"] if im["label"] == "beta"][:3]
    gamma = [im["path"] for im in audit["images"] if im["label"] == "gamma"]
    audit["findings"] += [
        {"id": "F2", "class": "beta", "kind": "background", "status": "confirmed", "region": None,
         "evidence": {"statistic": "median_background_share", "value": 0.7, "threshold": 0.5,
                      "others_median": 0.2, "images": 8, "object_erased_survival": 0.75,
                      "test": {"rate": 0.6, "control_rate": 0.05, "p_value": 0.002,
                               "examples": [{"path": beta[0], "before": {"predicted": "alpha"},
                                             "after": {"predicted": "beta"}}]}},
         "examples": beta},
        {"id": "F3", "class": "gamma", "kind": "recurring-motif", "status": "suspect", "region": None,
         "evidence": {"statistic": "coverage", "value": 0.5, "threshold": 0.3, "medoid": gamma[0],
                      "members": gamma[1:4], "member_paths": gamma[1:4],
                      "member_boxes": [[0.25, 0.25, 0.5, 0.5], [0.5, 0.0, 0.75, 0.25], [0.0, 0.5, 0.25, 0.75]]},
         "examples": gamma[:2]},
    ]
    (dest / "audit.json").write_text(json.dumps(audit))
    return dest


def expected_outcome(finding: dict) -> str:
    """The manifest's test column for an image the test's examples do not name."""
    test = finding["evidence"].get("test")
    if not test:
        return "not tested"
    if test.get("ran") is False:
        return f"not run: {test['reason']}"
    return f"{STATUS_TITLES[finding['status']]} (p = {pval(finding['evidence']['p_value'])})"


def manifest(folder: Path) -> list[dict]:
    with open(folder / "manifest.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


# ---------------------------------------------------------------------- content

def test_pack_manifest_rows_match_their_files(corner, packed):
    data, audit_dir = corner
    audit = json.loads((audit_dir / "audit.json").read_text())
    out = packed["folder"]
    (f1,) = audit["findings"]
    folder = out / "F1-fixed-position-alpha"
    assert sorted(p.name for p in out.iterdir()) == ["F1-fixed-position-alpha", "README.md", "pack.json"]
    rows = manifest(folder)
    assert list(rows[0]) == list(MANIFEST_COLUMNS)
    assert [r["original"] for r in rows] == f1["examples"]
    assert {r["file"] for r in rows} == {f"images/{p.name}" for p in (folder / "images").iterdir()}
    assert {r["overlay"] for r in rows} == {f"overlays/{p.name}" for p in (folder / "overlays").iterdir()}
    images = {im["path"]: im for im in audit["images"]}
    for r in rows:
        # Copied, not moved: the original is still there and the bytes are the same.
        assert sha(folder / r["file"]) == sha(data / r["original"])
        im = images[r["original"]]
        assert r["class"] == "alpha" and r["predicted"] == im["predicted"]
        assert float(r["confidence"]) == pytest.approx(im["confidence"], abs=5e-5)
        assert [float(v) for v in r["decisive_region"].split()] == pytest.approx(im["decisive_box"], abs=5e-4)
        assert float(r["score_before"]) == pytest.approx(im["label_score"], abs=5e-5)
        assert float(r["score_drop"]) == pytest.approx(
            float(r["score_before"]) - float(r["score_hidden"]), abs=2e-4)
        # the finding's state, and for an image whose region was transplanted in an
        # example trial, that trial's target prediction before and after
        assert r["test_outcome"].startswith(expected_outcome(f1))
    assert (folder / "contact_sheet.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_pack_request_asks_for_counts(corner, packed):
    out = packed["folder"]
    (f1,) = json.loads((corner[1] / "audit.json").read_text())["findings"]
    text = (out / "F1-fixed-position-alpha" / "request.md").read_text()
    # 8 agreeing images -> at least MIN_REQUEST = 30 photos; split over 2 other classes: 15 each.
    assert "At least **30** photos of alphas **without** anything in the upper-left corner" in text
    assert "At least **15** photos each of other items (betas, gammas) **with** the same kind of mark" in text
    assert status_sentence(f1) in text
    assert status_sentence(f1).startswith(("Confirmed", "Not confirmed", "Suspect"))


def test_pack_of_tested_background_and_motif_findings(more):
    _, out = more
    bg = out / "F2-background-beta"
    text = (bg / "request.md").read_text()
    assert "Confirmed: a counterfactual test bore it out (p = 0.002)." in text
    assert "photos of betas on **other** surfaces" in text
    assert "other items (alphas, gammas) on the **same** surface" in text
    rows = manifest(bg)
    assert rows[0]["test_outcome"] == "confirmed (p = 0.002); its region pasted: alpha -> beta"
    assert rows[1]["test_outcome"] == "confirmed (p = 0.002)"
    motif = manifest(out / "F3-recurring-motif-gamma")
    # examples (gamma 0, 1), then the medoid (gamma 0) and the members (gamma 1-3), each once.
    assert [r["original"] for r in motif] == [f"gamma/gamma_{i:02d}.png" for i in range(4)]
    # the motif's members are outlined where their crop was cut; the medoid, given without
    # a box, keeps its decisive box
    assert [r["region_source"] for r in motif[1:]] == ["motif crop"] * 3
    assert [r["decisive_region"] for r in motif[1:]] == [
        "0.2500 0.2500 0.5000 0.5000", "0.5000 0.0000 0.7500 0.2500", "0.0000 0.5000 0.2500 0.7500"]
    assert motif[0]["region_source"] in ("decisive", "hottest 5%", "")


def test_pack_of_one_finding_replaces_an_earlier_pack(more, tmp_path):
    audit_dir, earlier = more
    out = tmp_path / "pack"
    shutil.copytree(earlier, out)
    assert (out / "F2-background-beta").is_dir()
    make_pack(audit_dir, out, finding="F3")
    assert sorted(p.name for p in out.iterdir()) == ["F3-recurring-motif-gamma", "README.md", "pack.json"]


# ------------------------------------------------------------------ safe output

def test_zip_extracts_inside_its_root(packed, tmp_path):
    z, folder = packed["zip"], packed["folder"]
    with zipfile.ZipFile(z) as zf:
        names = zf.namelist()
        for name in names:
            assert not name.startswith("/") and "\\" not in name and ".." not in name.split("/")
            assert name.startswith("evidence/")
        zf.extractall(tmp_path / "x")
    root = (tmp_path / "x").resolve()
    for p in (tmp_path / "x").rglob("*"):
        assert p.resolve().is_relative_to(root)
    # The zip holds exactly the files of the folder pack, byte for byte.
    files = {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()}
    assert {n.removeprefix("evidence/") for n in names} == files
    with zipfile.ZipFile(z) as zf:
        assert zf.read("evidence/F1-fixed-position-alpha/manifest.csv") == \
            (folder / "F1-fixed-position-alpha" / "manifest.csv").read_bytes()


def test_hostile_names_come_out_safe(hostile, tmp_path):
    data, audit_dir = hostile
    out = make_pack(audit_dir, tmp_path / "pack")
    for p in out.rglob("*"):
        for part in p.relative_to(out).parts:
            assert SAFE_PART.match(part), part
    (folder,) = [p for p in out.iterdir() if p.is_dir()]
    assert folder.name == f"F1-fixed-position-{safe_name(HOSTILE_CLASS, limit=40)}" == \
        "F1-fixed-position-img_src_x_onerror_alert_1"
    rows = manifest(folder)
    # The manifest keeps the true names (CSV-quoted) and points at the safe copies.
    originals = {r["original"] for r in rows}
    assert {f"{HOSTILE_CLASS}/{n}" for n in HOSTILE_FILES} <= originals
    for r in rows:
        assert r["class"] == HOSTILE_CLASS
        assert sha(folder / r["file"]) == sha(data / r["original"])
    names = {Path(r["file"]).name for r in rows}
    assert not any(n.lower().startswith("con.") for n in names)
    text = (folder / "request.md").read_text()
    # Markdown: every < and > of the data is backslash-escaped, so no viewer makes a tag.
    assert re.search(r"(?<!\\)[<>]", text) is None
    assert '"\\>\\<img src=x onerror=alert(1)\\>' in text


def test_nothing_is_written_outside_out(packed):
    assert packed["after_zip"] == sorted(packed["before"] + ["evidence.zip"])
    assert packed["after"] == sorted(packed["before"] + ["evidence.zip", "pack"])
    assert packed["audit_after"] == packed["audit_before"]  # the audit folder is only read


def test_csv_cells_that_would_run_as_formulas_are_quoted():
    # OWASP "CSV Injection": prefix cells starting with = + - @ (tab, CR) with a quote.
    assert [_csv_cell(v) for v in ("=1+1", "+x", "@sum", "-cmd", "-0.25", "plain", None)] == \
        ["'=1+1", "'+x", "'@sum", "'-cmd", "-0.25", "plain", ""]


# ------------------------------------------------------------------------ errors

def test_no_audit_json_says_to_run_an_audit_first(tmp_path):
    with pytest.raises(UsageError, match=r"^no audit\.json in .*; run `shortcut-audit audit"):
        make_pack(tmp_path, tmp_path / "pack")


def test_unknown_finding_lists_the_ids(corner, tmp_path):
    _, audit_dir = corner
    with pytest.raises(UsageError, match=r"--finding 'F9' is not a finding of this audit; its findings are: F1\.$"):
        make_pack(audit_dir, tmp_path / "pack", finding="F9")
    assert not (tmp_path / "pack").exists()


def test_out_inside_the_image_set_is_refused(corner):
    data, audit_dir = corner
    with pytest.raises(UsageError, match="overlaps the image set"):
        make_pack(audit_dir, data / "pack")
    assert not (data / "pack").exists()


def test_non_empty_folder_is_refused(corner, tmp_path):
    _, audit_dir = corner
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("mine")
    with pytest.raises(UsageError, match="is not empty and holds no earlier pack"):
        make_pack(audit_dir, tmp_path / "busy")
    assert sorted(p.name for p in (tmp_path / "busy").iterdir()) == ["notes.txt"]


def test_moved_images_need_the_images_option(corner, tmp_path):
    data, audit_dir = corner
    moved = tmp_path / "audit"
    shutil.copytree(audit_dir, moved)
    audit = json.loads((moved / "audit.json").read_text())
    audit["dataset"]["root"] = str(tmp_path / "gone")
    (moved / "audit.json").write_text(json.dumps(audit))
    with pytest.raises(DataError, match="pass --images with the folder the audit read"):
        make_pack(moved, tmp_path / "pack")
    out = make_pack(moved, tmp_path / "pack", images=data)
    assert len(manifest(out / "F1-fixed-position-alpha")) == 8


def test_audit_without_findings_has_nothing_to_pack(corner, tmp_path):
    _, audit_dir = corner
    clean = tmp_path / "audit"
    shutil.copytree(audit_dir, clean)
    audit = json.loads((clean / "audit.json").read_text())
    audit["findings"] = []
    (clean / "audit.json").write_text(json.dumps(audit))
    with pytest.raises(UsageError, match="has no findings; there is nothing to pack"):
        make_pack(clean, tmp_path / "pack")


# ------------------------------------------------------------- leads and requests

def test_by_default_the_pack_holds_confirmed_findings_only(more, tmp_path):
    # F1 (the corner) and F2 (background) are confirmed, F3 is a suspect no test decided.
    audit_dir, _ = more
    out = make_pack(audit_dir, tmp_path / "pack")
    assert sorted(p.name for p in out.iterdir() if p.is_dir()) == [
        "F1-fixed-position-alpha", "F2-background-beta"]
    assert "F3" not in (out / "README.md").read_text()


def test_a_lead_asks_for_no_photos(more):
    _, out = more
    lead = (out / "F3-recurring-motif-gamma" / "request.md").read_text()
    request = (out / "F2-background-beta" / "request.md").read_text()
    assert lead.startswith("# Lead for review: F3") and "Nothing yet" in lead
    assert "At least **" not in lead
    assert request.startswith("# Data request: F2") and "At least **" in request
    assert "a lead for review, no photos requested" in (out / "README.md").read_text()


def test_an_audit_without_confirmed_findings_packs_only_on_request(more, tmp_path):
    audit_dir = tmp_path / "audit"
    shutil.copytree(more[0], audit_dir)
    audit = json.loads((audit_dir / "audit.json").read_text())
    for f in audit["findings"]:
        f["status"] = "not-confirmed"
    (audit_dir / "audit.json").write_text(json.dumps(audit))
    with pytest.raises(UsageError, match=r"no confirmed finding.*pass --leads to pack its 3 unconfirmed"):
        make_pack(audit_dir, tmp_path / "pack")
    out = make_pack(audit_dir, tmp_path / "pack", leads=True)
    text = (out / "F1-fixed-position-alpha" / "request.md").read_text()
    assert "its counterfactual test did not bear it out" in text
