"""Tests of shortcut_audit.dataset: safe decoding, conversion, the one resize, listing."""

from __future__ import annotations

import json
import os
import warnings
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageOps

import bad_inputs as bad
from shortcut_audit.dataset import (
    MAX_PIXELS,
    PIXEL_RESAMPLE,
    ImageEntry,
    ImageRecord,
    Skip,
    fit,
    iter_records,
    load_image,
    load_mask,
)
from shortcut_audit.listing import class_names, list_images
from shortcut_audit.errors import DataError, ImageSkip, UsageError

RED, GREEN, BLUE, WHITE = bad.RED, bad.GREEN, bad.BLUE, bad.WHITE


def _save(array: np.ndarray, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(array).save(path)
    return path


def _half_red(width: int = 40, height: int = 20) -> np.ndarray:
    """Left half red, right half blue."""
    a = np.zeros((height, width, 3), np.uint8)
    a[:, : width // 2] = RED
    a[:, width // 2 :] = BLUE
    return a


# ---------------------------------------------------------------- option checks


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"size": (0, 8)}, r"size must be two positive integers \(height, width\); got \(0, 8\)"),
        ({"size": 8}, r"size must be two positive integers"),
        ({"size": (8, 8), "channels": 4}, r"channels must be 1 \(gray\) or 3 \(RGB\); got 4"),
        ({"size": (8, 8), "resize": "fill"}, r"resize must be one of stretch, crop, pad; got 'fill'"),
        ({"size": (8, 8), "background": (0, 0, 300)}, r"background must be three integers in 0\.\.255"),
    ],
)
def test_load_image_rejects_bad_options(tmp_path, kwargs, match):
    path = bad.make_tiny(tmp_path)
    with pytest.raises(UsageError, match=match):
        load_image(path, **kwargs)


def test_iter_records_checks_options_at_the_call_before_any_decoding():
    with pytest.raises(UsageError, match="channels must be 1"):
        iter_records([], size=(8, 8), channels=2)  # no next(): raised by the call itself
    with pytest.raises(UsageError, match=r"prefetch must be an integer >= 0; got -1"):
        iter_records([], size=(8, 8), prefetch=-1)


# --------------------------------------------------------------- bad image files


def test_zero_byte_file_is_skipped(tmp_path):
    path = bad.make_zero_byte(tmp_path)
    with pytest.raises(ImageSkip, match=r"^file is empty$") as caught:
        load_image(path, size=(8, 8))
    assert caught.value.path == str(path)


def test_missing_file_is_skipped(tmp_path):
    with pytest.raises(ImageSkip, match=r"^file not found$"):
        load_image(tmp_path / "nope.png", size=(8, 8))


@pytest.mark.parametrize("builder", [bad.make_truncated_png, bad.make_truncated_jpeg])
def test_truncated_file_is_skipped(tmp_path, builder):
    with pytest.raises(ImageSkip, match=r"^cannot decode: .*truncated"):
        load_image(builder(tmp_path), size=(8, 8))


def test_text_file_named_png_is_skipped(tmp_path):
    with pytest.raises(ImageSkip, match=r"^cannot decode: not a recognised image format$"):
        load_image(bad.make_text_as_png(tmp_path), size=(8, 8))


def test_png_bomb_far_over_the_limit_is_refused_from_the_header(tmp_path):
    # 50000 x 50000 = 2500 MP: Pillow's own DecompressionBombError, turned into a skip.
    # The IDAT holds 64 bytes, so decoding would fail as "cannot decode": this reason
    # shows the pixels were never decoded.
    path = bad.make_png_bomb(tmp_path)
    with pytest.raises(ImageSkip, match=r"^declared size 2500\.0 MP exceeds the 89\.5 MP limit \(decompression bomb guard\)$"):
        load_image(path, size=(8, 8))


@pytest.mark.filterwarnings("ignore::PIL.Image.DecompressionBombWarning")
def test_png_bomb_just_over_max_pixels_is_refused_by_the_header_check(tmp_path):
    # 10000 x 9000 = 90.0 MP > MAX_PIXELS = 89 478 485 (Pillow's default limit); Pillow
    # only warns here, the tool's own check refuses.
    assert 10_000 * 9_000 > MAX_PIXELS
    path = bad.make_png_bomb(tmp_path, width=10_000, height=9_000)
    with pytest.raises(ImageSkip, match=r"^declared size 10000x9000 \(90\.0 MP\) exceeds the 89\.5 MP limit"):
        load_image(path, size=(8, 8))


