"""The planted-shortcut suite (bench/planted) and its scoreboard (bench/truth.py).

No torch: the shipped ONNX files are checked against truth.json, the scene generator
against the digests recorded when the models were built, and the recorded effects are
measured again with onnxruntime on regenerated scenes.
"""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
PLANTED = ROOT / "bench" / "planted"
sys.path.insert(0, str(PLANTED))
sys.path.insert(0, str(ROOT / "bench"))

import effects  # noqa: E402
import scenes  # noqa: E402
import truth as board  # noqa: E402
from suite import MODELS, VARIANTS, spec_of  # noqa: E402
from shortcut_audit.findings import FINDING_KINDS  # noqa: E402

TRUTH = json.loads((PLANTED / "truth.json").read_text(encoding="utf-8"))["models"]
#: The held-out variants (bench/planted/variants): their files are checked like the
#: suite's; no floor is asserted on their scoreboard, so no rule is tuned to them.
VARIANTS_TRUTH = json.loads((PLANTED / "variants" / "truth.json").read_text(encoding="utf-8"))["models"]

#: Largest difference allowed between a recorded rate and the same rate measured again:
#: the scenes and the ONNX files are byte-identical, so only onnxruntime's float order
#: can differ between machines; 0.05 is 2 to 6 flipped images out of 40 to 280.
RATE_TOLERANCE = 0.05

#: Models whose effects are measured again here (a fixed mark, a roaming sticker, a sink).
REMEASURED = ("tag-kite", "sticker-beetle", "dots-moth-sink")


def test_every_model_of_the_suite_is_in_truth_with_its_kinds_covered():
    assert [m["name"] for m in MODELS] == list(TRUTH)
    planted = {p["planted"] for e in TRUTH.values() for p in e["planted"]}
    assert planted == set(scenes.SHORTCUT_KINDS)
    # every finding kind a planted shortcut counts by is one the audit can report
    assert {k for e in TRUTH.values() for p in e["planted"] for k in p["accepted"]} <= set(FINDING_KINDS)
    assert any(len(e["planted"]) >= 2 for e in TRUTH.values())
    assert any(e["sink"] for e in TRUTH.values())
    assert sum(1 for e in TRUTH.values() if not e["planted"]) >= 3
    assert len({e["architecture"] for e in TRUTH.values() if not e["planted"]}) >= 3


def test_every_variant_is_in_its_truth_and_none_shares_a_name_or_seed_with_the_suite():
    assert [m["name"] for m in VARIANTS] == list(VARIANTS_TRUTH)
    assert not {m["name"] for m in VARIANTS} & {m["name"] for m in MODELS}
    assert not {m["seed"] for m in VARIANTS} & {m["seed"] for m in MODELS}


ALL = [(n, TRUTH[n], PLANTED) for n in TRUTH] + [(n, VARIANTS_TRUTH[n], PLANTED / "variants") for n in VARIANTS_TRUTH]


@pytest.mark.parametrize("name,entry,folder", ALL, ids=[a[0] for a in ALL])
def test_regenerated_audit_set_matches_the_recorded_digest(name, entry, folder):
    spec = spec_of(name)
    items = [(rel, rgb, mask) for rel, rgb, mask, *_ in scenes.audit_items(spec)]
    assert len(items) == entry["audit_set"]["count"] == len(spec["labels"]) * spec["audit_per_class"]
    assert scenes.set_digest(items) == entry["audit_set"]["sha256"]


def test_a_shortcut_changes_only_its_own_pixels():
    spec = spec_of("tag-kite")
    tag = spec["shortcuts"][0]
    plain, mask = scenes.render("leaf", 123, 64, [])
    marked, mask2 = scenes.render("leaf", 123, 64, [tag])
    assert np.array_equal(mask, mask2)
    changed = np.argwhere(np.any(plain != marked, axis=2))
    assert len(changed) > 0
    x0, y0, x1, y1 = (v * 64 for v in tag["box"])
    # the 2 x 2 averaging spreads the drawn box by at most one output pixel
    assert changed[:, 1].min() >= np.floor(x0) and changed[:, 1].max() <= np.ceil(x1)
    assert changed[:, 0].min() >= np.floor(y0) and changed[:, 0].max() <= np.ceil(y1)


