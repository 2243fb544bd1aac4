"""Tests of imagewide.py: the residual transplant that tells an image-wide cast from a backdrop,
and confirm.py's choice between ``background`` and ``image-wide``."""

import dataclasses

import numpy as np
import pytest

from shortcut_audit.confirm import _image_wide
from shortcut_audit.engine import run_job
from shortcut_audit.errors import UsageError
from shortcut_audit.findings import Finding, Thresholds
from shortcut_audit.imagewide import (flat_residual_tiles, mosaic, noise_residual,
                                      residual_transplant_job, tile_side)
from shortcut_audit.outcomes import ProbeResult, fisher_greater


def test_noise_residual_of_one_bright_pixel_by_hand():
    # A flat 5x5 image at 100 with one pixel at 130: every 3x3 window holds at most one
    # 130 among nine values, so the median is 100 everywhere; the residual is 30 at that
    # pixel and 0 elsewhere.
    img = np.full((5, 5, 1), 100.0, np.float32)
    img[2, 2] = 130.0
    want = np.zeros((5, 5), np.float32)
    want[2, 2] = 30.0
    np.testing.assert_allclose(noise_residual(img)[..., 0], want, atol=0)


def test_a_straight_edge_leaves_no_residual():
    # A median keeps a straight step edge (each 3x3 window's majority is one side), so an
    # object's outline is not mistaken for grain.
    img = np.zeros((6, 6, 1), np.float32)
    img[:, 3:] = 200.0
    np.testing.assert_allclose(noise_residual(img), 0.0, atol=0)


def test_tiles_come_only_from_places_wholly_on_the_object():
    # 8x8 image, object = the top-left 4x4 square; 2x2 tiles at stride 1 wholly inside it:
    # 3 x 3 = 9 places; share 1.0 keeps them all.
    img = np.zeros((8, 8, 1), np.float32)
    m = np.zeros((8, 8), bool)
    m[:4, :4] = True
    assert flat_residual_tiles(img, m, 2, share=1.0).shape == (9, 2, 2, 1)
    # one place only (a 2x2 object) is fewer than MIN_TILES: no tiles
    m2 = np.zeros((8, 8), bool)
    m2[:2, :2] = True
    assert flat_residual_tiles(img, m2, 2, share=1.0).shape == (0, 2, 2, 1)


