"""Tests of sufficiency.py: patches of a class's images that turn other images into the class."""

import numpy as np
import pytest

from shortcut_audit.engine import run_job
from shortcut_audit.errors import UsageError
from shortcut_audit.sufficiency import grid_places, sufficiency_job

SIZE = 32
MARK = np.array([250.0, 20.0, 200.0], np.float32)       # a magenta sticker no scene has


def sticker_reader(batch):
    """Class 0 when a 4x4 block of the magenta sticker colour is present anywhere, else
    class 1 or 2 by brightness: a model that takes the sticker as sufficient."""
    out = []
    for img in np.asarray(batch, np.float32):
        hit = np.all(np.abs(img - MARK) < 1.0, axis=2).astype(np.float32)
        win = np.lib.stride_tricks.sliding_window_view(hit, (4, 4)).sum(axis=(2, 3)).max()
        bright = float(img.mean())
        out.append([10.0 if win >= 16 else 0.0, 4.0 if bright < 120 else 0.0, 4.0 if bright >= 120 else 0.0])
    z = np.asarray(out)
    z = np.exp(z - z.max(axis=1, keepdims=True))
    return z / z.sum(axis=1, keepdims=True)


def _source(rng, at):
    img = np.full((SIZE, SIZE, 3), 90.0, np.float32)
    m = np.zeros((SIZE, SIZE), bool)
    m[8:24, 8:24] = True
    img[m] = rng.uniform(140, 200, 3)
    r, c = at
    img[r:r + 4, c:c + 4] = MARK
    return img, m


def test_grid_places_by_hand():
    m = np.zeros((8, 8), bool)
    m[:4, :4] = True
    # a 4x4 patch at stride 2: rows and columns 0, 2, 4; centres (2, 2) is on the object only at (0, 0)
    assert grid_places(m, 4, 2) == [(0, 0)]
    assert grid_places(np.ones((8, 8), bool), 4, 2) == [(r, c) for r in (0, 2, 4) for c in (0, 2, 4)]
    # the last place touches the edge even when the stride does not reach it
    assert grid_places(np.ones((7, 7), bool), 4, 2) == [(r, c) for r in (0, 2, 3) for c in (0, 2, 3)]


def test_the_patch_that_holds_the_sticker_is_found_and_narrowed():
    rng = np.random.default_rng(0)
    # stickers at even offsets, so a 4x4 sub-patch at stride 2 can hold one whole
    sources = [_source(rng, at) for at in [(10, 10), (16, 12), (12, 18)]]
    receivers = [[np.full((SIZE, SIZE, 3), v, np.float32) for v in (60.0, 80.0, 200.0)]] * 3
    res = run_job(sticker_reader, sufficiency_job(sources=sources, receivers=receivers, suspect=0,
                                                  side=8, min_pull=0.5))
    for (img, _m), r in zip(sources, res):
        assert r["pull"] == 1.0
        x0, y0, x1, y1 = (int(round(v * SIZE)) for v in r["box"])
        # narrowed to a 4x4 sub-patch that holds the whole sticker
        assert (x1 - x0, y1 - y0) == (4, 4)
        assert np.all(np.abs(img[y0:y1, x0:x1] - MARK) < 1.0)
        # the crop to cluster is centred on the sticker (within a pixel) and 1.5 sub-patch sides wide
        fx0, fy0, fx1, fy1 = (v * SIZE for v in r["focus"])
        assert fx1 - fx0 == pytest.approx(6.0) and fy1 - fy0 == pytest.approx(6.0)
        ys, xs = np.nonzero(np.all(np.abs(img - MARK) < 1.0, axis=2))
        assert abs((fx0 + fx1) / 2 - (xs.mean() + 0.5)) <= 1.0
        assert abs((fy0 + fy1) / 2 - (ys.mean() + 0.5)) <= 1.0
    # passes: places on the object (8x8 patches, stride 4, centre on the 16x16 object)
    # times 3 receivers, then 9 sub-patches times 3 receivers
    places = len(grid_places(sources[0][1], 8, 4))
    assert res[0]["passes"] == places * 3 + 9 * 3


