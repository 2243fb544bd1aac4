"""Tests of shortcut_audit.model, the ONNX model adapter.

The models are built with onnx.helper (tests/onnx_builders.py) as closed-form functions
of the pixels, so every expected score is computed here with numpy from the formula
the model implements; each test names its reference in a comment.
"""

from __future__ import annotations

import hashlib
import json
import warnings
from pathlib import Path

import numpy as np
import onnx_builders as ob
import pytest

from shortcut_audit import model as model_module
from shortcut_audit.errors import ModelError, UsageError
from shortcut_audit.model import (
    LUMA_WEIGHTS,
    METADATA_KEY,
    Classifier,
    ModelConfig,
    OnnxClassifier,
    parse_numbers,
    parse_size,
    read_labels,
    read_model_config,
)

K, C, H, W = 4, 3, 5, 6
MEAN = (0.485, 0.456, 0.406)
STD = (0.229, 0.224, 0.225)


def softmax(z: np.ndarray) -> np.ndarray:
    """Closed form: exp(z_k) / sum_j exp(z_j), row-wise."""
    e = np.exp(z - z.max(axis=1, keepdims=True))
    return e / e.sum(axis=1, keepdims=True)


def sigmoid(z: np.ndarray) -> np.ndarray:
    """Closed form: 1 / (1 + exp(-z))."""
    return 1.0 / (1.0 + np.exp(-z))


@pytest.fixture(scope="module")
def weights() -> tuple[np.ndarray, np.ndarray]:
    return ob.random_linear(K, C, H, W, seed=3, scale=4.0)


@pytest.fixture(scope="module")
def pixels() -> np.ndarray:
    # 7 images: not a multiple of the batch size 3 used below, so chunking is exercised
    return np.random.default_rng(11).uniform(0, 255, size=(7, H, W, C)).astype(np.float32)


def load(path: Path, **settings) -> OnnxClassifier:
    """An OnnxClassifier with a fixed batch size (skips the timing) unless overridden."""
    settings.setdefault("batch_size", 3)
    return OnnxClassifier(path, ModelConfig(**settings))


def write(tmp_path: Path, model, name: str = "m.onnx", **kwargs) -> Path:
    return ob.save(model, tmp_path / name, **kwargs)


# ---------------------------------------------------------------- closed-form scores

@pytest.mark.parametrize("layout", ["nchw", "nhwc"])
def test_predict_equals_softmax_of_linear_scores(tmp_path, weights, pixels, layout):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W, layout=layout))
    clf = load(path)
    assert (clf.layout, clf.height, clf.width, clf.channels) == (layout, H, W, 3)
    assert clf.output_kind == "logits"
    # reference: closed form softmax(W . flatten_nchw(x / 255) + b), default scale 1/255
    z = ob.reference_logits(w, b, pixels / 255.0)
    np.testing.assert_allclose(clf.logits(pixels), z, atol=1e-5)
    np.testing.assert_allclose(clf.predict(pixels), softmax(z), atol=1e-5)
    assert clf.predict(pixels).dtype == np.float32


@pytest.mark.parametrize("layout", ["nchw", "nhwc"])
def test_mean_std_from_config_toml_and_metadata_agree(tmp_path, weights, pixels, layout):
    w, b = weights
    model = ob.linear_model(w, b, height=H, width=W, layout=layout)
    plain = write(tmp_path, model, "plain.onnx")
    meta = write(tmp_path, model, "meta.onnx", metadata={"mean": list(MEAN), "std": list(STD)})
    toml = tmp_path / "model.toml"
    toml.write_text(f'mean = "{",".join(map(str, MEAN))}"\nstd = {list(STD)}\n', encoding="utf-8")

    by_config = load(plain, mean=MEAN, std=STD).predict(pixels)
    by_toml = OnnxClassifier(plain, ModelConfig(batch_size=3).merged_over(read_model_config(toml)))
    by_meta = load(meta)
    # reference: closed form softmax(W . flatten((x/255 - mean) / std) + b)
    x = (pixels / 255.0 - np.array(MEAN)) / np.array(STD)
    expected = softmax(ob.reference_logits(w, b, x))
    np.testing.assert_allclose(by_config, expected, atol=1e-5)
    np.testing.assert_allclose(by_toml.predict(pixels), by_config, atol=1e-6)
    np.testing.assert_allclose(by_meta.predict(pixels), by_config, atol=1e-6)
    assert by_meta.mean == MEAN and by_meta.std == STD


