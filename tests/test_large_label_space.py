"""A 1,000-output model audited on a dataset with 3 of its classes.

The model is scan_fixtures.corner_model's three linear rows placed at outputs 10, 500
and 990 of 1,000, plus an outsider output 7 ("delta") that reads the green channel:
so every prediction is known. The dataset has the three classes (folders named like
their labels, one with another spelling) and two pure green photos in "beta" that
the model calls "delta", a class outside the dataset: they count as wrong.
"""

from __future__ import annotations

import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
from PIL import Image

import shortcut_audit as sa
from onnx_builders import linear_model, save
from scan_fixtures import SIZE, corner_model, make_dataset

N_OUT = 1000
ROWS = {"alpha": 10, "beta": 500, "gamma ray": 990}
DELTA = 7
SETTINGS = sa.ScanSettings(test_budget=16)


def _labels() -> list[str]:
    names = [f"n{i:04d}" for i in range(N_OUT)]
    for name, i in ROWS.items():
        names[i] = name
    names[DELTA] = "delta"
    return names


def _model(tmp_path: Path) -> Path:
    import onnx
    small = onnx.load(corner_model(tmp_path / "small.onnx"))
    inits = {t.name: onnx.numpy_helper.to_array(t) for t in small.graph.initializer}
    w3 = next(v for v in inits.values() if v.ndim == 2)
    b3 = next(v for v in inits.values() if v.ndim == 1)
    w3 = w3 if w3.shape[0] == 3 else w3.T
    d = SIZE * SIZE
    w = np.zeros((N_OUT, 3 * d), np.float32)
    b = np.full(N_OUT, -10.0, np.float32)    # the 996 unused outputs stay far below
    for k, i in enumerate(ROWS.values()):
        w[i], b[i] = w3[k], b3[k]
    w[DELTA, d:2 * d] = 30.0 / d                # mean green * 30 - 25: only green photos
    b[DELTA] = -25.0
    return save(linear_model(w, b, height=SIZE, width=SIZE), tmp_path / "big.onnx")


def _dataset(root: Path) -> Path:
    make_dataset(root, n=8)
    (root / "gamma").rename(root / "Gamma_Ray")           # a folder spelled like a file name
    for i in range(2):
        Image.fromarray(np.full((48, 48, 3), (0, 255, 0), np.uint8)).save(root / "beta" / f"green_{i}.png")
    return root


class _Rows(HTMLParser):
    """Rows of the report's "Verdict per class" table."""

    def __init__(self):
        super().__init__()
        self.in_table = self.seen_heading = False
        self.rows: list[list[str]] = []
        self.cell: list[str] | None = None
        self.h4 = False

    def handle_starttag(self, tag, attrs):
        if tag == "h4":
            self.h4 = True
        if tag == "tbody" and self.seen_heading:
            self.in_table = True
        if self.in_table and tag == "tr":
            self.rows.append([])
        if self.in_table and tag == "td":
            self.cell = []

    def handle_endtag(self, tag):
        if tag == "h4":
            self.h4 = False
        if tag == "td" and self.cell is not None:
            self.rows[-1].append(" ".join("".join(self.cell).split()))
            self.cell = None
        if tag == "tbody" and self.in_table:
            self.in_table = self.seen_heading = False

    def handle_data(self, data):
        if self.h4 and "Verdict per class" in data:
            self.seen_heading = True
        if self.cell is not None:
            self.cell.append(data)


def test_three_of_a_thousand_classes(tmp_path):
    labels_file = tmp_path / "labels.txt"
    labels_file.write_text("\n".join(_labels()) + "\n")
    model = _model(tmp_path)
    data = _dataset(tmp_path / "data")
    config = sa.ModelConfig(labels=tuple(sa.model.read_labels(labels_file)))
    run = sa.audit
    result = run(data, model, out=tmp_path / "out", model_config=config, settings=SETTINGS)
    sa.write_scan_report(result, tmp_path / "out")

    # Per audited class only, in output order; the folder "Gamma_Ray" is "gamma ray".
    got = {c.name: (c.images, c.correct, c.accuracy) for c in result.classes}
    assert got == {"alpha": (8, 8, 1.0), "beta": (10, 8, 0.8), "gamma ray": (8, 8, 1.0)}
    assert [c.index for c in result.classes] == [10, 500, 990]
    assert not result.skipped
    # The green photos are predicted "delta", outside the dataset: wrong for beta.
    audit = json.loads((tmp_path / "out" / "audit.json").read_text())
    green = [im for im in audit["images"] if "green" in im["path"]]
    assert [(im["label"], im["predicted"]) for im in green] == [("beta", "delta")] * 2
    # The planted corner is found on alpha, the one class that has it (as with 3 outputs).
    assert [(f.class_name, f.kind) for f in result.findings] == [("alpha", "fixed-position")]
    # Its transplant test pastes the corner onto the other audited classes' photos: the
    # model then reads "alpha", so it is confirmed whatever the 997 other outputs.
    assert result.findings[0].status == "confirmed"

    # The report: the verdict table has the three classes, with their figures.
    page = (tmp_path / "out" / "report.html").read_text()
    parser = _Rows()
    parser.feed(page)
    rows = {r[0]: r[1:3] for r in parser.rows}
    assert sorted(rows) == ["alpha", "beta", "gamma ray"], parser.rows
    assert rows["beta"][0] == "10" and rows["beta"][1].startswith("80")
    assert "n0999" not in page                 # the 1,000 names are not spelled out

    # compare: the same model twice, per audited class only.
    cmp = sa.compare(before_audit=tmp_path / "out", after_audit=tmp_path / "out", out=tmp_path / "cmp",
                     resamples=200)
    sa.write_compare_page(cmp, tmp_path / "cmp")
    assert sorted(c.name for c in cmp.classes) == ["alpha", "beta", "gamma ray"]
    assert (tmp_path / "cmp" / "compare.html").exists()
