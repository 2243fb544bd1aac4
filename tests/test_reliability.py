"""Reliability and security of a whole scan (scan.py, store.py and cli.py end to end).

What each bad input, bad model, interruption and hostile name does to a complete
``scan`` (the Python API and ``shortcut-audit scan``): an image converted and audited,
an image skipped with its reason in audit.json["skipped"], or a one-line error with
exit 2 and no traceback. Interrupted scans (KeyboardInterrupt, SIGINT, SIGKILL, a full
disk) must keep every finished image and resume to the audit.json an uninterrupted run
writes; nothing is ever written outside the output folder.

References: the colour each unusual image must decode to is worked out by hand in
``EXPECTED_COLOUR`` (EXIF 2.3 orientation 6, alpha compositing ``a*src + (1-a)*dst``,
16-bit / 257, CMYK ink to RGB) and read back from the scan's probabilities of
:func:`probe_model`, a linear model whose logit differences are a closed form of the
mean colour of a known region.
"""

from __future__ import annotations

import errno
import hashlib
import json
import math
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

import bad_inputs as bi
from onnx_builders import (IR_VERSION, OPSET, external_data_model, linear_model, nan_model,
                           rank2_input_model, rank3_output_model, save, two_input_model)
from scan_fixtures import corner_model, make_dataset
from shortcut_audit import cli, store
from shortcut_audit.cli import app
from shortcut_audit.errors import DataError, OutputError
from shortcut_audit.model import ModelConfig
from shortcut_audit.occlusion import Fill, GridPlan, RandomPatchPlan, SmoothMaskPlan
from shortcut_audit.scan import ScanSettings, audit as run_audit

runner = CliRunner()
TESTS = Path(__file__).resolve().parent
REPO = TESTS.parent

SIDE = 16                      # probe model input (pixels)
REGION = (slice(1, 5), slice(1, 5))  # rows 1..4, columns 1..4: inside every top-left quadrant
GAINS = (10.0, 10.0, 5.0)      # logit_k = GAINS[k] * mean(channel k over REGION) / 255
FAST = ScanSettings(confirm=False, plan=GridPlan(patch=4, stride=4))
CFG = ModelConfig(threads=1, batch_size=16)
PLAN_ARGS = ["--no-confirm", "--no-report", "--patch", "4", "--stride", "4"]
MODEL_ARGS = ["--threads", "1", "--batch-size", "16"]
FAST_ARGS = PLAN_ARGS + MODEL_ARGS
# the progress bar's final render and the cost stated before the audit, on stderr
PROGRESS = re.compile(r"^(audit (images|sufficiency|tests)\b|cost: )")


# ------------------------------------------------------------------------ helpers


def probe_model(path: Path, *, labels: list[str] | None = None) -> Path:
    """3 classes; logit k = GAINS[k] * mean of channel k (x / 255) over REGION.

    So log(p0 / p2) = (10 R - 5 B) / 255 and log(p1 / p2) = (10 G - 5 B) / 255 for the
    region's mean colour (R, G, B): the colour an image decoded to, read back from the
    scan's probabilities. Distinct gains make a gray level visible too.
    """
    d = SIDE * SIDE
    w = np.zeros((3, 3 * d), np.float32)
    plane = np.zeros((SIDE, SIDE), np.float32)
    plane[REGION] = 1.0 / plane[REGION].size
    for k in range(3):
        w[k, k * d:(k + 1) * d] = GAINS[k] * plane.ravel()
    model = linear_model(w, np.zeros(3, np.float32), height=SIDE, width=SIDE)
    return save(model, path, metadata={"labels": labels} if labels else None)


def expected_log_ratios(rgb) -> np.ndarray:
    r, g, b = (float(v) for v in rgb)
    return np.array([(GAINS[0] * r - GAINS[2] * b) / 255, (GAINS[1] * g - GAINS[2] * b) / 255])


def log_ratios(probs) -> np.ndarray:
    p = np.asarray(probs, np.float64)
    return np.array([math.log(p[0] / p[2]), math.log(p[1] / p[2])])


def _graph_model(nodes, name, inputs, outputs, initializers):
    """An onnx.ModelProto at the opset and IR version of tests/onnx_builders.py."""
    from onnx import helper

    model = helper.make_model(helper.make_graph(nodes, name, inputs, outputs, initializers),
                              opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = IR_VERSION
    return model


def inf_model(gain: float, *, side: int = SIDE, classes: int = 3):
    """scores = exp(gain * mean(x)) * (1, 2, 3): +inf (float32 overflow) once gain * mean > 88.7."""
    from onnx import TensorProto, helper, numpy_helper

    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, side, side])
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", classes])
    nodes = [helper.make_node("ReduceMean", ["image"], ["m4"], axes=[1, 2, 3], keepdims=1),
             helper.make_node("Flatten", ["m4"], ["m"], axis=1),
             helper.make_node("Mul", ["m", "g"], ["gm"]),
             helper.make_node("Exp", ["gm"], ["e"]),
             helper.make_node("Mul", ["e", "ramp"], ["scores"])]
    inits = [numpy_helper.from_array(np.array([[gain]], np.float32), "g"),
             numpy_helper.from_array(np.arange(1, classes + 1, dtype=np.float32)[None], "ramp")]
    return _graph_model(nodes, "inf", [x], [y], inits)


def runtime_failure_model(*, side: int = SIDE):
    """Loads and passes the test forward pass, then fails inside onnxruntime for bright images.

    A Gather indexes a 7-row table with int(10 * mean(x)): an index of 7 or more (mean >= 0.7)
    is out of bounds, which onnxruntime reports as an INVALID_ARGUMENT error at run time.
    """
    from onnx import TensorProto, helper, numpy_helper

    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, side, side])
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 3])
    nodes = [helper.make_node("ReduceMean", ["image"], ["m4"], axes=[1, 2, 3], keepdims=1),
             helper.make_node("Flatten", ["m4"], ["m"], axis=1),
             helper.make_node("Mul", ["m", "ten"], ["m10"]),
             helper.make_node("Cast", ["m10"], ["idx"], to=TensorProto.INT64),
             helper.make_node("Gather", ["table", "idx"], ["g"], axis=0),
             helper.make_node("Flatten", ["g"], ["scores"], axis=1)]
    inits = [numpy_helper.from_array(np.array([[10.0]], np.float32), "ten"),
             numpy_helper.from_array(np.arange(21, dtype=np.float32).reshape(7, 3) / 7, "table")]
    return _graph_model(nodes, "runtime_failure", [x], [y], inits)