def test_config_wins_over_metadata_field_by_field(tmp_path, weights, pixels):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W),
                 metadata={"mean": 0.5, "std": 0.25, "scale": 1.0})
    clf = load(path, mean=0.1)  # mean from config, std and scale from metadata
    assert (clf.scale, clf.mean, clf.std) == (1.0, (0.1,) * 3, (0.25,) * 3)
    # reference: closed form with scale 1, mean 0.1, std 0.25
    expected = softmax(ob.reference_logits(w, b, (pixels - 0.1) / 0.25))
    np.testing.assert_allclose(clf.predict(pixels), expected, atol=1e-5)


# ---------------------------------------------------------------- batching

def test_fixed_batch_of_one_matches_dynamic_and_warns_once(tmp_path, weights, pixels):
    w, b = weights
    dyn = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W), "dyn.onnx"))
    one = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W, batch=1), "one.onnx"),
               batch_size=None)
    assert (one.dynamic_batch, one.fixed_batch, one.batch_size) == (False, 1, 1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        first = one.predict(pixels)
        second = one.predict(pixels[:3])
    slow = [c for c in caught if "fixed batch of 1" in str(c.message)]
    assert len(slow) == 1
    # reference: the same model with a dynamic batch
    np.testing.assert_allclose(first, dyn.predict(pixels), atol=1e-6)
    np.testing.assert_allclose(second, first[:3], atol=1e-6)


def test_fixed_batch_of_n_pads_the_last_chunk(tmp_path, weights, pixels):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W, batch=4))
    with pytest.warns(UserWarning, match=r"fixed batch of 4; ignoring --batch-size 3"):
        fixed = load(path)
    assert (fixed.fixed_batch, fixed.batch_size) == (4, 4)
    # reference: closed form; 7 images = one full batch of 4 + 3 padded to 4
    expected = softmax(ob.reference_logits(w, b, pixels / 255.0))
    out = fixed.predict(pixels)
    assert out.shape == (7, K)
    np.testing.assert_allclose(out, expected, atol=1e-5)


def test_empty_batch_gives_zero_rows(tmp_path, weights):
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W)))
    assert clf.predict(np.zeros((0, H, W, C), np.float32)).shape == (0, K)


def test_measured_batch_size_is_a_candidate_under_the_memory_cap(tmp_path, weights, monkeypatch):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W))
    # cap at 10 images of float32 input: reference is the rule min(candidate, cap)
    monkeypatch.setattr(model_module, "MAX_BATCH_BYTES", H * W * C * 4 * 10)
    clf = OnnxClassifier(path)
    assert clf.batch_size in {1, 8, 10}
    assert clf.config.batch_size == clf.batch_size


# ---------------------------------------------------------------- output kinds

@pytest.mark.parametrize("output", ["logits", "probs", "sigmoid"])
def test_output_kind_is_detected(tmp_path, weights, pixels, output):
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W, output=output)))
    assert clf.output_kind == output
    z = ob.reference_logits(w, b, pixels / 255.0)
    # reference: closed form of what each graph computes; predict gives probabilities
    expected_probs = sigmoid(z) if output == "sigmoid" else softmax(z)
    np.testing.assert_allclose(clf.predict(pixels), expected_probs, atol=1e-5)
    # logits(): z itself, log softmax(z) = z - logsumexp(z), or logit(sigmoid(z)) = z
    expected_logits = np.log(softmax(z)) if output == "probs" else z
    np.testing.assert_allclose(clf.logits(pixels), expected_logits, atol=1e-4)


@pytest.mark.parametrize("output", ["logits", "probs", "sigmoid"])
def test_probabilities_come_back_from_logits_without_a_pass(tmp_path, weights, pixels, output):
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W, output=output)))
    back = clf.probs_from_logits(clf.logits(pixels))
    # reference: the closed-form probabilities of the graph (as in the test above)
    z = ob.reference_logits(w, b, pixels / 255.0)
    np.testing.assert_allclose(back, sigmoid(z) if output == "sigmoid" else softmax(z), atol=1e-5)
    if output == "logits":      # the same softmax of the same scores: identical
        np.testing.assert_array_equal(back, clf.predict(pixels))
    else:
        np.testing.assert_allclose(back, clf.predict(pixels), rtol=1e-6, atol=1e-7)


