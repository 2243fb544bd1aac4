"""bench/agreement.py, the audit-level comparison of a plan with the exhaustive grid:
its measures on known inputs, and the grid against itself (which must agree exactly).
No speed is asserted."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))

import agreement  # noqa: E402


def test_ladder_steps():
    # DECISIVE_LADDER = (0.005, 0.01, 0.02, 0.03, 0.05, 0.075, 0.1, 0.15, 0.2, 0.25)
    assert agreement.ladder_step(0.005) == 0
    assert agreement.ladder_step(0.0075) == 1          # bisected between 0.5% and 1%
    assert agreement.ladder_step(0.05) == 4
    assert agreement.ladder_step(0.25) == 9
    assert agreement.ladder_step(None) == 10           # no move within the 25% cap


def test_box_iou_closed_form():
    # [0,0,1,1] and [0.5,0,1,1]: intersection 0.5, union 1
    assert agreement.box_iou([0, 0, 1, 1], [0.5, 0, 1, 1]) == pytest.approx(0.5)
    assert agreement.box_iou([0, 0, 0.5, 0.5], [0.5, 0.5, 1, 1]) == 0.0
    assert agreement.box_iou(None, [0, 0, 1, 1]) == 0.0


def test_plan_labels_round_trip():
    assert agreement.parse_plan("grid") == agreement.REFERENCE
    plan = agreement.parse_plan("adaptive:budget=45")
    assert plan.budget == 45 and agreement.plan_label(plan) == "adaptive:budget=45"
    assert agreement.parse_plan("grid:patch=0.25,stride=0.125").to_dict()["patch"] == 0.25


def test_the_grid_agrees_with_itself(tmp_path):
    out = tmp_path / "a.json"
    proc = subprocess.run([sys.executable, str(ROOT / "bench" / "agreement.py"), "--quick", "--plan", "grid",
                           "--plan", "adaptive:budget=20", "--json", str(out)],
                          capture_output=True, text=True, cwd=str(ROOT), timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    rows = json.loads(out.read_text())["rows"]
    # the quick sets have fewer images a class than the curve sample, so the grid with the
    # default sample is the reference audit itself
    same = [r for r in rows if r["plan"] == "grid"]
    assert len(same) == 2                                     # one per generated set
    for r in same:
        assert r["same_findings"] and r["passes_share"] == 1.0
        assert r["decisive_within_step"] == 1.0 and r["decisive_same_step"] == 1.0
        assert all(d == 0.0 for d in r["metric_diff"].values()), r["metric_diff"]
        assert not r["meets_bar"]                             # all the passes: not cheaper
    floors = json.loads(out.read_text())["floors"]
    assert [f["set"] for f in floors] == [r["set"] for r in same]
    assert all(f["reproduces"] == 1.0 for f in floors)       # the recomputed grid is the scan's
    for r in rows:
        if r["plan"] != "grid":
            assert r["passes"] <= 20 + r["passes_ref"] - 226 + 1e-9   # its budget replaces the 226 heatmap passes


def test_wholescan_quick_produces_every_figure(tmp_path):
    # bench/wholescan.py in its quick form: every figure, and the derived numbers follow
    # from the measured ones (no speed is asserted)
    out = tmp_path / "w.json"
    proc = subprocess.run([sys.executable, str(ROOT / "bench" / "wholescan.py"), "--quick", "--json", str(out)],
                          capture_output=True, text=True, cwd=str(ROOT), timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    res = json.loads(out.read_text())
    for e in res["estimate"]:
        assert e["ratio"] == pytest.approx(e["measured_seconds"] / e["estimated_seconds"])
        assert e["passes_per_image"] <= e["passes_per_image_estimated"]     # the estimate bounds the count
    lin = res["linear"]
    assert len(lin["sizes"]) == len(lin["seconds"]) == 3
    assert lin["ratio"] == pytest.approx(lin["seconds"][2] / lin["seconds"][0])
    # the line goes through the two outer sizes; the middle is judged against it
    fixed, per = lin["fixed_seconds"], lin["per_image_ms"] / 1000
    assert fixed + per * lin["sizes"][2] == pytest.approx(lin["seconds"][2])
    assert fixed + per * lin["sizes"][0] == pytest.approx(lin["seconds"][0])
    assert lin["middle_predicted"] == pytest.approx(fixed + per * lin["sizes"][1])
    for d in res["depthwise"]:
        # every pass counted at onnxruntime: the per-image ones and the batch-size measurement's
        assert d["passes"] > d["engine_passes"] > 0
        assert d["ratio"] == pytest.approx(d["whole_rate"] / d["raw_rate"])


def test_reference_stability_recomputes_the_scans_own_steps(tmp_path):
    # bench/stability.py rebuilds the grid's heatmap from recomputed patch drops and climbs
    # the ladder again, with the audit's own plan, fill and score. Without noise it must
    # land on the step of every decisive area the scan itself found, for the default
    # settings and for a constant fill with logit scores (a reimplementation that differs
    # from the scan, or ignores the audit's settings, fails here), and a large error on
    # the drops must move some steps (the measure can see a change).
    import shutil

    import stability
    from shortcut_audit.demo import demo_paths
    from shortcut_audit.model import read_model_config
    from shortcut_audit.occlusion import Fill

    p = demo_paths()
    m = p.models["baseline"]
    images = tmp_path / "images"
    for c in sorted(Path(p.images).iterdir()):
        (images / c.name).mkdir(parents=True)
        for f in sorted(c.iterdir())[:4]:
            shutil.copy(f, images / c.name / f.name)
    s = agreement.AuditSet("demo16", m.onnx, images, None, read_model_config(m.config) if m.config else None)
    cfg = agreement.model_config(s, batch=32)
    ref, _ = agreement.run_audit(s, agreement.REFERENCE, tmp_path / "ref", batch=32, every_curve=True)
    steps = [agreement.ladder_step(im.decisive_area) for im in ref.images]
    assert len(set(steps)) >= 3                 # the images do not all sit on one step
    exact = stability.stability(s.model, s.images, ref, config=cfg, relative=0.0)
    assert exact.images == 16 and exact.reproduces == 1.0
    rough = stability.stability(s.model, s.images, ref, config=cfg, relative=0.5)
    assert rough.same_step < 1.0

    other = agreement.sa.audit(images, m.onnx, out=tmp_path / "other", model_config=cfg,
                               settings=agreement.ScanSettings(plan=agreement.REFERENCE, score="logit",
                                                               fill=Fill(kind="constant", value=0.0)))
    other_steps = [agreement.ladder_step(im.decisive_area) for im in other.images]
    assert other_steps != steps                 # the settings matter to the steps
    assert stability.stability(s.model, s.images, other, config=cfg, relative=0.0).reproduces == 1.0
