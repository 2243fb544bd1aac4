"""Tests of findings.py: the threshold table, threshold files and overrides, the rules'
order, and which classes the rules could not judge.

Reference values are worked by hand from the class metrics given in each test.
"""

import numpy as np
import pytest

from scan_fixtures import corner_model, make_dataset
from shortcut_audit.classes import ClassSummary, ImageSummary
from shortcut_audit.errors import UsageError
from shortcut_audit.findings import (THRESHOLD_TABLE, Thresholds, judge, not_judged,
                                     parse_threshold_overrides, read_thresholds)
from shortcut_audit.scan import ScanSettings, audit as run_audit


def summary(index, name, *, correct=10, images=10, **metrics):
    base = {"small_area_rate": 0.0, "box_agreement": 0.0, "median_decisive_area": None,
            "median_background_share": None, "background_reliance": None,
            "object_erased_survival": None, "erased_default_rate": None,
            "masked_images": 10, "estimated_masks": 0}
    base.update(metrics)
    return ClassSummary(name=name, index=index, images=images, correct=correct,
                        accuracy=correct / images, mean_confidence=0.9, mean_heatmap=None,
                        metrics=base, place_box=[0.0, 0.0, 0.2, 0.2])


def test_defaults_equal_the_table():
    th = Thresholds()
    assert {name: getattr(th, name) for name, _, _ in THRESHOLD_TABLE} == {
        name: default for name, default, _ in THRESHOLD_TABLE}


def test_threshold_file_and_overrides(tmp_path):
    f = tmp_path / "t.toml"
    f.write_text("[thresholds]\nlocalized_rate = 0.55\n", encoding="utf-8")
    th = Thresholds.replace_from(Thresholds(), {**read_thresholds(f),
                                                **parse_threshold_overrides(["fixed_margin=0.3"])})
    assert (th.localized_rate, th.fixed_margin) == (0.55, 0.3)
    with pytest.raises(UsageError, match="unknown threshold 'nope'"):
        Thresholds.replace_from(Thresholds(), {"nope": 1})
    with pytest.raises(UsageError, match="must be between 0 and 1; got 1.5"):
        Thresholds(localized_rate=1.5)
    with pytest.raises(UsageError, match="NAME=VALUE"):
        parse_threshold_overrides(["localized_rate"])


def test_margin_against_other_classes_decides_localized():
    # small_area_rate 0.6 >= 0.4; others' median 0.3 -> margin 0.3 >= 0.25: flagged.
    # With others at 0.4 the margin is 0.2 < 0.25: not flagged (a fragile model).
    classes = [summary(0, "a", small_area_rate=0.6), summary(1, "b", small_area_rate=0.3),
               summary(2, "c", small_area_rate=0.3)]
    assert [(f.class_name, f.kind) for f in judge(classes, [])] == [("a", "localized")]
    classes[1] = summary(1, "b", small_area_rate=0.4)
    classes[2] = summary(2, "c", small_area_rate=0.4)
    assert judge(classes, []) == []


def test_fixed_position_class_is_no_background_reference():
    # a: fixed mark (agreement 0.9); b: heat outside 0.7 against c 0.2 -> background on b
    # only; a's own background share (0.8) is the mark and gives no background finding.
    classes = [summary(0, "a", small_area_rate=0.9, box_agreement=0.9, median_background_share=0.8),
               summary(1, "b", median_background_share=0.7),
               summary(2, "c", median_background_share=0.2)]
    got = [(f.class_name, f.kind) for f in judge(classes, [])]
    assert got == [("a", "fixed-position"), ("b", "background")]


def test_not_judged_reasons():
    th = Thresholds()
    assert not_judged(summary(0, "a", correct=1, images=1), th) == (
        "only 1 correctly predicted image (the rules need 5, min_correct_images)",)
    assert not_judged(summary(0, "a", masked_images=0), th) == (
        "background not judged: no object mask given or estimated (pass --masks)",)
    assert not_judged(summary(0, "a"), th) == ()
    assert not_judged(summary(0, "a", correct=4), Thresholds(min_correct_images=4)) == ()


