"""Tests of confirm.py through whole scans: motifs found and findings confirmed or cleared."""

import numpy as np
import pytest
from PIL import Image
from skimage.feature import match_template

from onnx_builders import save
from scan_fixtures import corner_model, make_dataset
from test_motifs import MARK, mark_images, mark_model
from shortcut_audit.dataset import load_image
from shortcut_audit.occlusion import GridPlan
from shortcut_audit.scan import ScanSettings, audit as run_audit


def _write(root, images, labels, names=("marked", "reddish", "bluish")):
    counts = {}
    for img, lab in zip(images, labels):
        name = names[lab]
        (root / name).mkdir(parents=True, exist_ok=True)
        i = counts.get(name, 0)
        counts[name] = i + 1
        Image.fromarray(np.clip(img, 0, 255).astype(np.uint8)).save(root / name / f"{name}_{i:02d}.png")
    return root


def test_a_roaming_mark_is_found_as_a_motif_and_confirmed(tmp_path):
    images, labels, _ = mark_images(3, n_marked=14, n_other=16)
    data = _write(tmp_path / "data", images, labels)
    model = save(mark_model(), tmp_path / "mark.onnx", metadata={"labels": ["marked", "reddish", "bluish"]})
    result = run_audit(data, model, out=tmp_path / "out",
                  settings=ScanSettings(plan=GridPlan(patch=4, stride=2), test_budget=30))
    motifs = [f for f in result.findings if f.kind == "recurring-motif"]
    assert [f.class_name for f in motifs] == ["marked"]
    f = motifs[0]
    assert f.evidence["value"] >= 0.5            # most marked images in one cluster
    assert f.evidence["spread"] > 0.1            # wherever the mark sits
    assert f.status == "confirmed"
    assert f.evidence["test"]["p_value"] < 0.01
    # the medoid crop is the planted mark (normalised cross-correlation, skimage)
    medoid = load_image(data / f.evidence["medoid"], size=(32, 32))
    x0, y0, x1, y1 = f.evidence["medoid_box"]
    crop = medoid[int(y0 * 32):int(np.ceil(y1 * 32)), int(x0 * 32):int(np.ceil(x1 * 32))].mean(axis=2)
    assert match_template(crop, MARK * 255.0).max() > 0.8
    assert all(g.class_name == "marked" for g in result.findings)


def test_planted_corner_is_confirmed_by_transplant_and_removal(tmp_path):
    data = make_dataset(tmp_path / "data", n=10)
    result = run_audit(data, corner_model(tmp_path / "m.onnx"))
    (f,) = result.findings
    assert f.kind == "fixed-position" and f.status == "confirmed"
    test = f.evidence["test"]
    assert test["rate"] - test["control_rate"] >= 0.2 and test["p_value"] < 0.01
    assert test["removal"]["accuracy_after"] < test["removal"]["accuracy_before"]