def test_output_kind_override(tmp_path, weights, pixels):
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W, output="probs")),
               output="logits")
    assert clf.output_kind == "logits"
    # reference: treated as logits, predict is softmax of the model's probabilities
    p = softmax(ob.reference_logits(w, b, pixels / 255.0))
    np.testing.assert_allclose(clf.predict(pixels), softmax(p), atol=1e-5)


# ---------------------------------------------------------------- channels and dtypes

def test_bgr_reverses_the_channels(tmp_path, weights, pixels):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W))
    bgr = load(path, channels="bgr", mean=MEAN, std=STD)
    rgb = load(path, mean=MEAN[::-1], std=STD[::-1])
    assert bgr.color == "bgr"
    # reference 1: the same model read as rgb, fed the flipped pixels (mean/std flipped too,
    # as they are given in RGB order)
    np.testing.assert_allclose(bgr.predict(pixels), rgb.predict(pixels[..., ::-1]), atol=1e-6)
    # reference 2: closed form, normalise in RGB order then reverse the channel axis
    x = ((pixels / 255.0 - np.array(MEAN)) / np.array(STD))[..., ::-1]
    np.testing.assert_allclose(bgr.predict(pixels), softmax(ob.reference_logits(w, b, x)), atol=1e-5)


def test_gray_model_takes_luma_of_rgb(tmp_path, pixels):
    w, b = ob.random_linear(K, 1, H, W, seed=5, scale=4.0)
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W, channels=1)))
    assert (clf.channels, clf.color) == (1, "gray")
    # reference: ITU-R BT.601 luma Y = 0.299 R + 0.587 G + 0.114 B
    luma = pixels @ np.array([0.299, 0.587, 0.114])
    assert LUMA_WEIGHTS == (0.299, 0.587, 0.114)
    expected = softmax(ob.reference_logits(w, b, luma[..., None] / 255.0))
    np.testing.assert_allclose(clf.predict(pixels), expected, atol=1e-5)
    np.testing.assert_allclose(clf.predict(luma[..., None].astype(np.float32)), expected, atol=1e-5)


def test_uint8_model_gets_rounded_pixels_without_normalisation(tmp_path, weights, pixels):
    w, b = ob.random_linear(K, C, H, W, seed=3, scale=4.0 / 255.0)
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W, input_dtype="uint8")))
    assert clf.input_dtype == np.uint8
    shifted = pixels.copy()
    shifted[0, 0, 0] = [300.0, -4.0, 12.5]  # out of range and a half: clipped, rounded
    # reference: closed form W . round(clip(x, 0, 255)) + b (numpy rounds half to even)
    expected = ob.reference_logits(w, b, np.rint(np.clip(shifted, 0, 255)))
    np.testing.assert_allclose(clf.logits(shifted), expected, atol=1e-4)
    with pytest.warns(UserWarning, match="ignored"):
        with_mean = load(clf.path, mean=0.5)
    np.testing.assert_allclose(with_mean.logits(shifted), expected, atol=1e-4)


@pytest.mark.parametrize(("dtype", "tol"), [("float64", 1e-5), ("float16", 2e-3)])
def test_float16_and_float64_inputs(tmp_path, weights, pixels, dtype, tol):
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W, input_dtype=dtype)))
    # reference: closed form; float16 rounds inputs to 11 significant bits
    expected = softmax(ob.reference_logits(w, b, pixels / 255.0))
    np.testing.assert_allclose(clf.predict(pixels), expected, atol=tol)


def test_dynamic_size_needs_size(tmp_path, weights, pixels):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W, dynamic_size=True))
    with pytest.raises(ModelError, match=r"dynamic height or width; pass --size HxW"):
        load(path)
    clf = load(path, size=(H, W))
    # reference: closed form at the given size
    expected = softmax(ob.reference_logits(w, b, pixels / 255.0))
    np.testing.assert_allclose(clf.predict(pixels), expected, atol=1e-5)


