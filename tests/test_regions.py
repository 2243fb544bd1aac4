"""Tests of regions.py: a fixed mark's box tightened from the pixels.

Ground truth is the planted mark's box; the loose box is what an occlusion grid of
8-pixel patches would heat around a 5-pixel mark (the mark grown by a patch).
"""

import numpy as np
import pytest

from shortcut_audit.regions import MIN_CONTRAST, contrast_map, tighten_region


def iou(a, b):
    ix = max(0.0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    area = lambda r: (r[2] - r[0]) * (r[3] - r[1])
    return inter / (area(a) + area(b) - inter)


def scenes(n, *, mark, seed):
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        img = rng.uniform(40, 215, (64, 64, 3))
        if mark:
            img[50:55, 44:49] = (250.0, 30.0, 30.0)      # rows 50..54, columns 44..48
        out.append(img)
    return out


def test_contrast_map_worked_example():
    # means 10 and 40, no spread: |10 - 40| / (0 + 0 + 1) = 30
    a = [np.full((2, 2, 3), 10.0)] * 3
    b = [np.full((2, 2, 3), 40.0)] * 3
    assert contrast_map(a, b) == pytest.approx(np.full((2, 2), 30.0))


def test_a_loose_box_is_tightened_to_the_mark():
    truth = [44 / 64, 50 / 64, 49 / 64, 55 / 64]
    loose = [40 / 64, 46 / 64, 53 / 64, 59 / 64]         # the mark grown by 4 px each side
    assert iou(loose, truth) < 0.2
    got = tighten_region(loose, scenes(12, mark=True, seed=0), scenes(12, mark=False, seed=1))
    assert got == pytest.approx(truth)


def test_nothing_to_tighten_keeps_the_loose_box():
    # no mark in either set: no pixel contrasts by MIN_CONTRAST, so None (keep the box)
    loose = [0.6, 0.7, 0.8, 0.9]
    assert tighten_region(loose, scenes(12, mark=False, seed=0), scenes(12, mark=False, seed=1)) is None
    assert MIN_CONTRAST > 0
    assert tighten_region(loose, scenes(1, mark=True, seed=0), scenes(5, mark=False, seed=1)) is None


def test_a_class_that_differs_everywhere_keeps_its_box():
    # own images are all brighter: the contrast inside the box is no higher than
    # elsewhere, so there is no mark to tighten to.
    own = [img * 0.3 + 170 for img in scenes(12, mark=False, seed=0)]
    assert tighten_region([0.6, 0.7, 0.8, 0.9], own, scenes(12, mark=False, seed=1)) is None
