"""Train, export and measure the planted-shortcut suite (needs the ``train`` extra: torch).

    python bench/planted/build.py                 # every model, writes models/ and truth.json
    python bench/planted/build.py --only tag-kite # one model (its truth entry is replaced)
    python bench/planted/build.py --suite variants  # the held-out variants, in variants/

Seeded and single-threaded (``torch.manual_seed``, ``torch.use_deterministic_algorithms``,
one thread), so a rebuild on the same torch gives byte-identical ONNX files. Each model
is exported (opset 17, TorchScript exporter, dynamic batch axis) with its options in the
metadata key ``shortcut_audit`` (labels, layout, size, scale, output), then measured with
onnxruntime (:mod:`effects`) and written into ``truth.json``.
"""

from __future__ import annotations

import argparse
import hashlib
import io
import json
import sys
import time
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parents[1]))

import effects  # noqa: E402
import scenes  # noqa: E402
from suite import ACCEPTED, SUITES, spec_of  # noqa: E402

SCALE = 1.0 / 255.0
STRONG = 0.5


def training_set(spec):
    xs, ys = [], []
    for ci, kind in enumerate(spec["labels"]):
        for i in range(spec["train_per_class"]):
            seed = scenes.image_seed(spec["seed"], 0, ci, i)
            xs.append(scenes.render(kind, seed, spec["size"], scenes.scene_flags(kind, seed, spec["shortcuts"]))[0])
            ys.append(ci)
    return np.stack(xs), np.asarray(ys, np.int64)


def network(arch: str, classes: int, size: int):
    import torch
    from torch import nn

    def block(cin, cout, stride=1, pool=True):
        layers = [nn.Conv2d(cin, cout, 3, stride=stride, padding=1), nn.BatchNorm2d(cout), nn.ReLU()]
        return nn.Sequential(*layers, nn.MaxPool2d(2)) if pool else nn.Sequential(*layers)

    stem_stride = 2 if size >= 96 else 1
    if arch == "plain3":      # three conv blocks with max pooling, global average, linear
        body = nn.Sequential(block(3, 12, stem_stride), block(12, 24), block(24, 32))
        head = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, classes))
        return nn.Sequential(body, head)
    if arch == "strided4":    # four strided convs, no pooling layers, global average, linear
        body = nn.Sequential(block(3, 8, 2, False), block(8, 16, 2, False), block(16, 24, 2, False),
                             block(24, 32, 2 if size >= 96 else 1, False))
        return nn.Sequential(body, nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, classes))
    if arch == "avgmax":      # three blocks, global average and max pooling side by side, dense, linear

        class AvgMax(nn.Module):
            def __init__(self):
                super().__init__()
                self.features = nn.Sequential(block(3, 16, stem_stride), block(16, 24), block(24, 32))
                self.avg, self.max = nn.AdaptiveAvgPool2d(1), nn.AdaptiveMaxPool2d(1)
                self.dense, self.out = nn.Linear(64, 32), nn.Linear(32, classes)

            def forward(self, x):
                f = self.features(x)
                h = torch.flatten(torch.cat([self.avg(f), self.max(f)], 1), 1)
                return self.out(torch.relu(self.dense(h)))
        return AvgMax()
    if arch == "dwsep":       # a stem conv, then depthwise-separable blocks

        def sep(cin, cout):
            return nn.Sequential(nn.Conv2d(cin, cin, 3, padding=1, groups=cin), nn.Conv2d(cin, cout, 1),
                                 nn.BatchNorm2d(cout), nn.ReLU(), nn.MaxPool2d(2))
        body = nn.Sequential(block(3, 16, stem_stride), sep(16, 24), sep(24, 32), sep(32, 32))
        return nn.Sequential(body, nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, classes))
    raise ValueError(f"unknown architecture {arch!r}")


def train(spec, x, y, log=print):
    import torch
    torch.manual_seed(spec["seed"])
    rng = np.random.default_rng(spec["seed"])
    xt = torch.from_numpy(x.transpose(0, 3, 1, 2).astype(np.float32) * np.float32(SCALE))
    yt = torch.from_numpy(y)
    net = network(spec["arch"], len(spec["labels"]), spec["size"])
    opt = torch.optim.Adam(net.parameters(), lr=3e-3, weight_decay=1e-4)
    steps = spec["epochs"] * int(np.ceil(len(x) / 64))
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=4e-3, total_steps=steps)
    loss_fn = torch.nn.CrossEntropyLoss()
    for epoch in range(spec["epochs"]):
        net.train()
        order = torch.from_numpy(rng.permutation(len(x)))
        total, correct = 0.0, 0
        for i in range(0, len(x), 64):
            idx = order[i:i + 64]
            opt.zero_grad()
            out = net(xt[idx])
            loss = loss_fn(out, yt[idx])
            loss.backward()
            opt.step()
            sched.step()
            total += loss.item() * len(idx)
            correct += int((out.argmax(1) == yt[idx]).sum())
        log(f"  {spec['name']} epoch {epoch + 1}/{spec['epochs']}: loss {total / len(x):.3f}, "
            f"train accuracy {correct / len(x):.3f}")
    return net.eval()