def without_run(text: str) -> str:
    """audit.json's bytes with the "run" object (timings, the one field allowed to differ) cut out."""
    start = text.index('\n  "run": {')
    end = text.index("\n  }", start) + len("\n  }")
    return text[:start] + text[end:]


def audit_text(out: Path) -> str:
    return (out / "audit.json").read_text(encoding="utf-8")


def store_entries(out: Path) -> list[Path]:
    """The per-image records of a store (every one must parse)."""
    files = [p for p in (out / "results").glob("*.json") if p.name != "fingerprint.json"]
    for p in files:
        json.loads(p.read_text(encoding="utf-8"))
    return files


def stored_probs(out: Path, path: str) -> list[float]:
    """The class probabilities the scan kept for ``path`` in OUT/results (its per-image record)."""
    record = json.loads((out / "results" / f"{store.ResultStore.key(path)}.json").read_text(encoding="utf-8"))
    assert record["path"] == path
    return record["probs"]


def temp_files(folder: Path) -> list[Path]:
    return list(folder.rglob(".tmp-*"))


def snapshot(folder: Path, *, skip: Path | None = None) -> dict[str, tuple]:
    """Every entry under ``folder`` (not following links): kind, size and bytes' hash."""
    found = {}
    for dirpath, dirnames, filenames in os.walk(folder):
        here = Path(dirpath)
        if skip is not None and (here == skip or skip in here.parents):
            dirnames[:] = []
            continue
        for name in dirnames + filenames:
            p = here / name
            if skip is not None and p == skip:
                continue
            st = p.lstat()
            key = os.fsencode(p.relative_to(folder)).hex()
            if p.is_symlink():
                found[key] = ("link", os.readlink(p))
            elif p.is_dir():
                found[key] = ("dir",)
            else:
                found[key] = ("file", st.st_size, hashlib.sha256(p.read_bytes()).hexdigest())
    return found


def assert_one_line_error(result, *needles: str) -> str:
    """Exit 2 and one line, "error: ...", naming the problem (besides the progress bar's last state
    and the cost line)."""
    lines = [ln for ln in result.output.splitlines() if ln.strip() and not PROGRESS.match(ln)]
    assert result.exit_code == 2, result.output
    assert isinstance(result.exception, SystemExit), repr(result.exception)
    assert "Traceback" not in result.output
    assert len(lines) == 1, lines
    assert lines[0].startswith("error: "), lines
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


def run_cli(*args: str):
    return runner.invoke(app, ["audit", *map(str, args)])


# --------------------------------------------------------------- the mixed folder

#: The colour REGION must hold after decoding, worked out by hand from the builder.
EXPECTED_COLOUR = {
    "vase/one_pixel.png": bi.BLUE,                 # 1x1, upscaled
    "vase/small_5x3.png": bi.BLUE,                 # smaller than a 4-pixel patch
    "vase/studio_b/nested.png": bi.BLUE,           # nested folder: label of the top folder
    "vase/animated.gif": bi.RED,                   # first frame red, second green
    "vase/animated_apng.png": bi.RED,
    "vase/rgba.png": (255, 127, 127),              # red at alpha 128/255 on white: 255*(127/255)
    "vase/la.png": (191, 191, 191),                # black at alpha 64/255 on white: 255*(191/255)
    "vase/cmyk.jpg": (0, 255, 255),                # top-left quadrant: full cyan ink, no black
    "vase/rotated.jpg": bi.BLUE,                   # EXIF 6: the stored bottom-left (blue) is shown top-left
    "bowl/palette.png": bi.WHITE,                  # left half is transparent index 0 on white
    "bowl/gray16_flat.png": (100, 100, 100),       # 16-bit 25700 / 257 = 100 (clipping would give 255)
    f"mug/{bi.NON_UTF8_SHOWN}": bi.GREEN,
}
JPEG = {"vase/cmyk.jpg", "vase/rotated.jpg"}

#: kind of bad input -> (path in the audit, keyword of the skip reason)
SKIP_KINDS = {
    "zero-byte file": ("mug/empty.png", "file is empty"),
    "truncated PNG": ("mug/truncated.png", "cannot decode"),
    "truncated JPEG": ("mug/truncated.jpg", "cannot decode"),
    "text file named .png": ("mug/notes.png", "not a recognised image format"),
    "PNG bomb 50000x50000": ("bowl/bomb.png", "decompression bomb"),
    "PNG bomb just over the limit": ("bowl/bomb_small.png", "decompression bomb"),
    "symlink outside the dataset": ("bowl/link.png", "symlink points outside the dataset root"),
    "empty class folder": ("plate/", "class folder is empty"),
}


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    """The corpus of tests/bad_inputs.py in one tree, scanned once by the API and once by the CLI."""
    tmp = tmp_path_factory.mktemp("mixed")
    data = tmp / "data"
    expected = bi.build_mixed_folder(data, 12, np.random.default_rng(0))
    Image.fromarray(np.full((4, 4), 25700, np.uint16)).save(data / "bowl" / "gray16_flat.png")
    expected["bowl/gray16_flat.png"] = ("ok", "")
    model = probe_model(tmp / "probe.onnx")
    result = run_audit(data, model, out=tmp / "api", settings=FAST, model_config=CFG)
    cli_result = run_cli(data, "-m", model, "-o", tmp / "cli", *FAST_ARGS)
    return {"tmp": tmp, "data": data, "model": model, "expected": expected, "result": result,
            "audit": json.loads(audit_text(tmp / "api")), "ref": without_run(audit_text(tmp / "api")),
            "cli": cli_result}


def test_mixed_folder_audits_every_good_file_exactly_once(mixed):
    ok = sorted(p for p, (outcome, _) in mixed["expected"].items() if outcome == "ok")
    audit = mixed["audit"]
    assert len(ok) == 12 + 13  # 12 noise images + 13 unusual-but-usable files (non-UTF-8 name included)
    assert [im["path"] for im in audit["images"]] == ok
    assert audit["dataset"]["audited"] == len(ok)
    for im in audit["images"]:
        assert im["label"] == im["path"].split("/")[0]
        probs = stored_probs(mixed["tmp"] / "api", im["path"])
        assert all(math.isfinite(p) for p in probs) and sum(probs) == pytest.approx(1, abs=1e-5)
        assert im["confidence"] == pytest.approx(max(probs), rel=1e-6)


def test_mixed_folder_lists_every_bad_file_exactly_once(mixed):
    skips = {p: kw for p, (outcome, kw) in mixed["expected"].items() if outcome == "skip"}
    listed = [s["path"] for s in mixed["audit"]["skipped"]]
    assert sorted(listed) == sorted(skips) and len(listed) == len(set(listed))
    for s in mixed["audit"]["skipped"]:
        assert skips[s["path"]] in s["reason"] and "\n" not in s["reason"]
    # hidden files and other extensions are passed over silently: neither audited nor listed
    everything = listed + [im["path"] for im in mixed["audit"]["images"]]
    assert not [p for p in everything if p.endswith((".hidden.png", "readme.txt"))]


