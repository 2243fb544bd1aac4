"""The occlusion heatmap through onnxruntime, checked against references outside the tool.

- A linear model built with onnx.helper: the grid heatmap in logit mode equals the
  closed form (Zeiler and Fergus 2014's definition plus linearity), to 1e-5.
- scikit-learn's bundled digits data set and a LogisticRegression converted with
  skl2onnx: the tool's score drops equal scikit-learn's own predict_proba on the same
  occluded arrays, to 1e-5.
- The same model in NCHW and NHWC form, with or without mean/std normalisation, and
  with a fixed batch of 1, gives the same heatmap.
"""

import warnings

import numpy as np
import onnx
import pytest
from numpy.testing import assert_allclose
from onnx import TensorProto, helper

from onnx_builders import linear_model, save
from shortcut_audit.model import ModelConfig, OnnxClassifier
from shortcut_audit.occlusion import Fill, GridPlan, RandomPatchPlan
from shortcut_audit.scan import make_scorer
from shortcut_audit.sensitivity import occlusion_heatmap

H = W = 12


def closed_form(w_t, x_model, f_model, patch, stride, h, w):
    """Mean over covering patches of sum_{patch} w . (x - f), by explicit loops."""
    def starts(side):
        s = list(range(0, side - patch + 1, stride))
        return s if s[-1] == side - patch else s + [side - patch]
    c = x_model.shape[2]
    wt = w_t.reshape(c, h, w).transpose(1, 2, 0)     # NCHW-flattened weights -> (H, W, C)
    acc, cnt = np.zeros((h, w)), np.zeros((h, w))
    for r in starts(h):
        for q in starts(w):
            d = float((wt[r:r + patch, q:q + patch] * (x_model - f_model)[r:r + patch, q:q + patch]).sum())
            acc[r:r + patch, q:q + patch] += d
            cnt[r:r + patch, q:q + patch] += 1
    return acc / cnt


@pytest.fixture(scope="module")
def linear(tmp_path_factory):
    rng = np.random.default_rng(0)
    w = rng.normal(size=(4, 3 * H * W)).astype(np.float32) * 0.05
    b = rng.normal(size=4).astype(np.float32)
    x = (rng.random((H, W, 3)) * 255).astype(np.float32)
    return tmp_path_factory.mktemp("lin"), w, b, x


def test_linear_onnx_logit_heatmap_equals_closed_form(linear):
    tmp, w, b, x = linear
    path = save(linear_model(w, b, height=H, width=W), tmp / "lin.onnx")
    clf = OnnxClassifier(path, ModelConfig(batch_size=16))
    fill = Fill(kind="constant", value=40.0)
    hm = occlusion_heatmap(make_scorer(clf, "logit"), x, plan=GridPlan(patch=3, stride=2),
                           fill=fill, target=2, batch_size=16)
    scale = 1 / 255
    ref = closed_form(w[2].astype(np.float64), x.astype(np.float64) * scale,
                      np.full_like(x, 40.0, dtype=np.float64) * scale, 3, 2, H, W)
    assert_allclose(hm.values, ref, atol=1e-5)


@pytest.mark.parametrize("variant", ["nhwc", "meanstd", "batch1", "probs-nhwc"])
def test_layouts_normalisation_and_fixed_batch_give_the_same_heatmap(linear, variant):
    tmp, w, b, x = linear
    plan, fill = GridPlan(patch=4, stride=2), Fill(kind="mean")
    ref_clf = OnnxClassifier(save(linear_model(w, b, height=H, width=W), tmp / "ref.onnx"),
                             ModelConfig(batch_size=8))
    ref = occlusion_heatmap(ref_clf.predict, x, plan=plan, fill=fill, batch_size=8).values
    if variant == "nhwc":
        clf = OnnxClassifier(save(linear_model(w, b, height=H, width=W, layout="nhwc"), tmp / "v.onnx"),
                             ModelConfig(batch_size=8))
    elif variant == "meanstd":
        # weights and bias rewritten so the normalised model is the same function:
        # w . (x s - m) / d + b' = (w / d) . x s + (b - sum(w m / d)) with b' chosen to match.
        mean, std = 0.4, 0.25
        w2 = w * std
        b2 = b + (w * mean).sum(axis=1)
        clf = OnnxClassifier(save(linear_model(w2, b2, height=H, width=W), tmp / "v.onnx"),
                             ModelConfig(mean=(mean,), std=(std,), batch_size=8))
    elif variant == "batch1":
        clf = OnnxClassifier(save(linear_model(w, b, height=H, width=W, batch=1), tmp / "v.onnx"))
    else:
        clf = OnnxClassifier(save(linear_model(w, b, height=H, width=W, layout="nhwc", output="probs"),
                                  tmp / "v.onnx"), ModelConfig(batch_size=8))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        got = occlusion_heatmap(clf.predict, x, plan=plan, fill=fill, batch_size=8).values
    assert_allclose(got, ref, atol=1e-5)


