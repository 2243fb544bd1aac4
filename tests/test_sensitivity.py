"""Tests of sensitivity.py against closed forms and worked examples.

The ONNX end of the same checks (the linear model through onnxruntime, scikit-learn's
digits) is in test_reference_models.py.
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shortcut_audit.engine import run_job
from shortcut_audit.occlusion import Fill, GridPlan, RandomPatchPlan, SmoothMaskPlan
from shortcut_audit.sensitivity import (
    DECISIVE_LADDER, background_share, box_of, concentration, curve_area,
    estimate_object_mask, gini, image_job, occlusion_heatmap,
)


def linear_scorer(W, b):
    """logits = W . flatten(x) + b, flattening (H, W, C) in C order."""
    def score(batch):
        return batch.reshape(len(batch), -1).astype(np.float64) @ W.T + b
    return score


def closed_form_grid(W_t, x, f, boxes):
    """Occlusion heatmap of a linear score by its definition (Zeiler and Fergus 2014):
    patch drop = sum over the patch of w * (x - fill); each pixel averages the drops of
    the patches that cover it. Written with explicit loops, independent of the tool."""
    h, w, c = x.shape
    wt = W_t.reshape(h, w, c)
    acc = np.zeros((h, w))
    cnt = np.zeros((h, w))
    for r0, r1, c0, c1 in boxes:
        drop = float((wt[r0:r1, c0:c1] * (x[r0:r1, c0:c1] - f[r0:r1, c0:c1])).sum())
        acc[r0:r1, c0:c1] += drop
        cnt[r0:r1, c0:c1] += 1
    with np.errstate(invalid="ignore"):
        return acc / cnt


@pytest.mark.parametrize("channels", [1, 3])
@pytest.mark.parametrize("patch,stride", [(2, 2), (3, 1), (4, 3)])
def test_grid_heatmap_of_linear_model_equals_closed_form(channels, patch, stride):
    rng = np.random.default_rng(0)
    h, w, k = 8, 10, 3
    x = (rng.random((h, w, channels)) * 255).astype(np.float32)
    W = rng.normal(size=(k, h * w * channels))
    b = rng.normal(size=k)
    fill = Fill(kind="constant", value=50.0)
    # hand-enumerated patch positions: 0, stride, ... and flush with the far edge
    def starts(side):
        s = list(range(0, side - patch + 1, stride))
        return s if s[-1] == side - patch else s + [side - patch]
    boxes = [(r, r + patch, c, c + patch) for r in starts(h) for c in starts(w)]
    hm = occlusion_heatmap(linear_scorer(W, b), x, plan=GridPlan(patch=patch, stride=stride),
                           fill=fill, target=1, batch_size=7)
    ref = closed_form_grid(W[1], x.astype(np.float64), np.full_like(x, 50.0, dtype=np.float64), boxes)
    assert_allclose(hm.values, ref, rtol=1e-5, atol=1e-5 * np.abs(ref).max())
    assert hm.passes == len(boxes) + 1
    assert hm.target == 1


def test_target_defaults_to_the_prediction():
    rng = np.random.default_rng(1)
    x = (rng.random((4, 4, 1)) * 255).astype(np.float32)
    W = rng.normal(size=(3, 16))
    b = np.array([0.0, 1e6, 0.0])     # class 1 always wins
    hm = occlusion_heatmap(linear_scorer(W, b), x, plan=GridPlan(patch=2, stride=2),
                           fill=Fill(kind="mean"))
    assert hm.target == 1 and hm.predicted == 1


def test_rise_converges_to_the_analytic_expectation():
    # Independent-pixel masks (cells=0): for a linear score s = c + sum_q a_q M_q with
    # M_q ~ Bernoulli(p), the RISE estimator E[s M_p] / p equals c + p sum_q a_q + (1-p) a_p
    # (Petsiuk et al. 2018, the estimator's definition), which the tool rescales to a_p.
    rng = np.random.default_rng(2)
    h = w = 6
    x = (rng.random((h, w, 1)) * 255).astype(np.float32)
    W = rng.normal(size=(1, h * w))
    fill = Fill(kind="constant", value=0.0)
    a = (W[0] * x.ravel()).reshape(h, w)          # drop from hiding pixel p alone
    errors = []
    for n in (250, 1000, 4000):
        plan = SmoothMaskPlan(count=n, cells=0, keep=0.5, seed=7)
        hm = occlusion_heatmap(linear_scorer(W, np.zeros(1)), x, plan=plan, fill=fill,
                               target=0, batch_size=128)
        errors.append(np.sqrt(np.mean((hm.values - a) ** 2)))
    # error falls roughly as 1/sqrt(N): each 4x more masks about halves it
    assert errors[1] < errors[0] * 0.75 and errors[2] < errors[1] * 0.75
    assert errors[2] < 0.1 * np.abs(a).std() * np.sqrt(h * w)


def test_random_patches_average_over_covering_patches():
    rng = np.random.default_rng(3)
    x = (rng.random((8, 8, 1)) * 255).astype(np.float32)
    W = rng.normal(size=(2, 64))
    plan = RandomPatchPlan(count=60, min_size=2, max_size=4, seed=1)
    from shortcut_audit.occlusion import patch_boxes
    boxes = patch_boxes(plan, 8, 8)
    hm = occlusion_heatmap(linear_scorer(W, np.zeros(2)), x, plan=plan,
                           fill=Fill(kind="constant", value=0.0), target=0)
    ref = closed_form_grid(W[0], x.astype(np.float64), np.zeros((8, 8, 1)), boxes)
    covered = ~np.isnan(ref)
    assert_allclose(hm.values[covered], ref[covered], rtol=1e-5, atol=1e-6)


# ---------------------------------------------------------------- statistics

def test_gini_worked_examples():
    # Standard definition: uniform -> 0; all mass on one of n -> (n - 1) / n.
    assert gini(np.ones((5, 5))) == pytest.approx(0.0, abs=1e-12)
    one = np.zeros((4, 4)); one[2, 3] = 7.0
    assert gini(one) == pytest.approx(15 / 16)
    # Two equal values among four: mean |xi - xj| over all 16 ordered pairs = 8/16 * 1,
    # mean = 0.5, G = 0.5 / (2 * 0.5) = 0.5.
    assert gini(np.array([0.0, 0.0, 1.0, 1.0])) == pytest.approx(0.5)
    # Against the pairwise definition on random data.
    x = np.random.default_rng(0).random(50)
    pairwise = np.abs(x[:, None] - x[None, :]).sum() / (2 * 50 ** 2 * x.mean())
    assert gini(x) == pytest.approx(pairwise, rel=1e-10)


def test_top_share_worked_examples():
    assert concentration(np.ones((10, 10))) == pytest.approx(0.05)
    m = np.zeros((10, 10)); m[0, :5] = 1.0
    assert concentration(m) == pytest.approx(1.0)
    m[5, :] = 1.0        # 15 pixels of mass 1: the top 5 hold 5/15
    assert concentration(m) == pytest.approx(1 / 3)
    assert concentration(-np.ones((3, 3))) == 0.0


def test_curve_area_matches_numpy_trapezoid():
    xs = np.linspace(0, 1, 17)
    ys = np.exp(-3 * xs)
    assert curve_area(xs, ys) == pytest.approx(np.trapezoid(ys, xs), rel=1e-12)
    # hand-worked: a straight line from 1 to 0 has area 1/2
    assert curve_area(np.array([0.0, 0.5, 1.0]), np.array([1.0, 0.5, 0.0])) == pytest.approx(0.5)


def test_box_and_background_share():
    m = np.zeros((4, 8), bool); m[1:3, 2:6] = True
    assert box_of(m) == [0.25, 0.25, 0.75, 0.75]
    heat = np.zeros((4, 8)); heat[0, 0] = 3.0; heat[1, 2] = 1.0
    assert background_share(heat, m) == pytest.approx(0.75)


def test_estimated_mask_on_a_plain_backdrop():
    img = np.full((32, 32, 3), 230.0, np.float32)
    img[8:24, 10:20] = [40, 90, 160]
    img[14:16, 14:16] = 230.0              # a hole inside the object stays object
    mask = estimate_object_mask(img)
    assert mask is not None
    truth = np.zeros((32, 32), bool); truth[8:24, 10:20] = True
    assert (mask == truth).all()
    noisy = np.random.default_rng(0).random((32, 32, 3)).astype(np.float32) * 255
    assert estimate_object_mask(noisy) is None


# ---------------------------------------------------------------- the image job

def corner_model(h, w, size=3):
    """Class 0's score is the mean brightness of the top-left size x size corner;
    class 1 is a constant just below what the corner gives, so hiding the corner moves
    the decision away from class 0."""
    def score(batch):
        corner = batch[:, :size, :size, :].reshape(len(batch), -1).mean(axis=1) / 255.0
        return np.stack([corner, np.full(len(batch), 0.5)], axis=1)
    return score


def test_decisive_area_and_box_find_the_corner():
    h = w = 20
    x = np.full((h, w, 1), 100.0, np.float32)
    x[:3, :3] = 255.0
    stats = run_job(corner_model(h, w), image_job(x, plan=GridPlan(patch=2, stride=1),
                                                  fill=Fill(kind="constant", value=0.0)))
    assert stats.target == 0
    # 9 corner pixels out of 400 = 2.25%; hiding a bit more than half of them flips it
    # (corner mean falls below 0.5), so the area lies on the ladder at or below 2.25%.
    assert stats.decisive_area is not None and stats.decisive_area <= 0.0225 + 1e-9
    x0, y0, x1, y1 = stats.decisive_box
    assert x1 <= 0.2 and y1 <= 0.2
    assert stats.deletion[0] == pytest.approx(1.0) and stats.insertion[-1] == pytest.approx(1.0)
    # the heatmap puts the corner first, so deleting it kills the score at once
    assert stats.deletion_area < 0.1
    assert stats.insertion_area > 0.8


def test_no_flip_within_the_cap_gives_no_decisive_area():
    x = np.full((10, 10, 1), 200.0, np.float32)
    score = lambda b: np.stack([b.reshape(len(b), -1).mean(1) * 0 + 1.0, np.zeros(len(b))], axis=1)
    stats = run_job(score, image_job(x, plan=GridPlan(patch=2, stride=2), fill=Fill(kind="constant", value=0.0)))
    assert stats.decisive_area is None and stats.decisive_box is None
    assert max(DECISIVE_LADDER) == 0.25


def test_mask_tests_background_model():
    # class 0 reads the border ring only: erasing the object keeps it, erasing the
    # background (to its flat mean colour) keeps a flat border... so use a textured border.
    rng = np.random.default_rng(0)
    x = (rng.random((16, 16, 3)) * 255).astype(np.float32)
    mask = np.zeros((16, 16), bool); mask[4:12, 4:12] = True

    def score(b):
        flat = b.reshape(len(b), 16, 16, 3)
        ring = np.ones((16, 16), bool); ring[2:14, 2:14] = False
        texture = flat[:, ring].std(axis=(1, 2)) / 255.0
        return np.stack([texture, np.full(len(b), 0.1)], axis=1)

    stats = run_job(score, image_job(x, plan=GridPlan(patch=4, stride=4), fill=Fill(kind="mean"),
                                     mask=mask, mask_source="given"))
    assert stats.survives_object_erased is True
    assert stats.survives_background_erased is False
    assert stats.background_share > 0.9


def test_ladder_without_curves_finds_the_same_decisive_area_for_fewer_passes():
    # A linear two-class score whose margin varies from image to image, so the decision
    # moves at different ladder steps (or not within 25%): climbing the ladder step by
    # step must stop at the step that scoring the whole ladder at once finds first.
    rng = np.random.default_rng(3)
    h = w = 16
    W = np.zeros((2, h * w * 3))
    W[0] = rng.normal(0.0, 1.0, h * w * 3)
    plan, fill = GridPlan(patch=4, stride=2), Fill(kind="constant", value=0.0)
    steps = set()
    for k in range(12):
        x = rng.uniform(0, 255, (h, w, 3)).astype(np.float32)
        s0 = float(W[0] @ x.ravel())
        # class 1 a constant a little below class 0's score: the margin decides the step
        b = np.array([0.0, s0 - abs(s0) * (0.05 + 0.1 * k) - 1.0])
        mask = np.zeros((h, w), bool)
        mask[4:12, 4:12] = True
        full = run_job(linear_scorer(W, b), image_job(x, plan=plan, fill=fill, target=0, mask=mask,
                                                      curves=True), batch_size=64)
        lean = run_job(linear_scorer(W, b), image_job(x, plan=plan, fill=fill, target=0, mask=mask,
                                                      curves=False), batch_size=64)
        assert lean.decisive_area == full.decisive_area
        assert lean.decisive_box == full.decisive_box
        assert lean.survives_object_erased == full.survives_object_erased
        assert lean.survives_background_erased == full.survives_background_erased
        assert lean.deletion == [] and np.isnan(lean.deletion_area)
        assert lean.passes < full.passes
        steps.add(full.decisive_area)
    assert len(steps) >= 3                    # the images exercised several steps