@pytest.mark.parametrize("kind", sorted(SKIP_KINDS))
def test_bad_file_in_a_scan_is_skipped_with_its_reason(mixed, kind):
    path, keyword = SKIP_KINDS[kind]
    reasons = [s["reason"] for s in mixed["audit"]["skipped"] if s["path"] == path]
    assert len(reasons) == 1 and keyword in reasons[0], reasons


@pytest.mark.parametrize("path", sorted(EXPECTED_COLOUR))
def test_unusual_file_in_a_scan_is_converted_to_the_right_colour(mixed, path):
    assert path in [im["path"] for im in mixed["audit"]["images"]]
    probs = stored_probs(mixed["tmp"] / "api", path)
    tol = 0.2 if path in JPEG else 0.1  # logit units: 0.1 is 2.5 grey levels of a gain of 10
    np.testing.assert_allclose(log_ratios(probs), expected_log_ratios(EXPECTED_COLOUR[path]), atol=tol)


def test_sixteen_bit_gradient_and_noise_images_are_audited(mixed):
    paths = {im["path"] for im in mixed["audit"]["images"]}
    assert "bowl/gray16.png" in paths
    assert sum(p.split("/")[-1].startswith("good_") for p in paths) == 12


def test_cli_scan_of_the_mixed_folder_writes_the_same_audit(mixed):
    r = mixed["cli"]
    assert r.exit_code == 0, r.output
    assert "Traceback" not in r.output
    skipped = len(mixed["audit"]["skipped"])
    assert f"{skipped} file(s) skipped; reasons in audit.json" in r.output
    assert without_run(audit_text(mixed["tmp"] / "cli")) == mixed["ref"]


# ------------------------------------------------------------------- manifests


def _manifest_tree(root: Path) -> Path:
    """A manifest whose every row but two is bad in its own way; returns the manifest path."""
    for cls, colour in (("mug", bi.RED), ("bowl", bi.BLUE)):
        (root / cls).mkdir(parents=True, exist_ok=True)
        Image.new("RGB", (4, 4), colour).save(root / cls / "a.png")
    Image.new("RGB", (4, 4), bi.GREEN).save(root / "bowl" / "b.png")
    Image.new("RGB", (4, 4), bi.GREEN).save(root / "bowl" / "c.png")
    outside = root.parent / "outside"
    outside.mkdir(exist_ok=True)
    Image.new("RGB", (4, 4), bi.RED).save(outside / "secret.png")
    (root / "mug" / "link.png").symlink_to(outside / "secret.png")
    return bi.write_manifest(root / "manifest.csv", ("path", "label"), [
        ("mug/a.png", "mug"),
        ("bowl/a.png", "bowl"),
        ("mug/a.png", "vase"),                       # duplicate row
        ("../outside/secret.png", "mug"),            # leaves the root with ..
        ("mug/../../outside/secret.png", "mug"),     # .. in the middle
        (str(outside / "secret.png"), "mug"),        # absolute
        ("mug/link.png", "mug"),                     # symlink out of the root
        ("mug/nope.png", "mug"),                     # no such file
        ("bowl/b.png", "teapot"),                    # a label the model does not have
        ("bowl/c.png", ""),                          # unlabelled
    ])


MANIFEST_SKIPS = {
    "mug/a.png": "duplicate row in manifest (first at line 2)",
    "../outside/secret.png": "path leaves the dataset root",
    "mug/../../outside/secret.png": "path leaves the dataset root",
    "mug/link.png": "symlink points outside the dataset root",
    "mug/nope.png": "file not found",
    "bowl/b.png": "label 'teapot' is not one of the model's labels (bowl, mug, vase)",
    "bowl/c.png": "no label",
}


def test_manifest_rows_that_are_bad_are_skipped_and_good_rows_audited(tmp_path):
    data = tmp_path / "data"
    manifest = _manifest_tree(data)
    model = probe_model(tmp_path / "m.onnx", labels=["bowl", "mug", "vase"])
    before = snapshot(tmp_path)
    result = run_audit(data, model, manifest=manifest, out=tmp_path / "out", settings=FAST,
                  model_config=CFG)
    assert [(im.path, im.label) for im in result.images] == [("bowl/a.png", 0), ("mug/a.png", 1)]
    audit = json.loads(audit_text(tmp_path / "out"))
    got = {s["path"]: s["reason"] for s in audit["skipped"]}
    absolute = str(tmp_path / "outside" / "secret.png")
    assert got.pop(absolute) == "path leaves the dataset root"
    assert got == MANIFEST_SKIPS
    assert len(audit["skipped"]) == len(MANIFEST_SKIPS) + 1
    # the secret outside the root was never read into the audit; nothing was written beside it
    assert snapshot(tmp_path, skip=tmp_path / "out") == before
    r = run_cli(data, "-m", model, "-o", tmp_path / "cli", "--manifest", manifest, *FAST_ARGS)
    assert r.exit_code == 0, r.output
    assert json.loads(audit_text(tmp_path / "cli"))["skipped"] == audit["skipped"]


def test_manifest_with_missing_columns_is_a_one_line_error(tmp_path):
    data = tmp_path / "data"
    manifest = bi.make_manifest_missing_columns(data)
    model = probe_model(tmp_path / "m.onnx", labels=["bowl", "mug", "vase"])
    with pytest.raises(DataError, match="needs the columns path,label"):
        run_audit(data, model, manifest=manifest, settings=FAST, model_config=CFG)
    r = run_cli(data, "-m", model, "-o", tmp_path / "out", "--manifest", manifest, *FAST_ARGS)
    assert_one_line_error(r, "needs the columns path,label", "found: file, class", "missing: path, label")
    assert not (tmp_path / "out").exists()


def test_dataset_of_only_bad_files_completes_with_everything_listed(tmp_path):
    data = tmp_path / "data"
    for cls in ("bowl", "mug", "vase"):
        (data / cls).mkdir(parents=True)
        bi.make_zero_byte(data / cls)
        bi.make_text_as_png(data / cls)
    r = run_cli(data, "-m", probe_model(tmp_path / "m.onnx"), "-o", tmp_path / "out", *FAST_ARGS)
    # audit.json lists every skip, and the exit code says nothing was audited (a gate fails)
    assert r.exit_code == 2 and "Traceback" not in r.output, r.output
    assert "no image could be audited (6 skipped" in r.output
    audit = json.loads(audit_text(tmp_path / "out"))
    assert audit["images"] == [] and audit["dataset"]["audited"] == 0
    assert len(audit["skipped"]) == 6