def test_written_pngs_hold_the_rendered_pixels(tmp_path):
    from PIL import Image
    spec = spec_of("clean-3")
    out = scenes.write_set(spec, tmp_path, per_class=2)
    assert out["count"] == 6
    rel, rgb, mask, *_ = next(scenes.audit_items(spec, per_class=2))
    assert np.array_equal(np.asarray(Image.open(out["images"] / rel)), rgb)
    assert np.array_equal(np.asarray(Image.open(out["masks"] / rel)) > 127, mask)


@pytest.mark.parametrize("name,entry,folder", ALL, ids=[a[0] for a in ALL])
def test_shipped_onnx_matches_truth(name, entry, folder):
    import onnx
    data = (folder / entry["onnx"]).read_bytes()
    assert hashlib.sha256(data).hexdigest() == entry["sha256"]
    proto = onnx.load_model_from_string(data)
    meta = json.loads({p.key: p.value for p in proto.metadata_props}["shortcut_audit"])
    assert meta["labels"] == entry["labels"]
    assert meta["layout"] == entry["layout"] and meta["output"] == entry["output"]
    assert meta["size"] == f"{entry['input_size']}x{entry['input_size']}"


def test_all_onnx_files_together_stay_small():
    total = sum((folder / e["onnx"]).stat().st_size for _, e, folder in ALL)
    assert total <= 6 * 1024 * 1024


@pytest.mark.parametrize("name", REMEASURED)
def test_recorded_effects_measure_again_with_onnxruntime(name):
    entry = TRUTH[name]
    spec = spec_of(name)
    got = effects.measure(spec, effects.load_model(PLANTED / entry["onnx"]))
    assert abs(got["accuracy"]["rate"] - entry["accuracy"]) <= RATE_TOLERANCE
    for p in entry["planted"]:
        m = got["shortcuts"][p["name"]]
        assert abs(m["pull"]["rate"] - p["pull"]) <= RATE_TOLERANCE, (p["name"], m["pull"], p["pull"])
        assert abs(m["drop"] - p["drop"]) <= 2 * RATE_TOLERANCE
    if entry["sink"]:
        src = next(p for p in entry["planted"] if p["class"] == entry["sink"]["source_class"])
        absorbed = got["shortcuts"][src["name"]]["sink_absorbed"]["rate"]
        assert abs(absorbed - entry["sink"]["absorbed"]) <= RATE_TOLERANCE


def test_box_iou_by_hand():
    # two half-size squares offset by a quarter: overlap 1/16, union 2/4 - 1/16 = 7/16
    assert board.iou([0, 0, 0.5, 0.5], [0.25, 0.25, 0.75, 0.75]) == pytest.approx(1 / 7)
    assert board.iou([0, 0, 0.2, 0.2], [0.5, 0.5, 0.6, 0.6]) == 0.0
    assert board.iou(None, [0, 0, 1, 1]) is None


def test_scoring_of_handmade_findings():
    entry = {"planted": [{"name": "tag", "class": "a", "planted": "fixed-mark", "accepted": ["fixed-position"],
                          "box": [0.8, 0.8, 0.9, 0.9], "pull": 0.9},
                         {"name": "s", "class": "b", "planted": "sticker-object",
                          "accepted": ["recurring-motif", "localized"], "box": None, "pull": 0.3}],
             "classes": {"a": "planted", "b": "planted", "c": "clean", "d": "sink"}}
    findings = [
        {"class": "a", "kind": "fixed-position", "status": "confirmed", "region": [0.8, 0.8, 1.0, 1.0]},
        {"class": "b", "kind": "background", "status": "suspect", "region": None},
        {"class": "c", "kind": "background", "status": "not-confirmed", "region": None},
        {"class": "d", "kind": "localized", "status": "confirmed", "region": None},
    ]
    classes = [{"name": "a", "correct": 9}, {"name": "b", "correct": 4}, {"name": "c", "correct": 9},
               {"name": "d", "correct": 5}]
    s = board.score_findings(entry, findings, classes, min_correct=5)
    a, b = s["planted"]
    assert a["found"] and a["confirmed"] and a["box_iou"] == pytest.approx(0.01 / 0.04)
    assert not b["found"] and not b["confirmed"] and b["strength"] == "weak"
    assert s["false_confirmed"] == ["d:localized"]
    assert s["cleared"] == ["c:background"]
    assert s["other_kind"] == ["b:background:suspect"]
    assert s["not_judged"] == ["b"]


