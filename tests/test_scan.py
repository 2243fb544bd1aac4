"""Tests of scan.py (with classes.py and findings.py) on planted-shortcut models.

The models are linear (tests/scan_fixtures.py), so the ground truth of what each class
reads is known exactly: a 6x6 corner square, the whole image, or the border ring.
"""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from scan_fixtures import (CORNER, SIZE, border_model, clean_model, corner_model,
                           make_dataset)
from shortcut_audit.errors import DataError
from shortcut_audit.findings import Thresholds
from shortcut_audit.scan import ScanSettings, audit as run_audit


def iou(a, b):
    ix = max(0.0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    union = (a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter
    return inter / union


FAST = ScanSettings(confirm=False)


def test_planted_corner_is_flagged_fixed_position_and_nothing_else(tmp_path):
    data = make_dataset(tmp_path / "data", n=8)
    result = run_audit(data, corner_model(tmp_path / "m.onnx"), out=tmp_path / "out", settings=FAST)
    assert [c.accuracy for c in result.classes] == [1.0, 1.0, 1.0]
    assert [(f.class_name, f.kind) for f in result.findings] == [("alpha", "fixed-position")]
    planted = [0.0, 0.0, CORNER / SIZE, CORNER / SIZE]
    assert iou(result.findings[0].region, planted) >= 0.5
    assert result.findings[0].evidence["value"] >= 0.9
    audit = json.loads((tmp_path / "out" / "audit.json").read_text())
    assert audit["schema"] == 1
    assert audit["findings"][0]["kind"] == "fixed-position"
    assert audit["settings"]["thresholds"]["fixed_agreement"] == 0.5
    assert len(audit["images"]) == 24


def test_clean_model_gives_no_finding(tmp_path):
    data = make_dataset(tmp_path / "data", n=8, corner_class=None)
    result = run_audit(data, clean_model(tmp_path / "m.onnx"), out=tmp_path / "out", settings=FAST)
    assert min(c.accuracy for c in result.classes) >= 0.9
    assert result.findings == []


def test_border_reading_class_is_flagged_background_with_given_masks(tmp_path):
    data = make_dataset(tmp_path / "data", n=8, corner_class=None, backdrop_class="alpha",
                        masks_root=tmp_path / "masks")
    result = run_audit(data, border_model(tmp_path / "m.onnx"), out=tmp_path / "out",
                  masks=tmp_path / "masks", settings=FAST)
    kinds = [(f.class_name, f.kind) for f in result.findings]
    assert ("alpha", "background") in kinds
    assert all(name == "alpha" for name, _ in kinds)
    f = next(f for f in result.findings if f.kind == "background")
    assert f.evidence["mask"] == "given"


def test_border_reading_class_is_flagged_with_estimated_masks(tmp_path):
    data = make_dataset(tmp_path / "data", n=8, corner_class=None, backdrop_class="alpha", plain=True)
    result = run_audit(data, border_model(tmp_path / "m.onnx"), out=tmp_path / "out", settings=FAST)
    f = [f for f in result.findings if f.kind == "background"]
    assert [x.class_name for x in f] == ["alpha"]
    assert f[0].evidence["mask"] == "estimated"


def _summary(index, rate):
    from shortcut_audit.classes import ClassSummary
    return ClassSummary(name=f"c{index}", index=index, images=20, correct=20, accuracy=1.0,
                        mean_confidence=0.9, mean_heatmap=None,
                        metrics={"small_area_rate": rate, "box_agreement": 0.0,
                                 "median_decisive_area": 0.02, "median_background_share": None,
                                 "object_erased_survival": None})


def test_a_model_fragile_everywhere_does_not_get_every_class_flagged():
    from shortcut_audit.findings import judge
    # every class's decisions move when <= 5% is hidden: fragile, but no class stands out
    assert judge([_summary(i, 0.9) for i in range(4)], []) == []
    # one class far above the others is flagged, and only that one
    found = judge([_summary(0, 0.9)] + [_summary(i, 0.1) for i in range(1, 4)], [])
    assert [(f.class_name, f.kind) for f in found] == [("c0", "localized")]
    assert found[0].evidence["others_median"] == pytest.approx(0.1)


def test_labels_not_in_the_model_are_skipped(tmp_path):
    data = make_dataset(tmp_path / "data", n=3)
    (data / "delta").mkdir()
    from PIL import Image
    Image.new("RGB", (48, 48), (9, 9, 9)).save(data / "delta" / "x.png")
    result = run_audit(data, corner_model(tmp_path / "m.onnx"), settings=FAST)
    assert any(s.path == "delta/x.png" and "not one of the model's labels" in s.reason for s in result.skipped)


def test_empty_dataset_is_a_data_error(tmp_path):
    (tmp_path / "data" / "alpha").mkdir(parents=True)
    with pytest.raises(DataError):
        run_audit(tmp_path / "data", corner_model(tmp_path / "m.onnx"), settings=FAST)


def _strip_run(audit: dict) -> dict:
    audit = dict(audit)
    audit.pop("run")
    return audit


def test_rerun_reuses_results_and_changed_settings_invalidate(tmp_path):
    data = make_dataset(tmp_path / "data", n=4)
    m = corner_model(tmp_path / "m.onnx")
    first = run_audit(data, m, out=tmp_path / "out", settings=FAST)
    again = run_audit(data, m, out=tmp_path / "out", settings=FAST)
    assert again.run["passes_this_run"] == 0 and again.run["resumed_images"] == 12
    assert _strip_run(first.to_dict()) == _strip_run(again.to_dict())
    other = run_audit(data, m, out=tmp_path / "out", settings=ScanSettings(confirm=False, seed=1,
                 plan=__import__("shortcut_audit.occlusion", fromlist=["x"]).GridPlan(patch=4, stride=4)))
    assert other.run["resumed_images"] == 0


def test_curves_are_measured_on_the_sample_and_the_rest_of_the_audit_is_unchanged(tmp_path):
    data = make_dataset(tmp_path / "data", n=6)
    m = corner_model(tmp_path / "m.onnx")
    every = run_audit(data, m, out=tmp_path / "every", settings=ScanSettings(confirm=False, curve_images=None))
    some = run_audit(data, m, out=tmp_path / "some", settings=ScanSettings(confirm=False, curve_images=2))
    def measured(im):          # no curves: None in the record (NaN is not JSON)
        return im.deletion_area is not None and np.isfinite(im.deletion_area)

    with_curves = [im for im in some.images if measured(im)]
    per_class = {}
    for im in with_curves:
        per_class[im.label] = per_class.get(im.label, 0) + 1
    assert sorted(per_class.values()) == [2, 2, 2]
    # the sampled images' curves are the same numbers; the class means are their means
    full = {im.path: im for im in every.images}
    for im in with_curves:
        assert im.deletion_area == pytest.approx(full[im.path].deletion_area, abs=1e-6)
    for c in some.classes:
        mine = [im.deletion_area for im in with_curves if im.label == some.model["labels"].index(c.name)]
        assert c.metrics["mean_deletion_area"] == pytest.approx(np.mean(mine))
    # everything a rule reads is unchanged, at fewer passes
    assert [im.decisive_area for im in some.images] == [im.decisive_area for im in every.images]
    assert [(f.class_name, f.kind) for f in some.findings] == [(f.class_name, f.kind) for f in every.findings]
    assert some.run["passes_this_run"] < every.run["passes_this_run"]
    # and the same sample again on a fresh run
    again = run_audit(data, m, out=tmp_path / "again", settings=ScanSettings(confirm=False, curve_images=2))
    assert {im.path for im in again.images if measured(im)} == {im.path for im in with_curves}


def test_every_curve_on_the_command_line(tmp_path):
    from typer.testing import CliRunner
    from shortcut_audit.cli import app
    data = make_dataset(tmp_path / "data", n=4)
    m = corner_model(tmp_path / "m.onnx")
    for args, want in (([], 32), (["--curve-images", "2"], 2), (["--every-curve"], None)):
        out = tmp_path / f"out{len(args)}{want}"
        r = CliRunner().invoke(app, ["audit", str(data), "-m", str(m), "-o", str(out), "--no-confirm",
                                     "--no-report", "--fail-on", "never", *args])
        assert r.exit_code == 0, r.output
        assert json.loads((out / "audit.json").read_text())["settings"]["curve_images"] == want


KILL_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from shortcut_audit.scan import ScanSettings, audit as run_audit
run_audit({data!r}, {model!r}, out={out!r}, settings=ScanSettings(confirm=False))
"""


def test_sigkill_midway_then_rerun_gives_the_same_audit(tmp_path):
    data = make_dataset(tmp_path / "data", n=30)
    m = corner_model(tmp_path / "m.onnx")
    ref = run_audit(data, m, out=tmp_path / "ref", settings=FAST)
    out = tmp_path / "killed"
    script = KILL_SCRIPT.format(tests=str(Path(__file__).parent), data=str(data), model=str(m), out=str(out))
    env = dict(os.environ, OMP_NUM_THREADS="1")
    killed_at = []
    for delay in (1.2, 1.6):
        proc = subprocess.Popen([sys.executable, "-c", script], env=env)
        # wait until some results exist, then kill without warning
        deadline = time.time() + 60
        while time.time() < deadline:
            n = len(list((out / "results").glob("*.json"))) if (out / "results").exists() else 0
            if n >= 3 or proc.poll() is not None:
                break
            time.sleep(0.05)
        time.sleep(delay * 0.1)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        killed_at.append(len(list((out / "results").glob("*.json"))) - 1)
    assert any(0 < k < 90 for k in killed_at), killed_at
    final = run_audit(data, m, out=out, settings=FAST)
    assert final.run["resumed_images"] > 0
    assert _strip_run(final.to_dict()) == _strip_run(ref.to_dict())
    # no half-written file is left behind
    assert not list(out.rglob(".tmp-*"))


def _forwarded_rows(monkeypatch):
    """Count the images every OnnxClassifier sends to onnxruntime."""
    from shortcut_audit.model import OnnxClassifier
    rows = []
    real = OnnxClassifier._forward

    def counting(self, feed):
        rows.append(len(feed))
        return real(self, feed)
    monkeypatch.setattr(OnnxClassifier, "_forward", counting)
    return rows


def test_logit_scores_make_no_pass_beyond_the_engines(tmp_path, monkeypatch):
    data = make_dataset(tmp_path / "data", n=4)
    from shortcut_audit.model import OnnxClassifier
    m = OnnxClassifier(corner_model(tmp_path / "m.onnx"))    # loading checks a few images
    rows = _forwarded_rows(monkeypatch)
    logit = run_audit(data, m, out=tmp_path / "logit", settings=ScanSettings(confirm=False, score="logit"))
    # every image sent to onnxruntime was one of the engine's passes (before: one more
    # per image, to get the probabilities)
    assert sum(rows) == logit.run["passes_this_run"]
    prob = run_audit(data, m, out=tmp_path / "prob", settings=FAST)
    # reference: the probability scan's own unperturbed scores
    a = json.loads((tmp_path / "logit" / "audit.json").read_text())["images"]
    b = json.loads((tmp_path / "prob" / "audit.json").read_text())["images"]
    assert [i["predicted"] for i in a] == [i["predicted"] for i in b]
    np.testing.assert_allclose([i["confidence"] for i in a], [i["confidence"] for i in b], atol=1e-6)
    assert prob.run["passes_this_run"] > 0


def test_tests_reuse_the_scans_unperturbed_scores(tmp_path, monkeypatch):
    import importlib
    scan_module = importlib.import_module("shortcut_audit.scan")   # the package exports run_audit()
    data = make_dataset(tmp_path / "data", n=6)
    from shortcut_audit.model import OnnxClassifier
    m = OnnxClassifier(corner_model(tmp_path / "m.onnx"))
    settings = ScanSettings(test_budget=12)
    rows = _forwarded_rows(monkeypatch)
    reused = run_audit(data, m, out=tmp_path / "a", settings=settings)
    with_reuse = sum(rows)
    rows.clear()
    real = scan_module.confirm_findings
    monkeypatch.setattr(scan_module, "confirm_findings",
                        lambda *a, **kw: real(*a, **dict(kw, known_scores=None)))
    redone = run_audit(data, m, out=tmp_path / "b", settings=settings)
    without = sum(rows)
    assert [f.status for f in reused.findings] == [f.status for f in redone.findings] == ["confirmed"]
    ta = reused.findings[0].evidence["test"]
    tb = redone.findings[0].evidence["test"]
    assert (ta["hits"], ta["control_hits"], ta["trials"]) == (tb["hits"], tb["control_hits"], tb["trials"])
    assert ta["removal"]["accuracy_before"] == tb["removal"]["accuracy_before"]
    # the transplant's targets and the removal's images, unperturbed, are not scored again
    saved = without - with_reuse
    assert saved == len(set(tb["images"]["others"])) + tb["removal"]["images"], (without, with_reuse)