def test_size_differing_from_fixed_graph_size(tmp_path, weights):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W))
    with pytest.raises(ModelError, match=r"fixed size 5x6 but --size is 8x8"):
        load(path, size=(8, 8))


def test_ambiguous_layout_needs_layout(tmp_path):
    w, b = ob.random_linear(2, 3, 8, 3)
    path = write(tmp_path, ob.linear_model(w, b, height=8, width=3))  # shape [N, 3, 8, 3]
    with pytest.raises(ModelError, match=r"could be NCHW or NHWC; pass --layout nchw or --layout nhwc"):
        load(path)
    clf = load(path, layout="nchw")
    assert (clf.layout, clf.height, clf.width) == ("nchw", 8, 3)


def test_channel_and_mean_mismatches(tmp_path, weights):
    w, b = weights
    rgb = write(tmp_path, ob.linear_model(w, b, height=H, width=W), "rgb.onnx")
    with pytest.raises(ModelError, match=r"--channels gray does not fit .* 3 channels; pass --channels rgb or bgr"):
        load(rgb, channels="gray")
    wg, bg = ob.random_linear(K, 1, H, W)
    gray = write(tmp_path, ob.linear_model(wg, bg, height=H, width=W, channels=1), "gray.onnx")
    with pytest.raises(ModelError, match=r"--mean has 3 numbers but gray.onnx takes 1 channel"):
        load(gray, mean=MEAN)


def test_batch_of_wrong_size_is_a_usage_error(tmp_path, weights):
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W)))
    with pytest.raises(UsageError, match=r"must have shape \(N, 5, 6, 3\).*got \(2, 6, 5, 3\)"):
        clf.predict(np.zeros((2, 6, 5, 3), np.float32))


# ---------------------------------------------------------------- labels

def test_label_precedence(tmp_path, weights):
    w, b = weights
    model = ob.linear_model(w, b, height=H, width=W)
    names = ("mug", "bowl", "vase", "plate")
    plain = write(tmp_path, model, "plain.onnx")
    meta = write(tmp_path, model, "meta.onnx", metadata={"labels": ["m0", "m1", "m2", "m3"]})
    data = ["d0", "d1", "d2", "d3"]
    assert load(plain).labels == ("class_0", "class_1", "class_2", "class_3")
    assert OnnxClassifier(plain, ModelConfig(batch_size=2), dataset_labels=data).labels == tuple(data)
    assert OnnxClassifier(meta, ModelConfig(batch_size=2), dataset_labels=data).labels == ("m0", "m1", "m2", "m3")
    cfg = ModelConfig(batch_size=2, labels=names)
    assert OnnxClassifier(meta, cfg, dataset_labels=data).labels == names


def test_label_count_mismatch_messages(tmp_path, weights):
    w, b = weights
    model = ob.linear_model(w, b, height=H, width=W)
    plain = write(tmp_path, model, "plain.onnx")
    exact = "--labels has 3 names but the model has 4 outputs; give one name per output, in output order."
    with pytest.raises(ModelError) as info:
        load(plain, labels=("mug", "bowl", "vase"))
    assert str(info.value) == exact
    meta = write(tmp_path, model, "meta.onnx", metadata={"labels": ["a", "b"]})
    with pytest.raises(ModelError, match=r"'labels' in the model's 'shortcut_audit' metadata has 2 names"):
        load(meta)
    with pytest.raises(ModelError, match=r"the dataset has 5 classes but the model has 4 outputs; pass --labels"):
        OnnxClassifier(plain, ModelConfig(batch_size=2), dataset_labels=list("abcde"))


def test_read_labels(tmp_path):
    path = tmp_path / "labels.txt"
    path.write_bytes("\ufeffmug\n\n  bowl \r\nvase\n\n".encode("utf-8"))
    # reference: the file's non-blank lines, stripped (the UTF-8 BOM dropped)
    assert read_labels(path) == ("mug", "bowl", "vase")
    (tmp_path / "bad.txt").write_bytes(b"\xff\xfemug")
    with pytest.raises(UsageError, match="is not UTF-8 text"):
        read_labels(tmp_path / "bad.txt")
    with pytest.raises(UsageError, match="does not exist"):
        read_labels(tmp_path / "none.txt")


