"""Train and export the three demo classifiers (needs the ``train`` extra: torch).

    python -m shortcut_audit.demo.train [--out DIR] [--quick]

Renders its own training photographs (:mod:`.render`, seeded), brings them to the
64 x 64 model input with the tool's own resize, trains one small CNN three ways and
writes ONNX files (opset 17, dynamic batch axis, logits out) with the labels in the
metadata key ``shortcut_audit``:

* ``baseline.onnx``: biased catalogue, no dropout, NCHW input, scale 1/255;
* ``dropout.onnx``: biased catalogue, dropout 0.2 after the inner dense layer, NHWC
  input (the graph starts with a transpose);
* ``rebalanced.onnx`` + ``rebalanced.toml``: rebalanced catalogue, NCHW, trained on
  ``(x / 255 - 0.5) / 0.25``; that normalisation lives in the TOML model config, not
  in the graph.

This is the only module of the project that imports torch, and only inside functions.
Seeds: ``torch.manual_seed``, numpy generators, ``torch.set_num_threads(2)``.
"""

from __future__ import annotations

import argparse
import io
import json
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from shortcut_audit.demo.catalogue import MODEL_SIZE, plan, render_spec, to_model_input
from shortcut_audit.demo.render import KINDS

__all__ = ["MODELS", "TRAIN_SEED", "build_set", "train_model", "export_model", "main"]

TRAIN_SEED = 2_000_000
"""First image seed of the training photographs (the audit set starts at 1_000_000)."""

MODELS: dict[str, dict] = {
    "baseline": {"scheme": "biased", "dropout": 0.0, "layout": "nchw",
                 "mean": (0.0, 0.0, 0.0), "std": (1.0, 1.0, 1.0), "config": False},
    "dropout": {"scheme": "biased", "dropout": 0.2, "layout": "nhwc",
                "mean": (0.0, 0.0, 0.0), "std": (1.0, 1.0, 1.0), "config": False},
    "rebalanced": {"scheme": "rebalanced", "dropout": 0.0, "layout": "nchw",
                   "mean": (0.5, 0.5, 0.5), "std": (0.25, 0.25, 0.25), "config": True},
}
"""The three demo models: training data, dropout, input layout, normalisation."""

PER_CLASS = 400
QUICK_PER_CLASS = 120
EPOCHS = 5
QUICK_EPOCHS = 3
SCALE = 1.0 / 255.0


def build_set(scheme: str, per_class: int, *, base_seed: int = TRAIN_SEED):
    """Render ``per_class`` photographs of each kind at 96 px and fit them to 64 x 64.

    Returns
    -------
    x : (N, 64, 64, 3) float32 in 0..255
    y : (N,) int64, index into :data:`.render.KINDS`
    """
    xs, ys = [], []
    for label, kind in enumerate(KINDS):
        for spec in plan(kind, per_class, scheme=scheme, base_seed=base_seed):
            rgb, _, _ = render_spec(spec)
            xs.append(to_model_input(rgb, MODEL_SIZE))
            ys.append(label)
    return np.stack(xs), np.asarray(ys, dtype=np.int64)


def _network(dropout: float):
    import torch
    from torch import nn

    class Net(nn.Module):
        """Three conv blocks (16, 32, 64), global average and max pooling, dense 64, 4 logits."""

        def __init__(self) -> None:
            super().__init__()

            def block(cin: int, cout: int) -> nn.Sequential:
                return nn.Sequential(nn.Conv2d(cin, cout, 3, padding=1), nn.BatchNorm2d(cout),
                                     nn.ReLU(), nn.MaxPool2d(2))

            self.features = nn.Sequential(block(3, 16), block(16, 32), block(32, 64))
            self.avg = nn.AdaptiveAvgPool2d(1)  # exports as GlobalAveragePool
            self.max = nn.AdaptiveMaxPool2d(1)  # exports as GlobalMaxPool
            self.dense = nn.Linear(128, 64)
            self.drop = nn.Dropout(dropout) if dropout > 0 else nn.Identity()
            self.out = nn.Linear(64, len(KINDS))

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            f = self.features(x)
            h = torch.flatten(torch.cat([self.avg(f), self.max(f)], dim=1), 1)
            return self.out(self.drop(torch.relu(self.dense(h))))

    return Net()


def train_model(name: str, x: np.ndarray, y: np.ndarray, *, epochs: int, seed: int = 0,
                log=print):
    """Train the network of model ``name`` on (x, y); returns the torch module (eval)."""
    import torch

    spec = MODELS[name]
    torch.manual_seed(seed)
    rng = np.random.default_rng(seed)
    mean = np.asarray(spec["mean"], np.float32).reshape(1, 3, 1, 1)
    std = np.asarray(spec["std"], np.float32).reshape(1, 3, 1, 1)
    xt = torch.from_numpy((x.transpose(0, 3, 1, 2) * np.float32(SCALE) - mean) / std)
    yt = torch.from_numpy(y)
    net = _network(spec["dropout"])
    opt = torch.optim.Adam(net.parameters(), lr=2e-3, weight_decay=1e-4)
    steps = epochs * int(np.ceil(len(x) / 64))
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=3e-3, total_steps=steps)
    loss_fn = torch.nn.CrossEntropyLoss()
    for epoch in range(epochs):
        net.train()
        order = torch.from_numpy(rng.permutation(len(x)))
        total, correct, seen = 0.0, 0, 0
        for i in range(0, len(x), 64):
            idx = order[i:i + 64]
            xb, yb = xt[idx], yt[idx]
            opt.zero_grad()
            out = net(xb)
            loss = loss_fn(out, yb)
            loss.backward()
            opt.step()
            sched.step()
            total += loss.item() * len(idx)
            correct += int((out.argmax(1) == yb).sum())
            seen += len(idx)
        log(f"  {name} epoch {epoch + 1}/{epochs}: loss {total / seen:.3f}, "
            f"train accuracy {correct / seen:.3f}")
    net.eval()
    return net