def test_png_bomb_when_warnings_are_errors_is_still_a_skip(tmp_path):
    path = bad.make_png_bomb(tmp_path, width=10_000, height=9_000)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(ImageSkip, match=r"^declared size 90\.0 MP exceeds .*decompression bomb guard"):
            load_image(path, size=(8, 8))


def test_float_image_is_skipped_with_what_to_do(tmp_path):
    path = tmp_path / "float.tif"
    Image.fromarray(np.ones((4, 4), np.float32)).save(path)
    with pytest.raises(ImageSkip, match=r"mode F.*save it as 8- or 16-bit"):
        load_image(path, size=(4, 4))


# ------------------------------------------------------------ unusual, still ok


@pytest.mark.parametrize("channels", [1, 3])
def test_16bit_png_is_scaled_by_257_not_clipped(tmp_path, channels):
    # Reference: the 16-bit -> 8-bit mapping v / 257 (65535 / 257 = 255 exactly).
    out = load_image(bad.make_png_16bit(tmp_path), size=(2, 4), channels=channels)
    expected = bad.SIXTEEN_BIT_VALUES.astype(np.float32) / 257
    assert out.shape == (2, 4, channels)
    for c in range(channels):
        np.testing.assert_allclose(out[:, :, c], expected, rtol=1e-6, atol=0)
    assert out.max() == 255.0


def test_16bit_png_padded_for_rgb_gets_the_coloured_background(tmp_path):
    # 4 wide x 2 tall padded into 4 x 4: scale 1, rows 1-2 data, rows 0 and 3 padding.
    out = load_image(bad.make_png_16bit(tmp_path), size=(4, 4), resize="pad", background=(0, 128, 255))
    np.testing.assert_array_equal(out[[0, 3]], np.broadcast_to(np.float32([0, 128, 255]), (2, 4, 3)))
    np.testing.assert_allclose(out[1:3, :, 1], bad.SIXTEEN_BIT_VALUES / 257, rtol=1e-6)


def test_palette_png_transparency_is_composited_on_the_background(tmp_path):
    out = load_image(bad.make_palette_png_transparent(tmp_path), size=(4, 4), background=(0, 128, 255))
    np.testing.assert_array_equal(out[:, :2], np.broadcast_to(np.float32([0, 128, 255]), (4, 2, 3)))
    np.testing.assert_array_equal(out[:, 2:], np.broadcast_to(np.float32(RED), (4, 2, 3)))


def test_rgba_and_la_follow_the_over_operator(tmp_path):
    # Reference: Porter-Duff "over", out = a * fg + (1 - a) * bg, a = alpha / 255.
    rgba = load_image(bad.make_rgba_png(tmp_path, alpha=128), size=(4, 4))
    a = 128 / 255
    np.testing.assert_allclose(rgba[0, 0], [255, (1 - a) * 255, (1 - a) * 255], atol=1)
    la = load_image(bad.make_la_png(tmp_path, gray=0, alpha=64), size=(4, 4), channels=1)
    np.testing.assert_allclose(la[0, 0], [(1 - 64 / 255) * 255], atol=1)


def test_cmyk_jpeg_matches_pillows_own_conversion(tmp_path):
    path = bad.make_cmyk_jpeg(tmp_path)
    out = load_image(path, size=(16, 16))
    with Image.open(path) as im:
        assert im.mode == "CMYK"
        reference = np.asarray(im.convert("RGB"), np.float32)  # reference: PIL convert("RGB")
    np.testing.assert_array_equal(out, reference)


def test_exif_orientation_6_is_applied(tmp_path):
    path = bad.make_exif_rotated_jpeg(tmp_path)
    out = load_image(path, size=(32, 16))  # displayed: 16 wide, 32 tall
    with Image.open(path) as im:
        assert im.size == (32, 16)  # stored: 32 wide, 16 tall
        reference = np.asarray(ImageOps.exif_transpose(im).convert("RGB"), np.float32)
    np.testing.assert_array_equal(out, reference)  # reference: PIL ImageOps.exif_transpose
    # Reference: orientation 6 = rotate 90 degrees clockwise = np.rot90(k=-1); JPEG error
    # of flat 8x8 blocks at quality 95 stays within a few levels.
    np.testing.assert_allclose(out, np.rot90(bad.quadrant_pattern(), k=-1), atol=8)
    np.testing.assert_allclose(out[0, 0], BLUE, atol=8)  # bottom-left quadrant comes to the top-left


