"""The benchmark (bench/run.py) in its quick form: every figure is produced and each
derived number follows from the measured ones. No speed is asserted."""

import json
import math
import statistics
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def quick(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("bench")
    out_md = tmp / "RESULTS.md"
    out_md.write_text("# Benchmark\n\nHand-written text that must survive.\n\n<!-- bench:begin -->\nold\n"
                      "<!-- bench:end -->\n\nMore text.\n", encoding="utf-8")
    proc = subprocess.run([sys.executable, str(ROOT / "bench" / "run.py"), "--quick", "--json", str(tmp / "r.json"),
                           "--out", str(out_md)], capture_output=True, text=True, cwd=str(ROOT), timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return json.loads((tmp / "r.json").read_text()), out_md.read_text(), proc.stdout


def number(x):
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def test_machine_is_described(quick):
    res, _md, _out = quick
    m = res["machine"]
    assert m["nproc"] >= 1 and m["cpu"] and m["onnxruntime"]
    assert len(m["load_average_before"]) == 3 and len(m["load_average_after"]) == 3


def test_throughput_figures_and_their_ratios(quick):
    res, _md, _out = quick
    for name in ("small", "large"):
        rows = res["throughput"][name]
        for t in (1, 2):
            r = rows[f"threads_{t}"]
            for key in ("raw", "predict", "heatmap", "scan"):
                assert number(r[key]) and r[key] > 0, (name, t, key)
            # each ratio is the median over repeats of that repeat's figure over its raw rate
            for key in ("predict", "heatmap", "scan"):
                expected = statistics.median(run[key] / run["raw"] for run in r["runs"])
                assert math.isclose(r[f"ratio_{key}"], expected, rel_tol=1e-9)
            assert r["batch_size"] >= 1 and r["scan_passes"] > 0
        one, two = rows["threads_1"]["runs"], rows["threads_2"]["runs"]
        expected = statistics.median(b["scan"] / a["scan"] for a, b in zip(one, two))
        assert math.isclose(rows["scaling_2_over_1"]["scan"], expected, rel_tol=1e-9)
        assert set(rows["scaling_2_over_1"]) == {"raw", "heatmap", "scan"}


def test_batch_size_figures(quick):
    res, _md, _out = quick
    for name in ("small", "large"):
        for t in (1, 2):
            r = res["batch_size"][name][f"threads_{t}"]
            assert set(r["raw"]) == set(r["engine"]) == {"1", "8", "16", "32", "64"}
            assert r["best_engine"] == int(max(r["engine"], key=r["engine"].get))
            assert r["best_raw"] == int(max(r["raw"], key=r["raw"].get))
            assert 0 < r["chosen_engine_share"] <= 1.0
            # the throughput figures run at the engine's best size
            assert res["throughput"][name][f"threads_{t}"]["batch_size"] == r["best_engine"]


def test_memory_figures(quick):
    res, _md, _out = quick
    for mode in ("store", "store_no_report", "in_memory"):
        rows = res["memory"][mode]
        small, large = sorted((k for k in rows if k.isdigit()), key=int)
        assert rows[small]["images"] == int(small) and rows[large]["images"] == int(large)
        assert math.isclose(rows["ratio"], rows[large]["vmhwm_kb"] / rows[small]["vmhwm_kb"], rel_tol=1e-9)
        assert rows[small]["vmhwm_kb"] > 0


def test_adaptive_figures(quick):
    res, _md, _out = quick
    assert set(res["adaptive"]) == {"small/prob", "small/logit", "large/prob"}
    for r in res["adaptive"].values():
        assert r["exhaustive_passes"] == 226            # the scan's default grid, 15 x 15 + 1
        assert 0 < r["pass_share"] <= 0.25
        assert -1.0 <= r["spearman_median"] <= 1.0
        for key in ("spearman_visible_median", "peak_iou_median", "decisive_iou_median",
                    "decisive_iou_share_at_least_0.8", "spearman_share_at_least_0.9"):
            assert number(r[key])                        # NaN where no image has a decisive box


def test_early_stopping_and_reuse_figures(quick):
    res, _md, _out = quick
    assert set(res["early_stopping"]) == {f"{p}/{t}" for p in ("rise", "random") for t in (0.1, 0.2, 0.3)}
    for r in res["early_stopping"].values():
        assert 0 < r["mask_share_median"] <= 1.0 and r["distance_max"] >= r["distance_median"] >= 0.0
    u = res["reuse"]
    assert u["images"] >= 1 and u["repeated_passes_per_image_mean"] >= 0


def test_results_block_is_replaced_and_the_rest_kept(quick):
    _res, md, out = quick
    assert "Hand-written text that must survive." in md and "More text." in md
    assert "\nold\n" not in md
    for heading in ("Throughput", "Scaling from 1 to 2", "Batch size: what", "Peak resident set",
                    "Adaptive plan", "Early stopping", "Reuse"):
        assert heading in md and heading in out