# ---------------------------------------------------------------- bad models

def test_missing_file_is_a_usage_error(tmp_path):
    with pytest.raises(UsageError, match=r"does not exist; pass the path of a .onnx file"):
        OnnxClassifier(tmp_path / "nope.onnx")


@pytest.mark.parametrize("content", [b"", b"not a model at all\n", bytes(range(256))])
def test_not_an_onnx_file(tmp_path, content):
    path = tmp_path / "junk.onnx"
    path.write_bytes(content)
    with pytest.raises(ModelError, match=r"junk.onnx is not an ONNX model onnxruntime can load: .+\. Pass the path of a .onnx file\.$"):
        OnnxClassifier(path)


@pytest.mark.parametrize("location", ["../outside.bin", "sub/../../outside.bin", "ABSOLUTE"])
def test_external_data_outside_the_folder_is_refused_before_onnxruntime(tmp_path, location, monkeypatch):
    import onnxruntime

    if location == "ABSOLUTE":
        location = str(tmp_path / "abs.bin")
    path = ob.external_data_model(tmp_path / "models", location=location)
    calls = []
    monkeypatch.setattr(onnxruntime, "InferenceSession", lambda *a, **k: calls.append(a))
    with pytest.raises(ModelError, match=r"in external data at .*outside the model's folder"):
        OnnxClassifier(path)
    assert calls == []  # refused before a session was created


def test_external_data_symlink_out_of_the_folder_is_refused(tmp_path):
    (tmp_path / "models").mkdir()
    (tmp_path / "secret.bin").write_bytes(np.ones(24, np.float32).tobytes())
    (tmp_path / "models" / "w.bin").symlink_to(tmp_path / "secret.bin")
    path = ob.external_data_model(tmp_path / "models", location="w.bin", write_data=False)
    with pytest.raises(ModelError, match="outside the model's folder"):
        OnnxClassifier(path)


def test_external_data_file_missing(tmp_path):
    path = ob.external_data_model(tmp_path, location="gone.bin", write_data=False)
    with pytest.raises(ModelError, match=r"external data file 'gone.bin', which is not in the model's folder"):
        OnnxClassifier(path)


def test_external_data_inside_the_folder_loads(tmp_path):
    path = ob.external_data_model(tmp_path, location="data/weights.bin")
    clf = load(path)
    x = np.full((1, 2, 2, 3), 51.0, np.float32)
    # reference: closed form logit_k = 4 (k + 1) mean(x / 255), mean = 51/255 = 0.2
    assert clf.output_kind == "logits"
    np.testing.assert_allclose(clf.logits(x), [[0.8, 1.6]], atol=1e-6)


@pytest.mark.parametrize(
    ("builder", "pattern"),
    [
        (ob.two_input_model, r"has 2 inputs \('a', 'b'\); the tool needs exactly one"),
        (ob.rank2_input_model, r"input 'features' has shape \[N, 12\] \(rank 2\); the tool needs an image input of rank 4"),
        (ob.rank3_output_model, r"output 'scores' has shape \[N, 1, 2\] \(rank 3.*needs an output of shape \(N, K\)"),
        (lambda: ob.rank3_output_model(declare_shape=False), r"output 'scores' has shape .*needs an output of shape \(N, K\)"),
        (lambda: ob.linear_model(*ob.random_linear(2, 5, 4, 4), height=4, width=4, channels=5),
         r"no channel dimension of 1 or 3"),
        (lambda: ob.linear_model(*ob.random_linear(1, 3, 4, 4), height=4, width=4),
         r"gives 1 score per image; the tool needs one score per class \(2 or more\)"),
        (lambda: ob.nan_model(-1.0), r"NaN or infinite scores for every test image"),
    ],
    ids=["two-inputs", "rank2-input", "rank3-output", "rank3-undeclared", "five-channels",
         "one-output", "all-nan"],
)
def test_bad_models(tmp_path, builder, pattern):
    path = write(tmp_path, builder())
    with pytest.raises(ModelError, match=pattern):
        load(path)


