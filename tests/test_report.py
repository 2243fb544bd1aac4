"""Tests of shortcut_audit.report: the scan report (report.html) and its figures.

The scans run on the planted-shortcut fixtures of scan_fixtures.py (a linear model that
reads a bright top-left square for class alpha), so the audit has a known finding.
"""

from __future__ import annotations

import base64
import doctest
import html
import io
import json
import shutil
from html.parser import HTMLParser
from pathlib import Path

import matplotlib
import markupsafe
import numpy as np
import onnx
import pytest

from onnx_builders import save
from scan_fixtures import CLASSES, corner_model, make_dataset
from shortcut_audit.report import figures as report_figures
from shortcut_audit.report import html as report_html
from shortcut_audit.report import render_report, words
from shortcut_audit.report import scan_page
from shortcut_audit.report.scan_page import report_plan, write_scan_report
from shortcut_audit.scan import audit as run_audit
from shortcut_audit.store import ResultStore

HOSTILE_CLASS = '"><img src=x onerror=alert(1)>'
HOSTILE_FILE = 'it\'s "a" & b.png'
SCRIPT_CLASS = "<script>alert(1)</script>"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


class Page(HTMLParser):
    """Collects what the tests look at: tags, img sources, links, ids, text."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.imgs: list[str] = []
        self.hrefs: list[str] = []
        self.ids: set[str] = set()
        self.attrs: list[tuple[str, str, str | None]] = []
        self.text: list[str] = []
        self.title = ""
        self._in_title = False

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            self.attrs.append((tag, name, value))
            if name == "id":
                self.ids.add(value)
        d = dict(attrs)
        if tag == "img":
            self.imgs.append(d.get("src") or "")
        if tag == "a" and "href" in d:
            self.hrefs.append(d["href"])
        self._in_title = tag == "title"

    def handle_endtag(self, tag):
        if tag == "title":
            self._in_title = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_title:
            self.title += data


def parse(text: str) -> Page:
    page = Page()
    page.feed(text)
    page.close()
    return page


def hostile_scan(tmp: Path) -> tuple[Path, Path]:
    """A scan whose flagged class folder and one file name are hostile to HTML."""
    base = make_dataset(tmp / "base", n=6)
    data = tmp / "data"
    data.mkdir()
    shutil.move(str(base / "alpha"), str(data / HOSTILE_CLASS))
    for name in ("beta", "gamma"):
        shutil.move(str(base / name), str(data / name))
    (data / "beta" / "beta_00.png").rename(data / "beta" / HOSTILE_FILE)
    model = corner_model(tmp / "m.onnx")
    save(onnx.load(str(model)), model, metadata={"labels": [HOSTILE_CLASS, "beta", "gamma"]})
    out = tmp / "out"
    write_scan_report(run_audit(data, model, out=out), out)
    return data, out


@pytest.fixture(scope="module")
def corner_audit(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("corner")
    make_dataset(tmp / "data", n=8)
    out = tmp / "out"
    write_scan_report(run_audit(tmp / "data", corner_model(tmp / "m.onnx"), out=out), out)
    return out


@pytest.fixture(scope="module")
def hostile_audit(tmp_path_factory) -> Path:
    return hostile_scan(tmp_path_factory.mktemp("hostile"))[1]


def read(out: Path) -> tuple[dict, str]:
    return (json.loads((out / "audit.json").read_text(encoding="utf-8")),
            (out / "report.html").read_text(encoding="utf-8"))


# ----------------------------------------------------------------- the real page

def test_report_parses_and_embeds_every_figure(corner_audit):
    audit, text = read(corner_audit)
    page = parse(text)
    assert page.title == "Shortcut audit of m.onnx"
    assert "script" not in page.tags and "link" not in page.tags and "iframe" not in page.tags
    assert page.imgs, "the report shows no figure"
    assert all(src.startswith("data:image/png;base64,") for src in page.imgs)
    embedded = [base64.b64decode(src.split(",", 1)[1]) for src in page.imgs]
    assert all(png.startswith(PNG_MAGIC) for png in embedded)
    # Every figure written beside the report is embedded in it, and nothing else is.
    written = sorted(p.read_bytes() for p in (corner_audit / "figures").glob("*.png"))
    assert sorted(embedded) == written
    # Links stay inside the page; no URL reaches the network.
    assert page.hrefs and all(h.startswith("#") and h[1:] in page.ids for h in page.hrefs)
    assert "http://" not in text and "https://" not in text


def test_report_shows_every_class_and_finding(corner_audit):
    audit, text = read(corner_audit)
    page = parse(text)
    body = " ".join(page.text)
    assert [f["id"] for f in audit["findings"]] == ["F1"]  # the planted corner on alpha
    for c in audit["classes"]:
        assert c["name"] in body
    for k, f in enumerate(audit["findings"], start=1):
        assert f"finding-{k}" in page.ids
        assert f["kind"] in body and f["id"] in body
    # The statistic against its threshold: box agreement 1.0 against 0.5 (audit.json).
    assert "decisive boxes agreeing on one place: 100% (flags at 50%" in body
    # Deletion and insertion areas, two decimals, from the class metrics.
    for c in audit["classes"]:
        assert f"{c['metrics']['mean_deletion_area']:.2f}" in body
    assert "No finding is not proof of no shortcut." in body


def test_report_states_the_counterfactual_test(corner_audit):
    audit, text = read(corner_audit)
    body = " ".join(parse(text).text)
    (f1,) = audit["findings"]
    test = f1["evidence"].get("test")
    if not test or not test.get("ran"):
        assert "Not tested" in body or "could not run" in body
        return
    # The sentence restates audit.json's counts; the rate is hits / trials.
    assert test["rate"] == pytest.approx(test["hits"] / test["trials"])
    assert (f"Pasting the suspect region onto {test['trials']} images of other classes turned "
            f"{test['hits']} of them ({words.pct(test['rate'])}) into alpha") in body
    assert f"Fisher's exact test, one-sided: p = {words.pval(test['p_value'])}." in body
    assert words.STATUS_TITLES[f1["status"]] in body


def test_report_tiles_show_scores_before_and_after(corner_audit):
    audit, text = read(corner_audit)
    first = audit["findings"][0]["examples"][0]
    record = json.loads((corner_audit / "results" / f"{ResultStore.key(first)}.json").read_text())
    image = next(im for im in audit["images"] if im["path"] == first)
    # before: audit.json's label_score; after: the store's decisive_score.
    expected = (f"label score {image['label_score']:.2f} → {record['decisive_score']:.2f} "
                f"with {100 * image['decisive_area']:.1f}% hidden")
    assert expected in html.unescape(text)


def test_report_escapes_hostile_names(hostile_audit):
    audit, text = read(hostile_audit)
    assert audit["findings"] and audit["findings"][0]["class"] == HOSTILE_CLASS
    assert HOSTILE_CLASS not in text and HOSTILE_FILE not in text
    # Jinja's autoescape is markupsafe.escape: & < > " ' become entities.
    assert str(markupsafe.escape(HOSTILE_CLASS)) in text
    assert str(markupsafe.escape(HOSTILE_FILE)) in text
    page = parse(text)
    body = "".join(page.text)
    assert HOSTILE_CLASS in body and HOSTILE_FILE in body  # shown, as text
    assert not any(name.startswith("on") for _, name, _ in page.attrs)
    assert all(src.startswith("data:image/png;base64,") for src in page.imgs)


# ------------------------------------------------------------------ pure rendering

def hand_made_audit(*, test: dict | None = None) -> dict:
    evidence = {"statistic": "box_agreement", "value": 0.8, "threshold": 0.5, "others_median": 0.1,
                "margin_required": 0.25, "images": 10, "agreeing_images": 8}
    if test is not None:
        evidence["test"] = test
    return {
        "schema": 1, "tool_version": "0.1.0",
        "model": {"path": "/m/<b>model</b>.onnx", "sha256": "ab" * 32, "labels": [SCRIPT_CLASS, "bowl"]},
        "dataset": {"root": "/nowhere", "listed": 3, "audited": 2, "skipped": 1},
        "settings": {"seed": 0, "thresholds": {"fixed_agreement": 0.5}},
        "classes": [{"name": SCRIPT_CLASS, "images": 1, "accuracy": 1.0, "mean_confidence": 0.9,
                     "metrics": {"small_area_rate": 1.0, "box_agreement": 0.8}},
                    {"name": "bowl", "images": 1, "accuracy": 1.0, "mean_confidence": 0.8,
                     "metrics": {"small_area_rate": 0.0, "box_agreement": 0.0}}],
        "findings": [{"id": "F1", "class": SCRIPT_CLASS, "kind": "fixed-position", "status": "confirmed",
                      "region": [0.8, 0.8, 1.0, 1.0], "evidence": evidence,
                      "examples": [f"{SCRIPT_CLASS}/a&b.png"]}],
        "images": [{"path": f"{SCRIPT_CLASS}/a&b.png", "label": SCRIPT_CLASS, "predicted": SCRIPT_CLASS,
                    "confidence": 0.9, "label_score": 0.9, "decisive_area": 0.02,
                    "decisive_box": [0.8, 0.8, 1.0, 1.0], "decisive_score": 0.1},
                   {"path": "bowl/b.png", "label": "bowl", "predicted": "bowl", "confidence": 0.8,
                    "label_score": 0.8, "decisive_area": None, "decisive_box": None}],
        "skipped": [{"path": "bowl/<x>.png", "reason": "file is empty"}],
    }


def test_render_report_is_pure_and_escapes_script_class():
    audit = hand_made_audit()
    first = render_report(audit, {})
    assert render_report(audit, {}) == first
    assert SCRIPT_CLASS not in first and "<b>model</b>" not in first
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in first
    page = parse(first)
    assert "script" not in page.tags and "b" not in page.tags
    assert page.imgs == []  # no figures given: every place says "not available"
    assert "not available" in first
    assert "lower-right corner" in first  # where() of the region [0.8, 0.8, 1, 1]
    assert "bowl/&lt;x&gt;.png" in first and "file is empty" in first


def test_render_report_shows_a_counterfactual_test():
    # The shape of outcomes.ProbeResult.to_dict(), as confirm.py stores it.
    test = {"test": "transplant", "ran": True, "suspect": 0, "trials": 40, "hits": 31, "rate": 0.775,
            "control_trials": 40, "control_hits": 3, "control_rate": 0.075, "p_value": 1.2e-10,
            "effect": 0.7, "removal": {"images": 10, "accuracy_before": 1.0, "accuracy_after": 0.3},
            "images": {"own": ["x"] * 10, "others": ["y"] * 40},
            "examples": [{"source": 0, "target": 3, "box": [0.8, 0.8, 1.0, 1.0], "hit": True,
                          "before": {"pred": 1, "p": 0.8}, "after": {"pred": 0, "p": 0.7},
                          "control": {"pred": 1, "p": 0.75}}]}
    text = render_report(hand_made_audit(test=test), {})
    body = " ".join(parse(text).text)
    # 31/40 = 77.5% (shown 78%) against 3/40 = 7.5% (8%); p in two significant digits.
    assert (f"Pasting the suspect region onto 40 images of other classes turned 31 of them (78%) "
            f"into {SCRIPT_CLASS}; a control patch of the same size, cut from elsewhere, turned 3 "
            f"of 40 (8%). Fisher's exact test, one-sided: p = 1.2e-10.") in body
    assert f"took their accuracy from 100% to 30%." in body
    assert "Confirmed: a counterfactual test bore it out (p = 1.2e-10)." in body
    # Predictions by class name (labels[1] = bowl, labels[0] = the script class) and score.
    assert "bowl (0.80)" in body and f"{SCRIPT_CLASS} (0.70)" in body
    assert "Not tested" not in body and SCRIPT_CLASS not in text


def test_render_report_says_when_a_test_could_not_run():
    test = {"ran": False, "reason": "not enough images (or masks) to run its test"}
    body = " ".join(parse(render_report(hand_made_audit(test=test), {})).text)
    assert "The test could not run: not enough images (or masks) to run its test." in body


def test_render_report_embeds_the_figures_it_is_given():
    audit = hand_made_audit()
    plan = report_plan(audit)
    png = report_figures.scale_bar_png(1.0)
    figures = {plan["findings"][0]["mean"]: png, "curves": png}
    page = parse(render_report(audit, figures))
    assert page.imgs == [report_html.data_uri(png)] * 2


def test_write_scan_report_rewrites_and_prunes(corner_audit, tmp_path):
    out = tmp_path / "copy"
    shutil.copytree(corner_audit, out)
    stale = out / "figures" / "stale-old.png"
    stale.write_bytes(b"x")
    audit = json.loads((out / "audit.json").read_text())
    page = write_scan_report(audit, out)
    assert page == out / "report.html"
    assert not stale.exists()
    assert page.read_text(encoding="utf-8") == (corner_audit / "report.html").read_text(encoding="utf-8")


# ------------------------------------------------------------------------ pieces

def test_figures_are_pngs_of_the_stated_size():
    rng = np.random.default_rng(0)
    image = rng.uniform(0, 255, (16, 16, 3)).astype(np.float32)
    heat = rng.normal(0, 1, (16, 16)).astype(np.float32)
    png = report_figures.overlay_tile_png(image, heat, vmax=1.0, box=[0, 0, 0.5, 0.5])
    assert png.startswith(PNG_MAGIC)
    # PNG header: width and height are the big-endian ints at bytes 16..24 (PNG spec, IHDR).
    # 16 px enlarged by ceil(160 / 16) = 10: two 160 px panels and the 6 px gap.
    assert int.from_bytes(png[16:20], "big") == 2 * 160 + report_figures.TILE_GAP == 326
    assert int.from_bytes(png[20:24], "big") == 160
    # A "$" in a name must not reach mathtext (an unbalanced one raises in matplotlib).
    sheet = report_figures.contact_sheet_png([(image, None, "cost $5 \\frac{")], title="$x")
    assert sheet.startswith(PNG_MAGIC)


def test_tile_colours_follow_the_stated_scale():
    from PIL import Image

    image = np.full((8, 8, 3), 100.0, np.float32)
    heat = np.zeros((8, 8), np.float32)
    heat[2, 5] = 2.0                     # at vmax
    heat[6, 1] = 4.0                     # above vmax: clipped to the top colour
    tile = np.asarray(Image.open(io.BytesIO(report_figures.overlay_tile_png(image, heat, vmax=2.0))))[..., :3]
    s = 20                               # ceil(160 / 8)
    right = tile[:, 8 * s + report_figures.TILE_GAP:]
    # Over the grey backdrop 80 + 0.6 * 100 = 140, the top of viridis (matplotlib's
    # colormap at 1.0) with opacity 0.12 + 0.83 = 0.95; zero heat at opacity 0.12.
    top = np.array(matplotlib.colormaps["viridis"](1.0)[:3]) * 255
    low = np.array(matplotlib.colormaps["viridis"](0.0)[:3]) * 255
    np.testing.assert_allclose(right[2 * s + 3, 5 * s + 3], 140 * 0.05 + top * 0.95, atol=1.01)
    np.testing.assert_allclose(right[6 * s + 3, 1 * s + 3], 140 * 0.05 + top * 0.95, atol=1.01)
    np.testing.assert_allclose(right[0, 0], 140 * 0.88 + low * 0.12, atol=1.01)
    np.testing.assert_array_equal(tile[:, : 8 * s][4 * s, 4 * s], [100, 100, 100])  # the image as given


def test_positive_max_is_the_shared_scale():
    a = np.array([[-5.0, 0.25]])
    b = np.array([[0.5, np.nan]])
    assert report_figures.positive_max(a, b) == 0.5
    assert report_figures.positive_max(np.array([[-1.0]])) == 1e-12


@pytest.mark.parametrize("module", [report_figures, words, report_html, scan_page])
def test_doctests(module):
    result = doctest.testmod(module)
    assert result.attempted > 0 and result.failed == 0


def test_report_names_the_classes_of_the_fixture(corner_audit):
    audit, _ = read(corner_audit)
    assert [c["name"] for c in audit["classes"]] == list(CLASSES)


def test_background_sentence_states_no_reliance_the_empty_scene_rate_explains():
    # Worked example: plates stay plates in 100% of erased images, but 95% of other
    # classes' erased images become plates too: no reliance of plate's own.
    from shortcut_audit.report.words import finding_sentence

    base = {"class": "plate", "kind": "background",
            "evidence": {"statistic": "median_background_share", "value": 0.62,
                         "median_background_share": 0.62}}
    sink = dict(base, evidence=dict(base["evidence"], object_erased_survival=1.0, erased_default_rate=0.95))
    own = dict(base, evidence=dict(base["evidence"], object_erased_survival=0.9, erased_default_rate=0.1))
    text = finding_sentence(sink)
    assert "empty scene" in text and "100%" in text and "95%" in text
    assert "may read the surroundings" not in text
    text = finding_sentence(own)
    assert "may read the surroundings" in text and "(against 10% of other classes' images" in text


def test_motif_sentence_says_how_the_motif_was_found():
    # A motif found by the sufficiency scan pulls other images when pasted but decides few
    # answers when hidden: its sentence must not say that it decides them.
    from shortcut_audit.report.words import finding_sentence

    heat = {"class": "mug", "kind": "recurring-motif", "evidence": {"statistic": "motif_coverage", "value": 0.4}}
    pasted = dict(heat, evidence=dict(heat["evidence"], found_in="sufficiency scan",
                                      sufficiency={"sources": 8, "pulling": 7}))
    assert "decides many answers" in finding_sentence(heat)
    text = finding_sentence(pasted)
    assert "decides many answers" not in text
    assert "turns them into mug (7 of 8 mug images scanned had such a patch)" in text
    assert "Hidden where" not in text                  # no removal test: nothing said of hiding
    tested = dict(pasted, evidence=dict(pasted["evidence"], test={"removal": {"drop": 2 / 7, "images": 7}}))
    assert "they change the answer for 29% of those 7 images" in finding_sentence(tested)


def test_render_report_shows_notes_and_classes_not_judged():
    audit = hand_made_audit()
    audit["classes"][1]["notes"] = ["decisions hinge on a small part of the object itself"]
    audit["classes"][1]["not_judged"] = ["only 1 correctly predicted image (the rules need 5, min_correct_images)"]
    body = " ".join(parse(render_report(audit, {})).text)
    assert "Noted: bowl" in " ".join(body.split())
    assert "note: decisions hinge on a small part of the object itself" in body
    assert "Not judged:" in body and "not judged: only 1 correctly predicted image" in body
    assert "A class the rules could not judge is not a clean class." in body


def test_motif_strip_cuts_each_image_where_the_motif_was_found():
    # A motif found by pasting sits where its evidence says, not at the image's decisive
    # region: the strip cuts it there (box [x0, y0, x1, y1] 0.5-1.0 of an 8x8 image is
    # pixels 4-8), and falls back to the stored decisive crop for an image with no box.
    from shortcut_audit.report.scan_page import _motif_crop
    from shortcut_audit.report.words import motif_boxes as _motif_boxes

    pixels = np.arange(8 * 8 * 3, dtype=np.float32).reshape(8, 8, 3)
    stored = np.zeros((2, 2, 3), np.float32)

    class Files:
        def pixels(self, path):
            return pixels

        def arrays(self, path):
            return {"crop": stored}

    finding = {"kind": "recurring-motif",
               "evidence": {"medoid": "a.png", "medoid_box": [0.5, 0.5, 1.0, 1.0],
                            "member_paths": ["a.png", "b.png"],
                            "member_boxes": [[0.5, 0.5, 1.0, 1.0], [0.0, 0.0, 0.25, 0.5]]}}
    boxes = _motif_boxes(finding)
    assert np.array_equal(_motif_crop(Files(), "a.png", boxes), pixels[4:8, 4:8])
    assert np.array_equal(_motif_crop(Files(), "b.png", boxes), pixels[0:4, 0:2])
    assert _motif_crop(Files(), "c.png", boxes) is stored
