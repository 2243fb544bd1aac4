"""Tests of store.py: the JSON converter, atomic writes, the per-image store and the one
audit.json reader. Reference values are worked by hand."""

import json
import math

import numpy as np
import pytest

from shortcut_audit.errors import DataError, UsageError
from shortcut_audit.store import ResultStore, read_audit, to_jsonable, write_json


def test_to_jsonable_worked_example():
    value = {"a": np.float32(0.1), "b": [np.int64(3), math.nan, np.inf], "c": np.array([True, False]),
             1: (1.23456789012, None)}
    # float32(0.1) is 0.100000001490116..., kept to 8 significant digits: 0.1
    assert to_jsonable(value) == {"a": 0.1, "b": [3, None, None], "c": [True, False],
                                  "1": [1.2345679, None]}


def test_write_json_is_atomic_and_leaves_no_temporary(tmp_path):
    write_json(tmp_path / "x.json", {"v": np.float64(2.5)})
    assert json.loads((tmp_path / "x.json").read_text()) == {"v": 2.5}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["x.json"]


def test_result_store_round_trip_and_a_new_fingerprint_clears_it(tmp_path):
    store = ResultStore(tmp_path / "r", {"model": "a"})
    store.put("mug/1.png", {"score": 0.5, "source": [1, 2]}, {"heatmap": np.eye(2, dtype=np.float32)})
    assert store.has("mug/1.png") and store.has("mug/1.png", [1, 2]) and not store.has("mug/1.png", [1, 3])
    record, arrays = store.get("mug/1.png")
    assert record["score"] == 0.5 and record["path"] == "mug/1.png"
    np.testing.assert_array_equal(arrays["heatmap"], np.eye(2, dtype=np.float32))
    assert ResultStore(tmp_path / "r", {"model": "a"}).count() == 1     # same fingerprint: kept
    again = ResultStore(tmp_path / "r", {"model": "b"})                  # changed: cleared
    assert again.reset and again.count() == 0 and again.get("mug/1.png") is None


def test_read_audit_says_what_is_wrong(tmp_path):
    with pytest.raises(UsageError, match="is not a folder; pass the --out folder of an audit"):
        read_audit(tmp_path / "missing")
    with pytest.raises(UsageError, match=r"^--before-audit '.*' has no audit.json"):
        read_audit(tmp_path, option="--before-audit")
    (tmp_path / "audit.json").write_text("{not json")
    with pytest.raises(DataError, match="cannot be read as JSON"):
        read_audit(tmp_path)
    (tmp_path / "audit.json").write_text(json.dumps({"classes": []}))
    with pytest.raises(DataError, match="is not an audit"):
        read_audit(tmp_path)
    (tmp_path / "audit.json").write_text(json.dumps({"schema": 9, "classes": [], "findings": [], "images": []}))
    assert read_audit(tmp_path)["schema"] == 9
    with pytest.raises(DataError, match=r"^--after-audit: .* not an audit.json of schema 1"):
        read_audit(tmp_path, option="--after-audit", schema=1)
