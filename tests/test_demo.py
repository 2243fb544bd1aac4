"""Tests of the shipped demo (shortcut_audit/demo): renderer, assets, audit set, truth.json.

The reference for the measured effects is the demo's own truth.json, written by
``python -m shortcut_audit.demo.build truth``; re-measuring from the shipped models must
give the same counts. No torch here.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shortcut_audit.dataset import load_image, load_mask
from shortcut_audit.listing import list_images
from shortcut_audit.demo import demo_paths
from shortcut_audit.demo.catalogue import RATES, plan, render_spec, to_model_input
from shortcut_audit.demo.effects import load_assets, measure_effects
from shortcut_audit.demo.render import (
    KINDS, mask_box, paste_rgba, render, stamp_origin, stamp_rgba, sticker_origin,
    sticker_rgba, wood_texture,
)
from shortcut_audit.model import OnnxClassifier, read_model_config

PATHS = demo_paths()


@pytest.fixture(scope="module")
def truth() -> dict:
    return json.loads(PATHS.truth.read_text(encoding="utf-8"))


# ----------------------------------------------------------------------- the shipped files


def test_demo_paths_point_at_existing_files():
    assert PATHS.images.is_dir() and PATHS.masks.is_dir() and PATHS.truth.is_file()
    assert sorted(PATHS.models) == ["baseline", "dropout", "rebalanced"]
    for m in PATHS.models.values():
        assert m.onnx.is_file()
        assert (m.config is not None) == (m.name == "rebalanced")
        if m.config is not None:
            assert m.config.is_file()
    for name in ("stamp.png", "sticker.png", "wood.png"):
        assert (PATHS.assets / name).is_file()


def test_shipped_onnx_files_match_their_sha256_in_truth(truth):
    # Reference: hashlib's SHA-256 of the file bytes, recorded when truth.json was built.
    for name, m in PATHS.models.items():
        digest = hashlib.sha256(m.onnx.read_bytes()).hexdigest()
        assert digest == truth["models"][name]["sha256"], name


def test_demo_is_small():
    sizes = {m.name: m.onnx.stat().st_size for m in PATHS.models.values()}
    assert max(sizes.values()) < 1.5 * 2**20
    images = sum(p.stat().st_size for p in PATHS.root.rglob("*") if p.is_file())
    assert images + sum(sizes.values()) < 10 * 2**20


def test_the_tool_lists_the_audit_set_with_every_mask():
    entries, skipped = list_images(PATHS.images, masks=PATHS.masks)
    assert skipped == []
    assert sorted({e.label for e in entries}) == list(KINDS)
    assert len(entries) == 36 * 4
    assert all(e.mask_file is not None for e in entries)


def test_models_describe_themselves_as_the_config_says():
    for m in PATHS.models.values():
        cfg = read_model_config(m.config) if m.config else None
        clf = OnnxClassifier(m.onnx, cfg)
        assert clf.labels == KINDS
        assert (clf.height, clf.width) == (64, 64)
        assert clf.layout == ("nhwc" if m.name == "dropout" else "nchw")
        assert clf.output_kind == "logits"
        assert clf.dynamic_batch
        expected = (0.5, 0.5, 0.5) if m.name == "rebalanced" else (0.0, 0.0, 0.0)
        assert_allclose(clf.mean, expected)


# ----------------------------------------------------------------------- the audit set


def test_audit_set_has_the_advertised_shortcut_counts(truth):
    # round(rate * 36): 0.9 -> 32 vases stamped, 0.85 -> 31 mugs / bowls, 0.05 -> 2.
    counts = {(k, s): 0 for k in KINDS for s in ("stamp", "sticker", "wood")}
    for e in truth["images"]:
        for s in e["shortcuts"]:
            counts[(e["class"], s)] += 1
    for (k, s), n in counts.items():
        assert n == round(RATES["biased"][k][s] * 36), (k, s)


def test_masks_cover_the_object_inside_the_frame(truth):
    for e in truth["images"]:
        mask = load_mask(PATHS.masks / e["mask"], size=(96, 96))
        img = load_image(PATHS.images / e["path"], size=(96, 96))
        assert img.shape == (96, 96, 3)
        assert mask.mean() > 0.01, e["path"]
        # the whole piece is in the picture: no object pixel on the border
        border = np.concatenate([mask[0], mask[-1], mask[:, 0], mask[:, -1]])
        assert not border.any(), e["path"]
        assert_allclose(mask_box(mask), e["object_box"], atol=1e-6)


def test_shipped_images_re_render_from_their_seeds(truth):
    # A few of every class: render(seed, flags) must give the PNG's pixels back.
    for e in truth["images"][::9]:
        spec = plan(e["class"], 36, scheme="biased", base_seed=truth["audit"]["base_seed"])
        spec = spec[e["index"]]
        assert spec.seed == e["seed"]
        rgb, mask, ann = render_spec(spec)
        shipped = load_image(PATHS.images / e["path"], size=(96, 96))
        assert np.array_equal(rgb.astype(np.float32), shipped), e["path"]
        assert np.array_equal(mask, load_mask(PATHS.masks / e["mask"], size=(96, 96)))
        assert sorted(ann) == sorted(e["shortcuts"])


def test_stamp_boxes_sit_in_the_lower_right_quarter(truth):
    boxes = [e["shortcuts"]["stamp"] for e in truth["images"] if "stamp" in e["shortcuts"]]
    assert len(boxes) == 32
    for x0, y0, x1, y1 in boxes:
        assert 0.5 <= x0 < x1 <= 1.0 and 0.5 <= y0 < y1 <= 1.0
        assert (x1 - x0) == pytest.approx(9 / 96)


def test_sticker_boxes_lie_on_the_piece(truth):
    for e in truth["images"]:
        if "sticker" not in e["shortcuts"]:
            continue
        mask = load_mask(PATHS.masks / e["mask"], size=(96, 96))
        x0, y0, x1, y1 = (np.array(e["shortcuts"]["sticker"]) * 96).round().astype(int)
        assert mask[y0:y1, x0:x1].mean() > 0.9, e["path"]


# ------------------------------------------------------------------------------ renderer


@pytest.mark.parametrize("kind", KINDS)
def test_render_is_deterministic_for_a_seed(kind):
    a = render(kind, np.random.default_rng(5), stamp=True, sticker=True, wood=True)
    b = render(kind, np.random.default_rng(5), stamp=True, sticker=True, wood=True)
    c = render(kind, np.random.default_rng(6), stamp=True, sticker=True, wood=True)
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1]) and a[2] == b[2]
    assert not np.array_equal(a[0], c[0])


@pytest.mark.parametrize("kind", KINDS)
def test_a_flag_changes_only_its_own_shortcut(kind):
    # The generator is consumed the same way whatever the flags, so switching one
    # shortcut off changes nothing outside its box (the wood: nothing on the piece).
    from scipy import ndimage

    # the first seed from 11 whose piece is large enough to have a core 8 px inside it
    # (the soft focus carries the backdrop up to 6 px into the piece)
    for seed in range(11, 60):
        off, mask, _ = render(kind, np.random.default_rng(seed))
        core = ndimage.binary_erosion(mask, iterations=8)
        if core.any():
            break
    assert core.any()
    for flag in ("stamp", "sticker"):
        on, _, ann = render(kind, np.random.default_rng(seed), **{flag: True})
        x0, y0, x1, y1 = (np.array(ann[flag]) * 96).round().astype(int)
        diff = np.any(on != off, axis=2)
        assert diff[y0:y1, x0:x1].any()
        diff[y0:y1, x0:x1] = False
        assert not diff.any(), flag
    on, _, ann = render(kind, np.random.default_rng(seed), wood=True)
    assert ann == {"wood": [0.0, 0.0, 1.0, 1.0]}
    diff = np.any(on != off, axis=2)
    assert diff[~mask].mean() > 0.9  # the backdrop is replaced
    assert not diff[core].any()  # the piece itself is untouched away from its edge


def test_render_rejects_an_unknown_kind():
    with pytest.raises(ValueError, match="kind must be one of bowl, mug, plate, vase; got 'cup'"):
        render("cup", np.random.default_rng(0))


# -------------------------------------------------------------------------------- assets


def test_shipped_assets_are_the_ones_the_code_draws():
    assets = load_assets()
    assert np.array_equal(assets["stamp"], stamp_rgba(96))
    assert np.array_equal(assets["sticker"], sticker_rgba(96))
    assert assets["wood"].shape == (96, 96, 3)
    # the wood tile is a texture: brown (red > green > blue on average) with grain
    mean = assets["wood"].reshape(-1, 3).mean(axis=0)
    assert mean[0] > mean[1] > mean[2]
    assert assets["wood"].astype(float).std(axis=0).mean() > 5
    assert wood_texture(np.random.default_rng(0), 32).shape == (32, 32, 3)


def test_stamp_paste_lands_in_the_lower_right_quarter():
    grey = np.full((96, 96, 3), 128.0)
    out = paste_rgba(grey, stamp_rgba(96), stamp_origin(96))
    changed = np.argwhere(np.any(out != grey, axis=2))
    assert changed.size
    assert changed[:, 0].min() >= 48 and changed[:, 1].min() >= 48
    # the nominal place: 4 px from the lower and right borders (83 = 96 - 4 - 9)
    assert stamp_origin(96) == (83, 83)
    assert stamp_origin(96, (5, -5)) == (85, 81)  # jitter is clipped to +-2 px


def test_sticker_origin_keeps_the_disc_inside_the_mask():
    # A hand-made 20x20 mask with an 11x11 square: the only fitting place is its corner.
    m = np.zeros((20, 20), bool)
    m[5:16, 5:16] = True
    assert sticker_origin(m, 0.0, 11) == (5, 5)
    assert sticker_origin(m, 0.999, 11) == (5, 5)
    assert sticker_origin(np.zeros((20, 20), bool), 0.5, 11) == (4, 4)


def test_model_input_matches_the_tool_reading_the_png(tmp_path):
    # Reference: the tool's own load_image on the saved file (Pillow bilinear resize).
    from PIL import Image

    rgb, _, _ = render("mug", np.random.default_rng(3), sticker=True)
    Image.fromarray(rgb).save(tmp_path / "m.png")
    assert np.array_equal(to_model_input(rgb), load_image(tmp_path / "m.png", size=(64, 64)))


# ---------------------------------------------------------------------- measured effects


@pytest.mark.parametrize("name", ["baseline", "dropout", "rebalanced"])
def test_effects_in_truth_are_reproduced_from_the_shipped_models(name, truth):
    m = PATHS.models[name]
    got = measure_effects(m.onnx, config_path=m.config, images_root=PATHS.images, truth=truth)
    want = truth["models"][name]["effects"]

    def walk(a, b, where):
        if isinstance(b, dict):
            assert sorted(a) == sorted(b), where
            for k in b:
                walk(a[k], b[k], f"{where}.{k}")
        elif isinstance(b, float):
            assert a == pytest.approx(b, abs=1e-6), where
        else:
            assert a == b, where

    walk(got, want, name)


def test_baseline_shortcuts_are_real_and_rebalanced_is_clean(truth):
    # The demo's promise, read from the measured truth.
    base = truth["models"]["baseline"]["effects"]
    assert base["accuracy"]["audit"]["rate"] >= 0.9
    assert base["transplant"]["stamp"]["after"]["rate"] >= 0.5
    assert base["transplant"]["sticker"]["after"]["rate"] >= 0.5
    assert base["transplant"]["wood"]["after"]["rate"] >= 0.4
    clean = truth["models"]["rebalanced"]["effects"]
    for s in ("stamp", "sticker", "wood"):
        t = clean["transplant"][s]
        assert t["after"]["rate"] - t["before"]["rate"] <= 0.1, s


def test_demo_code_does_not_import_torch():
    code = ("import sys, shortcut_audit.demo, shortcut_audit.demo.build, "
            "shortcut_audit.demo.effects, shortcut_audit.demo.render; "
            "assert 'torch' not in sys.modules")
    subprocess.run([sys.executable, "-c", code], check=True)
