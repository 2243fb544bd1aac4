"""Tests of compare.py and report/compare_page.py.

Ground truth comes from the planted-shortcut linear models of tests/scan_fixtures.py:
corner_model reads alpha from the top-left 6x6 square only, clean_model reads every
class from the whole image, so removing the corner dependence is known to happen
exactly between the two.
"""

import copy
import dataclasses
import json
from html.parser import HTMLParser

import numpy as np
import pytest
from scipy import stats

from scan_fixtures import clean_model, corner_model, make_dataset
from shortcut_audit.compare import compare
from shortcut_audit.comparison import CompareResult, compare_audits
from shortcut_audit.intervals import binomial_bootstrap, paired_bootstrap
from shortcut_audit.errors import UsageError
from shortcut_audit.model import ModelConfig
from shortcut_audit.report.compare_page import render_compare_page, write_compare_page
from shortcut_audit.scan import ScanSettings, audit as run_audit

FAST = ScanSettings(confirm=False)


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    """One image set, both models, and the corner -> clean comparison (scanned once)."""
    root = tmp_path_factory.mktemp("compare")
    data = make_dataset(root / "data", n=8)
    corner, clean = corner_model(root / "corner.onnx"), clean_model(root / "clean.onnx")
    result = compare(data, before=corner, after=clean, out=root / "fixed", settings=FAST, resamples=1000)
    write_compare_page(result, root / "fixed")
    return {"root": root, "data": data, "corner": corner, "clean": clean, "result": result}


def every_difference(result: CompareResult):
    for c in result.classes:
        yield from c.statistics
    for f in result.findings:
        yield f.statistic
        yield from f.tests


# ---------------------------------------------------------------- planted shortcut

def test_removing_the_planted_corner_is_resolved(planted):
    # Reference: the models' weights. corner_model's alpha logit reads only the corner
    # square; clean_model reads no small region, so the fixed-position finding must go.
    r = planted["result"]
    assert [(f.class_name, f.kind, f.verdict) for f in r.findings] == [("alpha", "fixed-position", "resolved")]
    f = r.findings[0]
    assert (f.before_status, f.after_status) == ("suspect", "absent")
    d = f.statistic
    assert d.name == "box_agreement" and d.images == 8
    assert d.before == pytest.approx(1.0) and d.after == pytest.approx(0.0)
    assert d.high < 0 and d.verdict == "change"
    assert r.exit_code("new") == 0 and r.exit_code("persists") == 0 and r.exit_code("never") == 0
    saved = json.loads((planted["root"] / "fixed" / "compare.json").read_text())
    assert saved["verdicts"]["resolved"] == 1
    assert saved["findings"][0]["statistic"]["interval"][1] < 0
    assert (planted["root"] / "fixed" / "before" / "audit.json").is_file()
    assert (planted["root"] / "fixed" / "after" / "audit.json").is_file()


def test_before_values_are_the_audits_class_metrics(planted):
    # Reference: classes.summarise_classes, as written in the before audit.json; the
    # per-image indicators must reproduce its small-area rate and box agreement.
    audit = json.loads((planted["root"] / "fixed" / "before" / "audit.json").read_text())
    by_name = {c["name"]: c for c in audit["classes"]}
    for c in planted["result"].classes:
        m = by_name[c.name]
        assert c.get("accuracy").before == pytest.approx(m["accuracy"])
        assert c.get("mean_confidence").before == pytest.approx(m["mean_confidence"], rel=1e-6)
        assert c.get("small_area_rate").before == pytest.approx(m["metrics"]["small_area_rate"])
        assert c.get("box_agreement").before == pytest.approx(m["metrics"]["box_agreement"])


def test_adding_the_corner_is_new_the_other_way_round(planted, tmp_path):
    fixed = planted["root"] / "fixed"
    r = compare(before_audit=fixed / "after", after_audit=fixed / "before", out=tmp_path, resamples=1000)
    assert [(f.class_name, f.kind, f.verdict) for f in r.findings] == [("alpha", "fixed-position", "new")]
    assert r.findings[0].statistic.low > 0
    # The place comes from the audit that has the finding (the after one here).
    assert r.findings[0].statistic.after == pytest.approx(1.0)
    assert r.exit_code("new") == 1 and r.exit_code("persists") == 1 and r.exit_code("never") == 0
    assert json.loads((tmp_path / "compare.json").read_text())["verdicts"]["new"] == 1