def _digits_model(tmp_path):
    """LogisticRegression on scikit-learn's digits, as ONNX, fed an (N, 1, 8, 8) image."""
    sklearn = pytest.importorskip("sklearn")
    skl2onnx = pytest.importorskip("skl2onnx")
    from sklearn.datasets import load_digits
    from sklearn.linear_model import LogisticRegression
    from skl2onnx.common.data_types import FloatTensorType

    digits = load_digits()
    X, y = digits.data.astype(np.float32)[:600], digits.target[:600]
    clf = LogisticRegression(max_iter=2000).fit(X / 16.0, y)
    core = skl2onnx.convert_sklearn(clf, initial_types=[("features", FloatTensorType([None, 64]))],
                                    options={id(clf): {"zipmap": False}}, target_opset=17)
    # prepend: image (N,1,8,8) -> Reshape -> features (N,64)
    shape = helper.make_tensor("flat_shape", TensorProto.INT64, [2], [-1, 64])
    core.graph.initializer.append(shape)
    core.graph.node.insert(0, helper.make_node("Reshape", ["image", "flat_shape"], ["features"]))
    del core.graph.input[:]
    core.graph.input.append(helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 1, 8, 8]))
    onnx.checker.check_model(core)
    path = tmp_path / "digits.onnx"
    onnx.save(core, str(path))
    return path, clf, digits


def test_digits_score_drops_equal_sklearn_predict_proba(tmp_path):
    path, sk, digits = _digits_model(tmp_path)
    # the classifier was fitted on pixels / 16 (0..1); the tool's pixels are 0..255 so
    # pixels * 255 / 16 with the default scale 1/255 reach the model as pixels / 16.
    model = OnnxClassifier(path, ModelConfig(output="probs", batch_size=16))
    assert model.n_classes == 10
    fill = Fill(kind="constant", value=0.0)
    for i in (0, 7, 42, 100, 333):
        img16 = digits.images[i].astype(np.float64)               # (8, 8) in 0..16
        pixels = (img16 * 255 / 16).astype(np.float32)[..., None]
        target = int(digits.target[i])
        hm = occlusion_heatmap(model.predict, pixels, plan=GridPlan(patch=2, stride=2),
                               fill=fill, target=target, batch_size=16)
        base = sk.predict_proba(img16.reshape(1, -1) / 16.0)[0, target]
        # non-overlapping 2x2 patches: each patch's pixels carry exactly that patch's drop
        for r in range(0, 8, 2):
            for c in range(0, 8, 2):
                occluded = img16.copy()
                occluded[r:r + 2, c:c + 2] = 0.0
                drop = base - sk.predict_proba(occluded.reshape(1, -1) / 16.0)[0, target]
                assert_allclose(hm.values[r:r + 2, c:c + 2], drop, atol=1e-5)


# ------------------------------------------- patches pasted in the session's input form

