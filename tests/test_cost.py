"""Tests of cost.py: the passes an audit will spend, stated before it spends them.

References: the passes are counted by the scorer the job actually calls (run_job), and by
the scan's own engine counter; the time is closed-form arithmetic on those counts.
"""

import numpy as np
import pytest
from typer.testing import CliRunner

from scan_fixtures import clean_model, corner_model, make_dataset
from shortcut_audit.cli import app
from shortcut_audit.cost import ENGINE_SHARE, FIXED_SECONDS, estimate_cost, image_passes
from shortcut_audit.engine import run_job
from shortcut_audit.model import ModelConfig, OnnxClassifier
from shortcut_audit.occlusion import AdaptivePlan, Fill, GridPlan, RandomPatchPlan
from shortcut_audit.scan import ScanSettings, audit as run_audit
from shortcut_audit.sensitivity import image_job


class Counting:
    """A scorer whose score never depends on the image (no decision ever moves), counting rows."""

    def __init__(self):
        self.rows = 0

    def __call__(self, batch):
        self.rows += len(batch)
        out = np.zeros((len(batch), 3), np.float32)
        out[:, 0] = 1.0
        return out


@pytest.mark.parametrize("plan", [GridPlan(patch=0.125, stride=0.0625), GridPlan(patch=4, stride=4),
                                  RandomPatchPlan(count=50)])
@pytest.mark.parametrize("with_mask", [False, True])
@pytest.mark.parametrize("curves", [True, False])
def test_image_passes_counts_what_the_image_job_scores(plan, with_mask, curves):
    rng = np.random.default_rng(0)
    img = rng.uniform(0, 255, (32, 32, 3)).astype(np.float32)
    mask = np.zeros((32, 32), bool)
    mask[8:24, 8:24] = True
    scorer = Counting()
    stats = run_job(scorer, image_job(img, plan=plan, fill=Fill(kind="mean"), target=0,
                                      mask=mask if with_mask else None, curves=curves), batch_size=32)
    assert stats.decisive_area is None              # so no bisection pass was made
    # no decision moves: no bisection, and the ladder without curves climbs every step
    assert image_passes(plan, 32, 32, masks=with_mask, bisect=0, curves=curves) == scorer.rows == stats.passes


def test_adaptive_plan_is_counted_at_its_budget():
    # the budget bounds the heatmap's passes, the unperturbed image included
    assert image_passes(AdaptivePlan(budget=30), 64, 64, masks=False, bisect=0) == \
        30 + image_passes(GridPlan(patch=64, stride=64), 64, 64, masks=False, bisect=0) - 2


def test_estimate_arithmetic_and_per_class_caps():
    plan = GridPlan(patch=4, stride=4)               # 16 patches on 16 x 16
    ppi = image_passes(plan, 16, 16, masks=True)
    e = estimate_cost({"a": 30, "b": 5, "c": 12}, plan, 16, 16, rate=500.0, masks=True, per_class=(10, 40),
                      curve_images=None)
    assert e.images == 47 and e.passes == 47 * ppi
    assert e.seconds == pytest.approx(47 * ppi / (500.0 * ENGINE_SHARE) + FIXED_SECONDS)
    # a cap of 10 keeps 10 + 5 + 10 images; a cap above every class changes nothing and is left out
    assert e.per_class == {10: {"images": 25, "seconds": pytest.approx(25 * ppi / (500.0 * ENGINE_SHARE)
                                                                         + FIXED_SECONDS)}}
    assert "--per-class 10: 25 images" in e.describe()


def test_estimate_counts_curves_on_the_sampled_images_only():
    plan = GridPlan(patch=4, stride=4)
    plain = image_passes(plan, 16, 16, masks=False, curves=False)
    full = image_passes(plan, 16, 16, masks=False, curves=True)
    # two 16-step curves, of which the ladder's 25% and "all hidden" are shared
    assert full - plain == 2 * 16 - 2
    e = estimate_cost({"a": 30, "b": 5}, plan, 16, 16, rate=100.0, masks=False, per_class=(10,), curve_images=8)
    # curves on 8 of a's images and all 5 of b's
    assert e.passes == 35 * plain + 13 * (full - plain)
    assert e.per_class[10]["seconds"] == pytest.approx((15 * plain + 13 * (full - plain)) / (100.0 * ENGINE_SHARE)
                                                       + FIXED_SECONDS)


def test_measured_rate_reuses_the_batch_size_measurement(tmp_path, monkeypatch):
    clf = OnnxClassifier(corner_model(tmp_path / "m.onnx"))
    assert clf.batch_size in clf.batch_rates
    calls = []
    real = clf._session.run
    monkeypatch.setattr(clf._session, "run", lambda *a, **k: calls.append(1) or real(*a, **k))
    assert clf.measured_rate == clf.batch_rates[clf.batch_size] > 0
    assert calls == []                               # no pass spent on it


def test_measured_rate_with_a_given_batch_size_times_it_once(tmp_path, monkeypatch):
    clf = OnnxClassifier(corner_model(tmp_path / "m.onnx"), ModelConfig(batch_size=5))
    first = clf.measured_rate
    calls = []
    real = clf._session.run
    monkeypatch.setattr(clf._session, "run", lambda *a, **k: calls.append(1) or real(*a, **k))
    assert first > 0 and clf.measured_rate == first and calls == []


def test_scan_states_the_cost_before_the_first_pass_and_keeps_to_its_count(tmp_path):
    data = make_dataset(tmp_path / "data", n=4)
    model = clean_model(tmp_path / "m.onnx")
    events = []
    result = run_audit(data, model, settings=ScanSettings(confirm=False), progress=events.append)
    first = [e for e in events if "estimate" in e]
    assert len(first) == 1 and events.index(first[0]) <= 1 and first[0]["passes"] == 0
    est = first[0]["estimate"]
    assert est.images == result.dataset["audited"] == 12
    # an upper bound the scan meets but for the bisection passes it skipped (3 at most) and
    # the two erasures of an image whose mask could not be estimated
    assert 0 <= est.passes - result.run["passes_this_run"] <= 5 * est.images


def test_cli_prints_the_cost_before_the_scan(tmp_path):
    data = make_dataset(tmp_path / "data", n=4)
    model = corner_model(tmp_path / "m.onnx")
    r = CliRunner().invoke(app, ["audit", str(data), "-m", str(model), "-o", str(tmp_path / "out"),
                                 "--no-confirm", "--no-report", "--fail-on", "never"], terminal_width=200)
    assert r.exit_code == 0, r.output
    line = next(ln for ln in r.output.splitlines() if ln.startswith("cost:"))
    assert "12 images x" in line and "passes/s (measured)" in line


def test_an_unknown_rate_is_said_so():
    e = estimate_cost({"a": 3}, GridPlan(patch=4, stride=4), 16, 16, rate=0.0, masks=False)
    assert e.seconds == float("inf") and "could not be measured" in e.describe()