def test_same_model_against_itself_shows_no_change(planted, tmp_path):
    # Reference: identity. Both scans have one seed and plan, so every paired
    # difference is zero and every interval must contain zero.
    # One batch size on both sides (one as a ModelConfig, one from a TOML file), so the
    # two runs are bit-identical rather than equal up to float rounding.
    (tmp_path / "model.toml").write_text("batch_size = 8\n")
    r = compare(planted["data"], before=planted["corner"], after=planted["corner"], out=tmp_path,
                before_config=ModelConfig(batch_size=8), after_config=tmp_path / "model.toml",
                settings=FAST, resamples=500)
    diffs = list(every_difference(r))
    assert len(diffs) >= 12
    for d in diffs:
        assert d.verdict == "no clear change", d
        assert d.low <= 0 <= d.high, d
    assert [(f.kind, f.verdict) for f in r.findings] == [("fixed-position", "persists")]
    assert r.exit_code("new") == 0 and r.exit_code("persists") == 1


# ---------------------------------------------------------------- the bootstrap

def test_paired_bootstrap_agrees_with_scipy():
    # Reference: scipy.stats.bootstrap, paired=True, method="percentile", of the mean
    # difference. Tolerance: both are Monte-Carlo estimates; with 20000 resamples the
    # standard error of a 2.5% percentile is about 0.02 bootstrap SDs, so 0.1 SD is ~4 SE.
    rng = np.random.default_rng(3)
    x = rng.normal(0.5, 0.2, size=30)
    y = x + rng.normal(0.1, 0.1, size=30)
    ours = paired_bootstrap(x, y, resamples=20000, seed=11)
    ref = stats.bootstrap((x, y), lambda a, b, axis: np.mean(b, axis=axis) - np.mean(a, axis=axis),
                          paired=True, vectorized=True, method="percentile", n_resamples=20000,
                          rng=np.random.default_rng(12))
    sd = ref.standard_error
    assert ours.difference == pytest.approx(np.mean(y - x), abs=1e-12)
    assert ours.low == pytest.approx(ref.confidence_interval.low, abs=0.1 * sd)
    assert ours.high == pytest.approx(ref.confidence_interval.high, abs=0.1 * sd)


def test_paired_bootstrap_closed_forms():
    # A constant shift c in every pair: every resample's difference is c exactly.
    iv = paired_bootstrap([0.1, 0.4, 0.2, 0.9], [0.35, 0.65, 0.45, 1.15], resamples=300)
    assert (iv.low, iv.high) == pytest.approx((0.25, 0.25), abs=1e-12)
    # NaN = not in the denominator: 2 of 4 counted before (1, 0 -> 0.5), all 4 after (0.75).
    iv = paired_bootstrap([1, 0, np.nan, np.nan], [1, 1, 1, 0], resamples=300)
    assert iv.difference == pytest.approx(0.75 - 0.5)
    # Seeded: the same seed gives the same interval.
    a = paired_bootstrap(np.arange(10.0), np.arange(10.0) ** 1.1, seed=5)
    b = paired_bootstrap(np.arange(10.0), np.arange(10.0) ** 1.1, seed=5)
    assert (a.low, a.high) == (b.low, b.high)


def test_binomial_bootstrap_of_rates():
    # Reference: 36/40 against 4/40; normal approximation of the difference,
    # sd = sqrt(.9*.1/40 * 2) = 0.067, so the interval is about -0.8 +- 0.13.
    iv = binomial_bootstrap((0.9, 40), (0.1, 40), resamples=4000, seed=1)
    assert iv.difference == pytest.approx(-0.8)
    assert iv.low == pytest.approx(-0.8 - 1.96 * 0.067, abs=0.03)
    assert iv.high == pytest.approx(-0.8 + 1.96 * 0.067, abs=0.03)


@pytest.mark.parametrize("bad, match", [
    ({"resamples": 10}, "resamples must be a whole number of at least 100"),
    ({"statistic": "mode"}, "statistic must be mean or median"),
])
def test_paired_bootstrap_rejects_bad_options(bad, match):
    with pytest.raises(UsageError, match=match):
        paired_bootstrap([1, 2], [1, 2], **bad)


# ---------------------------------------------------------------- hand-made audits

def _audit(images, findings, labels=("alpha", "beta")):
    return {"schema": 1, "model": {"path": "m.onnx", "sha256": "0" * 64, "labels": list(labels),
                                   "input": {"input": {"size": [32, 32], "channels": 3, "resize": "stretch"}}},
            "settings": {"seed": 0}, "dataset": {"root": "nowhere"}, "classes": [],
            "findings": findings, "images": images, "skipped": []}


def _image(path, label, *, share=None, predicted=None):
    return {"path": path, "label": label, "predicted": predicted or label, "confidence": 0.9,
            "decisive_area": None, "decisive_box": None, "background_share": share,
            "survives_object_erased": None}


