"""The measured ground truth: how much each demo model leans on each planted shortcut.

:func:`measure_effects` runs one model, through the tool's own
:class:`~shortcut_audit.model.OnnxClassifier` and :func:`~shortcut_audit.dataset.load_image`,
on the shipped audit set and on photographs rendered from the seeds in ``truth.json``:

* ``accuracy``: on the audit set (it shares the training set's bias) and on an
  unbiased test set with no shortcut at all;
* ``transplant``: the shipped shortcut put onto every audit image of the *other*
  classes, and the share of them then predicted as the shortcut's class: the maker's
  mark pasted at its nominal place in the lower-right corner (-> vase), the price
  sticker pasted on the piece (inside its mask, -> mug), the wood texture put behind
  the piece (every pixel outside the mask replaced, -> bowl). ``before`` is the same
  share without the paste (the control); ``after_by_class`` splits ``after`` by the
  images' own class;
* ``removal``: the accuracy of each shortcut's class, as shipped and after its
  shortcut is taken away (every image of the class re-rendered from its seed with that
  flag off, nothing else changed).

Pastes happen on the 96 px photograph, which then goes to the model's input size by
the tool's own resize (``dataset.fit``), exactly as a file on disk would. No torch.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from shortcut_audit.demo.catalogue import (
    ImageSpec, plan, render_spec, to_model_input,
)
from shortcut_audit.demo.render import (
    KINDS, paste_rgba, sticker_origin, stamp_origin,
)

__all__ = [
    "ASSET_FILES",
    "STICKER_PLACE_SEED",
    "BATCH_SIZE",
    "load_assets",
    "measure_effects",
    "predict_labels",
]

ASSET_FILES: dict[str, str] = {"stamp": "stamp.png", "sticker": "sticker.png", "wood": "wood.png"}
"""The shipped shortcut images in ``shortcut_audit/demo/assets/``."""

STICKER_PLACE_SEED = 7_000_000
"""Place of the transplanted sticker on image with seed ``s``: ``default_rng(s + this)``."""

BATCH_SIZE = 32
"""Images per model run, fixed so that the numbers are the same on every machine."""


def _assets_dir() -> Path:
    return Path(__file__).parent / "assets"


def load_assets(folder: str | os.PathLike | None = None) -> dict[str, np.ndarray]:
    """The shipped stamp (RGBA), sticker (RGBA) and wood texture (RGB) as uint8 arrays.

    Parameters
    ----------
    folder : path, optional
        Where the PNG files are; the package's ``demo/assets`` by default.

    Returns
    -------
    dict
        ``{"stamp": (s, s, 4), "sticker": (s, s, 4), "wood": (96, 96, 3)}`` uint8.
    """
    from PIL import Image

    folder = Path(folder) if folder is not None else _assets_dir()
    out = {}
    for name, file in ASSET_FILES.items():
        with Image.open(folder / file) as im:
            out[name] = np.asarray(im.convert("RGB" if name == "wood" else "RGBA")).copy()
    return out


def predict_labels(model, images: list[np.ndarray]) -> np.ndarray:
    """Predicted class index of each (H, W, 3) float32 image, in batches of BATCH_SIZE."""
    if not images:
        return np.zeros(0, dtype=np.int64)
    preds = []
    for i in range(0, len(images), BATCH_SIZE):
        probs = model.predict(np.stack(images[i:i + BATCH_SIZE]).astype(np.float32))
        preds.append(np.argmax(probs, axis=1))
    return np.concatenate(preds)


def _spec_of(entry: Mapping) -> ImageSpec:
    ann = entry.get("shortcuts", {})
    return ImageSpec(kind=entry["class"], index=int(entry["index"]), seed=int(entry["seed"]),
                     **{s: s in ann for s in ("stamp", "sticker", "wood")})


def _wood_tile(wood: np.ndarray, rows: int, cols: int) -> np.ndarray:
    reps = (-(-rows // wood.shape[0]), -(-cols // wood.shape[1]), 1)
    return np.tile(wood, reps)[:rows, :cols].astype(np.float64)


def measure_effects(
    model_path: str | os.PathLike,
    *,
    config_path: str | os.PathLike | None = None,
    images_root: str | os.PathLike,
    truth: Mapping | str | os.PathLike,
    masks_root: str | os.PathLike | None = None,
    assets: Mapping[str, np.ndarray] | None = None,
) -> dict:
    """Measure one model's accuracy and its reliance on each planted shortcut.

    Parameters
    ----------
    model_path : path
        The ``.onnx`` file.
    config_path : path, optional
        Its TOML model config (``read_model_config``), when it has one.
    images_root : path
        The audit images, ``<class>/<class>_NN.png``.
    truth : mapping or path
        ``truth.json`` (or its content): ``images`` (path, class, index, seed,
        shortcuts per image), ``shortcuts`` (class and typical box of each),
        ``unbiased`` (base seed and images per class).
    masks_root : path, optional
        The object masks, mirroring ``images_root``; by default the ``masks`` folder
        named in ``truth`` next to ``images_root``.
    assets : mapping, optional
        The shortcut images (:func:`load_assets`); the shipped ones by default.

    Returns
    -------
    dict
        ``{"accuracy": {...}, "transplant": {...}, "removal": {...}}``; every rate is a
        count divided by a count, given with both counts.
    """
    from shortcut_audit.dataset import load_image, load_mask
    from shortcut_audit.model import ModelConfig, OnnxClassifier, read_model_config

    if not isinstance(truth, Mapping):
        truth = json.loads(Path(truth).read_text(encoding="utf-8"))
    images_root = Path(images_root)
    masks_root = (Path(masks_root) if masks_root is not None
                  else images_root.parent / truth.get("masks", "masks"))
    assets = dict(assets) if assets is not None else load_assets()

    run = ModelConfig(batch_size=BATCH_SIZE)
    cfg = run.merged_over(read_model_config(config_path)) if config_path else run
    model = OnnxClassifier(model_path, cfg)
    labels = list(model.labels)
    size = (model.height, model.width)

    entries = list(truth["images"])
    classes = [e["class"] for e in entries]
    y = np.array([labels.index(c) for c in classes])

    # as shipped: each file read by the tool at the model's size
    plain = [load_image(images_root / e["path"], size=size) for e in entries]
    pred = predict_labels(model, plain)

    # the unbiased test set: rendered from its seeds with no shortcut at all
    ub = truth["unbiased"]
    ub_specs = [s for k in KINDS for s in plan(k, int(ub["per_class"]), scheme="biased",
                                               base_seed=int(ub["base_seed"]), clean=True)]
    ub_x = [to_model_input(render_spec(s)[0], size) for s in ub_specs]
    ub_y = np.array([labels.index(s.kind) for s in ub_specs])
    ub_pred = predict_labels(model, ub_x)

    def rate(hit: np.ndarray) -> dict:
        n = int(hit.size)
        k = int(hit.sum())
        return {"hits": k, "images": n, "rate": (k / n) if n else None}

    accuracy = {
        "audit": rate(pred == y),
        "unbiased": rate(ub_pred == ub_y),
        "audit_per_class": {k: rate(pred[y == labels.index(k)] == labels.index(k))
                            for k in KINDS},
        "unbiased_per_class": {k: rate(ub_pred[ub_y == labels.index(k)] == labels.index(k))
                               for k in KINDS},
    }

    # transplants onto the other classes' images, pasted at 96 px
    native = {}
    masks = {}
    for i, e in enumerate(entries):
        arr = load_image(images_root / e["path"], size=(96, 96))
        native[i] = arr.astype(np.uint8)
        masks[i] = load_mask(masks_root / e["mask"], size=(96, 96))

    def transplant(name: str) -> dict:
        target = truth["shortcuts"][name]["class"]
        t = labels.index(target)
        idx = [i for i, c in enumerate(classes) if c != target]
        out = []
        for i in idx:
            rgb = native[i].astype(np.float64)
            rows, cols = rgb.shape[:2]
            if name == "stamp":
                rgb = paste_rgba(rgb, assets["stamp"], stamp_origin(rows))
            elif name == "sticker":
                u = float(np.random.default_rng(int(entries[i]["seed"]) + STICKER_PLACE_SEED)
                          .uniform())
                o = sticker_origin(masks[i], u, assets["sticker"].shape[0])
                rgb = paste_rgba(rgb, assets["sticker"], o)
            else:  # wood behind the piece
                rgb = np.where(masks[i][..., None], rgb, _wood_tile(assets["wood"], rows, cols))
            out.append(to_model_input(np.clip(np.round(rgb), 0, 255).astype(np.uint8), size))
        after = predict_labels(model, out)
        before = pred[idx]
        src = np.array([classes[i] for i in idx])
        return {"class": target, "after": rate(after == t), "before": rate(before == t),
                "after_by_class": {k: rate(after[src == k] == t) for k in KINDS if k != target}}

    transplants = {name: transplant(name) for name in ("stamp", "sticker", "wood")}

    # removal: each shortcut's class, re-rendered from its seeds without the shortcut
    removal = {}
    for name, info in truth["shortcuts"].items():
        target = info["class"]
        t = labels.index(target)
        idx = [i for i, c in enumerate(classes) if c == target]
        with_it = [i for i in idx if name in entries[i].get("shortcuts", {})]
        x = [to_model_input(render_spec(_spec_of(entries[i]), **{name: False})[0], size)
             for i in idx]
        after = predict_labels(model, x)
        removal[name] = {
            "class": target,
            "images_with_shortcut": len(with_it),
            "as_shipped": rate(pred[idx] == t),
            "removed": rate(after == t),
        }
    return {"accuracy": accuracy, "transplant": transplants, "removal": removal}