@pytest.mark.parametrize("resize", ["stretch", "crop", "pad"])
@pytest.mark.parametrize(("width", "height"), [(1, 1), (5, 3)])
def test_tiny_images_are_upscaled(tmp_path, resize, width, height):
    out = load_image(bad.make_tiny(tmp_path, width=width, height=height, color=BLUE), size=(16, 16),
                     resize=resize, background=BLUE)
    np.testing.assert_array_equal(out, np.broadcast_to(np.float32(BLUE), (16, 16, 3)))


@pytest.mark.parametrize("builder", [bad.make_animated_gif, bad.make_animated_png])
def test_animation_gives_its_first_frame(tmp_path, builder):
    path = builder(tmp_path)
    with Image.open(path) as im:
        assert im.n_frames == 2
    out = load_image(path, size=(8, 8))
    np.testing.assert_array_equal(out, np.broadcast_to(np.float32(RED), (8, 8, 3)))


def test_channels_1_matches_pillows_luma_and_gray_is_repeated_for_rgb(tmp_path):
    rgb = np.random.default_rng(1).integers(0, 256, (6, 9, 3), dtype=np.uint8)
    path = _save(rgb, tmp_path / "rgb.png")
    gray = load_image(path, size=(6, 9), channels=1)
    reference = np.asarray(Image.fromarray(rgb).convert("L"), np.float32)  # reference: PIL convert("L")
    np.testing.assert_array_equal(gray[:, :, 0], reference)
    gray_path = _save(reference.astype(np.uint8), tmp_path / "gray.png")
    repeated = load_image(gray_path, size=(6, 9), channels=3)
    np.testing.assert_array_equal(repeated, np.repeat(gray, 3, axis=2))


# --------------------------------------------------------------------- resize


def test_stretch_equals_pillows_bilinear_resize(tmp_path):
    rgb = np.random.default_rng(2).integers(0, 256, (23, 37, 3), dtype=np.uint8)
    out = load_image(_save(rgb, tmp_path / "n.png"), size=(16, 20), resize="stretch")
    # Reference: PIL Image.resize((W, H), BILINEAR) on the same image.
    reference = Image.fromarray(rgb).resize((20, 16), Image.Resampling.BILINEAR)
    assert out.shape == (16, 20, 3) and out.dtype == np.float32
    np.testing.assert_array_equal(out, np.asarray(reference, np.float32))
    assert PIXEL_RESAMPLE == Image.Resampling.BILINEAR


@pytest.mark.parametrize("transpose", [False, True])
def test_crop_keeps_the_centre_of_the_longer_side(tmp_path, transpose):
    # 40 x 20, left half red: the centre 20 x 20 is columns 10-29, half red, half blue
    # (scale 1, so the crop is exact). Transposed: 20 x 40, top half red.
    a = _half_red()
    if transpose:
        a = a.transpose(1, 0, 2)
    out = load_image(_save(np.ascontiguousarray(a), tmp_path / "h.png"), size=(20, 20), resize="crop")
    if transpose:
        out = out.transpose(1, 0, 2)
    np.testing.assert_array_equal(out[:, :10], np.broadcast_to(np.float32(RED), (20, 10, 3)))
    np.testing.assert_array_equal(out[:, 10:], np.broadcast_to(np.float32(BLUE), (20, 10, 3)))


def test_pad_fits_the_longer_side_and_centres_on_the_background(tmp_path):
    # 40 x 20 -> scale 1/2 -> 20 x 10 pasted at row 5: rows 0-4 and 15-19 are background.
    out = load_image(_save(_half_red(), tmp_path / "h.png"), size=(20, 20), resize="pad", background=GREEN)
    pad = np.broadcast_to(np.float32(GREEN), (5, 20, 3))
    np.testing.assert_array_equal(out[:5], pad)
    np.testing.assert_array_equal(out[15:], pad)
    # Inside, away from the red/blue edge that bilinear filtering blends (columns 9-10):
    np.testing.assert_array_equal(out[5:15, :9], np.broadcast_to(np.float32(RED), (10, 9, 3)))
    np.testing.assert_array_equal(out[5:15, 11:], np.broadcast_to(np.float32(BLUE), (10, 9, 3)))