def export(spec, net, out_dir: Path) -> Path:
    import onnx
    import torch

    class Exported(torch.nn.Module):
        def __init__(self, inner):
            super().__init__()
            self.inner = inner

        def forward(self, image):
            if spec["layout"] == "nhwc":
                image = image.permute(0, 3, 1, 2)
            out = self.inner(image)
            return torch.softmax(out, dim=1) if spec["output"] == "probs" else out

    s = spec["size"]
    example = torch.zeros((2, s, s, 3) if spec["layout"] == "nhwc" else (2, 3, s, s))
    buf = io.BytesIO()
    out_name = "probs" if spec["output"] == "probs" else "logits"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(Exported(net).eval(), (example,), buf, dynamo=False, opset_version=17,
                          input_names=["image"], output_names=[out_name],
                          dynamic_axes={"image": {0: "batch"}, out_name: {0: "batch"}},
                          do_constant_folding=True)
    proto = onnx.load_model_from_string(buf.getvalue())
    meta = {"labels": spec["labels"], "layout": spec["layout"], "size": f"{s}x{s}", "scale": SCALE,
            "mean": [0.0, 0.0, 0.0], "std": [1.0, 1.0, 1.0], "channels": "rgb", "resize": "stretch",
            "output": spec["output"]}
    del proto.metadata_props[:]
    entry = proto.metadata_props.add()
    entry.key, entry.value = "shortcut_audit", json.dumps(meta, sort_keys=True)
    proto.producer_name = "bench.planted.build"
    proto.doc_string = f"Planted-shortcut suite model '{spec['name']}' (invented scenes)."
    onnx.checker.check_model(proto)
    out_dir.mkdir(parents=True, exist_ok=True)
    path = out_dir / f"{spec['name']}.onnx"
    onnx.save_model(proto, path)
    return path


def truth_entry(spec, path: Path, measured: dict, audit: dict) -> dict:
    planted, per_class = [], {k: "clean" for k in spec["labels"]}
    for s in spec["shortcuts"]:
        m = measured["shortcuts"][s["name"]]
        size = s.get("size") if s["kind"] != "fixed-mark" else round(s["box"][2] - s["box"][0], 4)
        pull = m["pull"]["rate"]
        planted.append({
            "name": s["name"], "class": s["class"], "planted": s["kind"], "accepted": ACCEPTED[s["kind"]],
            "box": s.get("box"), "size": size, "style": s.get("style"),
            "share": s["share"], "others_share": s.get("others_share", 0.0),
            "audit_images_carrying": audit["carrying"][s["name"]],
            "pull": pull, "pull_before": m["pull_before"]["rate"], "drop": m["drop"],
            "strength": "strong" if pull >= STRONG else "weak",
            "measured": m})
        per_class[s["class"]] = "planted"
    if spec.get("sink"):
        per_class[spec["sink"]["class"]] = "sink"
    sink = None
    if spec.get("sink"):
        src = next(s for s in spec["shortcuts"] if s["name"] == spec["sink"]["of"])
        sink = {"class": spec["sink"]["class"], "source_class": src["class"], "accepted": [],
                "absorbed": measured["shortcuts"][src["name"]]["sink_absorbed"]["rate"],
                "measured": measured["shortcuts"][src["name"]]["sink_absorbed"]}
    data = path.read_bytes()
    return {
        "name": spec["name"], "note": spec["note"], "onnx": f"models/{path.name}",
        "sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data),
        "labels": spec["labels"], "layout": spec["layout"], "output": spec["output"],
        "input_size": spec["size"], "architecture": spec["arch"], "seed": spec["seed"],
        "epochs": spec["epochs"], "train_per_class": spec["train_per_class"],
        "classes": per_class, "planted": planted, "sink": sink,
        "accuracy": measured["accuracy"]["rate"],
        "accuracy_per_class": {k: v["rate"] for k, v in measured["accuracy_per_class"].items()},
        "audit_set": {"per_class": spec["audit_per_class"], "count": audit["count"], "sha256": audit["sha256"]},
        "effect_set": {"split": 2, "per_class": spec["effect_per_class"]},
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--only", action="append", help="build only this model (repeatable)")
    ap.add_argument("--suite", choices=sorted(SUITES), default="planted",
                    help="the suite (variants: the held-out models, in variants/)")
    ap.add_argument("--out", type=Path, default=None, help="folder of models/ and truth.json")
    args = ap.parse_args(argv)
    models, folder = SUITES[args.suite]
    if args.out is None:
        args.out = HERE / folder
    import tempfile

    import torch
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    truth_path = args.out / "truth.json"
    truth = json.loads(truth_path.read_text()) if truth_path.exists() else {"models": {}}
    truth.setdefault("models", {})
    for spec in [spec_of(n) for n in args.only] if args.only else models:
        t0 = time.perf_counter()
        x, y = training_set(spec)
        t1 = time.perf_counter()
        net = train(spec, x, y)
        path = export(spec, net, args.out / "models")
        t2 = time.perf_counter()
        measured = effects.measure(spec, effects.load_model(path))
        with tempfile.TemporaryDirectory() as tmp:
            audit = scenes.write_set(spec, tmp)
        entry = truth_entry(spec, path, measured, audit)
        entry["build_seconds"] = {"render": round(t1 - t0, 1), "train": round(t2 - t1, 1)}
        truth["models"][spec["name"]] = entry
        pulls = ", ".join(f"{p['name']}->{p['class']} pull {p['pull']:.2f} drop {p['drop']:.2f}"
                          for p in entry["planted"])
        sink = f", sink absorbed {entry['sink']['absorbed']:.2f}" if entry["sink"] else ""
        print(f"{spec['name']}: accuracy {entry['accuracy']:.2f}; {pulls or 'clean'}{sink}; "
              f"render {t1 - t0:.0f} s, train {t2 - t1:.0f} s, {entry['bytes'] / 1024:.0f} KiB", flush=True)
        order = {m["name"]: i for i, m in enumerate(models)}
        truth["models"] = dict(sorted(truth["models"].items(), key=lambda kv: order.get(kv[0], 99)))
        truth["about"] = ("Planted-shortcut suite: per model its facts, what is planted on which class, "
                          "and the effects measured with onnxruntime on the effect scenes (split 2).")
        truth_path.write_text(json.dumps(truth, indent=1) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
