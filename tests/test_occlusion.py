"""Tests of occlusion.py: plans, fills, streaming of weights."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import ndimage

from shortcut_audit.errors import UsageError
from shortcut_audit.occlusion import (
    Fill, GridPlan, RandomPatchPlan, SmoothMaskPlan, box_weights, fill_image,
    iter_weights, pass_count, patch_boxes, perturb,
)


def test_grid_boxes_by_hand_4x4_patch2_stride2():
    # Worked by hand: a 4x4 image, 2x2 patches, stride 2 -> four quadrants.
    boxes = patch_boxes(GridPlan(patch=2, stride=2), 4, 4)
    assert boxes.tolist() == [[0, 2, 0, 2], [0, 2, 2, 4], [2, 4, 0, 2], [2, 4, 2, 4]]


def test_grid_is_edge_complete_when_stride_does_not_divide():
    # 10 pixels, patch 4, stride 3: starts 0, 3, 6 (last flush with the edge at 6).
    boxes = patch_boxes(GridPlan(patch=4, stride=3), 10, 10)
    starts = sorted(set(boxes[:, 0].tolist()))
    assert starts == [0, 3, 6]
    covered = box_weights(boxes, 10, 10).sum(axis=0)
    assert covered.min() >= 1


def test_grid_fractions_resolve_per_side():
    plan = GridPlan(patch=0.25, stride=0.25)
    boxes = patch_boxes(plan, 8, 16)
    assert set((boxes[:, 1] - boxes[:, 0]).tolist()) == {2}
    assert set((boxes[:, 3] - boxes[:, 2]).tolist()) == {4}
    assert pass_count(plan, 8, 16) == 16


def test_patch_larger_than_image_is_a_usage_error():
    with pytest.raises(UsageError, match=r"--patch must be at most the image side \(8\); got 12"):
        patch_boxes(GridPlan(patch=12), 8, 8)


@pytest.mark.parametrize("bad", [0, -1, 1.5, "3"])
def test_bad_patch_values(bad):
    with pytest.raises(UsageError, match="--patch"):
        GridPlan(patch=bad)


def test_random_patches_are_seeded_and_inside():
    plan = RandomPatchPlan(count=50, min_size=2, max_size=5, seed=3)
    a = patch_boxes(plan, 20, 30)
    b = patch_boxes(plan, 20, 30)
    assert (a == b).all()
    assert (a[:, 0] >= 0).all() and (a[:, 1] <= 20).all()
    assert (a[:, 2] >= 0).all() and (a[:, 3] <= 30).all()
    sizes = a[:, 1] - a[:, 0]
    assert sizes.min() >= 2 and sizes.max() <= 5
    assert not (patch_boxes(RandomPatchPlan(count=50, min_size=2, max_size=5, seed=4), 20, 30) == a).all()


@pytest.mark.parametrize("chunk", [1, 7, 64])
def test_weights_do_not_depend_on_chunk(chunk):
    for plan in (GridPlan(patch=3, stride=2), RandomPatchPlan(count=20, seed=1),
                 SmoothMaskPlan(count=20, cells=4, seed=2)):
        ref = np.concatenate(list(iter_weights(plan, 12, 12, chunk=100)))
        got = np.concatenate(list(iter_weights(plan, 12, 12, chunk=chunk)))
        assert_allclose(got, ref)
        assert all(len(w) <= chunk for w in iter_weights(plan, 12, 12, chunk=chunk))


def test_smooth_masks_keep_rate_and_smoothness():
    plan = SmoothMaskPlan(count=400, cells=4, keep=0.3, seed=0)
    w = np.concatenate(list(iter_weights(plan, 32, 32, chunk=64)))
    keep = 1 - w
    assert keep.min() >= 0 and keep.max() <= 1
    # Bilinear upsampling of Bernoulli(0.3) cells keeps the mean at 0.3 (linearity).
    assert abs(keep.mean() - 0.3) < 0.02
    # Smooth: neighbouring pixels differ by at most one cell's step (1/cell size = 1/8).
    assert np.abs(np.diff(keep, axis=2)).max() <= 1 / 8 + 1e-6


def test_fills():
    rng = np.random.default_rng(0)
    img = rng.random((6, 8, 3)).astype(np.float32) * 255
    assert_allclose(fill_image(img, Fill(kind="constant", value=10.0)), 10.0)
    assert_allclose(fill_image(img, Fill(kind="mean"))[0, 0], img.reshape(-1, 3).mean(0), rtol=1e-6)
    # blur: scipy's gaussian_filter, the reference implementation, on each channel.
    ref = ndimage.gaussian_filter(img[..., 1], sigma=0.08 * 8, mode="reflect")
    assert_allclose(fill_image(img, Fill(kind="blur"))[..., 1], ref, rtol=1e-5)
    n1 = fill_image(img, Fill(kind="noise", seed=5))
    assert_allclose(n1, fill_image(img, Fill(kind="noise", seed=5)))
    assert 0 <= n1.min() and n1.max() <= 255


def test_bad_fill():
    with pytest.raises(UsageError, match="--fill must be one of constant, mean, blur, noise; got 'zero'"):
        Fill(kind="zero")


def test_perturb_mixes_by_weight():
    img = np.full((2, 2, 1), 10.0, np.float32)
    filled = np.zeros_like(img)
    w = np.array([[[1.0, 0.5], [0.0, 0.0]]], np.float32)
    out = perturb(img, w, filled)
    assert out.shape == (1, 2, 2, 1)
    assert out[0, :, :, 0].tolist() == [[0.0, 5.0], [10.0, 10.0]]
