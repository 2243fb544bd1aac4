"""Build the shipped demo: shortcut assets, the audit image set, and ``truth.json``.

    python -m shortcut_audit.demo.build assets   # demo/assets/*.png
    python -m shortcut_audit.demo.build images   # demo_images/images, masks
    python -m shortcut_audit.demo.build truth    # demo_images/truth.json (needs models/)
    python -m shortcut_audit.demo.build all

The order of the whole job: ``build assets images``, then
``python -m shortcut_audit.demo.train`` (torch), then ``build truth``. No torch here.
"""

from __future__ import annotations

import argparse
import dataclasses
import hashlib
import json
import os
import sys
from pathlib import Path

import numpy as np

from shortcut_audit.demo import demo_paths
from shortcut_audit.demo.catalogue import RATES, plan, render_spec
from shortcut_audit.demo.effects import ASSET_FILES, measure_effects
from shortcut_audit.demo.render import (
    KINDS, mask_box, stamp_origin, stamp_rgba, sticker_rgba, wood_texture,
)

__all__ = [
    "AUDIT_SEED", "AUDIT_PER_CLASS", "UNBIASED_SEED", "UNBIASED_PER_CLASS", "WOOD_ASSET_SEED",
    "SHORTCUT_INFO", "write_assets", "write_images", "write_truth", "truth_images", "main",
]

AUDIT_SEED = 1_000_000
AUDIT_PER_CLASS = 36
UNBIASED_SEED = 3_000_000
UNBIASED_PER_CLASS = 50
WOOD_ASSET_SEED = 4_000_000

SHORTCUT_INFO: dict[str, dict] = {
    "stamp": {"class": "vase", "kind": "fixed-position", "expected_finding": "fixed-position",
              "what": "maker's mark (dark ring around a triangle on a pale disc) printed near "
                      "the lower-right corner, +-2 px jitter"},
    "sticker": {"class": "mug", "kind": "roaming motif", "expected_finding": "recurring-motif",
                "what": "round price sticker (yellow disc, orange rim, dark price bar) "
                        "anywhere on the piece"},
    "wood": {"class": "bowl", "kind": "background", "expected_finding": "background",
             "what": "wood-grain table top as the backdrop"},
}
"""Each planted shortcut: the class it points to and how it shows."""


def _save_png(array: np.ndarray, path: Path) -> None:
    from PIL import Image

    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    # no text chunks, no timestamps: the same pixels give the same bytes
    Image.fromarray(array).save(tmp, format="PNG", optimize=True)
    os.replace(tmp, path)


def write_assets(folder: Path) -> dict[str, Path]:
    """Write the stamp and sticker (RGBA, for a 96 px photograph) and a wood tile (96 px)."""
    arrays = {
        "stamp": stamp_rgba(96),
        "sticker": sticker_rgba(96),
        "wood": np.round(wood_texture(np.random.default_rng(WOOD_ASSET_SEED), 96)).astype(np.uint8),
    }
    out = {}
    for name, arr in arrays.items():
        out[name] = folder / ASSET_FILES[name]
        _save_png(arr, out[name])
    return out


def truth_images() -> list[dict]:
    """The audit set's specs, rendered: one dict per image (path, seed, shortcut boxes)."""
    rows = []
    for kind in KINDS:
        for spec in plan(kind, AUDIT_PER_CLASS, scheme="biased", base_seed=AUDIT_SEED):
            rgb, mask, ann = render_spec(spec)
            name = f"{kind}/{kind}_{spec.index:02d}.png"
            rows.append({"path": name, "mask": name, "class": kind, "index": spec.index,
                         "seed": spec.seed, "shortcuts": ann, "object_box": mask_box(mask),
                         "_rgb": rgb, "_mask": mask})
    return rows


def write_images(root: Path) -> list[dict]:
    """Render the audit set into ``root/images/<class>/`` and ``root/masks/<class>/``."""
    rows = truth_images()
    for r in rows:
        _save_png(r.pop("_rgb"), root / "images" / r["path"])
        _save_png(r.pop("_mask").astype(np.uint8) * 255, root / "masks" / r["mask"])
    return rows


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _round_box(box):
    return [round(float(v), 6) for v in box]