@pytest.mark.parametrize(("resize", "object_pixels"), [("stretch", 4 * 8), ("crop", 8 * 8), ("pad", 4 * 4)])
def test_mask_and_pixels_share_geometry(tmp_path, resize, object_pixels):
    # 40 x 20 blue image with a red 8 x 8 square at columns 16-23, rows 4-11; the mask is
    # that square. Target 20 x 20. Hand-computed object sizes: stretch halves columns
    # (4 x 8), crop keeps scale 1 and columns 10-29, so all of it (8 x 8), pad halves
    # both (4 x 4).
    img = np.zeros((20, 40, 3), np.uint8)
    img[:] = BLUE
    img[4:12, 16:24] = RED
    msk = np.zeros((20, 40), np.uint8)
    msk[4:12, 16:24] = 255
    root, masks = tmp_path / "data", tmp_path / "masks"
    _save(img, root / "mug" / "a.png")
    _save(msk, masks / "mug" / "a.png")
    entries, _ = list_images(root, masks=masks)
    (record,) = list(iter_records(entries, size=(20, 20), resize=resize, background=(0, 0, 0)))
    assert isinstance(record, ImageRecord)
    red = record.pixels[:, :, 0] > 127
    np.testing.assert_array_equal(record.mask, red)
    assert record.mask.sum() == object_pixels
    # fit itself, on the mask image alone, gives the same array (one resize for both).
    direct = fit(Image.fromarray(msk), (20, 20), resize, resample=Image.Resampling.NEAREST)
    np.testing.assert_array_equal(np.asarray(direct) != 0, record.mask)


def test_load_mask_marks_any_nonzero_pixel(tmp_path):
    # Reference: the definition, object = value != 0 after conversion to gray.
    values = np.array([[0, 1, 128, 255]], np.uint8)
    np.testing.assert_array_equal(
        load_mask(_save(values, tmp_path / "m.png"), size=(1, 4)), [[False, True, True, True]]
    )
    sixteen = np.array([[0, 1, 300, 65535]], np.uint16)
    np.testing.assert_array_equal(
        load_mask(_save(sixteen, tmp_path / "m16.png"), size=(1, 4)), [[False, True, True, True]]
    )


def test_mask_size_unlike_its_image_is_a_skip(tmp_path):
    root, masks = tmp_path / "data", tmp_path / "masks"
    _save(_half_red(), root / "mug" / "a.png")
    _save(np.zeros((10, 10), np.uint8), masks / "mug" / "a.png")
    entries, _ = list_images(root, masks=masks)
    (got,) = list(iter_records(entries, size=(8, 8)))
    assert got == Skip(path="mug/a.png", reason="mask: size 10x10 differs from the image's 40x20; a mask must match its image")


# ---------------------------------------------------------------------- listing


def _tree(root: Path) -> None:
    for rel, color in [("mug/b.png", RED), ("mug/a.jpg", RED), ("mug/studio/c.png", RED),
                       ("bowl/x.PNG", BLUE), ("vase/1.webp", GREEN)]:
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        Image.new("RGB", (4, 4), color).save(path, format="WEBP" if rel.endswith("webp") else None)


def test_folder_per_class_labels_nesting_and_order(tmp_path):
    _tree(tmp_path)
    (tmp_path / "mug" / ".hidden.png").write_bytes(b"junk")  # hidden: passed over
    (tmp_path / "mug" / "notes.txt").write_text("x")  # other extension: passed over
    (tmp_path / ".cache").mkdir()
    Image.new("RGB", (2, 2)).save(tmp_path / ".cache" / "z.png")  # hidden folder
    Image.new("RGB", (2, 2)).save(tmp_path / "loose.png")  # not in a class folder
    entries, skips = list_images(tmp_path)
    assert [(e.path, e.label) for e in entries] == [
        ("bowl/x.PNG", "bowl"), ("mug/a.jpg", "mug"), ("mug/b.png", "mug"),
        ("mug/studio/c.png", "mug"), ("vase/1.webp", "vase"),
    ]
    assert all(e.file.is_absolute() and e.file.is_file() and e.mask_file is None for e in entries)
    assert skips == [Skip(path="loose.png", reason="image is not inside a class folder (expected root/<class>/<image>)")]
    assert class_names(entries) == ("bowl", "mug", "vase")


