"""Tests of adaptive.py (the coarse-to-fine occlusion plan) and of the early stopping of
random plans in sensitivity.heatmap_job, both of which trade passes for accuracy.

References: the exhaustive sliding grid's heatmap (occlusion_heatmap with GridPlan, itself
checked against the closed form of a linear score in test_sensitivity.py), and closed
forms of a linear score worked out in the comments.
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from scan_fixtures import CORNER, SIZE, corner_model, make_dataset
from shortcut_audit.adaptive import (adaptive_job, adaptive_layout, coarse_density,
                                     grid_heatmap, predict_drops)
from shortcut_audit.engine import PassEngine, run_job
from shortcut_audit.errors import UsageError
from shortcut_audit.occlusion import (AdaptivePlan, Fill, GridPlan, RandomPatchPlan,
                                      SmoothMaskPlan, box_weights, fill_image, paste_boxes,
                                      pass_count, patch_boxes, perturb, plan_from_dict)
from shortcut_audit.scan import ScanSettings, audit as run_audit
from shortcut_audit.sensitivity import heatmap_job, image_job, occlusion_heatmap, peak_box

BLACK = Fill(kind="constant", value=0.0)


def linear_scorer(W, b):
    """scores = W . flatten(x) + b, flattening (H, W, C) in C order."""
    def score(batch):
        return batch.reshape(len(batch), -1).astype(np.float64) @ W.T + b
    return score


def planted(h=32, w=32, c=3, *, box=(20, 26, 6, 12), seed=0, strength=40.0):
    """An image and a 2-class linear score whose class 1 reads a small square ``box``
    (rows r0:r1, columns c0:c1) strongly and the rest of the image weakly."""
    rng = np.random.default_rng(seed)
    x = (rng.random((h, w, c)) * 200 + 30).astype(np.float32)
    weights = rng.normal(0.0, 0.0005, size=(2, h, w, c))
    r0, r1, c0, c1 = box
    weights[1, r0:r1, c0:c1] += strength / (255.0 * (r1 - r0) * (c1 - c0) * c)
    return x, linear_scorer(weights.reshape(2, -1), np.array([0.0, -1.0]))


def iou(a, b):
    ix = max(0.0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    return inter / ((a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter)


# ------------------------------------------------------------------ the plan itself

def test_layout_of_the_default_plan_on_64_pixels():
    # fine grid: 8-pixel patches at stride 4 -> starts 0, 4, ..., 56: 15 x 15 = 225;
    # coarse: a 4 x 4 tiling of 16-pixel patches; budget: (225 + 1) // 4 = 56 passes, so
    # 56 - 1 - 16 = 39 fine patches can be run.
    lay = adaptive_layout(AdaptivePlan(), 64, 64)
    assert (len(lay.coarse), len(lay.fine), lay.grid, lay.budget, lay.refine) == (16, 225, (15, 15), 56, 39)
    assert pass_count(AdaptivePlan(), 64, 64) == 55
    assert pass_count(AdaptivePlan(budget=30), 64, 64) == 29


def test_plan_round_trips_through_its_dict():
    plan = AdaptivePlan(coarse=0.25, fine=4, fine_stride=2, budget=40, keep_top=0.3, tolerance=0.01)
    d = plan.to_dict()
    assert d["kind"] == "adaptive"
    assert plan_from_dict(d) == plan


@pytest.mark.parametrize("kwargs,match", [
    (dict(budget=1), r"--budget must be a whole number of passes per image, at least 2; got 1"),
    (dict(keep_top=0.0), r"--keep-top must be a share of the fine patches in \(0, 1\]; got 0.0"),
    (dict(tolerance=1.5), r"--tolerance must be in \[0, 1\); got 1.5"),
    (dict(coarse=0), r"--coarse in pixels must be at least 1; got 0"),
])
def test_bad_plan_values_are_usage_errors(kwargs, match):
    with pytest.raises(UsageError, match=match):
        AdaptivePlan(**kwargs)


def test_budget_without_room_beyond_the_coarse_grid_is_a_usage_error():
    with pytest.raises(UsageError, match=r"--budget \(17 passes\) leaves nothing beyond the coarse grid's 16"):
        adaptive_layout(AdaptivePlan(budget=17), 64, 64)


def test_coarse_patch_larger_than_the_image_names_the_option():
    with pytest.raises(UsageError, match=r"--coarse must be at most the image side \(8 pixels\); got 12"):
        adaptive_layout(AdaptivePlan(coarse=12, fine=2, fine_stride=1), 8, 8)


def test_paste_boxes_gives_the_same_numbers_as_perturb():
    # paste_boxes is perturb(image, box_weights(boxes), filled) without the products;
    # the same float32 numbers, bit for bit, for every fill kind.
    rng = np.random.default_rng(3)
    img = (rng.random((12, 10, 3)) * 255).astype(np.float32)
    boxes = patch_boxes(GridPlan(patch=4, stride=3), 12, 10)
    for kind in ("constant", "mean", "blur", "noise"):
        filled = fill_image(img, Fill(kind=kind))
        assert np.array_equal(paste_boxes(img, boxes, filled), perturb(img, box_weights(boxes, 12, 10), filled))


# ------------------------------------------------------------------ its pieces

def test_grid_heatmap_by_hand():
    # two 2x2 boxes overlapping in column 1 of a 2x3 image: drops 2 and 4, so column 1
    # averages them (3) and is covered twice.
    values, cover = grid_heatmap(2, 3, np.array([[0, 2, 0, 2], [0, 2, 1, 3]]), np.array([2.0, 4.0]))
    assert values.tolist() == [[2.0, 3.0, 4.0], [2.0, 3.0, 4.0]]
    assert cover.tolist() == [[1.0, 2.0, 1.0], [1.0, 2.0, 1.0]]


def test_prediction_is_exact_when_each_cell_has_one_weight():
    # Closed form: a gray image x >= 0, a black fill, and a linear score with one weight
    # per coarse cell (w_cell). A box's drop is sum over it of w_cell(p) * x_p; the
    # coarse patch shares its drop w_cell * sum(x) in proportion to |x - 0| = x, so the
    # density is w_cell(p) * x_p and every fine box's predicted drop is exact.
    rng = np.random.default_rng(1)
    h = w = 16
    x = rng.random((h, w)) * 255
    cells = rng.normal(size=(4, 4))
    wmap = np.kron(cells, np.ones((4, 4)))
    coarse = patch_boxes(GridPlan(patch=4, stride=4), h, w)
    fine = patch_boxes(GridPlan(patch=2, stride=1), h, w)

    def drop(b):
        return float((wmap[b[0]:b[1], b[2]:b[3]] * x[b[0]:b[1], b[2]:b[3]]).sum())

    density = coarse_density(h, w, coarse, np.array([drop(b) for b in coarse]), energy=x)
    assert_allclose(predict_drops(density, fine), [drop(b) for b in fine], rtol=1e-10, atol=1e-9)


# ------------------------------------------------------------------ against the exhaustive grid

def test_adaptive_finds_the_top_region_of_the_exhaustive_grid_on_a_linear_model():
    # 32x32, fine grid 4-pixel patches at stride 2 (15 x 15 = 225 patches), budget a
    # quarter of the exhaustive passes. The class reads a 6x6 square at rows 20:26,
    # columns 6:12; both maps must put their peak there and agree on its box.
    x, score = planted()
    plan = AdaptivePlan(coarse=0.25, fine=0.125, fine_stride=0.0625)
    exhaustive = occlusion_heatmap(score, x, plan=GridPlan(patch=0.125, stride=0.0625), fill=BLACK, target=1)
    adaptive = run_job(score, adaptive_job(x, plan=plan, fill=BLACK, target=1))
    assert exhaustive.passes == 226
    assert adaptive.passes <= 56
    for hm in (exhaustive, adaptive):
        r, c = np.unravel_index(np.argmax(hm.values), hm.values.shape)
        assert 20 <= r < 26 and 6 <= c < 12
    assert iou(peak_box(adaptive.values), peak_box(exhaustive.values)) >= 0.8
    # Where every fine patch covering a pixel was run, the two maps are the same numbers.
    assert_allclose(adaptive.values[21:25, 7:11], exhaustive.values[21:25, 7:11], rtol=1e-5)


def test_adaptive_through_onnxruntime_finds_the_planted_corner(tmp_path):
    # The scan fixtures' corner model: class alpha reads the top-left 6x6 square.
    from shortcut_audit.model import OnnxClassifier
    clf = OnnxClassifier(corner_model(tmp_path / "m.onnx"))
    x = np.full((SIZE, SIZE, 3), 150.0, np.float32)
    x[:CORNER, :CORNER] = 255.0
    hm = run_job(clf.logits, heatmap_job(x, plan=AdaptivePlan(), fill=Fill(kind="mean"), target=0))
    ref = run_job(clf.logits, heatmap_job(x, plan=GridPlan(patch=0.125, stride=0.0625), fill=Fill(kind="mean"),
                                          target=0))
    assert hm.passes <= 56 < ref.passes
    r, c = np.unravel_index(np.argmax(hm.values), hm.values.shape)
    assert r < CORNER and c < CORNER
    assert iou(peak_box(hm.values), peak_box(ref.values)) >= 0.8


def test_a_budget_that_covers_the_grid_gives_the_exhaustive_heatmap():
    x, score = planted(seed=2)
    grid = GridPlan(patch=0.125, stride=0.0625)
    ref = occlusion_heatmap(score, x, plan=grid, fill=BLACK, target=1)
    hm = run_job(score, adaptive_job(x, plan=AdaptivePlan(budget=500), fill=BLACK, target=1))
    assert hm.passes == ref.passes == 226
    assert_allclose(hm.values, ref.values, rtol=1e-6, atol=1e-9)


def test_a_tolerance_stops_refinement_before_the_budget():
    # One hot square and a near-zero elsewhere: with tolerance 0.3 only patches predicted
    # to move the score by 30% of the largest move are run, fewer than the budget allows
    # (and more than the coarse grid and the unperturbed image, 17).
    x, score = planted(seed=4)
    hm = run_job(score, adaptive_job(x, plan=AdaptivePlan(tolerance=0.3), fill=BLACK, target=1))
    full = run_job(score, adaptive_job(x, plan=AdaptivePlan(), fill=BLACK, target=1))
    assert full.passes == 56
    assert 17 < hm.passes < full.passes


def test_image_job_and_the_engine_take_an_adaptive_plan():
    # Several images at once through one engine, as a scan runs them: each result is the
    # same as that image's job alone.
    imgs = [planted(seed=s)[0] for s in range(3)]
    _, score = planted()
    engine = PassEngine(score, batch_size=16, overlap=True)
    jobs = [(i, image_job(im, plan=AdaptivePlan(), fill=BLACK, target=1)) for i, im in enumerate(imgs)]
    results = dict(engine.run(jobs))
    for i, im in enumerate(imgs):
        alone = run_job(score, heatmap_job(im, plan=AdaptivePlan(), fill=BLACK, target=1), batch_size=64)
        assert_allclose(results[i].heatmap.values, alone.values, rtol=1e-6, atol=1e-9)
        assert results[i].passes > results[i].heatmap.passes == alone.passes


def test_scan_with_the_adaptive_plan_flags_the_planted_corner(tmp_path):
    # The same finding as the exhaustive grid in test_scan.py, at a quarter of the passes.
    data = make_dataset(tmp_path / "data", n=8)
    result = run_audit(data, corner_model(tmp_path / "m.onnx"),
                  settings=ScanSettings(plan=AdaptivePlan(), confirm=False))
    kinds = {(f.class_name, f.kind) for f in result.findings}
    assert ("alpha", "fixed-position") in kinds
    assert all(cls == "alpha" for cls, _k in kinds)
    assert result.settings.to_dict()["plan"]["kind"] == "adaptive"


# ------------------------------------------------------------------ early stopping (random plans)

@pytest.mark.parametrize("plan,tolerance", [
    (RandomPatchPlan(count=1500, min_size=0.1, max_size=0.3, seed=1), 0.2),
    (SmoothMaskPlan(count=1500, cells=4, seed=1), 0.2),
])
def test_early_stopping_stops_before_the_cap_within_the_tolerance(plan, tolerance):
    # The capped run (every mask) is the reference; the early-stopped map must be within
    # ``tolerance`` of it in relative Frobenius norm, having used fewer masks.
    x, score = planted(h=24, w=24, box=(4, 10, 12, 20), seed=5)
    capped = occlusion_heatmap(score, x, plan=plan, fill=BLACK, target=1, batch_size=50)
    early = occlusion_heatmap(score, x, plan=plan, fill=BLACK, target=1, batch_size=50, tolerance=tolerance)
    assert capped.passes == 1501 and capped.tolerance is None and capped.error_estimate is None
    assert early.passes < 1501
    assert early.tolerance == tolerance and early.error_estimate < tolerance
    distance = np.linalg.norm(early.values - capped.values) / np.linalg.norm(capped.values)
    assert distance <= tolerance


def test_early_stopping_is_off_by_default_and_identical_to_before():
    x, score = planted(h=16, w=16, box=(2, 6, 2, 6))
    plan = RandomPatchPlan(count=200, seed=2)
    hm = occlusion_heatmap(score, x, plan=plan, fill=BLACK, target=1, batch_size=32)
    # the same sum written out: mean drop over the patches covering each pixel
    boxes = patch_boxes(plan, 16, 16)
    base = score(x[None])[0, 1]
    drops = base - score(perturb(x, box_weights(boxes, 16, 16), fill_image(x, BLACK)))[:, 1]
    ref, _ = grid_heatmap(16, 16, boxes, drops)
    assert hm.passes == 201
    assert_allclose(hm.values, ref, rtol=1e-5, atol=1e-9)


@pytest.mark.parametrize("plan,tolerance,match", [
    (GridPlan(patch=4), 0.1, r"early stopping \(tolerance\) applies to random plans \(random patches, smooth masks\)"),
    (AdaptivePlan(), 0.1, r"early stopping \(tolerance\) applies to random plans; an adaptive plan"),
    (RandomPatchPlan(count=10), 1.5, r"tolerance must be a relative error in \(0, 1\), e\.g\. 0\.05; got 1\.5"),
])
def test_bad_early_stopping_requests_are_usage_errors(plan, tolerance, match):
    x, score = planted(h=16, w=16, box=(2, 6, 2, 6))
    with pytest.raises(UsageError, match=match):
        occlusion_heatmap(score, x, plan=plan, fill=BLACK, tolerance=tolerance)
