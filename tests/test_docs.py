"""The README's promises that code can check: the thresholds table and the commands."""

import re
from pathlib import Path

from shortcut_audit.findings import THRESHOLD_TABLE

ROOT = Path(__file__).resolve().parents[1]


def test_readme_thresholds_table_matches_the_code():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    block = text.split("<!-- thresholds-table")[1].split("<!-- /thresholds-table -->")[0]
    rows = re.findall(r"^\| `(\w+)` \| ([0-9.]+) \| (.+?) \|$", block, flags=re.M)
    assert [(n, float(v), r) for n, v, r in rows] == [(n, float(v), r) for n, v, r in THRESHOLD_TABLE]


def test_ci_runs_the_readme_test_command():
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    command = 'pip install -e ".[test]" && python -m pytest -q'
    assert command in ci and command in readme


def test_threshold_defaults_equal_the_table():
    from shortcut_audit.findings import Thresholds
    defaults = Thresholds().to_dict()
    assert list(defaults) == [name for name, _, _ in THRESHOLD_TABLE]
    assert all(defaults[name] == value for name, value, _ in THRESHOLD_TABLE)
