"""The README's "Auditing a pretrained model" runs as written.

The PyTorch export block, the model.toml block and the two commands are read from the
README and run on a tiny torch network (skipped with the reason without torch); the
scikit-learn block runs on a logistic regression (skl2onnx is in the test extra). The
exported models' scores are checked against the frameworks' own (torch's forward pass,
scikit-learn's predict_proba), through the tool's preprocessing.
"""

from __future__ import annotations

import json
import os
import shlex
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

import shortcut_audit as sa
from shortcut_audit.cli import app

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _block(name: str) -> str:
    """The fenced code between ``<!-- name -->`` and ``<!-- /name -->``."""
    part = README.split(f"<!-- {name} -->")[1].split(f"<!-- /{name} -->")[0]
    return part.split("```", 2)[1].split("\n", 1)[1]


@pytest.fixture
def in_tmp(tmp_path):
    old = Path.cwd()
    os.chdir(tmp_path)
    try:
        yield tmp_path
    finally:
        os.chdir(old)


def _command(line: str) -> list[str]:
    args = shlex.split(line)
    assert args[0] == "shortcut-audit"
    return args[1:]


@pytest.mark.filterwarnings("ignore::DeprecationWarning")   # torch: the TorchScript exporter
def test_pytorch_export_as_the_readme_shows(in_tmp):
    torch = pytest.importorskip("torch", reason="torch is not installed (the train extra)")
    torch.manual_seed(0)
    torch.set_num_threads(1)
    # A tiny stand-in for a fine-tuned network: 10 outputs, of which 3 are audited.
    model = torch.nn.Sequential(
        torch.nn.Conv2d(3, 4, kernel_size=8, stride=8), torch.nn.ReLU(),
        torch.nn.AdaptiveAvgPool2d(1), torch.nn.Flatten(), torch.nn.Linear(4, 10))
    exec(_block("export-torch"), {"model": model})             # writes model.onnx
    assert Path("model.onnx").exists()

    Path("model.toml").write_text(_block("model-toml"))
    names = [f"kind {i}" for i in range(10)]
    Path("labels.txt").write_text("\n".join(names) + "\n")
    rng = np.random.default_rng(0)
    for folder in ("kind_1", "kind 4", "Kind-7"):                   # loose spellings of 3 labels
        (in_tmp / "photos" / folder).mkdir(parents=True)
        for i in range(2):
            Image.fromarray(rng.integers(0, 256, (96, 128, 3), dtype=np.uint8)).save(
                in_tmp / "photos" / folder / f"{i}.jpg")

    # The exported scores equal torch's own on the tool's preprocessed pixels.
    cfg = sa.read_model_config("model.toml")
    clf = sa.OnnxClassifier("model.onnx", cfg)
    pixels = rng.uniform(0, 255, (2, 224, 224, 3)).astype(np.float32)
    x = (pixels / 255 - np.array(cfg.mean, np.float32)) / np.array(cfg.std, np.float32)
    with torch.no_grad():
        want = model(torch.from_numpy(x.transpose(0, 3, 1, 2).copy())).numpy()
    np.testing.assert_allclose(clf.logits(pixels), want, rtol=1e-4, atol=1e-4)

    runner = CliRunner()
    lines = [ln for ln in _block("pretrained-commands").splitlines() if ln.strip()]
    inspect = runner.invoke(app, _command(lines[0]))
    assert inspect.exit_code == 0, inspect.output
    assert "10 classes" in inspect.output
    scan = runner.invoke(app, _command(lines[1]))
    assert scan.exit_code in (0, 1), scan.output
    audit = json.loads((in_tmp / "audit" / "audit.json").read_text())
    assert [c["name"] for c in audit["classes"]] == ["kind 1", "kind 4", "kind 7"]
    assert all(c["images"] == 2 for c in audit["classes"])
    assert len(audit["model"]["labels"]) == 10 and (in_tmp / "audit" / "report.html").exists()


def test_sklearn_export_as_the_readme_shows(in_tmp):
    pytest.importorskip("skl2onnx", reason="skl2onnx is not installed (the test extra)")
    from sklearn.linear_model import LogisticRegression

    rng = np.random.default_rng(1)
    n = 60
    y = rng.integers(0, 3, n)
    images = rng.uniform(0, 255, (n, 32, 32, 3))
    images[y == 1, :16] += 60            # class 1 brighter on top, class 2 on the left
    images[y == 2, :, :16] += 60
    images = np.clip(images, 0, 255).astype(np.float32)
    clf = LogisticRegression(max_iter=500).fit(images.reshape(n, -1) / 255, y)
    exec(_block("export-sklearn"), {"clf": clf})
    tool = sa.OnnxClassifier("model.onnx", sa.ModelConfig(layout="nhwc", size=(32, 32),
                                                          labels=("a", "b", "c")))
    # The tool's probabilities equal scikit-learn's predict_proba on the same pixels.
    got = tool.predict(images[:8])
    want = clf.predict_proba(images[:8].reshape(8, -1) / 255)
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-5)