def test_usage_errors_about_the_dataset_are_one_line(tmp_path):
    data = make_dataset(tmp_path / "data", n=1)
    model = corner_model(tmp_path / "m.onnx")
    r = run_cli(data, "-m", model, "-o", tmp_path / "out", "--no-confirm", "--patch", "40")
    assert_one_line_error(r, "--patch must be at most the image side (32); got 40")
    empty = tmp_path / "empty"
    (empty / "alpha").mkdir(parents=True)
    r = run_cli(empty, "-m", model, "-o", tmp_path / "out")
    assert_one_line_error(r, "no usable images found", "class folder is empty")


# ------------------------------------------------------------------- bad models


def _bad_models(tmp: Path) -> dict[str, tuple[Path, list[str], tuple[str, ...]]]:
    (tmp / "text.onnx").write_text("not a model\n")
    (tmp / "labels2.txt").write_text("bowl\nmug\n")
    probe = probe_model(tmp / "probe.onnx")
    four = linear_model(np.zeros((4, 3 * SIDE * SIDE), np.float32), np.arange(4, dtype=np.float32),
                        height=SIDE, width=SIDE)
    return {
        "not an ONNX file": (tmp / "text.onnx", MODEL_ARGS, ("text.onnx is not an ONNX model",)),
        "external data outside its folder": (
            external_data_model(tmp / "ext", location="../outside.bin", height=SIDE, width=SIDE, classes=3),
            MODEL_ARGS, ("external data at '../outside.bin', outside the model's folder",)),
        "two inputs": (save(two_input_model(height=SIDE, width=SIDE), tmp / "two.onnx"), MODEL_ARGS,
                       ("has 2 inputs ('a', 'b')",)),
        "non-image input": (save(rank2_input_model(classes=3), tmp / "tab.onnx"), MODEL_ARGS,
                            ("input 'features' has shape [N, 12] (rank 2)",)),
        "3-D output": (save(rank3_output_model(height=SIDE, width=SIDE, classes=3), tmp / "r3.onnx"),
                       MODEL_ARGS,
                       ("output 'scores' has shape [N, 1, 3]", "(N, K)")),
        "3-D output, undeclared": (
            save(rank3_output_model(height=SIDE, width=SIDE, classes=3, declare_shape=False),
                 tmp / "r3u.onnx"),
            MODEL_ARGS, ("(N, K)",)),
        "NaN for every input": (save(nan_model(-1.0, height=SIDE, width=SIDE), tmp / "nan.onnx"), MODEL_ARGS,
                                ("NaN or infinite scores for every test image",)),
        "labels file count differs": (probe, MODEL_ARGS + ["--labels", str(tmp / "labels2.txt")],
                                      ("--labels has 2 names but the model has 3 outputs",)),
        "metadata labels count differs": (
            probe_model(tmp / "meta.onnx", labels=["bowl", "mug"]), MODEL_ARGS,
            ("'labels' in the model's 'shortcut_audit' metadata has 2 names but the model has 3 outputs",)),
        "dataset classes count differs": (save(four, tmp / "four.onnx"), MODEL_ARGS,
                                          ("the dataset has 3 classes but the model has 4 outputs",)),
        "malformed metadata": (save(linear_model(np.zeros((3, 3 * SIDE * SIDE), np.float32),
                                                 np.zeros(3, np.float32), height=SIDE, width=SIDE),
                                    tmp / "badmeta.onnx", metadata="{labels: oops"),
                               [], ("malformed 'shortcut_audit' metadata: not JSON",)),
    }


