"""Tests of cli.py: exit codes, one-line errors, written files, help with examples."""

import json

import numpy as np
import pytest
from typer.testing import CliRunner

import shortcut_audit
from scan_fixtures import corner_model, make_dataset
from shortcut_audit.cli import app

runner = CliRunner()


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cli")
    data = make_dataset(tmp / "data", n=6)
    model = corner_model(tmp / "m.onnx")
    return tmp, data, model


def test_public_api_is_guarded():
    # every name in __all__ exists; the list is what the README documents
    for name in shortcut_audit.__all__:
        assert hasattr(shortcut_audit, name), name
    assert {"audit", "OnnxClassifier", "GridPlan", "Fill", "AuditError"} <= set(shortcut_audit.__all__)


@pytest.mark.parametrize("command", ["inspect", "heatmap", "audit"])
def test_help_has_examples(command):
    result = runner.invoke(app, [command, "--help"])
    assert result.exit_code == 0
    assert "Examples" in result.output and f"shortcut-audit {command}" in result.output


@pytest.mark.parametrize("command, shown", [
    ("audit", "onnxruntime threads [default: all cores]"),
    ("audit", "Grid step [default: half the patch]"),
    ("heatmap", "Class to explain (name) [default: the prediction]"),
    ("pack", "[default: every confirmed one]"),
])
def test_help_shows_the_defaults_written_in_brackets(command, shown):
    # rich reads "[...]" as markup and would drop it; the help escapes it
    result = runner.invoke(app, [command, "--help"], terminal_width=200)
    text = " ".join(result.output.replace("│", " ").split())
    assert shown in text, text


def test_help_names_the_cluster_extra():
    # "[cluster]" is rich markup unless escaped: the help once said pip install "shortcut_audit"
    result = runner.invoke(app, ["audit", "--help"], terminal_width=120, env={"COLUMNS": "120"})
    text = " ".join(result.output.replace("│", " ").split())
    assert 'pip install "shortcut_audit[cluster]"' in text, text


def test_inspect(setup):
    tmp, data, model = setup
    result = runner.invoke(app, ["inspect", str(model), "--json"])
    assert result.exit_code == 0, result.output
    info = json.loads(result.output)
    assert info["input"]["size"] == [32, 32] and info["labels"] == ["alpha", "beta", "gamma"]
    assert info["output"]["kind"] == "logits" and info["passes_per_second"] > 0


def _heatmap(setup, name: str, *options: str):
    """``shortcut-audit heatmap`` of the first alpha image into ``tmp/name``."""
    tmp, data, model = setup
    out = tmp / name
    return runner.invoke(app, ["heatmap", str(data / "alpha" / "alpha_00.png"), "-m", str(model),
                               "-o", str(out), *options]), out