def test_a_source_without_a_sufficient_patch_is_not_narrowed():
    rng = np.random.default_rng(1)
    img, m = _source(rng, (10, 10))
    img[10:14, 10:14] = 150.0                               # no sticker
    res = run_job(sticker_reader, sufficiency_job(sources=[(img, m)], receivers=[[np.full((SIZE, SIZE, 3), 60.0)]],
                                                  suspect=0, side=8, min_pull=0.5))
    assert res[0]["pull"] == 0.0
    assert res[0]["passes"] == len(grid_places(m, 8, 4))      # the grid only


def test_bad_input_says_what_to_do():
    rng = np.random.default_rng(0)
    src = _source(rng, (10, 10))
    with pytest.raises(UsageError, match="one list per source"):
        sufficiency_job(sources=[src], receivers=[], suspect=0, side=8, min_pull=0.5)
    with pytest.raises(UsageError, match="model's input shape"):
        sufficiency_job(sources=[src], receivers=[[np.zeros((8, 8, 3))]], suspect=0, side=8, min_pull=0.5)
    with pytest.raises(UsageError, match="min_pull must be a share"):
        sufficiency_job(sources=[src], receivers=[[src[0]]], suspect=0, side=8, min_pull=2.0)


def test_doctests():
    import doctest

    import shortcut_audit.sufficiency as module
    result = doctest.testmod(module)
    assert result.attempted > 0 and result.failed == 0


def test_receivers_with_nan_scores_count_as_not_pulled():
    # One receiver of three scores NaN and the other two are pulled: the pull is 2/3, not
    # 2/2. A hand count of the shares.
    rng = np.random.default_rng(2)
    src = _source(rng, (10, 10))
    nan_grey = 77.0

    def reader(batch):
        out = sticker_reader(batch)
        for i, img in enumerate(np.asarray(batch, np.float32)):
            if abs(float(img[0, 0, 0]) - nan_grey) < 1e-3:
                out[i] = np.nan
        return out

    recs = [[np.full((SIZE, SIZE, 3), v, np.float32) for v in (60.0, nan_grey, 200.0)]]
    res = run_job(reader, sufficiency_job(sources=[src], receivers=recs, suspect=0, side=8, min_pull=0.5))
    assert res[0]["pull"] == pytest.approx(2 / 3)


def test_focus_stays_inside_the_image_at_its_edge():
    # A sticker in the corner: the focus box is clamped into the image, still holding it.
    rng = np.random.default_rng(3)
    img = np.full((SIZE, SIZE, 3), 90.0, np.float32)
    m = np.zeros((SIZE, SIZE), bool)
    m[:12, :12] = True
    img[m] = rng.uniform(140, 200, 3)
    img[0:4, 0:4] = MARK
    res = run_job(sticker_reader, sufficiency_job(sources=[(img, m)], receivers=[[np.full((SIZE, SIZE, 3), 60.0)]],
                                                  suspect=0, side=8, min_pull=0.5))
    fx0, fy0, fx1, fy1 = res[0]["focus"]
    assert 0.0 <= fx0 and 0.0 <= fy0 and fx1 <= 1.0 and fy1 <= 1.0
    assert fx0 == pytest.approx(0.0) and fy0 == pytest.approx(0.0)
    assert (fx1 - fx0) * SIZE == pytest.approx(6.0)


def test_an_odd_half_side_still_reaches_the_patch_edge():
    # side 10: sub-patches of 5 at stride 2 start at 0, 2, 4 and 5, so the last column of
    # the patch is covered (16 sub-patches, not 9).
    rng = np.random.default_rng(4)
    src = _source(rng, (10, 10))
    res = run_job(sticker_reader, sufficiency_job(sources=[src], receivers=[[np.full((SIZE, SIZE, 3), 60.0)]],
                                                  suspect=0, side=10, min_pull=0.5))
    places = len(grid_places(src[1], 10, 5))
    assert res[0]["pull"] == 1.0
    assert res[0]["passes"] == places + 16