@pytest.fixture(scope="module")
def bad_models(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("models")
    data = tmp / "data"
    for cls, colour in (("bowl", bi.RED), ("mug", bi.GREEN), ("vase", bi.BLUE)):
        (data / cls).mkdir(parents=True)
        Image.new("RGB", (8, 8), colour).save(data / cls / "a.png")
    models = _bad_models(tmp)
    assert sorted(models) == sorted(BAD_MODEL_KINDS)
    return tmp, data, models


BAD_MODEL_KINDS = [
    "not an ONNX file", "external data outside its folder", "two inputs", "non-image input",
    "3-D output", "3-D output, undeclared", "NaN for every input", "labels file count differs",
    "metadata labels count differs", "dataset classes count differs", "malformed metadata",
]


@pytest.mark.parametrize("kind", BAD_MODEL_KINDS)
def test_bad_model_is_a_one_line_error_exit_2(bad_models, kind):
    tmp, data, models = bad_models
    model, extra, needles = models[kind]
    out = tmp / f"out-{BAD_MODEL_KINDS.index(kind)}"
    r = run_cli(data, "-m", model, "-o", out, *PLAN_ARGS, *extra)
    assert_one_line_error(r, *needles)
    assert not (out / "audit.json").exists()


def test_malformed_metadata_is_ignored_when_model_options_are_given(bad_models):
    tmp, data, models = bad_models
    model = models["malformed metadata"][0]
    r = run_cli(data, "-m", model, "-o", tmp / "out-given", *FAST_ARGS)
    assert r.exit_code == 0 and "Traceback" not in r.output, r.output
    assert json.loads(audit_text(tmp / "out-given"))["model"]["labels"] == ["bowl", "mug", "vase"]


@pytest.fixture(scope="module")
def light_and_dark(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("nan")
    data = tmp / "data"
    for cls in ("bowl", "mug", "vase"):
        (data / cls).mkdir(parents=True)
        Image.new("RGB", (8, 8), (40, 40, 40)).save(data / cls / "dark.png")       # mean 0.157
        Image.new("RGB", (8, 8), (250, 250, 250)).save(data / cls / "light.png")   # mean 0.980
        Image.new("RGB", (8, 8), (150, 150, 150)).save(data / cls / "mid.png")     # mean 0.588
    return tmp, data


@pytest.mark.parametrize("kind", ["nan", "inf"])
def test_model_giving_nan_or_inf_for_some_images_skips_those_and_audits_the_rest(light_and_dark, kind):
    tmp, data = light_and_dark
    # NaN: log(0.7 - mean) for mean > 0.7 (onnx_builders.nan_model). inf: exp(100 * mean)
    # overflows float32 above mean 0.887. The seeded random test pass has mean ~0.5: finite.
    model = save(nan_model(0.7, height=SIDE, width=SIDE) if kind == "nan" else inf_model(100.0),
                 tmp / f"{kind}.onnx")
    r = run_cli(data, "-m", model, "-o", tmp / kind, *FAST_ARGS)
    assert r.exit_code == 0 and "Traceback" not in r.output, r.output
    audit = json.loads(audit_text(tmp / kind))
    assert [im["path"] for im in audit["images"]] == [f"{c}/{n}.png" for c in ("bowl", "mug", "vase")
                                                        for n in ("dark", "mid")]
    assert [(s["path"], s["reason"]) for s in audit["skipped"]] == [
        (f"{c}/light.png", "the model returned NaN or infinity for the unperturbed image; image skipped")
        for c in ("bowl", "mug", "vase")]


def test_nan_for_perturbed_images_only_skips_the_image(light_and_dark):
    tmp, data = light_and_dark
    # mid (150/255 = 0.588) is finite unperturbed; a white 4x4 patch (1/16 of the image)
    # lifts its mean to 0.588 + 0.412/16 = 0.614 > 0.6: NaN. The deletion curve ends on
    # an all-white image (mean 1), so dark images meet NaN there: every image is skipped,
    # each with the stage that failed, and the scan still completes.
    model = save(nan_model(0.6, height=SIDE, width=SIDE), tmp / "nan06.onnx")
    r = run_cli(data, "-m", model, "-o", tmp / "perturbed", *FAST_ARGS, "--fill", "constant",
                "--fill-value", "255")
    assert r.exit_code == 2 and "no image could be audited" in r.output, r.output
    assert "Traceback" not in r.output
    audit = json.loads(audit_text(tmp / "perturbed"))
    assert audit["images"] == []
    unperturbed = "the model returned NaN or infinity for the unperturbed image; image skipped"
    perturbed = "the model returned NaN or infinity for a perturbed image; image skipped"
    assert [(s["path"], s["reason"]) for s in audit["skipped"]] == [
        (f"{c}/{n}.png", unperturbed if n == "light" else perturbed)
        for c in ("bowl", "mug", "vase") for n in ("dark", "light", "mid")]


def test_model_failing_at_run_time_for_some_images_is_a_one_line_error(light_and_dark):
    tmp, data = light_and_dark
    model = save(runtime_failure_model(), tmp / "gather.onnx")
    r = run_cli(data, "-m", model, "-o", tmp / "gather", *FAST_ARGS)
    assert_one_line_error(r, "gather.onnx", "indices element out of data bounds")


# ---------------------------------------------------------------- interruptions


class StopAfter:
    """A progress callback that raises KeyboardInterrupt (a Ctrl-C) once ``n`` images are done."""

    def __init__(self, n: int):
        self.n = n

    def __call__(self, event: dict) -> None:
        if event["done"] >= self.n:
            raise KeyboardInterrupt


def test_ctrl_c_through_the_api_keeps_finished_images_and_resumes_to_the_same_audit(mixed, tmp_path):
    out = tmp_path / "out"
    total = len(mixed["result"].images) + sum(1 for s in mixed["audit"]["skipped"]
                                              if s["path"] != "plate/" and "symlink" not in s["reason"])
    for n in (5, 17):
        with pytest.raises(KeyboardInterrupt):
            run_audit(mixed["data"], mixed["model"], out=out, settings=FAST, model_config=CFG,
                 progress=StopAfter(n))
        assert len(store_entries(out)) == n  # exactly the finished images, each complete
        assert not (out / "audit.json").exists()
    final = run_audit(mixed["data"], mixed["model"], out=out, settings=FAST, model_config=CFG)
    assert final.run["resumed_images"] == 17 and len(store_entries(out)) == total
    assert without_run(audit_text(out)) == mixed["ref"]


def test_ctrl_c_in_the_cli_exits_130_saying_how_to_resume(mixed, tmp_path, monkeypatch):
    out = tmp_path / "out"
    real_call = cli._Bar.__call__

    def interrupting(self, event):
        real_call(self, event)
        if event["done"] >= 6:
            raise KeyboardInterrupt

    monkeypatch.setattr(cli._Bar, "__call__", interrupting)
    r = run_cli(mixed["data"], "-m", mixed["model"], "-o", out, *FAST_ARGS)
    assert r.exit_code == 130, r.output
    assert "Traceback" not in r.output
    kept = len(list((out / "results").glob("*.npz")))
    message = (f"interrupted: the results of {kept} images are kept in {out / 'results'}; "
               "run the same command again to resume.")
    assert "".join(message.split()) in "".join(r.output.split())  # rich wraps at 80 columns
    assert len(store_entries(out)) == 6
    monkeypatch.setattr(cli._Bar, "__call__", real_call)
    r = run_cli(mixed["data"], "-m", mixed["model"], "-o", out, *FAST_ARGS)
    assert r.exit_code == 0, r.output
    assert without_run(audit_text(out)) == mixed["ref"]


SIGINT_SCRIPT = """
import sys, time
sys.path.insert(0, {tests!r})
from shortcut_audit import store
real_put = store.ResultStore.put
def slow_put(self, *args, **kwargs):
    real_put(self, *args, **kwargs)
    time.sleep(0.1)  # so the scan cannot finish before the signal arrives
store.ResultStore.put = slow_put
from shortcut_audit.cli import main
sys.argv = ["shortcut-audit", "audit"] + {args!r}
main()
"""


def _wait_for_entries(out: Path, proc: subprocess.Popen, at_least: int) -> None:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        if (out / "results").is_dir() and sum(1 for _ in (out / "results").glob("*.json")) > at_least:
            return
        time.sleep(0.01)


def test_real_sigint_to_the_cli_exits_130_and_a_rerun_completes(mixed, tmp_path):
    out = tmp_path / "out"
    args = [str(mixed["data"]), "-m", str(mixed["model"]), "-o", str(out), *FAST_ARGS]
    proc = subprocess.Popen([sys.executable, "-c", SIGINT_SCRIPT.format(tests=str(TESTS), args=args)],
                            cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=dict(os.environ, OMP_NUM_THREADS="1"))
    _wait_for_entries(out, proc, 3)
    proc.send_signal(signal.SIGINT)
    _, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr
    assert "runthesamecommandagaintoresume" in "".join(stderr.split())  # rich wraps at 80 columns
    assert "Traceback" not in stderr
    assert 3 <= len(store_entries(out)) < 31  # 31 = 25 audited + 6 undecodable files
    r = run_cli(*args)
    assert r.exit_code == 0, r.output
    assert without_run(audit_text(out)) == mixed["ref"]


KILL_SCRIPT = """
import os, signal, sys
from pathlib import Path
sys.path.insert(0, {tests!r})
real_replace = os.replace
calls = 0
def replace(src, dst):
    # SIGKILL this process just before the rename of write number {kill_at} (temp file
    # written, target not yet replaced), or of the first write to a file named {kill_name!r}
    global calls
    calls += 1
    if calls == {kill_at} or Path(dst).name == {kill_name!r}:
        os.kill(os.getpid(), signal.SIGKILL)
    real_replace(src, dst)
os.replace = replace
from shortcut_audit.model import ModelConfig
from shortcut_audit.occlusion import GridPlan
from shortcut_audit.scan import ScanSettings, audit as run_audit
run_audit({data!r}, {model!r}, out={out!r}, settings=ScanSettings(confirm=False, plan=GridPlan(patch=4, stride=4)),
     model_config=ModelConfig(threads=1, batch_size=16))
"""


def _killed_run(mixed, out: Path, *, kill_at: int = 0, kill_name: str = "") -> None:
    script = KILL_SCRIPT.format(tests=str(TESTS), data=str(mixed["data"]), model=str(mixed["model"]),
                                out=str(out), kill_at=kill_at, kill_name=kill_name)
    proc = subprocess.run([sys.executable, "-c", script], cwd=REPO, capture_output=True, text=True,
                          env=dict(os.environ, OMP_NUM_THREADS="1"), timeout=120)
    assert proc.returncode == -signal.SIGKILL, proc.stderr  # the kill point was reached


def test_sigkill_at_random_points_then_rerun_gives_the_same_audit(mixed, tmp_path):
    out = tmp_path / "out"
    rng = np.random.default_rng(7)
    counts = []
    # three kills at seeded random writes, each run resuming the last; every kill lands
    # between a temp file's write and its rename, the worst moment for a reader
    for kill_at in rng.integers(3, 20, size=3):
        _killed_run(mixed, out, kill_at=int(kill_at))
        counts.append(len(store_entries(out)))  # every record on disk parses
        assert temp_files(out) and not (out / "audit.json").exists()
    assert counts == sorted(counts) and counts[-1] > counts[0] > 0, counts
    _killed_run(mixed, out, kill_name="audit.json")
    assert not (out / "audit.json").exists()  # never half a file: none at all
    assert [p.parent for p in temp_files(out)] == [out]
    final = run_audit(mixed["data"], mixed["model"], out=out, settings=FAST, model_config=CFG)
    assert final.run["passes_this_run"] == 0  # every image came from the store
    assert without_run(audit_text(out)) == mixed["ref"]
    assert temp_files(out) == []  # the rerun removed what the killed writers left
    # a kill while audit.json is rewritten leaves the previous audit.json whole
    _killed_run(mixed, out, kill_name="audit.json")
    assert without_run(audit_text(out)) == mixed["ref"]
    run_audit(mixed["data"], mixed["model"], out=out, settings=FAST, model_config=CFG)
    assert temp_files(out) == [] and without_run(audit_text(out)) == mixed["ref"]


def test_ctrl_c_during_a_write_leaves_no_temp_file(mixed, tmp_path, monkeypatch):
    out = tmp_path / "out"
    real_fsync, calls = os.fsync, []

    def fsync(fd):
        calls.append(fd)
        if len(calls) == 4:
            raise KeyboardInterrupt  # Ctrl-C arrives while a result file is being written
        return real_fsync(fd)

    monkeypatch.setattr(store.os, "fsync", fsync)
    with pytest.raises(KeyboardInterrupt):
        run_audit(mixed["data"], mixed["model"], out=out, settings=FAST, model_config=CFG)
    assert temp_files(out) == []


def _full_disk(monkeypatch, after: int) -> None:
    """Every fsync after the first ``after`` fails with ENOSPC, as on a full disk."""
    real_fsync, calls = os.fsync, []

    def fsync(fd):
        calls.append(fd)
        if len(calls) > after:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_fsync(fd)

    monkeypatch.setattr(store.os, "fsync", fsync)


def test_full_disk_mid_scan_is_a_one_line_error_and_a_rerun_completes(mixed, tmp_path, monkeypatch):
    out = tmp_path / "out"
    _full_disk(monkeypatch, after=9)
    r = run_cli(mixed["data"], "-m", mixed["model"], "-o", out, *FAST_ARGS)
    assert_one_line_error(r, "cannot write", "No space left on device",
                          "Free some space or pass another --out")
    assert temp_files(out) == [] and not (out / "audit.json").exists()
    assert 0 < len(store_entries(out)) < 9
    monkeypatch.undo()
    r = run_cli(mixed["data"], "-m", mixed["model"], "-o", out, *FAST_ARGS)
    assert r.exit_code == 0, r.output
    assert without_run(audit_text(out)) == mixed["ref"]
    # the disk fills while audit.json is rewritten (write 2 of a fully resumed run: after
    # fingerprint.json): the old audit.json stays whole and no temp file remains
    before = (out / "audit.json").read_bytes()
    _full_disk(monkeypatch, after=1)
    r = run_cli(mixed["data"], "-m", mixed["model"], "-o", out, *FAST_ARGS)
    assert_one_line_error(r, f"cannot write {out / 'audit.json'}: No space left on device")
    assert (out / "audit.json").read_bytes() == before and temp_files(out) == []


def test_output_folder_under_a_regular_file_is_a_one_line_error(mixed, tmp_path):
    blocker = tmp_path / "not_a_folder"
    blocker.write_text("x")
    with pytest.raises(OutputError, match="Pass an --out folder you can write to"):
        run_audit(mixed["data"], mixed["model"], out=blocker / "sub", settings=FAST, model_config=CFG)
    r = run_cli(mixed["data"], "-m", mixed["model"], "-o", blocker / "sub", *FAST_ARGS)
    assert_one_line_error(r, f"cannot write into {blocker / 'sub' / 'results'}", "Not a directory")
    r = run_cli(mixed["data"], "-m", mixed["model"], "-o", blocker, *FAST_ARGS)
    assert r.exit_code == 2 and "Traceback" not in r.output and "is a file" in r.output
    assert blocker.read_text() == "x"


@pytest.mark.skipif(os.geteuid() == 0, reason="root ignores chmod 0o500; the full-disk and "
                                              "file-as-folder tests cover unwritable output")
def test_read_only_output_folder_is_a_one_line_error(mixed, tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        r = run_cli(mixed["data"], "-m", mixed["model"], "-o", ro / "out", *FAST_ARGS)
        assert_one_line_error(r, "cannot write into", "Permission denied")
    finally:
        ro.chmod(0o700)


def test_a_file_repaired_after_a_scan_is_read_again_on_rerun(tmp_path):
    data = tmp_path / "data"
    for cls, colour in (("bowl", bi.RED), ("mug", bi.GREEN), ("vase", bi.BLUE)):
        (data / cls).mkdir(parents=True)
        Image.new("RGB", (8, 8), colour).save(data / cls / "a.png")
    bi.make_truncated_png(data / "mug", "b.png")
    model = probe_model(tmp_path / "m.onnx")
    first = run_audit(data, model, out=tmp_path / "out", settings=FAST, model_config=CFG)
    assert [s.path for s in first.skipped] == ["mug/b.png"]
    Image.new("RGB", (8, 8), bi.GREEN).save(data / "mug" / "b.png")  # the user re-exports it
    again = run_audit(data, model, out=tmp_path / "out", settings=FAST, model_config=CFG)
    assert again.skipped == [] and len(again.images) == 4


# ---------------------------------------------------------------- hostile names


HOSTILE_FILES = {
    "<b>x</b>": ['a"b&c.png', "<img src=x onerror=alert(1)>.png"],  # a folder "<b>x<" holding "b>"
    "\"q'&amp;": ["up\\..\\..\\evil.png", "-rf.png"],
    "back\\slash": ["new\nline.png", "$(touch pwned).png"],
}


def test_hostile_class_and_file_names_survive_a_scan_and_nothing_is_written_outside(tmp_path):
    data = tmp_path / "data"
    expected = []
    for cls, files in HOSTILE_FILES.items():
        (data / cls).mkdir(parents=True)
        for i, name in enumerate(files):
            Image.new("RGB", (8, 8), (60 * i, 120, 30)).save(data / cls / name, format="PNG")
            expected.append((f"{cls}/{name}", cls.split("/")[0]))
    model = probe_model(tmp_path / "m.onnx")
    work = tmp_path / "a" / "b"
    work.mkdir(parents=True)
    out = work / "out"
    before = snapshot(tmp_path)
    r = run_cli(data, "-m", model, "-o", out, "--no-confirm", "--patch", "4", "--stride", "4",
                "--threads", "1", "--batch-size", "16")
    assert r.exit_code == 0 and "Traceback" not in r.output, r.output
    assert snapshot(tmp_path, skip=out) == before
    assert sorted(os.listdir(work)) == ["out"]
    audit = json.loads(audit_text(out))
    assert sorted((im["path"], im["label"]) for im in audit["images"]) == sorted(expected)
    assert audit["skipped"] == []
    assert sorted(c["name"] for c in audit["classes"]) == sorted({lbl for _, lbl in expected})
    for p in out.rglob("*"):
        assert not p.is_symlink() and p.resolve().is_relative_to(out.resolve())
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "<img src=x" not in html and "<b>x<" not in html
    assert "&lt;b&gt;x&lt;" in html  # the class name is shown, escaped


HOSTILE_LABELS = ["../../etc/passwd", "<script>alert(1)</script>", "..\\..\\boot.ini"]


def test_hostile_labels_in_model_metadata_are_data_never_paths(tmp_path):
    data = tmp_path / "data"
    (data / "imgs").mkdir(parents=True)
    rows = []
    for i, label in enumerate(HOSTILE_LABELS):
        for j in range(2):
            Image.new("RGB", (8, 8), (200 * (i == 0), 200 * (i == 1), 200 * (i == 2) + 20 * j)).save(
                data / "imgs" / f"{i}{j}.png")
            rows.append((f"imgs/{i}{j}.png", label))
    manifest = bi.write_manifest(tmp_path / "manifest.csv", ("path", "label"), rows)
    model = probe_model(tmp_path / "m.onnx", labels=HOSTILE_LABELS)
    out = tmp_path / "a" / "b" / "out"
    before = snapshot(tmp_path)
    r = run_cli(data, "-m", model, "-o", out, "--manifest", manifest, "--threads", "1",
                "--batch-size", "16", "--patch", "4", "--stride", "4", "--test-budget", "4")
    assert r.exit_code in (0, 1) and "Traceback" not in r.output, r.output
    after = snapshot(tmp_path, skip=out)
    assert after == {**before, os.fsencode("a").hex(): ("dir",), os.fsencode("a/b").hex(): ("dir",)}
    audit = json.loads(audit_text(out))
    assert audit["model"]["labels"] == HOSTILE_LABELS
    assert sorted((im["path"], im["label"]) for im in audit["images"]) == sorted(rows)
    for p in out.rglob("*"):
        assert not p.is_symlink() and p.resolve().is_relative_to(out.resolve())
        assert not {"etc", "passwd", "boot.ini", ".."} & set(p.relative_to(out).parts)
    assert "<script>alert(1)</script>" not in (out / "report.html").read_text(encoding="utf-8")


def test_class_folder_with_a_trailing_space_is_audited(tmp_path):
    data = tmp_path / "data"
    for cls, colour in (("bowl", bi.RED), ("mug", bi.GREEN), ("vase ", bi.BLUE)):
        (data / cls).mkdir(parents=True)
        Image.new("RGB", (8, 8), colour).save(data / cls / "a.png")
    result = run_audit(data, probe_model(tmp_path / "m.onnx"), settings=FAST, model_config=CFG)
    assert result.skipped == [] and len(result.images) == 3


def _one_image_per_class(data: Path, classes=("bowl", "mug", "vase")) -> None:
    for cls, colour in zip(classes, (bi.RED, bi.GREEN, bi.BLUE)):
        (data / cls).mkdir(parents=True)
        Image.new("RGB", (8, 8), colour).save(data / cls / "a.png")


@pytest.mark.parametrize("cell", ["[/x]/a.png", "[bold]a.png"])
def test_rich_markup_in_an_error_message_is_printed_verbatim(tmp_path, cell):
    data = tmp_path / "data"
    _one_image_per_class(data)
    manifest = bi.write_manifest(tmp_path / "manifest.csv", ("path", "label"), [(cell, "mug")])
    r = run_cli(data, "-m", probe_model(tmp_path / "m.onnx"), "-o", tmp_path / "out",
                "--manifest", manifest, *FAST_ARGS)
    assert_one_line_error(r, "no usable images found", f"first: {cell}: file not found")


def test_rich_markup_in_a_label_is_printed_verbatim_in_the_summary(tmp_path):
    labels = ["[/x]", "[red]mug", "vase"]
    data = tmp_path / "data"
    (data / "i").mkdir(parents=True)
    for i in range(3):
        Image.new("RGB", (4, 4), (90 * i, 40, 40)).save(data / "i" / f"{i}.png")
    manifest = bi.write_manifest(tmp_path / "manifest.csv", ("path", "label"),
                                 [(f"i/{i}.png", label) for i, label in enumerate(labels)])
    r = run_cli(data, "-m", probe_model(tmp_path / "m.onnx", labels=labels), "-o", tmp_path / "out",
                "--manifest", manifest, *FAST_ARGS)
    assert (tmp_path / "out" / "audit.json").exists()
    assert r.exit_code == 0 and "Traceback" not in r.output, repr(r.exception)
    assert "[/x]" in r.output and "[red]mug" in r.output


def test_error_naming_a_file_with_a_newline_stays_one_line(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    bi.make_tiny(data, "a\nb.png")  # directly in the root, so the only entry is a Skip
    r = run_cli(data, "-m", probe_model(tmp_path / "m.onnx"), "-o", tmp_path / "out", *FAST_ARGS)
    assert_one_line_error(r, "no usable images found", "is not inside a class folder")


def test_two_files_whose_shown_names_collide_are_not_merged(tmp_path):
    data = tmp_path / "data"
    _one_image_per_class(data)
    if bi.make_non_utf8_name(data / "mug") is None:
        pytest.skip("the file system refuses non-UTF-8 names")
    bi.make_tiny(data / "mug", bi.NON_UTF8_SHOWN, color=bi.BLUE)  # the name shown for the other one
    result = run_audit(data, probe_model(tmp_path / "m.onnx"), settings=FAST, model_config=CFG)
    paths = [im.path for im in result.images]
    assert len(paths) == len(set(paths))
    assert len(result.images) + len(result.skipped) == 5


def test_output_folder_inside_the_dataset_resumes_to_the_same_audit(tmp_path):
    data = tmp_path / "data"
    _one_image_per_class(data)
    model = probe_model(tmp_path / "m.onnx")
    r = run_cli(data, "-m", model, "-o", data / "audit", *FAST_ARGS)
    assert r.exit_code == 0, r.output
    first = audit_text(data / "audit")
    r = run_cli(data, "-m", model, "-o", data / "audit", *FAST_ARGS)
    assert r.exit_code == 0, r.output
    assert without_run(audit_text(data / "audit")) == without_run(first)


# ------------------------------------------------------------------ determinism


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("determinism")
    return tmp, make_dataset(tmp / "data", n=4), corner_model(tmp / "m.onnx")


PLANS = {
    "grid": (GridPlan(patch=0.125, stride=0.125), Fill(kind="mean")),
    "random": (RandomPatchPlan(count=48, min_size=0.1, max_size=0.3), Fill(kind="noise")),
    "rise": (SmoothMaskPlan(count=64, cells=4), Fill(kind="blur")),
}


@pytest.mark.parametrize("plan", sorted(PLANS))
def test_same_inputs_and_seed_give_byte_identical_audits_across_runs_and_threads(planted, plan):
    tmp, data, model = planted
    the_plan, fill = PLANS[plan]
    settings = ScanSettings(plan=the_plan, fill=fill, seed=3, test_budget=8)
    texts = []
    for run, threads in enumerate((1, 1, 2)):
        out = tmp / f"{plan}-{run}"
        run_audit(data, model, out=out, settings=settings,
             model_config=ModelConfig(threads=threads, batch_size=32))
        texts.append(without_run(audit_text(out)))
    assert texts[0] == texts[1] == texts[2]
    audit = json.loads(audit_text(tmp / f"{plan}-0"))
    assert audit["settings"]["seed"] == 3 and len(audit["images"]) == 12
    if plan != "grid":  # the seed matters: another seed gives other numbers
        out = tmp / f"{plan}-seed4"
        run_audit(data, model, out=out, settings=ScanSettings(plan=the_plan, fill=fill, seed=4, test_budget=8),
             model_config=ModelConfig(threads=1, batch_size=32))
        other = json.loads(audit_text(out))
        concentration = [im["concentration"] for im in audit["images"]]
        assert [im["concentration"] for im in other["images"]] != concentration


# ------------------------------------------------------------------------- soak


def _soak_tree(root: Path) -> tuple[set[str], set[str]]:
    rng = np.random.default_rng(11)
    classes = ("bowl", "mug", "vase")
    for cls in classes:
        (root / cls).mkdir(parents=True)
    good, bad = set(), set()
    for i in range(200):
        cls, ext = classes[i % 3], (".png", ".jpg")[i % 2]
        bi.noise_image(rng, 10 + i % 5, 8 + i % 3).save(root / cls / f"g{i:03d}{ext}")
        good.add(f"{cls}/g{i:03d}{ext}")
    makers = (bi.make_zero_byte, bi.make_truncated_png, bi.make_truncated_jpeg, bi.make_text_as_png,
              bi.make_png_bomb)
    for i in range(40):
        cls, make = classes[i % 3], makers[i % len(makers)]
        ext = ".jpg" if make is bi.make_truncated_jpeg else ".png"
        make(root / cls, f"b{i:03d}{ext}")
        bad.add(f"{cls}/b{i:03d}{ext}")
    return good, bad


def test_soak_240_mixed_images_with_interruptions_loses_and_duplicates_nothing(tmp_path):
    data = tmp_path / "data"
    good, bad = _soak_tree(data)
    model = probe_model(tmp_path / "m.onnx")
    run_audit(data, model, out=tmp_path / "ref", settings=FAST, model_config=CFG)
    ref = without_run(audit_text(tmp_path / "ref"))
    out = tmp_path / "out"
    for n in (40, 100, 160):  # three Ctrl-Cs, each run resuming the last
        with pytest.raises(KeyboardInterrupt):
            run_audit(data, model, out=out, settings=FAST, model_config=CFG, progress=StopAfter(n))
        assert len(store_entries(out)) == n
    script = KILL_SCRIPT.format(tests=str(TESTS), data=str(data), model=str(model), out=str(out),
                                kill_at=0, kill_name="")
    proc = subprocess.Popen([sys.executable, "-c", script], cwd=REPO, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, env=dict(os.environ, OMP_NUM_THREADS="1"))
    _wait_for_entries(out, proc, 170)
    proc.send_signal(signal.SIGKILL)  # one kill from outside, wherever the scan is
    proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    assert 170 <= len(store_entries(out)) < 240
    final = run_audit(data, model, out=out, settings=FAST, model_config=CFG)
    audit = json.loads(audit_text(out))
    images = [im["path"] for im in audit["images"]]
    skipped = [s["path"] for s in audit["skipped"]]
    assert len(images) == len(set(images)) and set(images) == good
    assert len(skipped) == len(set(skipped)) and set(skipped) == bad
    assert final.run["resumed_images"] >= 170
    assert without_run(audit_text(out)) == ref