def test_heatmap_writes_three_files(setup):
    result, out = _heatmap(setup, "hm", "--patch", "4", "--stride", "2")
    assert result.exit_code == 0, result.output
    hm = np.load(out / "heatmap.npy")
    assert hm.shape == (32, 32) and hm.dtype == np.float32
    info = json.loads((out / "heatmap.json").read_text())
    assert info["target"] == "alpha" and info["plan"] == {"kind": "grid", "patch": 4, "stride": 2}
    # 15 x 15 patches of 4 at stride 2 on 32 pixels, plus the unperturbed pass
    assert info["passes"] == 226
    assert (out / "overlay.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the planted corner is where the heat is
    assert hm[:6, :6].mean() > 5 * hm[10:, 10:].mean()


def test_scan_exit_codes(setup):
    tmp, data, model = setup
    r = runner.invoke(app, ["audit", str(data), "-m", str(model), "-o", str(tmp / "a1"),
                            "--no-confirm", "--no-report", "--fail-on", "suspect"])
    assert r.exit_code == 1, r.output
    assert "fixed-position" in r.output
    r = runner.invoke(app, ["audit", str(data), "-m", str(model), "-o", str(tmp / "a1"),
                            "--no-confirm", "--no-report", "--fail-on", "never"])
    assert r.exit_code == 0, r.output
    assert json.loads((tmp / "a1" / "audit.json").read_text())["findings"][0]["class"] == "alpha"


@pytest.mark.parametrize("args,message", [
    (["--patch", "99"], "--patch must be at most the image side (32); got 99"),
    (["--threshold", "nonsense=1"], "unknown threshold 'nonsense'"),
    (["--threshold", "localized_rate"], "--threshold takes NAME=VALUE"),
    (["--mean", "1,2"], "--mean"),
])
def test_scan_usage_errors_are_one_line_exit_2(setup, args, message):
    tmp, data, model = setup
    r = runner.invoke(app, ["audit", str(data), "-m", str(model), "-o", str(tmp / "bad"),
                            "--no-confirm"] + args)
    assert r.exit_code == 2, r.output
    assert message in r.output
    assert "Traceback" not in r.output


def test_label_count_mismatch_is_a_one_line_error(setup, tmp_path):
    tmp, data, model = setup
    labels = tmp_path / "labels.txt"
    labels.write_text("a\nb\n")
    r = runner.invoke(app, ["inspect", str(model), "--labels", str(labels)])
    assert r.exit_code == 2
    assert "2 names but the model has 3 outputs" in r.output


def test_adaptive_plan_respects_its_budget(setup):
    r, out = _heatmap(setup, "hm-adaptive", "--plan", "adaptive", "--budget", "30")
    assert r.exit_code == 0, r.output
    info = json.loads((out / "heatmap.json").read_text())
    assert info["plan"]["kind"] == "adaptive" and info["passes"] <= 30
    hm = np.load(out / "heatmap.npy")
    # the planted corner still carries the most heat
    assert hm[:6, :6].mean() > 5 * hm[10:, 10:].mean()


def test_tolerance_stops_a_random_plan_and_is_refused_for_a_grid(setup):
    tmp, data, model = setup
    r, out = _heatmap(setup, "hm-tol", "--plan", "rise", "--count", "3000", "--tolerance", "0.3",
                      "--score", "logit")
    assert r.exit_code == 0, r.output
    info = json.loads((out / "heatmap.json").read_text())
    assert info["tolerance"] == 0.3 and info["passes"] < 3001
    assert info["error_estimate"] < 0.3
    r = runner.invoke(app, ["audit", str(data), "-m", str(model), "-o", str(tmp / "tol-grid"),
                            "--tolerance", "0.1"])
    assert r.exit_code == 2 and "--tolerance applies to --plan random or rise" in r.output


def test_every_command_line_choice_is_one_the_library_takes():
    # The choices are built from the library's tuples; each must also pass the
    # library's own checks, and each --plan must build a plan of that kind (a kind
    # added to PLAN_KINDS without a branch in build_plan would come back as another).
    from shortcut_audit import cli
    from shortcut_audit.comparison import FAIL_ON as COMPARE_FAIL_ON
    from shortcut_audit.findings import FAIL_ON

    for option, enum in (("layout", cli.Layout), ("channels", cli.Channels), ("resize", cli.Resize),
                         ("output", cli.OutputKind)):
        for member in enum:
            assert getattr(shortcut_audit.ModelConfig(**{option: member.value}), option) == member.value
    assert [m.value for m in cli.FillKind] == [shortcut_audit.Fill(kind=m.value).kind for m in cli.FillKind]
    for member in cli.Score:
        assert shortcut_audit.ScanSettings(score=member.value).score == member.value
    for member in cli.PlanKind:
        plan = cli.build_plan(member, None, None, None, None, None, 8, 0.5, 0)
        assert plan.to_dict()["kind"] == member.value
    assert [m.value for m in cli.ScanGate] == list(FAIL_ON)
    assert [m.value for m in cli.CompareGate] == list(COMPARE_FAIL_ON)