def test_the_flattest_places_are_kept():
    # Object = the whole left half (rows 0..15, cols 0..7) of a 16x16 image; its top half
    # is flat with single-pixel specks (a grain), its bottom half has broad stripes (the
    # object's own structure). The flattest quarter lies in the flat half, so its tiles
    # hold the specks' residual and no stripe.
    img = np.full((16, 16, 1), 100.0, np.float32)
    img[0:8:2, 1:8:3] = 120.0                       # specks: residual +20 each
    img[8:, :, 0] = np.where((np.arange(16)[None, :] // 4) % 2 == 0, 40.0, 200.0)
    m = np.zeros((16, 16), bool)
    m[:, :8] = True
    tiles = flat_residual_tiles(img, m, 4, share=0.25)
    assert len(tiles) >= 2
    assert set(np.unique(tiles)) <= {0.0, 20.0}
    assert tiles.max() == 20.0


def test_mosaic_covers_the_frame_with_whole_tiles():
    tiles = np.stack([np.full((3, 3, 1), v, np.float32) for v in (1.0, 2.0)])
    frame = mosaic(tiles, (7, 8), np.random.default_rng(0))
    assert frame.shape == (7, 8, 1)
    # each 3x3 cell holds one tile's value
    for r in range(0, 7, 3):
        for c in range(0, 8, 3):
            assert len(np.unique(frame[r:r + 3, c:c + 3])) == 1


def test_tile_side():
    assert (tile_side(64), tile_side(96), tile_side(128), tile_side(16)) == (8, 12, 16, 4)


# ------------------------------------------------------------------ the job on a fake model

SIZE = 32


def _scene(rng, *, grain_bg: bool, grain_obj: bool, pattern_bg: bool = False):
    """A flat table with a flat square object; a grain on either part, or a pattern behind."""
    img = np.full((SIZE, SIZE, 3), rng.uniform(90, 140), np.float32)
    if pattern_bg:
        img[::4] += 60.0                                  # a striped cloth: broad, not a grain
    r0, c0 = rng.integers(2, SIZE - 18, 2)
    m = np.zeros((SIZE, SIZE), bool)
    m[r0:r0 + 16, c0:c0 + 16] = True
    img[m] = rng.uniform(150, 220, 3)
    grain = rng.normal(0, 12, (SIZE, SIZE, 1)).astype(np.float32)
    where = np.zeros((SIZE, SIZE, 1), bool)
    if grain_bg:
        where |= ~m[..., None]
    if grain_obj:
        where |= m[..., None]
    return np.clip(img + np.where(where, grain, 0), 0, 255), m


def grain_reader(batch):
    """Class 0 when the image's median-residual energy is high (a model that reads a grain),
    else class 1 or 2 by the mean brightness: a plain function, as the Classifier protocol allows."""
    out = []
    for img in np.asarray(batch, np.float32):
        energy = float(np.abs(noise_residual(img)).mean())
        bright = float(img.mean())
        out.append([energy, 4.0 if bright < 150 else 0.0, 4.0 if bright >= 150 else 0.0])
    z = np.asarray(out) * 1.0
    z = np.exp(z - z.max(axis=1, keepdims=True))
    return z / z.sum(axis=1, keepdims=True)


def _sets(seed, **suspect_kind):
    rng = np.random.default_rng(seed)
    own = [(*_scene(rng, **suspect_kind), 0) for _ in range(8)]
    others = [(*_scene(rng, grain_bg=False, grain_obj=False), 1 + i % 2) for i in range(12)]
    return own, others


def test_a_grain_over_the_whole_picture_is_carried_by_its_objects():
    own, others = _sets(1, grain_bg=True, grain_obj=True)
    r = run_job(grain_reader, residual_transplant_job(own=own, others=others, suspect=0,
                                                      flat_share=0.25, trials=30, seed=2))
    assert r.test == "residual-transplant"
    assert r.trials == 30 and r.rate == 1.0 and r.control_rate == 0.0
    assert r.p_value == pytest.approx(fisher_greater(30, 0, 0, 30))
    assert r.status() == "confirmed"


@pytest.mark.parametrize("kind", [dict(grain_bg=True, grain_obj=False),
                                  dict(grain_bg=False, grain_obj=False, pattern_bg=True)])
def test_a_backdrop_is_not_carried_by_its_objects(kind):
    # a grain only behind the object, or a striped cloth: the objects' own tiles are clean
    own, others = _sets(3, **kind)
    r = run_job(grain_reader, residual_transplant_job(own=own, others=others, suspect=0,
                                                      flat_share=0.25, trials=30, seed=2))
    assert r.hits == 0 and r.status() == "not-confirmed"


def test_known_scores_are_not_scored_again():
    own, others = _sets(1, grain_bg=True, grain_obj=True)
    calls = []

    def counting(batch):
        calls.append(len(batch))
        return grain_reader(batch)

    known = list(grain_reader(np.stack([o[0] for o in others])))
    a = run_job(counting, residual_transplant_job(own=own, others=others, suspect=0, flat_share=0.25,
                                                  trials=10, seed=5, others_scores=known))
    assert sum(calls) == 20                            # the composites only
    b = run_job(grain_reader, residual_transplant_job(own=own, others=others, suspect=0,
                                                      flat_share=0.25, trials=10, seed=5))
    assert (a.hits, a.control_hits) == (b.hits, b.control_hits)


def test_bad_input_says_what_to_do():
    own, others = _sets(1, grain_bg=True, grain_obj=True)
    with pytest.raises(UsageError, match="needs an \\(H, W\\) object mask.*Pass object masks"):
        residual_transplant_job(own=[(own[0][0], None, 0)] + own[1:], others=others, suspect=0,
                                flat_share=0.25)
    tiny = [(p, np.zeros_like(m), 0) for p, m, _ in own]
    with pytest.raises(UsageError, match="at least two images of the suspect class"):
        residual_transplant_job(own=tiny, others=others, suspect=0, flat_share=0.25)
    with pytest.raises(UsageError, match="model's input shape"):
        residual_transplant_job(own=own, others=[(np.zeros((8, 8, 3)), np.ones((8, 8), bool), 1)] + others,
                                suspect=0, flat_share=0.25)
    with pytest.raises(UsageError, match="trials must be a whole number"):
        residual_transplant_job(own=own, others=others, suspect=0, flat_share=0.25, trials=0)
    with pytest.raises(UsageError, match="share of flat tiles must be in"):
        residual_transplant_job(own=own, others=others, suspect=0, flat_share=0.0)


# ------------------------------------------------------------ background or image-wide

def _result(hits, control_hits, n=40, test="residual-transplant"):
    return ProbeResult(test=test, suspect=0, trials=n, hits=hits, rate=hits / n, control_trials=n,
                       control_hits=control_hits, control_rate=control_hits / n, mean_gain=0.0,
                       control_mean_gain=0.0, p_value=fisher_greater(hits, n - hits, control_hits, n - control_hits),
                       effect=(hits - control_hits) / n)


def _background(status):
    swap = _result(39, 0, test="background-swap").to_dict()
    return Finding(id="", class_name="block", class_index=0, kind="background", status=status,
                   evidence={"statistic": "median_background_share", "value": 0.9, "test": swap,
                             "p_value": swap["p_value"]})


def test_a_confirmed_backdrop_whose_objects_carry_it_too_is_image_wide():
    f = _image_wide(_background("confirmed"), _result(37, 20), None, [], Thresholds())
    assert f.kind == "image-wide" and f.status == "confirmed"
    assert f.evidence["test"]["test"] == "residual-transplant"
    assert f.evidence["background_test"]["test"] == "background-swap"
    assert f.evidence["value"] == 0.9                  # the rule's evidence stays


@pytest.mark.parametrize("status, wide", [("confirmed", (12, 8)), ("not-confirmed", (37, 0))])
def test_otherwise_it_stays_a_background_finding(status, wide):
    f = _image_wide(_background(status), _result(*wide), None, [], Thresholds())
    assert f.kind == "background" and f.status == status
    assert f.evidence["test"]["test"] == "background-swap"
    assert f.evidence["image_wide_test"]["hits"] == wide[0]


def test_a_residual_test_that_could_not_run_says_why():
    f = _image_wide(_background("confirmed"), None, "too few tiles", [], Thresholds())
    assert f.kind == "background"
    assert f.evidence["image_wide_test"] == {"ran": False, "reason": "too few tiles"}
    assert dataclasses.replace(f, id="F1").kind == "background"


def test_doctests():
    import doctest

    import shortcut_audit.imagewide as module
    result = doctest.testmod(module)
    assert result.attempted > 0 and result.failed == 0


def test_the_report_and_the_pack_word_an_image_wide_finding():
    from shortcut_audit.pack import request_text
    from shortcut_audit.report.words import KIND_TITLES, finding_sentence, test_sentence

    f = _image_wide(_background("confirmed"), _result(37, 20), None, [], Thresholds())
    d = dict(f.to_dict(), id="F1")
    d["evidence"]["median_background_share"] = 0.9
    assert KIND_TITLES["image-wide"] == "read from the whole picture"
    assert "spread over the whole picture" in finding_sentence(d) and "90%" in finding_sentence(d)
    told = test_sentence(d)
    # the residual test's counts, then the background swap's (39 of 40 against 0)
    assert "turned 37 of them (92%) into block" in told and "20 of 40 (50%)" in told
    assert "Their backgrounds alone turned 39 of 40 (98%) into block" in told
    audit = {"classes": [{"name": "block", "images": 20}, {"name": "kite", "images": 20}],
             "model": {"labels": ["block", "kite"]}}
    text = request_text(d, audit, n_images=3, folder="F1-image-wide-block")
    assert "processed **differently**" in text and "processed the **same** way" in text