def test_nan_for_some_images_only_gives_nan_rows(tmp_path):
    clf = load(write(tmp_path, ob.nan_model(0.9)))  # random test images have mean ~0.5
    x = np.stack([np.full((4, 4, 3), 51.0), np.full((4, 4, 3), 255.0)]).astype(np.float32)
    z = clf.logits(x)
    # reference: scores = m * (k + 1) + log(0.9 - m) with m = mean(x / 255) = 0.2; m = 1 -> NaN
    np.testing.assert_allclose(z[0], 0.2 * np.arange(1, 4) + np.log(0.7), atol=1e-5)
    assert np.isnan(z[1]).all() and np.isnan(clf.predict(x)[1]).all()


# ---------------------------------------------------------------- metadata

@pytest.mark.parametrize(
    ("metadata", "pattern"),
    [
        ("{not json", r"malformed 'shortcut_audit' metadata: not JSON"),
        ({"labels_file": "labels.txt"}, r"unknown key 'labels_file'"),
        ({"colour": "rgb"}, r"unknown key 'colour'; allowed keys: labels, layout"),
        ({"layout": "nwhc"}, r"'layout' in the model's 'shortcut_audit' metadata must be one of nchw, nhwc"),
        (["rgb"], r"must be a table of model settings"),
    ],
)
def test_malformed_metadata(tmp_path, weights, metadata, pattern):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W), metadata=metadata)
    with pytest.raises(ModelError, match=pattern) as info:
        OnnxClassifier(path)
    assert "--model-config" in str(info.value)
    # with settings given, the metadata is ignored with a warning
    with pytest.warns(UserWarning, match="Ignoring the metadata"):
        clf = load(path)
    assert clf.layout == "nchw"


# ---------------------------------------------------------------- configuration

def test_read_model_config_keys(tmp_path):
    (tmp_path / "names.txt").write_text("mug\nbowl\n", encoding="utf-8")
    path = tmp_path / "m.toml"
    path.write_text(
        'labels_file = "names.txt"\nlayout = "NHWC"\nsize = [64, 48]\nscale = 1.0\n'
        'mean = 0.5\nstd = [0.2, 0.3, 0.4]\nchannels = "bgr"\nresize = "pad"\n'
        'output = "probs"\nthreads = 2\nbatch_size = 16\n',
        encoding="utf-8",
    )
    # reference: the values written above, in canonical form
    assert read_model_config(path) == ModelConfig(
        labels=("mug", "bowl"), layout="nhwc", size=(64, 48), scale=1.0, mean=(0.5,),
        std=(0.2, 0.3, 0.4), channels="bgr", resize="pad", output="probs", threads=2,
        batch_size=16,
    )


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ('colour = "rgb"\n', r"m.toml has unknown key 'colour'; allowed keys: labels, labels_file, layout"),
        ('size = "64"\n', r"'size' in m.toml must be HxW"),
        ("size = [64, 0]\n", r"'size' in m.toml must be HxW"),
        ("mean = [0.1, 0.2]\n", r"'mean' in m.toml must be one number or 3"),
        ("std = 0\n", r"'std' in m.toml must be one positive number or 3"),
        ('labels = ["a"]\nlabels_file = "x.txt"\n', r"sets both 'labels' and 'labels_file'"),
        ('labels_file = "missing.txt"\n', r"labels file .*missing.txt' does not exist"),
        ("threads = 0\n", r"'threads' in m.toml must be a whole number of at least 1"),
        ("layout = [\n", r"is not valid UTF-8 TOML"),
    ],
)
def test_read_model_config_errors(tmp_path, text, pattern):
    path = tmp_path / "m.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(UsageError, match=pattern):
        read_model_config(path)


def test_read_model_config_missing_file(tmp_path):
    with pytest.raises(UsageError, match=r"--model-config file .* does not exist"):
        read_model_config(tmp_path / "none.toml")


@pytest.mark.parametrize(
    ("field", "value", "pattern"),
    [
        ("layout", "nwhc", r"--layout must be one of nchw, nhwc; got 'nwhc'"),
        ("channels", "rgba", r"--channels must be one of rgb, bgr, gray"),
        ("resize", "fit", r"--resize must be one of stretch, crop, pad"),
        ("output", "softmax", r"--output must be one of probs, logits, sigmoid"),
        ("scale", -1.0, r"--scale must be a positive number"),
        ("mean", (0.1, float("nan"), 0.2), r"--mean must be one number or 3"),
        ("batch_size", 1.5, r"--batch-size must be a whole number of at least 1; got 1.5"),
        ("labels", "mug", r"--labels must be a list of class names"),
        ("labels", ("mug", "mug"), r"--labels names 'mug' twice"),
        ("size", (224,), r"--size must be HxW"),
    ],
)
def test_model_config_validation(field, value, pattern):
    with pytest.raises(UsageError, match=pattern):
        ModelConfig(**{field: value})


