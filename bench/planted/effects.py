"""Measured effects of a planted model, through the audit's own model loader (no torch).

For each planted shortcut of a model, on the effect scenes (split 2,
``effect_per_class`` per class), the same scene rendered with and without it:

* ``pull``: share of the *other* classes' scenes predicted as the shortcut's class once
  the shortcut is added to them (``pull_before``: the same share as planted);
* ``removal``: accuracy on the class's scenes as planted, and with the shortcut taken
  away (``drop`` = the difference);
* for a sink: share of the backdrop class's scenes predicted as the sink class once the
  backdrop is swapped away.

Every rate is given with its counts.
"""

from __future__ import annotations

import numpy as np

from scenes import image_seed, render, scene_flags

__all__ = ["load_model", "predict", "measure"]

BATCH = 32


def load_model(path):
    from shortcut_audit.model import ModelConfig, OnnxClassifier
    return OnnxClassifier(path, ModelConfig(batch_size=BATCH, threads=1))


def predict(model, images) -> np.ndarray:
    out = []
    for i in range(0, len(images), BATCH):
        out.append(np.argmax(model.predict(np.stack(images[i:i + BATCH]).astype(np.float32)), axis=1))
    return np.concatenate(out) if out else np.zeros(0, int)


def _rate(hit) -> dict:
    hit = np.asarray(hit, bool)
    return {"hits": int(hit.sum()), "images": int(hit.size), "rate": round(float(hit.mean()), 4) if hit.size else None}


def measure(spec: dict, model, per_class: int | None = None) -> dict:
    """Accuracy, pulls, removals (and the sink's absorption) of one model; see the module text."""
    n = per_class or spec["effect_per_class"]
    labels = spec["labels"]
    assert list(model.labels) == labels, (model.labels, labels)
    scenes = []
    for ci, kind in enumerate(labels):
        for i in range(n):
            seed = image_seed(spec["seed"], 2, ci, i)
            scenes.append((ci, kind, seed, scene_flags(kind, seed, spec["shortcuts"])))
    y = np.array([s[0] for s in scenes])

    def run(edit):
        imgs = [render(kind, seed, spec["size"], edit(kind, flags))[0] for _ci, kind, seed, flags in scenes]
        return predict(model, imgs)

    pred = run(lambda k, f: f)
    out = {"accuracy": _rate(pred == y),
           "accuracy_per_class": {k: _rate(pred[y == ci] == ci) for ci, k in enumerate(labels)},
           "shortcuts": {}}
    for s in spec["shortcuts"]:
        t = labels.index(s["class"])
        added = run(lambda k, f: [g for g in f if g["name"] != s["name"]] + [s])
        removed = run(lambda k, f: [g for g in f if g["name"] != s["name"]])
        other, own = y != t, y == t
        entry = {"pull": _rate(added[other] == t), "pull_before": _rate(pred[other] == t),
                 "accuracy_as_planted": _rate(pred[own] == t), "accuracy_removed": _rate(removed[own] == t)}
        entry["drop"] = round(entry["accuracy_as_planted"]["rate"] - entry["accuracy_removed"]["rate"], 4)
        if spec.get("sink") and spec["sink"]["of"] == s["name"]:
            entry["sink_absorbed"] = _rate(removed[own] == labels.index(spec["sink"]["class"]))
        out["shortcuts"][s["name"]] = entry
    return out