def test_per_class_keeps_the_first_n_in_path_order(tmp_path):
    _tree(tmp_path)
    entries, _ = list_images(tmp_path, per_class=2)
    assert [e.path for e in entries] == ["bowl/x.PNG", "mug/a.jpg", "mug/b.png", "vase/1.webp"]
    with pytest.raises(UsageError, match=r"per_class must be a positive integer or None; got 0"):
        list_images(tmp_path, per_class=0)


def test_empty_class_folder_is_reported_not_fatal(tmp_path):
    _tree(tmp_path)
    bad.make_empty_class(tmp_path, "plate")
    entries, skips = list_images(tmp_path)
    assert "plate" not in class_names(entries)
    assert skips == [Skip(path="plate/", reason="class folder is empty (no image files)")]


def test_missing_root_and_root_without_images_are_data_errors(tmp_path):
    with pytest.raises(DataError, match=r"image folder '.*nope' does not exist .*one sub-folder per class"):
        list_images(tmp_path / "nope")
    (tmp_path / "mug").mkdir()
    (tmp_path / "mug" / "readme.txt").write_text("x")
    with pytest.raises(DataError, match=r"no usable images found in .*put images \(\.png, .*\) in one sub-folder per class"):
        list_images(tmp_path)


def test_masks_folder_prefers_png_and_a_missing_mask_is_none(tmp_path):
    root, masks = tmp_path / "data", tmp_path / "masks"
    _tree(root)
    for rel in ("mug/b.jpg", "mug/b.png", "mug/studio/c.bmp"):
        path = masks / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        Image.new("L", (4, 4), 255).save(path)
    found = {e.path: e.mask_file for e in list_images(root, masks=masks)[0]}
    assert found["mug/b.png"] == (masks / "mug" / "b.png").absolute()
    assert found["mug/a.jpg"] is None
    assert found["mug/studio/c.png"] == (masks / "mug" / "studio" / "c.bmp").absolute()
    with pytest.raises(DataError, match=r"mask folder '.*' does not exist"):
        list_images(root, masks=tmp_path / "nomasks")


def test_non_utf8_file_name_is_shown_escaped_and_still_opens(tmp_path):
    (tmp_path / "mug").mkdir()
    if bad.make_non_utf8_name(tmp_path / "mug") is None:
        pytest.skip("this file system refuses non-UTF-8 names")
    (entry,), _ = list_images(tmp_path)
    assert entry.path == "mug/" + bad.NON_UTF8_SHOWN
    json.dumps({"path": entry.path}, ensure_ascii=False).encode("utf-8")  # valid UTF-8 text
    assert os.fsencode(entry.file.name) == b"\xff\xfe.png"
    (record,) = list(iter_records([entry], size=(4, 4)))
    np.testing.assert_array_equal(record.pixels[0, 0], GREEN)


def test_symlink_outside_the_root_is_skipped(tmp_path):
    root = tmp_path / "data"
    _tree(root)
    if bad.make_symlink_outside(root / "mug", tmp_path / "outside") is None:
        pytest.skip("symlinks cannot be made here")
    (root / "bowl" / "inside.png").symlink_to(root / "mug" / "b.png")  # inside: followed
    entries, skips = list_images(root)
    assert "bowl/inside.png" in [e.path for e in entries]
    assert skips == [Skip(path="mug/link.png", reason="symlink points outside the dataset root")]


# --------------------------------------------------------------------- manifests


def test_manifest_missing_columns_names_found_and_needed(tmp_path):
    path = bad.make_manifest_missing_columns(tmp_path)
    with pytest.raises(DataError, match=r"needs the columns path,label \(mask optional\); found: file, class; missing: path, label"):
        list_images(tmp_path, manifest=path)


def test_manifest_row_without_a_file_is_skipped(tmp_path):
    entries, skips = list_images(tmp_path, manifest=bad.make_manifest_missing_file(tmp_path))
    assert [(e.path, e.label) for e in entries] == [("mug/a.png", "mug")]
    assert skips == [Skip(path="mug/nope.png", reason="file not found")]