def test_background_share_median_and_transplant_rates():
    # Reference: hand-made numbers. Median background share 0.8 -> 0.2 on 6 images of
    # alpha, a background finding before only, and its test's rates 36/40 -> 4/40.
    before = [_image(f"alpha/{i}.png", "alpha", share=s) for i, s in enumerate([.7, .8, .8, .9, .8, .75])]
    after = [_image(f"alpha/{i}.png", "alpha", share=s) for i, s in enumerate([.1, .2, .2, .3, .2, .25])]
    test = {"rate": 0.9, "trials": 40, "control_rate": 0.1, "control_trials": 40}
    fb = [{"id": "F1", "class": "alpha", "kind": "background", "status": "confirmed", "region": None,
           "evidence": {"statistic": "median_background_share", "value": 0.8, "test": test},
           "examples": ["alpha/0.png"]}]
    fa = [{"id": "F1", "class": "alpha", "kind": "background", "status": "not-confirmed", "region": None,
           "evidence": {"statistic": "median_background_share", "value": 0.2,
                        "test": {"rate": 0.1, "trials": 40, "control_rate": 0.1, "control_trials": 40}},
           "examples": []}]
    r = compare_audits(_audit(before, fb), _audit(after, []), resamples=1000)
    f = r.findings[0]
    assert f.verdict == "resolved"
    # cleared before, absent after: never a shortcut
    cleared = [dict(fb[0], status="not-confirmed")]
    assert compare_audits(_audit(before, cleared), _audit(after, []), resamples=200).findings[0].verdict == "cleared"
    assert (f.statistic.before, f.statistic.after) == pytest.approx((0.8, 0.2))
    assert f.statistic.high < 0 and f.statistic.images == 6
    # present after but cleared by its test, whose rate fell clearly: resolved
    r = compare_audits(_audit(before, fb), _audit(after, fa), resamples=1000)
    f = r.findings[0]
    assert f.verdict == "resolved"
    rate = next(t for t in f.tests if t.name == "test_rate")
    assert rate.difference == pytest.approx(-0.8) and rate.high < 0
    control = next(t for t in f.tests if t.name == "control_rate")
    assert control.low <= 0 <= control.high
    page = Collector()
    page.feed(render_compare_page(r))
    text = " ".join(page.text)
    assert "transplant rate (background test)" in text and "weakened" in text


def test_trial_outcomes_are_compared_paired():
    # Reference: the same 10 transplants, all hits before and none after: [-1, -1].
    ims = [_image(f"alpha/{i}.png", "alpha") for i in range(6)]
    def finding(outcomes):
        rate = float(np.mean(outcomes))
        return [{"id": "F1", "class": "alpha", "kind": "localized", "status": "suspect", "region": None,
                 "evidence": {"statistic": "small_area_rate", "value": 0.5,
                              "test": {"rate": rate, "trials": 10, "outcomes": outcomes,
                                       "control_rate": 0.0, "control_trials": 10,
                                       "control_outcomes": [0] * 10}},
                 "examples": []}]
    r = compare_audits(_audit(ims, finding([1] * 10)), _audit(copy.deepcopy(ims), finding([0] * 10)),
                       resamples=500)
    rate = next(t for t in r.findings[0].tests if t.name == "test_rate")
    assert (rate.low, rate.high) == (-1.0, -1.0)
    assert rate.method.startswith("paired bootstrap over trials")


# ---------------------------------------------------------------- the page

class Collector(HTMLParser):
    def __init__(self):
        super().__init__()
        self.starts, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.starts.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def test_compare_html_is_self_contained_with_the_verdict_table_first(planted):
    # Reference: the standard library's html.parser; a data: URI needs no other file.
    html = (planted["root"] / "fixed" / "compare.html").read_text(encoding="utf-8")
    p = Collector()
    p.feed(html)
    p.close()
    tags = [t for t, _ in p.starts]
    imgs = [a for t, a in p.starts if t == "img"]
    # 3 example figures of the one finding + 3 class-mean figures.
    assert len(imgs) == 6
    assert all(a["src"].startswith("data:image/png;base64,") for a in imgs)
    assert not any(t in ("script", "link", "iframe") for t in tags)
    assert tags.index("table") < tags.index("img")
    text = " ".join(p.text)
    assert text.index("verdict") < text.index("Class statistics, side by side")
    assert "resolved" in text and "after − before" in text


def test_page_escapes_names_from_the_data(planted):
    # Reference: jinja2 autoescape; a class name is data and must stay text.
    r = planted["result"]
    nasty = "<script>alert(1)</script>"
    f = dataclasses.replace(r.findings[0], class_name=nasty)
    page = render_compare_page(dataclasses.replace(r, findings=(f,)))
    assert nasty not in page and "&lt;script&gt;" in page


