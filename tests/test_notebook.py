"""Results show themselves in Jupyter (``_repr_html_``), checked without a kernel.

The HTML is parsed with the standard library's html.parser: the class names, hostile
ones included, come back as text (never as tags), the verdict table has one row per
class with its figures, every image is a PNG that Pillow decodes, and the link points
at the written report.
"""

from __future__ import annotations

import base64
import io
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import pytest
from PIL import Image

import shortcut_audit as sa
from scan_fixtures import corner_model, make_dataset

HOSTILE = ('<script>alert("a")', 'b" onmouseover="x', "gamma & <i>delta")   # no '/': folder names


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.images: list[str] = []
        self.links: list[str] = []
        self.rows: list[list[str]] = []
        self.cell: list[str] | None = None
        self.attrs_seen: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs_seen += [k for k, _ in attrs]
        a = dict(attrs)
        if tag == "img":
            self.images.append(a["src"])
        if tag == "a":
            self.links.append(a["href"])
        if tag == "tr":
            self.rows.append([])
        if tag in ("td", "th"):
            self.cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self.cell is not None:
            self.rows[-1].append("".join(self.cell))
            self.cell = None

    def handle_data(self, data):
        if self.cell is not None:
            self.cell.append(data)


def _parse(text: str) -> _Page:
    p = _Page()
    p.feed(text)
    return p


def _png_sizes(page: _Page) -> list[tuple[int, int]]:
    sizes = []
    for src in page.images:
        assert src.startswith("data:image/png;base64,")
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as im:
            assert im.format == "PNG"
            sizes.append(im.size)
    return sizes


@pytest.fixture(scope="module")
def audited(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("nb")
    data = make_dataset(tmp / "data", n=6)
    for old, new in zip(("alpha", "beta", "gamma"), HOSTILE):
        (data / old).rename(data / new)
    model = corner_model(tmp / "m.onnx")
    config = sa.ModelConfig(labels=HOSTILE)
    run = sa.audit
    result = run(data, model, out=tmp / "out", model_config=config, settings=sa.ScanSettings(confirm=False))
    sa.write_scan_report(result, tmp / "out")
    return tmp, data, model, config, result


def test_audit_shows_its_verdict_table_means_and_link(audited, monkeypatch):
    tmp, _, _, _, result = audited
    monkeypatch.chdir(tmp)
    page = _parse(result._repr_html_())
    assert "script" not in page.tags and "i" not in page.tags and "onmouseover" not in page.attrs_seen
    header = page.rows[0]
    assert header == ["class", "images", "accuracy", "mean confidence", "findings"]
    body = {r[0]: r for r in page.rows[1:1 + len(HOSTILE)]}
    assert sorted(body) == sorted(HOSTILE)                      # names back as plain text
    for c in result.classes:
        assert body[c.name][1] == str(c.images) == "6"
        assert body[c.name][2] == f"{100 * c.accuracy:.0f}%"
    assert "fixed-position" in body[HOSTILE[0]][4]              # the planted corner on "alpha"
    assert body[HOSTILE[1]][4] == "–"
    sizes = _png_sizes(page)
    assert len(sizes) == 3 and all(max(s) >= 32 for s in sizes)    # one class mean each
    assert page.links == ["out/report.html"]


def test_compare_and_heatmap_show_themselves(audited, monkeypatch):
    tmp, data, model, config, result = audited
    monkeypatch.chdir(tmp)
    cmp = sa.compare(before_audit=tmp / "out", after_audit=tmp / "out", out=tmp / "cmp", resamples=100)
    assert _parse(cmp._repr_html_()).links == []        # compare writes no page itself
    sa.write_compare_page(cmp, tmp / "cmp")
    page = _parse(cmp._repr_html_())
    assert "script" not in page.tags
    verdicts = [r for r in page.rows if len(r) == 5 and r[0] != "class"]
    assert [(r[0], r[1], r[4]) for r in verdicts] == [(HOSTILE[0], "fixed-position", "persists")]
    assert sorted(r[0] for r in page.rows if len(r) == 2 and r[0] != "class") == sorted(HOSTILE)
    assert page.links == ["cmp/compare.html"]

    image = next((data / HOSTILE[0]).glob("*.png"))
    hm = sa.run_heatmap(image, model, out=tmp / "hm", model_config=config)
    assert isinstance(hm, dict) and hm["target"] == HOSTILE[0]
    assert not (tmp / "hm" / "overlay.png").exists()          # drawn by report/, not by run_heatmap
    page = _parse(hm._repr_html_())                            # drawn from the values in memory
    assert "script" not in page.tags
    assert len(_png_sizes(page)) == 1
    written = sa.write_heatmap_files(hm)
    assert written == tmp / "hm" / "overlay.png"
    assert _png_sizes(_parse(hm._repr_html_())) == _png_sizes(page)
    assert [HOSTILE[0]] in [r[1:] for r in page.rows if r and r[0] == "target"]


def test_importing_the_package_imports_no_plotting_or_front_end():
    # report/ (matplotlib, jinja2) and pack.py load on first use of their names.
    code = ("import sys, shortcut_audit\n"
            "print(sorted(m for m in ('matplotlib', 'jinja2', 'typer', 'rich', 'shortcut_audit.report',"
            " 'shortcut_audit.pack') if m in sys.modules))\n"
            "from shortcut_audit import write_scan_report\n"
            "print(write_scan_report.__module__, 'matplotlib' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=Path(__file__).resolve().parents[1])
    assert out.stdout.splitlines() == ["[]", "shortcut_audit.report.scan_page True"]


def test_importing_the_package_does_not_import_the_notebook_module():
    code = ("import sys, shortcut_audit; "
            "print('shortcut_audit.report.notebook' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=Path(__file__).resolve().parents[1])
    assert out.stdout.strip() == "False"