def test_manifest_duplicate_rows_keep_the_first(tmp_path):
    entries, skips = list_images(tmp_path, manifest=bad.make_manifest_duplicate_rows(tmp_path))
    assert [(e.path, e.label) for e in entries] == [("bowl/a.png", "bowl"), ("mug/a.png", "mug")]
    assert skips == [Skip(path="mug/a.png", reason="duplicate row in manifest (first at line 2)")]


def test_manifest_paths_leaving_the_root_are_skipped(tmp_path):
    root = tmp_path / "data"
    entries, skips = list_images(root, manifest=bad.make_manifest_leaving_root(root, tmp_path / "outside"))
    assert [e.path for e in entries] == ["mug/a.png"]
    assert [s.reason for s in skips] == ["path leaves the dataset root"] * 2


def test_manifest_mask_column_empty_label_and_missing_manifest(tmp_path):
    _tree(tmp_path)
    Image.new("L", (4, 4), 255).save(tmp_path / "m.png")
    manifest = bad.write_manifest(tmp_path / "list.csv", ("path", "label", "mask"),
                                  [("mug/b.png", "mug", "m.png"), ("./bowl/x.PNG", "", "")])
    entries, skips = list_images(tmp_path, manifest=manifest)
    assert [(e.path, e.label, e.mask_file) for e in entries] == [
        ("bowl/x.PNG", None, None), ("mug/b.png", "mug", tmp_path / "m.png"),
    ]
    assert skips == [] and class_names(entries) == ("mug",)
    with pytest.raises(DataError, match=r"manifest '.*none\.csv' does not exist; pass a CSV file"):
        list_images(tmp_path, manifest=tmp_path / "none.csv")


# -------------------------------------------------------------------- streaming


@pytest.mark.filterwarnings("ignore::PIL.Image.DecompressionBombWarning")
@pytest.mark.parametrize("prefetch", [0, 3])
def test_mixed_folder_yields_every_good_image_and_skips_every_bad_one(tmp_path, prefetch):
    root = tmp_path / "data"
    root.mkdir()
    expected = bad.build_mixed_folder(root, 9, np.random.default_rng(0))
    entries, skips = list_images(root)
    results = list(iter_records(entries, size=(12, 10), prefetch=prefetch))
    assert [r.path for r in results] == [e.path for e in entries]  # one per entry, in order
    outcome = {s.path: s for s in skips} | {r.path: r for r in results}
    assert sorted(outcome) == sorted(expected)
    for path, (kind, keyword) in expected.items():
        got = outcome[path]
        if kind == "ok":
            assert isinstance(got, ImageRecord), (path, got)
            assert got.pixels.shape == (12, 10, 3) and got.pixels.dtype == np.float32
            assert 0.0 <= got.pixels.min() and got.pixels.max() <= 255.0
        else:
            assert isinstance(got, Skip) and keyword in got.reason, (path, got)


def test_prefetch_gives_the_same_records_in_the_same_order(tmp_path):
    rng = np.random.default_rng(3)
    for i in range(12):
        _save(rng.integers(0, 256, (9, 13, 3), dtype=np.uint8), tmp_path / "bowl" / f"{i:02d}.png")
    entries, _ = list_images(tmp_path)
    plain = list(iter_records(entries, size=(8, 8)))
    ahead = iter_records(entries, size=(8, 8), prefetch=2)
    for want, got in zip(plain, ahead, strict=True):
        assert want.path == got.path
        np.testing.assert_array_equal(want.pixels, got.pixels)
    early = iter_records(entries, size=(8, 8), prefetch=4)
    assert next(early).path == "bowl/00.png"
    early.close()  # stopping early shuts the threads down without decoding the rest


def test_value_types_check_themselves():
    with pytest.raises(ValueError, match="one non-empty line"):
        Skip(path="a.png", reason="two\nlines")
    with pytest.raises(ValueError, match=r"\(H, W, 1\|3\) float32"):
        ImageRecord(path="a.png", label=None, pixels=np.zeros((4, 4, 3), np.uint8), mask=None)
    with pytest.raises(ValueError, match="mask must be"):
        ImageRecord(path="a.png", label=None, pixels=np.zeros((4, 4, 3), np.float32), mask=np.zeros((4, 5), bool))
    assert ImageEntry(path="a.png", label=None, file=Path("/a.png"), mask_file=None).label is None