def test_merged_over_and_parsers():
    low = ModelConfig(layout="nhwc", scale=1.0, mean=(0.1, 0.2, 0.3))
    high = ModelConfig(layout="nchw", std=2.0)
    merged = high.merged_over(low)
    # reference: fields set in `high` win, the rest come from `low`
    assert merged == ModelConfig(layout="nchw", scale=1.0, mean=(0.1, 0.2, 0.3), std=(2.0,))
    assert parse_size(" 224X160 ") == (224, 160)
    assert parse_numbers("0.485,0.456, 0.406", name="mean") == (0.485, 0.456, 0.406)
    with pytest.raises(UsageError, match=r"--size must be HxW.*got '224'"):
        parse_size("224")
    with pytest.raises(UsageError, match=r"--std must be one number or comma-separated numbers.*got '0.2,,0.3'"):
        parse_numbers("0.2,,0.3", name="std")


# ---------------------------------------------------------------- describe, throughput

def test_describe_is_json_and_matches_the_model(tmp_path, weights):
    w, b = weights
    path = write(tmp_path, ob.linear_model(w, b, height=H, width=W, layout="nhwc", output="probs"))
    clf = load(path, labels=("mug", "bowl", "vase", "plate"), mean=0.5, threads=1)
    info = json.loads(json.dumps(clf.describe()))
    assert info["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()  # reference: hashlib
    assert info["input"] == {
        "name": "image", "layout": "nhwc", "size": [H, W], "channels": 3, "color": "rgb",
        "dtype": "float32", "dynamic_batch": True, "fixed_batch": None, "scale": 1 / 255,
        "mean": [0.5, 0.5, 0.5], "std": [1.0, 1.0, 1.0], "resize": "stretch",
    }
    assert info["output"] == {"name": "scores", "kind": "probs", "n_classes": K}
    assert (info["labels"], info["batch_size"], info["threads"]) == (["mug", "bowl", "vase", "plate"], 3, 1)
    assert clf.config.output == "probs" and clf.config.mean == (0.5, 0.5, 0.5)
    assert isinstance(clf, Classifier)


def test_measure_throughput_is_positive(tmp_path, weights):
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W)))
    assert clf.measure_throughput(seconds=0.05) > 0
    assert clf.measure_throughput(seconds=0.05, batch_size=2) > 0
    with pytest.raises(UsageError, match="seconds must be a positive number"):
        clf.measure_throughput(seconds=0)


def test_metadata_key_is_the_documented_one():
    assert METADATA_KEY == "shortcut_audit"


def test_measured_batch_size_is_the_largest_near_the_fastest(tmp_path, weights, monkeypatch):
    # A fake session on a fake clock: seconds per call = per_image[size] * size, so the
    # rates (images per second) are 1 / per_image. Worked example of the rule: the
    # fastest is 8 (100/s); 16 (90/s) is within BATCH_KEEP = 0.85 of it, 32 (80/s) is not.
    w, b = weights
    clf = load(write(tmp_path, ob.linear_model(w, b, height=H, width=W)))
    per_image = {8: 1 / 100, 16: 1 / 90, 32: 1 / 80, 64: 1 / 50}
    clock = [0.0]

    class Session:
        def run(self, names, feed):
            n = len(next(iter(feed.values())))
            clock[0] += per_image[n] * n
            return [np.zeros((n, K), np.float32)]

    monkeypatch.setattr(clf, "_session", Session())
    monkeypatch.setattr(model_module.time, "perf_counter", lambda: clock[0])
    assert model_module.BATCH_KEEP == 0.85
    assert clf._measure_batch_size() == 16
    per_image[32] = 1 / 86          # now within 0.85 of the fastest
    assert clf._measure_batch_size() == 32