@pytest.mark.parametrize("layout, dtype, settings", [
    ("nchw", "float32", dict(mean=(0.4, 0.5, 0.6), std=(0.2, 0.25, 0.3))),
    ("nhwc", "float32", dict(channels="bgr", scale=1 / 255)),
    ("nchw", "uint8", {}),
])
@pytest.mark.parametrize("plan", [GridPlan(patch=3, stride=2), RandomPatchPlan(count=50, seed=3)])
@pytest.mark.parametrize("fill", [Fill(kind="mean"), Fill(kind="blur"), Fill(kind="noise", seed=2)])
def test_patches_pasted_in_the_input_form_give_the_same_heatmap(tmp_path, layout, dtype, settings, plan, fill):
    from shortcut_audit.engine import PassEngine, run_job
    from shortcut_audit.sensitivity import heatmap_job

    rng = np.random.default_rng(7)
    w = rng.normal(size=(4, 3 * H * W)).astype(np.float32)
    b = rng.normal(size=4).astype(np.float32)
    clf = OnnxClassifier(save(linear_model(w, b, height=H, width=W, layout=layout, input_dtype=dtype),
                              tmp_path / "m.onnx"), ModelConfig(batch_size=7, **settings))
    x = rng.uniform(0, 255, size=(H, W, 3)).astype(np.float32)
    # reference: the same job pasting pixels, each pass prepared by predict()
    plain = run_job(clf.predict, heatmap_job(x, plan=plan, fill=fill, chunk=7), batch_size=7)
    engine = PassEngine.for_classifier(clf)
    [(_k, pasted)] = list(engine.run([(0, heatmap_job(x, plan=plan, fill=fill, chunk=7, prepared_by=clf))]))
    np.testing.assert_array_equal(pasted.values, plain.values)
    np.testing.assert_array_equal(pasted.base_scores, plain.base_scores)
    assert pasted.passes == plain.passes == engine.stats.passes


@pytest.mark.parametrize("layout, dtype", [("nchw", "float32"), ("nhwc", "uint8")])
def test_image_analysis_in_the_input_form_gives_the_same_statistics(tmp_path, layout, dtype):
    from shortcut_audit.engine import PassEngine, run_job
    from shortcut_audit.sensitivity import image_job

    rng = np.random.default_rng(11)
    w = rng.normal(size=(3, 3 * H * W)).astype(np.float32)
    b = rng.normal(size=3).astype(np.float32)
    clf = OnnxClassifier(save(linear_model(w, b, height=H, width=W, layout=layout, input_dtype=dtype),
                              tmp_path / "m.onnx"),
                         ModelConfig(batch_size=16, **({"mean": (0.5, 0.4, 0.3)} if dtype == "float32" else {})))
    x = rng.uniform(0, 255, size=(H, W, 3)).astype(np.float32)
    mask = np.zeros((H, W), bool)
    mask[3:9, 2:10] = True
    kw = dict(plan=GridPlan(patch=3, stride=2), fill=Fill(kind="blur"), mask=mask, mask_source="given", chunk=16)
    # reference: the same analysis with pixel requests, each prepared by predict()
    plain = run_job(clf.predict, image_job(x, **kw), batch_size=16)
    engine = PassEngine.for_classifier(clf)
    [(_k, formed)] = list(engine.run([(0, image_job(x, **kw, prepared_by=clf))]))
    np.testing.assert_array_equal(formed.heatmap.values, plain.heatmap.values)
    for field in ("decisive_area", "decisive_box", "deletion", "insertion", "survives_object_erased",
                  "survives_background_erased", "object_erased_prediction", "passes"):
        assert getattr(formed, field) == getattr(plain, field), field
    assert formed.passes == engine.stats.passes


@pytest.mark.parametrize("fill", [Fill(kind="mean"), Fill(kind="blur"), Fill(kind="noise", seed=2)])
def test_the_rows_pasted_in_the_input_form_are_the_prepared_pasted_pixels(tmp_path, fill):
    # The engine would score what the job sends; compare the rows themselves, exactly:
    # the reference is prepare() of paste_boxes() (the pixel path).
    from shortcut_audit.occlusion import fill_image, paste_boxes, patch_boxes
    from shortcut_audit.sensitivity import heatmap_job

    rng = np.random.default_rng(7)
    w = rng.normal(size=(2, 3 * H * W)).astype(np.float32)
    clf = OnnxClassifier(save(linear_model(w, np.zeros(2, np.float32), height=H, width=W),
                              tmp_path / "m.onnx"), ModelConfig(batch_size=8, mean=(0.4, 0.5, 0.6), std=(0.2, 0.3, 0.4)))
    x = rng.uniform(0, 255, size=(H, W, 3)).astype(np.float32)
    plan = GridPlan(patch=3, stride=2)
    job = heatmap_job(x, plan=plan, fill=fill, chunk=8, prepared_by=clf)
    request = next(job)
    assert request.prepared and request.ahead
    boxes = patch_boxes(plan, H, W)[:7]
    expected = clf.prepare(np.concatenate([x[None], paste_boxes(x, boxes, fill_image(x, fill))]))
    np.testing.assert_array_equal(request.images, expected)
    job.close()