def test_gray_padding_and_1bit_images_use_pillows_luma(tmp_path):
    # 4 x 2 white image padded to 4 x 4 in gray: the pad is the background's luma, as
    # PIL's RGB -> L conversion gives it (reference: Image.convert("L"), ITU-R 601-2).
    path = tmp_path / "bits.png"
    Image.new("1", (4, 2), 1).save(path)
    out = load_image(path, size=(4, 4), channels=1, resize="pad", background=(0, 128, 255))
    luma = Image.new("RGB", (1, 1), (0, 128, 255)).convert("L").getpixel((0, 0))
    assert luma == 104  # 0.299 * 0 + 0.587 * 128 + 0.114 * 255 = 104.2
    np.testing.assert_array_equal(out[[0, 3], :, 0], np.full((2, 4), 104, np.float32))
    np.testing.assert_array_equal(out[1:3, :, 0], np.full((2, 4), 255, np.float32))


# --------------------------------------------------------------- JPEG draft decoding

def _camera_jpeg(path, orientation: int = 6):
    """A 4000x3000 camera-like JPEG stored turned, with the EXIF tag that turns it back.

    The displayed picture is 3000 wide and 4000 tall: smooth gradients, a red square at
    its top left and a dark disc low on the right, plus fine texture."""
    h, w = 4000, 3000
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    rng = np.random.default_rng(3)
    img = np.stack([90 + 100 * x / w, 60 + 120 * y / h, 140 + 60 * np.sin(x / 300.0)], axis=-1)
    img += rng.normal(0, 6, (h, w, 1))
    img[200:1000, 200:1000] = (230, 20, 20)
    img[((y - 3200) ** 2 + (x - 2200) ** 2) < 500 ** 2] = (20, 20, 30)
    shown = Image.fromarray(np.clip(img, 0, 255).astype(np.uint8))
    stored = shown.transpose(Image.Transpose.ROTATE_90)       # exif_transpose(6) turns it back
    exif = Image.Exif()
    exif[0x0112] = orientation
    stored.save(path, quality=90, exif=exif.tobytes())
    return shown


def test_big_rotated_jpeg_decodes_reduced_with_the_same_orientation_and_pixels(tmp_path):
    path = tmp_path / "camera.jpg"
    shown = _camera_jpeg(path)
    with Image.open(path) as im:
        assert im.size == (4000, 3000)                         # stored landscape
    # Reference: the full decode, turned by Pillow's own exif_transpose, one bilinear resize.
    with Image.open(path) as im:
        full = ImageOps.exif_transpose(im).convert("RGB")
    assert full.size == (3000, 4000)
    for size in ((224, 224), (300, 200)):
        want = np.asarray(full.resize((size[1], size[0]), Image.Resampling.BILINEAR, reducing_gap=None),
                          np.float32)
        got = load_image(path, size=size)
        assert got.shape == (*size, 3)
        diff = np.abs(got - want)
        # The draft decode (1/4 scale by the DCT here) then bilinear, against full decode
        # then bilinear: within 1 level of 255 on average and 8 at any pixel (measured
        # 0.12 and 2 with Pillow 13).
        assert diff.mean() < 1.0, diff.mean()
        assert diff.max() <= 8, diff.max()
        # Orientation: the red square is at the top left, the dark disc low on the right.
        h, w = size
        assert got[int(0.15 * h), int(0.15 * w)].tolist()[0] > 200
        assert got[int(0.8 * h), int(0.73 * w)].max() < 60


def test_draft_keeps_twice_the_model_size(tmp_path):
    # Pillow's draft picks the largest DCT scale whose result keeps the requested size;
    # the request is DRAFT_MARGIN times the model input, turned for orientation 6.
    from shortcut_audit.dataset import DRAFT_MARGIN, _decode
    path = tmp_path / "camera.jpg"
    _camera_jpeg(path)
    for size, expected in (((224, 224), (750, 1000)), ((600, 400), (1500, 2000)),
                           ((1000, 224), (1500, 2000)), ((1600, 1200), (3000, 4000)),
                           # without turning the request, 1/2 scale would leave 1,500 < 2,000 columns
                           ((224, 1000), (3000, 4000))):
        im = _decode(path, size)
        assert im.size == expected, (size, im.size)
        assert im.size[0] >= DRAFT_MARGIN * size[1] or im.size == (3000, 4000)
        assert im.size[1] >= DRAFT_MARGIN * size[0] or im.size == (3000, 4000)