def test_a_class_too_small_to_judge_is_shown_as_not_judged(tmp_path):
    # alpha keeps 1 image: fewer than min_correct_images (5), so no rule judges it,
    # and audit.json and the terminal table must say so instead of "none".
    from typer.testing import CliRunner

    from shortcut_audit.cli import app

    data = make_dataset(tmp_path / "data", n=6, plain=True)
    for extra in sorted((data / "alpha").iterdir())[1:]:
        extra.unlink()
    result = run_audit(data, corner_model(tmp_path / "m.onnx"), settings=ScanSettings(confirm=False),
                       estimate_masks=False)
    by_name = {c.name: c for c in result.classes}
    assert by_name["alpha"].not_judged[0].startswith("only 1 correctly predicted image")
    assert by_name["beta"].not_judged == (
        "background not judged: no object mask given or estimated (pass --masks)",)
    assert result.to_dict()["classes"][0]["not_judged"] == list(by_name["alpha"].not_judged)
    r = CliRunner().invoke(app, ["audit", str(data), "-m", str(tmp_path / "m.onnx"), "-o",
                                 str(tmp_path / "out"), "--no-confirm", "--no-estimate-masks",
                                 "--no-report"])
    words = " ".join(r.output.replace("│", " ").split())   # the table wraps long cells
    assert r.exit_code == 0 and "not judged" in words and "only 1" in words


def test_motif_candidates_need_a_margin_and_three_small_images():
    # a: small-area rate 0.8 against others' median 0.1 (margin 0.7 >= 0.15) with 3
    # small images: clustered. b: 0.2 - 0.45 < 0.15: not. c: margin, but 2 small images.
    from shortcut_audit.findings import MIN_MOTIF_IMAGES, motif_candidates

    def im(label, i, area):
        return ImageSummary(path=f"{label}/{i}.png", label=label, predicted=label, confidence=0.9,
                            label_score=0.9, concentration=0.1, gini=0.5, decisive_area=area,
                            decisive_box=[0, 0, 0.1, 0.1], peak_box=None, deletion_area=0.1,
                            insertion_area=0.5)
    classes = [summary(0, "a", small_area_rate=0.8), summary(1, "b", small_area_rate=0.2),
               summary(2, "c", small_area_rate=0.8), summary(3, "d", small_area_rate=0.1)]
    images = [im(0, i, 0.01) for i in range(3)] + [im(2, i, 0.01) for i in range(2)]
    assert MIN_MOTIF_IMAGES == 3
    assert [c.name for c in motif_candidates(classes, images)] == ["a"]


def test_a_class_the_sufficiency_scan_could_not_scan_says_so(tmp_path):
    # beta's masks cover the whole image, so no patch has an outline to lie inside and the
    # sufficiency scan has no usable source: audit.json must say the scan did not run on
    # beta, rather than let "no finding" read as "scanned, nothing found".
    from PIL import Image

    data = make_dataset(tmp_path / "data", n=6, masks_root=tmp_path / "masks")
    for m in (tmp_path / "masks" / "beta").iterdir():
        Image.fromarray(np.full((48, 48), 255, np.uint8)).save(m)
    events = []
    result = run_audit(data, corner_model(tmp_path / "m.onnx"), masks=tmp_path / "masks",
                       settings=ScanSettings(confirm=False), progress=events.append)
    by_name = {c.name: c for c in result.classes}
    reasons = [r for r in by_name["beta"].not_judged if r.startswith("sufficiency scan not run")]
    # the scan reports its progress over the classes it should scan: every judged class
    # without a fixed-position or motif finding
    marked = {f.class_name for f in result.findings if f.kind in ("fixed-position", "recurring-motif")}
    todo = [c for c in result.classes if c.name not in marked]
    phase = [e for e in events if e.get("phase") == "sufficiency"]
    assert phase[0]["done"] == 0 and phase[-1]["done"] == phase[-1]["total"] == len(todo) >= 2
    assert reasons == ["sufficiency scan not run: 0 of 6 sampled correct images had a usable "
                       "object mask (it needs 3; give masks that outline the object with --masks)"]
    assert not any(r.startswith("sufficiency") for r in by_name["gamma"].not_judged)
    assert reasons[0] in result.to_dict()["classes"][1]["not_judged"]