def write_truth(root: Path, log=print, *, models_dir: Path | None = None,
                write: bool = True) -> dict:
    """Measure every shipped model (or those in ``models_dir``) and write ``root/truth.json``."""
    models = demo_paths().models
    if models_dir is not None:
        models = {n: dataclasses.replace(m, onnx=models_dir / m.onnx.name,
                                         config=models_dir / m.config.name if m.config else None)
                  for n, m in models.items()}
    rows = truth_images()
    for r in rows:
        r.pop("_rgb")
        r.pop("_mask")
    shortcuts = {}
    for name, info in SHORTCUT_INFO.items():
        boxes = np.array([r["shortcuts"][name] for r in rows if name in r["shortcuts"]
                          and r["class"] == info["class"]])
        nominal = (stamp_origin(96), stamp_rgba(96).shape[0]) if name == "stamp" else None
        typical = ([nominal[0][1] / 96, nominal[0][0] / 96, (nominal[0][1] + nominal[1]) / 96,
                    (nominal[0][0] + nominal[1]) / 96] if nominal else np.median(boxes, 0))
        shortcuts[name] = {
            **info,
            "rate": RATES["biased"][info["class"]][name],
            "rate_other_classes": {k: RATES["biased"][k][name] for k in KINDS
                                   if k != info["class"]},
            "typical_box": _round_box(typical),
            "asset": f"shortcut_audit/demo/assets/{ASSET_FILES[name]}",
        }
    truth = {
        "schema": 1,
        "about": "Ground truth of the demo ceramics catalogue (invented): planted shortcuts, "
                 "per-image annotations and seeds, shipped models and their measured effects. "
                 "Boxes are fractions [x0, y0, x1, y1] of width and height.",
        "images_root": "images",
        "masks": "masks",
        "image_size": [96, 96],
        "model_size": [64, 64],
        "shortcuts": shortcuts,
        "audit": {"scheme": "biased", "base_seed": AUDIT_SEED, "per_class": AUDIT_PER_CLASS},
        "unbiased": {"base_seed": UNBIASED_SEED, "per_class": UNBIASED_PER_CLASS,
                     "note": "rendered from these seeds with no shortcut at all (not shipped)"},
        "images": [{**r, "shortcuts": {k: _round_box(v) for k, v in r["shortcuts"].items()},
                    "object_box": _round_box(r["object_box"])} for r in rows],
        "models": {},
    }
    for name, m in models.items():
        if not m.onnx.is_file():
            log(f"skipping {name}: {m.onnx} does not exist (run the training first)")
            continue
        effects = measure_effects(m.onnx, config_path=m.config, images_root=root / "images",
                                  truth=truth)
        truth["models"][name] = {
            "file": f"shortcut_audit/demo/models/{m.onnx.name}",
            "config": f"shortcut_audit/demo/models/{m.config.name}" if m.config else None,
            "sha256": _sha256(m.onnx),
            "bytes": m.onnx.stat().st_size,
            "effects": effects,
        }
        log(summary_line(name, effects))
    if not write:
        return truth
    out = root / "truth.json"
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(json.dumps(truth, indent=1) + "\n", encoding="utf-8")
    os.replace(tmp, out)
    return truth


def summary_line(name: str, e: dict) -> str:
    """One line of the effects table."""
    a, t, r = e["accuracy"], e["transplant"], e["removal"]
    return (f"{name:10s} audit {a['audit']['rate']:.3f} unbiased {a['unbiased']['rate']:.3f} | "
            f"stamp->vase {t['stamp']['after']['rate']:.3f} (before {t['stamp']['before']['rate']:.3f}) "
            f"sticker->mug {t['sticker']['after']['rate']:.3f} (before {t['sticker']['before']['rate']:.3f}) "
            f"wood->bowl {t['wood']['after']['rate']:.3f} (before {t['wood']['before']['rate']:.3f}) | "
            f"removed: vase {r['stamp']['as_shipped']['rate']:.3f}->{r['stamp']['removed']['rate']:.3f} "
            f"mug {r['sticker']['as_shipped']['rate']:.3f}->{r['sticker']['removed']['rate']:.3f} "
            f"bowl {r['wood']['as_shipped']['rate']:.3f}->{r['wood']['removed']['rate']:.3f}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m shortcut_audit.demo.build",
                                     description=__doc__.split("\n\n")[0])
    parser.add_argument("steps", nargs="+", choices=["assets", "images", "truth", "all"])
    args = parser.parse_args(argv)
    paths = demo_paths()
    steps = {"assets", "images", "truth"} if "all" in args.steps else set(args.steps)
    if "assets" in steps:
        for p in write_assets(paths.assets).values():
            print(f"wrote {p}")
    if "images" in steps:
        rows = write_images(paths.root)
        print(f"wrote {len(rows)} images and masks under {paths.root}")
    if "truth" in steps:
        write_truth(paths.root)
        print(f"wrote {paths.truth}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