def export_model(name: str, net, out_dir: Path) -> Path:
    """Write ``<name>.onnx`` (and ``<name>.toml`` when the model has a config)."""
    import onnx
    import torch

    spec = MODELS[name]
    h, w = MODEL_SIZE

    class Exported(torch.nn.Module):
        def __init__(self, inner) -> None:
            super().__init__()
            self.inner = inner

        def forward(self, image: torch.Tensor) -> torch.Tensor:
            if spec["layout"] == "nhwc":
                image = image.permute(0, 3, 1, 2)
            return self.inner(image)

    wrapper = Exported(net).eval()
    shape = (2, h, w, 3) if spec["layout"] == "nhwc" else (2, 3, h, w)
    example = torch.zeros(shape, dtype=torch.float32)
    buffer = io.BytesIO()
    # The TorchScript exporter writes opset 17 directly and keeps the graph plain
    # (Conv, BatchNorm folded, Relu, MaxPool, GlobalAveragePool, Flatten, Gemm).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(
            wrapper, (example,), buffer, dynamo=False, opset_version=17,
            input_names=["image"], output_names=["logits"],
            dynamic_axes={"image": {0: "batch"}, "logits": {0: "batch"}},
            do_constant_folding=True,
        )
    proto = onnx.load_model_from_string(buffer.getvalue())
    meta = {"labels": list(KINDS), "layout": spec["layout"], "output": "logits"}
    if not spec["config"]:
        meta.update({"scale": SCALE, "mean": list(spec["mean"]), "std": list(spec["std"]),
                     "channels": "rgb", "resize": "stretch"})
    del proto.metadata_props[:]
    entry = proto.metadata_props.add()
    entry.key, entry.value = "shortcut_audit", json.dumps(meta, sort_keys=True)
    proto.producer_name = "shortcut_audit.demo.train"
    proto.doc_string = f"Demo ceramics classifier '{name}' (invented catalogue)."
    onnx.checker.check_model(proto)
    out_dir.mkdir(parents=True, exist_ok=True)
    path = out_dir / f"{name}.onnx"
    onnx.save_model(proto, path)
    if spec["config"]:
        (out_dir / f"{name}.toml").write_text(model_config_toml(name), encoding="utf-8")
    return path


def model_config_toml(name: str) -> str:
    """The TOML model config shipped next to ``<name>.onnx`` (CLI option names)."""
    spec = MODELS[name]
    h, w = MODEL_SIZE

    def nums(v) -> str:
        return "[" + ", ".join(repr(float(a)) for a in v) + "]"

    labels = ", ".join(f'"{k}"' for k in KINDS)
    return (
        f"# Model config of the demo model {name}.onnx: its input normalisation is not\n"
        "# in the graph, so the audit must be told (shortcut-audit ... --model-config).\n"
        f"labels = [{labels}]\n"
        f'layout = "{spec["layout"]}"\n'
        f'size = "{h}x{w}"\n'
        f"scale = {SCALE!r}\n"
        f"mean = {nums(spec['mean'])}\n"
        f"std = {nums(spec['std'])}\n"
        'channels = "rgb"\n'
        'resize = "stretch"\n'
        'output = "logits"\n'
    )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m shortcut_audit.demo.train",
                                     description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=None,
                        help="folder for the .onnx files (default: the package's models/, "
                             "which ship with the tool)")
    parser.add_argument("--quick", action="store_true",
                        help=f"{QUICK_PER_CLASS} images per class and {QUICK_EPOCHS} "
                             "epochs: a smoke run, not the shipped models")
    parser.add_argument("--only", choices=list(MODELS), action="append",
                        help="train only this model (repeatable)")
    args = parser.parse_args(argv)
    if args.out is None:
        if args.quick:
            parser.error("--quick needs --out DIR: a smoke run must not replace the shipped models")
        args.out = Path(__file__).parent / "models"
    try:
        import torch
    except ImportError:
        print("error: torch is not installed; run `pip install torch==2.13.0 onnxscript` "
              "(the train extra).", file=sys.stderr)
        return 2
    torch.set_num_threads(2)
    per_class = QUICK_PER_CLASS if args.quick else PER_CLASS
    epochs = QUICK_EPOCHS if args.quick else EPOCHS
    data: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for name in args.only or list(MODELS):
        scheme = MODELS[name]["scheme"]
        if scheme not in data:
            t0 = time.perf_counter()
            data[scheme] = build_set(scheme, per_class)
            print(f"rendered {len(data[scheme][1])} {scheme} images in "
                  f"{time.perf_counter() - t0:.0f} s")
        t0 = time.perf_counter()
        net = train_model(name, *data[scheme], epochs=epochs)
        path = export_model(name, net, args.out)
        print(f"{name}: trained in {time.perf_counter() - t0:.0f} s -> {path} "
              f"({path.stat().st_size / 1024:.0f} KiB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
