"""Tests of motifs.py: crops, the appearance descriptor, and the clustering of crops.

The end-to-end check builds, with onnx.helper, a model that keys class 0 to a small
5 x 5 mark placed anywhere (a Conv whose kernel is the mark, a GlobalMaxPool and a
threshold-like scaling), runs the occlusion heatmaps of sensitivity.py on images with
the mark at random places, and asks find_motifs to find the mark again.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from onnx import TensorProto, helper, numpy_helper
from scipy import ndimage
from skimage.feature import match_template

from onnx_builders import OPSET, save
from shortcut_audit.engine import PassEngine
from shortcut_audit.errors import UsageError
from shortcut_audit.model import OnnxClassifier
from shortcut_audit.motifs import (
    DEFAULT_MAX_DISTANCE, Crop, crop_distances, cut_crop, describe_crop, find_motifs,
)
from shortcut_audit.occlusion import Fill, GridPlan
from shortcut_audit.sensitivity import image_job

SIDE = 32
#: The planted mark: a ring with a centre dot (1 = white, 0 = black).
MARK = np.array([[1, 1, 1, 1, 1],
                 [1, 0, 0, 0, 1],
                 [1, 0, 1, 0, 1],
                 [1, 0, 0, 0, 1],
                 [1, 1, 1, 1, 1]], np.float32)


# ------------------------------------------------------------------ test builders

def mark_model(*, side: int = SIDE) -> "onnx.ModelProto":  # noqa: F821
    """Three classes, softmax output, NCHW RGB input in 0..1 (the adapter's default scale).

    ``logit0 = 2 * (max over places of conv(x, K) - 0.6 * r)``, where ``K`` is the mark's
    +-1 pattern made zero-mean, applied to the channel mean, and ``r`` its response to
    the mark itself; so class 0 wins exactly when the mark is (nearly) intact somewhere.
    ``logit1 = 10 (R - B)`` and ``logit2 = 10 (B - R)`` of the image's mean colour.
    """
    k = 2.0 * MARK - 1.0
    k -= k.mean()
    response = float((k * MARK).sum())
    kernel = np.stack([k / 3.0] * 3)[None].astype(np.float32)         # (1, 3, 5, 5)
    colour = np.array([[0, 0, 0], [10, 0, -10], [-10, 0, 10]], np.float32)
    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, side, side])
    y = helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 3])
    nodes = [
        helper.make_node("Conv", ["image", "K"], ["conv"]),
        helper.make_node("GlobalMaxPool", ["conv"], ["peak4"]),
        helper.make_node("Flatten", ["peak4"], ["peak"], axis=1),           # (N, 1)
        helper.make_node("Sub", ["peak", "t"], ["over"]),
        helper.make_node("Mul", ["over", "gain"], ["l0"]),
        helper.make_node("Mul", ["l0", "e0"], ["l0_row"]),                  # (N, 3)
        helper.make_node("ReduceMean", ["image"], ["mean"], axes=[2, 3], keepdims=0),
        helper.make_node("Gemm", ["mean", "CW"], ["l_colour"], transB=1),
        helper.make_node("Add", ["l_colour", "l0_row"], ["logits"]),
        helper.make_node("Softmax", ["logits"], ["scores"], axis=1),
    ]
    inits = [
        numpy_helper.from_array(kernel, "K"),
        numpy_helper.from_array(np.array([[0.6 * response]], np.float32), "t"),
        numpy_helper.from_array(np.array([[2.0]], np.float32), "gain"),
        numpy_helper.from_array(np.array([[1, 0, 0]], np.float32), "e0"),
        numpy_helper.from_array(colour, "CW"),
    ]
    model = helper.make_model(helper.make_graph(nodes, "mark", [x], [y], inits),
                              opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = 9
    return model


def texture(rng: np.random.Generator, tint, *, side: int = SIDE) -> np.ndarray:
    """A smooth random texture around grey 128 (std 20), shifted by ``tint`` per channel."""
    f = ndimage.gaussian_filter(rng.random((side, side, 3)), sigma=(3, 3, 0))
    f = (f - f.mean()) / (f.std() + 1e-9) * 20.0 + 128.0 + np.asarray(tint, float)
    return np.clip(f, 0, 255).astype(np.float32)


def plant(image: np.ndarray, row: int, col: int) -> np.ndarray:
    out = image.copy()
    out[row:row + 5, col:col + 5] = MARK[..., None] * 255.0
    return out


def mark_images(seed: int, *, n_marked: int, n_other: int, fixed: tuple[int, int] | None = None):
    """Class-0 images with the mark (at random places, or at ``fixed``), then class 1 and
    class 2 images (reddish, bluish) without it. Returns (images, labels, mark corners)."""
    rng = np.random.default_rng(seed)
    images, labels, corners = [], [], []
    for _ in range(n_marked):
        r, c = fixed if fixed is not None else (int(v) for v in rng.integers(0, SIDE - 5 + 1, 2))
        images.append(plant(texture(rng, rng.normal(0, 10, 3)), r, c))
        labels.append(0)
        corners.append((r, c))
    for i in range(n_other):
        images.append(texture(rng, [25, 0, -25] if i % 2 == 0 else [-25, 0, 25]))
        labels.append(1 if i % 2 == 0 else 2)
        corners.append(None)
    return images, labels, corners


PLAN = GridPlan(patch=4, stride=2)
FILL = Fill(kind="blur")
MIN_SIDE = 10   # about twice the occlusion patch


def decisive_crops(clf, images, indices):
    """Crops at the decisive boxes of ``images[i]`` for ``i`` in ``indices``."""
    engine = PassEngine(clf.predict, batch_size=64, overlap=False)
    stats = dict(engine.run([(i, image_job(images[i], plan=PLAN, fill=FILL, curves=False))
                             for i in indices]))
    return [cut_crop(images[i], stats[i].decisive_box, index=i, min_side=MIN_SIDE)
            for i in indices if stats[i].decisive_box is not None]


@pytest.fixture(scope="module")
def mark_setup(tmp_path_factory):
    """The mark model and 12 class-0 images with the mark roaming, 8 without."""
    path = save(mark_model(), tmp_path_factory.mktemp("mark") / "mark.onnx")
    clf = OnnxClassifier(path)
    images, labels, corners = mark_images(1, n_marked=12, n_other=8)
    crops = decisive_crops(clf, images, range(12))
    return {"clf": clf, "images": images, "labels": labels, "corners": corners,
            "crops": crops, "motifs": find_motifs(crops, n_images=12)}


# ---------------------------------------------------------------------- cut_crop

def test_cut_crop_widens_a_sliver_to_a_centred_square():
    img = np.arange(8 * 8, dtype=np.float32).reshape(8, 8, 1)
    # box: columns 4..5, rows 4..6 (half-open); widened to 4 x 4 about its centre
    # (row 5, column 4.5): rows floor(5 - 2) = 3..7, columns floor(4.5 - 2) = 2..6
    crop = cut_crop(img, [0.5, 0.5, 0.625, 0.75], index=7, min_side=4)
    assert crop.index == 7
    assert crop.box == [2 / 8, 3 / 8, 6 / 8, 7 / 8]
    assert_allclose(crop.pixels, img[3:7, 2:6])


def test_cut_crop_keeps_an_edge_region_centred():
    img = np.arange(8 * 8 * 3, dtype=np.float32).reshape(8, 8, 3)
    # the corner pixel (7, 7), widened to 4 x 4 about its centre 7.5: rows and columns
    # floor(7.5 - 2) = 5..9; rows and columns 8 lie outside and repeat the edge
    # (numpy.pad mode "edge"); the box is the part inside
    crop = cut_crop(img, [0.875, 0.875, 1.0, 1.0], index=0, min_side=0.5)
    assert crop.pixels.shape == (4, 4, 3)
    assert crop.box == [5 / 8, 5 / 8, 1.0, 1.0]
    assert_allclose(crop.pixels[:3, :3], img[5:8, 5:8])
    assert_allclose(crop.pixels[3, :3], img[7, 5:8])
    assert_allclose(crop.pixels[:, 3], crop.pixels[:, 2])


def test_cut_crop_rejects_a_bad_min_side():
    with pytest.raises(UsageError, match="min_side"):
        cut_crop(np.zeros((8, 8, 1), np.float32), [0, 0, 1, 1], index=0, min_side=0)


# ------------------------------------------------------------------- descriptor

@pytest.mark.parametrize("channels", [1, 3])
def test_descriptor_parts_count_alike(channels):
    # By the definition in describe_crop: three parts, each of unit length scaled by
    # 1/sqrt(3); pixels size^2 * C, histogram 4 * C, HOG 9 orientations x 2 x 2 cells x
    # 3 x 3 blocks = 324 for size 16 (skimage.feature.hog's layout).
    rng = np.random.default_rng(0)
    d = describe_crop((rng.random((12, 9, channels)) * 255).astype(np.float32))
    n_pix, n_hist = 16 * 16 * channels, 4 * channels
    assert d.shape == (n_pix + n_hist + 324,)
    parts = [d[:n_pix], d[n_pix:n_pix + n_hist], d[n_pix + n_hist:]]
    assert_allclose([np.linalg.norm(p) for p in parts], [1 / math.sqrt(3)] * 3, rtol=1e-5)
    # pixels: zero weighted mean under the centre weight exp(-r^2 / (2 (0.2 * 16)^2)),
    # r the distance from the window's centre (15/2, 15/2)
    g = np.arange(16.0)
    w = np.exp(-((g[:, None] - 7.5) ** 2 + (g[None, :] - 7.5) ** 2) / (2 * 3.2 ** 2))
    assert abs(float(parts[0] @ np.repeat(np.sqrt(w).ravel(), channels))) < 1e-5
    assert np.all(parts[1] >= 0)


def test_flat_crop_keeps_only_its_histogram():
    # A flat crop has no contrast and no edges: its pixel and HOG parts are zero, and
    # its histogram (value 40 sits in the first of 4 bins of 64, nearer its centre 32
    # than the next, 96: soft weights 7/8 and 1/8) is the only part left.
    d = describe_crop(np.full((6, 6, 1), 40.0, np.float32))
    assert_allclose(d[:256], 0.0, atol=1e-7)
    assert_allclose(d[260:], 0.0, atol=1e-7)
    hist = d[256:260] / np.linalg.norm(d[256:260])
    assert_allclose(hist, np.array([7, 1, 0, 0]) / math.hypot(7, 1), rtol=1e-5)


def test_distance_forgives_a_small_shift():
    # Two 20 x 20 crops cut one pixel apart from one texture: the descriptor resamples
    # 20 -> 20 (no scaling) and compares windows up to 2 pixels off, so at their best
    # alignment the two describe the same pixels; the centred descriptors differ.
    rng = np.random.default_rng(3)
    tex = (rng.random((24, 24, 3)) * 255).astype(np.float32)
    a = Crop(index=0, pixels=tex[1:21, 1:21], box=[0, 0, 0.5, 0.5])
    b = Crop(index=1, pixels=tex[2:22, 1:21], box=[0, 0, 0.5, 0.5])
    d = crop_distances([a, b])
    direct = float(np.linalg.norm(describe_crop(a.pixels) - describe_crop(b.pixels)))
    assert d[0, 1] < 1e-3
    assert direct > 0.5
    assert d[0, 1] == d[1, 0] and d[0, 0] == 0.0


def test_describe_crop_rejects_a_small_size():
    with pytest.raises(UsageError, match="at least 8"):
        describe_crop(np.zeros((4, 4, 3), np.float32), size=4)


# ------------------------------------------------------------------- clustering

def _hand_crops():
    """Three noisy copies of mark A, three of mark B, two unrelated textures."""
    rng = np.random.default_rng(5)
    a, b = (rng.random((8, 8, 3)) * 255 for _ in range(2))
    crops, k = [], 0
    for mark, x0 in ((a, 0.0), (b, 0.5)):
        for j in range(3):
            px = np.clip(mark + rng.normal(0, 6, mark.shape), 0, 255).astype(np.float32)
            crops.append(Crop(index=k, pixels=px, box=[x0, 0.1 * j, x0 + 0.25, 0.1 * j + 0.25]))
            k += 1
    for _ in range(2):
        crops.append(Crop(index=k, pixels=(rng.random((8, 8, 3)) * 255).astype(np.float32),
                          box=[0.0, 0.0, 0.25, 0.25]))
        k += 1
    return crops


def test_find_motifs_groups_the_alike_crops():
    crops = _hand_crops()
    motifs = find_motifs(crops, n_images=10, min_coverage=0.3)
    assert sorted(sorted(m.members) for m in motifs) == [[0, 1, 2], [3, 4, 5]]
    dist = crop_distances(crops)
    for m in motifs:
        rows = list(m.members)
        sub = dist[np.ix_(rows, rows)]
        # medoid: least summed distance to the others (its definition)
        assert m.medoid == m.members[0] == rows[int(np.argmin(sub.sum(axis=1)))]
        assert m.coverage == pytest.approx(0.3)
        assert m.cohesion == pytest.approx(sub[np.triu_indices(3, 1)].mean())
        assert m.cohesion < DEFAULT_MAX_DISTANCE
        # box centres (x0 + 0.125, 0.125 + 0.1 j), j = 0, 1, 2: mean distance from
        # their mean is (0.1 + 0 + 0.1) / 3 by hand
        assert m.spread == pytest.approx(0.2 / 3)
        assert [b for b in m.boxes] == [crops[r].box for r in rows]


def test_find_motifs_does_not_depend_on_order_and_breaks_ties_by_index():
    crops = _hand_crops()
    shuffled = [crops[i] for i in np.random.default_rng(0).permutation(len(crops))]
    assert find_motifs(shuffled, n_images=10) == find_motifs(crops, n_images=10)
    same = np.full((6, 6, 3), 9.0, np.float32)
    same[2:4, 2:4] = 200.0
    twins = [Crop(index=i, pixels=same, box=[0, 0, 0.2, 0.2]) for i in (4, 2, 9)]
    (m,) = find_motifs(twins, n_images=3)
    assert m.medoid == 2 and m.members == (2, 4, 9)
    assert m.cohesion == 0.0 and m.spread == pytest.approx(0.0, abs=1e-12)


def test_find_motifs_needs_the_stated_coverage():
    crops = _hand_crops()
    assert find_motifs(crops, n_images=20, min_coverage=0.3) == []       # needs 6 of 20
    assert len(find_motifs(crops, n_images=20, min_coverage=0.15)) == 2  # needs 3
    assert find_motifs(crops[:2], n_images=2, min_coverage=0.5) == []    # never fewer than 3


@pytest.mark.parametrize("kwargs,match", [
    ({"n_images": 0}, "n_images must be a whole number"),
    ({"n_images": 3}, r"n_images \(3\) must be at least the number of crops \(8\)"),
    ({"n_images": 10, "min_coverage": 1.5}, r"min_coverage must be a share in \(0, 1\]"),
    ({"n_images": 10, "max_distance": -1.0}, "max_distance must be a positive number"),
])
def test_find_motifs_rejects_bad_arguments(kwargs, match):
    with pytest.raises(UsageError, match=match):
        find_motifs(_hand_crops(), **kwargs)


def test_find_motifs_rejects_repeated_images_and_mixed_channels():
    crops = _hand_crops()
    with pytest.raises(UsageError, match="distinct images"):
        find_motifs(crops + [crops[0]], n_images=20)
    gray = Crop(index=99, pixels=np.zeros((8, 8, 1), np.float32), box=[0, 0, 0.1, 0.1])
    with pytest.raises(UsageError, match="same channel count"):
        find_motifs(crops + [gray], n_images=20)


# ------------------------------------------------- end to end: a roaming mark

def test_the_planted_mark_drives_class_0(mark_setup):
    probs = mark_setup["clf"].predict(np.stack(mark_setup["images"]))
    assert np.argmax(probs, axis=1).tolist() == mark_setup["labels"]


def test_a_roaming_mark_is_found_as_one_motif(mark_setup):
    crops, motifs = mark_setup["crops"], mark_setup["motifs"]
    assert len(crops) == 12              # every class-0 decision hinges on a small region
    assert len(motifs) == 1
    (m,) = motifs
    assert m.coverage >= 0.75
    # the corners were drawn uniformly over 0..27 of 32 px: the centres roam widely
    assert m.spread > 0.15
    # the medoid crop holds the planted mark: the peak of the normalised
    # cross-correlation (skimage.feature.match_template, Lewis 1995) of the mark over
    # the crop's channel mean
    medoid = next(c for c in crops if c.index == m.medoid)
    assert match_template(medoid.pixels.mean(axis=2), MARK).max() > 0.8
    # and every member's box holds its image's mark
    for idx, box in zip(m.members, m.boxes):
        r, c = mark_setup["corners"][idx]
        assert box[0] * SIDE <= c and c + 5 <= box[2] * SIDE + 1
        assert box[1] * SIDE <= r and r + 5 <= box[3] * SIDE + 1


def test_a_mark_at_one_place_has_a_small_spread(mark_setup):
    images, _labels, _corners = mark_images(2, n_marked=6, n_other=0, fixed=(20, 6))
    crops = decisive_crops(mark_setup["clf"], images, range(6))
    (m,) = find_motifs(crops, n_images=6)
    assert len(m.members) >= 5
    assert m.spread < 0.05


def test_unrelated_crops_make_no_motif():
    # crops of independent smooth textures (no mark): no cluster of 4 or more within the cut
    rng = np.random.default_rng(4)
    crops = [cut_crop(texture(rng, rng.normal(0, 10, 3)), [0.3, 0.3, 0.6, 0.6], index=i,
                      min_side=MIN_SIDE) for i in range(12)]
    assert find_motifs(crops, n_images=12) == []