@pytest.mark.slow
def test_scoreboard_counts_what_the_audit_wrote(tmp_path):
    name = "tag-kite"
    entry = TRUTH[name]
    row = board.score_model(name, entry, tmp_path)
    assert row["set_matches"]
    audit = json.loads((tmp_path / "out" / "audit.json").read_text(encoding="utf-8"))
    found = audit["findings"]
    assert row["findings"] == len(found)
    kite = [f for f in found if f["class"] == "kite" and f["kind"] == "fixed-position"]
    (p,) = row["planted"]
    assert p["found"] == bool(kite)
    assert p["confirmed"] == any(f["status"] == "confirmed" for f in kite)
    if kite and kite[0]["region"]:
        r, b = kite[0]["region"], entry["planted"][0]["box"]
        inter = max(0, min(r[2], b[2]) - max(r[0], b[0])) * max(0, min(r[3], b[3]) - max(r[1], b[1]))
        union = (r[2] - r[0]) * (r[3] - r[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter
        assert p["box_iou"] == pytest.approx(inter / union)
    assert sorted(row["false_confirmed"]) == sorted(
        f"{f['class']}:{f['kind']}" for f in found if f["status"] == "confirmed" and f["class"] != "kite")
    assert len(row["cleared"]) == sum(1 for f in found if f["status"] == "not-confirmed")
    mc = audit["settings"]["thresholds"]["min_correct_images"]
    assert row["not_judged"] == [c["name"] for c in audit["classes"] if c["correct"] < mc]


#: Planted shortcuts the rules are known to miss, with why (README, "What it measures").
#: A fix that finds one makes this test fail until the entry goes: the list only shrinks.
KNOWN_MISSES: dict[tuple[str, str], str] = {}


@pytest.mark.slow
def test_scoreboard_floors(tmp_path):
    # Floors of the truth issue, on the shipped suite; the known misses are listed above.
    rows = {name: board.score_model(name, entry, tmp_path / name) for name, entry in TRUTH.items()}
    planted = [(name, p) for name, r in rows.items() for p in r["planted"]]
    hit = {(name, p["class"]): p["found"] and p["confirmed"] for name, p in planted}
    assert {key for key, ok in hit.items() if not ok} == set(KNOWN_MISSES)
    strong = [(n, p) for n, p in planted if p["pull"] >= 0.5 and (n, p["class"]) not in KNOWN_MISSES]
    weak = [(n, p) for n, p in planted if p["pull"] < 0.5]
    assert strong and all(hit[(n, p["class"])] for n, p in strong)                  # 100% of the rest
    assert sum(hit[(n, p["class"])] for n, p in weak) >= 0.8 * len(weak)              # >= 80% of weak
    assert {n: r["false_confirmed"] for n, r in rows.items() if r["false_confirmed"]} == {}
    fixed = [p for _, p in planted if p["planted"] == "fixed-mark"]
    assert fixed and all(p["box_iou"] is not None and p["box_iou"] >= 0.7 for p in fixed)


def test_on_object_share_of_tested_boxes(tmp_path):
    from PIL import Image
    mask = np.zeros((20, 20), np.uint8)
    mask[:, :10] = 255                      # the left half is the object
    (tmp_path / "a").mkdir()
    Image.fromarray(mask).save(tmp_path / "a" / "a_00.png")
    finding = {"evidence": {"test": {"examples": [
        {"box": [0.0, 0.0, 0.25, 0.5], "source_path": "a/a_00.png"},   # wholly on the object: 1
        {"box": [0.0, 0.0, 1.0, 1.0], "source_path": "a/a_00.png"},    # half on it: 0.5
        {"box": None, "source_path": "a/a_00.png"}]}}}                 # no box: left out
    assert board.on_object_share(finding, tmp_path) == pytest.approx(0.75)
    assert board.on_object_share({"evidence": {}}, tmp_path) is None
    # a motif is measured on its members' crops in their own images, not where they were pasted
    motif = {"kind": "recurring-motif", "evidence": {
        "member_boxes": [[0.5, 0.0, 1.0, 1.0], [0.25, 0.0, 0.75, 1.0]], "member_paths": ["a/a_00.png"] * 2,
        "test": {"examples": [{"box": [0.0, 0.0, 0.5, 1.0], "source_path": "a/a_00.png"}]}}}
    assert board.on_object_share(motif, tmp_path) == pytest.approx((0.0 + 0.5) / 2)