# ---------------------------------------------------------------- bad input

def test_audits_of_different_images_are_refused(planted, tmp_path):
    # A real scan of the same set capped at 6 images a class: 6 of alpha's 8 and so on.
    fewer = run_audit(planted["data"], planted["clean"], out=tmp_path / "fewer",
                 settings=ScanSettings(confirm=False, per_class=6))
    assert len(fewer.images) == 18
    with pytest.raises(UsageError, match=r"not of the same images: 6 only in the before audit \(alpha/alpha_06.png"):
        compare(before_audit=planted["root"] / "fixed" / "before", after_audit=tmp_path / "fewer",
                out=tmp_path / "cmp")


def test_relabelled_images_are_refused():
    a = _audit([_image("x/1.png", "alpha"), _image("x/2.png", "alpha")], [])
    b = _audit([_image("x/1.png", "beta"), _image("x/2.png", "alpha")], [])
    with pytest.raises(UsageError, match="label 1 image"):
        compare_audits(a, b)


@pytest.mark.parametrize("kwargs, match", [
    ({"before": "a.onnx", "after": "b.onnx", "before_audit": "x", "after_audit": "y"}, "not both"),
    ({}, "nothing to compare"),
    ({"before": "a.onnx"}, "--after is missing"),
    ({"before_audit": "x"}, "--after-audit is missing"),
    ({"before_audit": "x", "after_audit": "y", "masks": "m"}, "--masks applies only when compare scans"),
    ({"before_audit": "x", "after_audit": "y", "resamples": 5}, "--resamples must be a whole number"),
])
def test_compare_rejects_bad_combinations(kwargs, match, tmp_path):
    with pytest.raises(UsageError, match=match):
        compare("images" if "before" in kwargs else None, out=tmp_path, **kwargs)


def test_audit_folder_without_audit_json_is_refused(tmp_path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(UsageError, match="has no audit.json"):
        compare(before_audit=tmp_path / "empty", after_audit=tmp_path / "empty", out=tmp_path / "o")


def test_exit_code_rejects_unknown_gate(planted):
    with pytest.raises(UsageError, match="--fail-on must be new, persists or never"):
        planted["result"].exit_code("suspect")


def test_compare_again_reuses_both_scans(planted):
    # The same compare into the same folder: both sides resume from their stores and
    # make no forward pass, and the result is the same.
    r = compare(planted["data"], before=planted["corner"], after=planted["clean"],
                out=planted["root"] / "fixed", settings=FAST, resamples=1000)
    for side in ("before", "after"):
        audit = json.loads((planted["root"] / "fixed" / side / "audit.json").read_text())
        assert audit["run"]["passes_this_run"] == 0
        assert audit["run"]["resumed_images"] == 24
    assert [(f.class_name, f.verdict) for f in r.findings] == [("alpha", "resolved")]
    assert r.findings[0].statistic.before == planted["result"].findings[0].statistic.before


def test_cli_model_options_apply_to_both_models_and_per_model_files_override(planted, tmp_path):
    # Reference: the options given. --threads and --batch-size are shared model options;
    # --after-config sets the after model's batch size only, so the two audits must
    # record 1 thread each and batch sizes 4 (before) and 8 (after).
    from typer.testing import CliRunner

    from shortcut_audit.cli import app

    after_cfg = tmp_path / "after.toml"
    after_cfg.write_text("batch_size = 8\n", encoding="utf-8")
    out = tmp_path / "cmp"
    r = CliRunner().invoke(app, ["compare", str(planted["data"]), "--before", str(planted["corner"]),
                                 "--after", str(planted["clean"]), "-o", str(out), "--no-confirm",
                                 "--threads", "1", "--batch-size", "4", "--after-config", str(after_cfg),
                                 "--resamples", "100", "--patch", "8"])
    assert r.exit_code == 0, r.output
    before = json.loads((out / "before" / "audit.json").read_text())
    after = json.loads((out / "after" / "audit.json").read_text())
    assert (before["run"]["threads"], before["run"]["batch_size"]) == (1, 4)
    assert (after["run"]["threads"], after["run"]["batch_size"]) == (1, 8)
    # the occlusion options reach both audits too
    assert before["settings"]["plan"]["patch"] == after["settings"]["plan"]["patch"] == 8


def test_the_page_names_a_resolved_finding_by_its_verdict(planted):
    # The verdict's own word: the corner finding is resolved, and the page says so.
    html = render_compare_page(planted["result"])
    assert "Resolved: alpha" in html and "Removed" not in html
