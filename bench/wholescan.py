"""Whole scans: the cost estimate against the measured time, linear growth with the
number of images, and every pass of a scan against onnxruntime's own rate.

    python bench/wholescan.py            # about 5 minutes on 2 cores; writes its block of bench/RESULTS.md
    python bench/wholescan.py --quick    # tiny sizes, seconds: checks that every figure is produced
    python bench/wholescan.py --profile depthwise.prof   # also a cProfile of the depthwise scan

Three figures, each measured within one run:

- **estimate**: on the random 224 x 224 CNN of :mod:`builders`, what
  :func:`shortcut_audit.cost.estimate_cost` predicts from the classifier's own
  batch-size measurement (no extra passes) against the scan's measured wall time
  (``audit(..., out=...)`` then ``write_scan_report``, as the command line runs it). Goal: within 25%.
- **linearity**: the wall time of scans of 200, 1,100 and 2,000 generated images on a
  small random CNN (32 x 32), each in a fresh output folder: the middle one against the
  line through the other two, and the 2,000 against the 200 (goal of issue 16: the
  ratio within 10% of 10, which holds only for the part of a scan that grows with the
  images; the curve sample, the sufficiency scan, the tests and the report are per class
  or per scan).
- **whole scan**: on the MobileNet-like depthwise-separable 224 x 224 network
  (:func:`builders.depthwise_cnn`), every forward pass of a whole scan (the batch-size
  measurement when the classifier is made, the heatmaps, the ladder and curves, the
  mask tests, the counterfactual tests) counted at onnxruntime's ``run`` and divided by
  the scan's wall time (decoding and report writing included), against the session's
  own rate on a prepared random batch of the same size (measured before and after, the
  mean taken). Goal: >= 0.85.
"""

from __future__ import annotations

import argparse
import cProfile
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

import builders  # noqa: E402

import shortcut_audit as sa  # noqa: E402
from shortcut_audit.cost import estimate_cost  # noqa: E402
from shortcut_audit.model import ModelConfig, OnnxClassifier  # noqa: E402
from shortcut_audit.scan import ScanSettings  # noqa: E402

BEGIN = "<!-- wholescan:begin -->"
END = "<!-- wholescan:end -->"

FULL = dict(estimate_images=24, linear_sizes=(200, 1100, 2000), linear_side=32, linear_image=32,
            depthwise_images=8, size=224, raw_seconds=5.0, threads=(1, 2))
QUICK = dict(estimate_images=4, linear_sizes=(4, 22, 40), linear_side=16, linear_image=16,
             depthwise_images=2, size=32, raw_seconds=0.2, threads=(1,))


def _scan_fn():
    """The audit as the command line runs it: the computation, then the report written."""
    def run(images, model, *, out=None, **kwargs):
        result = sa.audit(images, model, out=out, **kwargs)
        if out is not None:
            sa.write_scan_report(result, out)
        return result
    return run


class PassCounter:
    """Counts the images of every onnxruntime ``run`` call while active."""

    def __init__(self):
        import onnxruntime

        self.cls = onnxruntime.InferenceSession
        self.original = self.cls.run
        self.passes = 0
        self.calls = 0

    def __enter__(self):
        counter = self

        def run(session, names, feed, *args, **kw):
            for v in feed.values():
                counter.passes += int(np.shape(v)[0]) if np.ndim(v) else 1
                break
            counter.calls += 1
            return counter.original(session, names, feed, *args, **kw)

        self.cls.run = run
        return self

    def __exit__(self, *exc):
        self.cls.run = self.original


def raw_rate(clf: OnnxClassifier, images: Path, seconds: float, min_calls: int = 5) -> float:
    """The session alone on one prepared batch of the scan's own images (decoded as the
    scan decodes them) at the classifier's batch size, over ``seconds`` and ``min_calls``."""
    from shortcut_audit.dataset import iter_records
    from shortcut_audit.listing import list_images

    entries, _ = list_images(images)
    pixels = [r.pixels for r in iter_records(entries[:clf.batch_size], size=(clf.height, clf.width),
                                             channels=clf.channels, resize=clf.resize)
              if hasattr(r, "pixels")]
    batch = np.stack([pixels[i % len(pixels)] for i in range(clf.batch_size)]).astype(np.float32)
    feed = {clf.input_name: clf._prepare(batch)}
    names = [clf.output_name]
    clf._session.run(names, feed)
    count, calls, start = 0, 0, time.perf_counter()
    while True:
        clf._session.run(names, feed)
        count += clf.batch_size
        calls += 1
        if time.perf_counter() - start >= seconds and calls >= min_calls:
            return count / (time.perf_counter() - start)


def estimate_figure(cfg: dict, work: Path, threads: int) -> dict:
    model = builders.save(builders.large_cnn(size=cfg["size"]) if cfg["size"] == 224 else
                          builders.large_cnn(size=cfg["size"], channels=((3, 8, 2), (8, 16, 2), (16, 16, 1)),
                                             classes=10), work / "large.onnx")
    images = builders.write_image_set(work / "est_images", cfg["estimate_images"], size=cfg["size"], seed=11)
    t0 = time.perf_counter()
    clf = OnnxClassifier(model, ModelConfig(threads=threads), dataset_labels=builders.KINDS)
    counts = {k: len(list((images / k).glob("*.png"))) for k in builders.KINDS}
    est = estimate_cost(counts, ScanSettings().plan, clf.height, clf.width, rate=clf.measured_rate,
                        masks=True, per_class=(2,))
    result = _scan_fn()(images, clf, out=work / "est_out", settings=ScanSettings())
    measured = time.perf_counter() - t0
    return {"threads": threads, "images": est.images, "passes_per_image_estimated": est.passes_per_image,
            "passes_per_image": result.run["passes_this_run"] / max(1, result.dataset["audited"]),
            "rate": est.rate, "batch": clf.batch_size, "estimated_seconds": est.seconds,
            "measured_seconds": measured, "ratio": measured / est.seconds}


def linear_figure(cfg: dict, work: Path) -> dict:
    """Wall time of whole scans of three sizes, and of their per-image phase (first to
    last progress event of the images phase), in the order small, middle, large, large,
    middle, small (so a load that drifts during the run weighs on all alike); means of the
    two. Linear growth is judged by the middle size against the line through the other two
    (no circularity: the line is fitted without it)."""
    model = builders.save(builders.small_cnn(size=cfg["linear_side"], seed=2), work / "small.onnx")
    sizes = tuple(cfg["linear_sizes"])
    a, m, b = sizes
    sets = {n: builders.write_image_set(work / f"lin{n}", n, size=cfg["linear_image"], seed=12) for n in sizes}
    whole: dict[int, list[float]] = {n: [] for n in sizes}
    phase: dict[int, list[float]] = {n: [] for n in sizes}
    for k, n in enumerate(sizes + sizes[::-1]):
        clf = OnnxClassifier(model, ModelConfig(threads=1, batch_size=32), dataset_labels=builders.KINDS)
        marks = []

        def progress(e, marks=marks):
            if e.get("phase") == "images":
                marks.append(time.perf_counter())

        t0 = time.perf_counter()
        _scan_fn()(sets[n], clf, out=work / f"lin_out{n}_{k}", settings=ScanSettings(), progress=progress)
        whole[n].append(time.perf_counter() - t0)
        phase[n].append(marks[-1] - marks[0])
    w = {n: float(np.mean(whole[n])) for n in sizes}
    p = {n: float(np.mean(phase[n])) for n in sizes}
    per_image = (w[b] - w[a]) / (b - a)
    fixed = w[a] - a * per_image
    predicted_middle = fixed + m * per_image
    return {"sizes": list(sizes), "seconds": [w[n] for n in sizes], "ratio": w[b] / w[a],
            "runs": {str(n): whole[n] for n in sizes},
            "phase_seconds": [p[n] for n in sizes], "phase_ratio": p[b] / p[a], "expected": b / a,
            "fixed_seconds": fixed, "per_image_ms": 1000 * per_image,
            "middle_predicted": predicted_middle, "middle_off": w[m] / predicted_middle - 1.0,
            "side": cfg["linear_side"]}


def depthwise_figure(cfg: dict, work: Path, threads: int, profile: Path | None = None) -> dict:
    m = builders.depthwise_cnn(size=cfg["size"]) if cfg["size"] == 224 else builders.depthwise_cnn(
        size=cfg["size"], classes=10, blocks=((16, 2), (32, 2)))
    model = builders.save(m, work / "depthwise.onnx")
    images = builders.write_image_set(work / f"dw_images{threads}", cfg["depthwise_images"], size=cfg["size"],
                                      seed=13)
    out = work / f"dw_out{threads}"
    prof = cProfile.Profile() if profile is not None else None
    # the session's own rate before (on a classifier of its own, same batch size) and after
    probe = OnnxClassifier(model, ModelConfig(threads=threads), dataset_labels=builders.KINDS)
    raw_before = raw_rate(probe, images, cfg["raw_seconds"])
    del probe
    with PassCounter() as counter:
        t0 = time.perf_counter()
        if prof:
            prof.enable()
        clf = OnnxClassifier(model, ModelConfig(threads=threads), dataset_labels=builders.KINDS)
        result = _scan_fn()(images, clf, out=out, settings=ScanSettings())
        if prof:
            prof.disable()
        elapsed = time.perf_counter() - t0
    if prof:
        prof.dump_stats(str(profile))
    after = raw_rate(clf, images, cfg["raw_seconds"])
    before = raw_before
    raw = (before + after) / 2
    whole = counter.passes / elapsed
    return {"threads": threads, "parameters": builders.parameter_count(m), "images": result.dataset["audited"],
            "batch": clf.batch_size, "passes": counter.passes, "calls": counter.calls,
            "engine_passes": result.run["passes_this_run"], "seconds": elapsed, "whole_rate": whole,
            "raw_rate": raw, "raw_before": before, "raw_after": after, "ratio": whole / raw,
            "findings": len(result.findings)}


def block(res: dict, machine: dict) -> str:
    lines = [f"Run: `python bench/wholescan.py` on {machine['date']}; load average before "
             f"{machine['load_before']:.2f}, after {machine['load_after']:.2f}.\n"]
    lines.append("Cost estimate before a scan (random 224 x 224 CNN, generated images with estimated masks; "
                 "the rate is the classifier's own batch-size measurement, no extra passes):\n")
    lines.append("| threads | images | batch | passes/image estimated (measured) | rate measured | estimated | "
                 "measured | measured / estimated |")
    lines.append("| --- | --- | --- | --- | --- | --- | --- | --- |")
    for e in res["estimate"]:
        lines.append(f"| {e['threads']} | {e['images']} | {e['batch']} | {e['passes_per_image_estimated']} "
                     f"({e['passes_per_image']:.1f}) | {e['rate']:.0f}/s | {e['estimated_seconds']:.1f} s | "
                     f"{e['measured_seconds']:.1f} s | {e['ratio']:.2f} |")
    lin = res["linear"]
    (a, m, b), (wa, wm, wb), (pa, pm, pb) = lin["sizes"], lin["seconds"], lin["phase_seconds"]
    lines.append(f"\nLinear growth (small random CNN at {lin['side']} x {lin['side']}, batch 32, one thread, report written; "
                 f"each size twice, small to large and back, means): {a} images {wa:.1f} s, {m} images "
                 f"{wm:.1f} s, {b} images {wb:.1f} s. As a line through {a} and {b}: "
                 f"{lin['fixed_seconds']:.1f} s that do not grow with the images + {lin['per_image_ms']:.1f} ms "
                 f"an image; the {m}-image scan lies {lin['middle_off']:+.1%} off that line "
                 f"({lin['middle_predicted']:.1f} s predicted). {b} against {a} images: ratio "
                 f"{lin['ratio']:.2f} ({lin['expected']:.0f} only without the part that does not grow); the "
                 f"per-image phase alone "
                 f"{pa:.1f}, {pm:.1f} and {pb:.1f} s: ratio {lin['phase_ratio']:.2f}.\n")
    lines.append("Whole scan on the depthwise-separable 224 x 224 network (every pass of the scan over its "
                 "wall time, against the session alone at the same batch size):\n")
    lines.append("| threads | parameters | images | batch | passes (of which per-image) | seconds | "
                 "whole-scan passes/s | raw passes/s | ratio | per-image passes only: ratio |")
    lines.append("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for d in res["depthwise"]:
        lines.append(f"| {d['threads']} | {d['parameters']} | {d['images']} | {d['batch']} | {d['passes']} "
                     f"({d['engine_passes']}) | {d['seconds']:.1f} | {d['whole_rate']:.1f} | "
                     f"{d['raw_rate']:.1f} | {d['ratio']:.2f} | {d['engine_passes'] / d['seconds'] / d['raw_rate']:.2f} |")
    return "\n".join(lines) + "\n"


def write_block(path: Path, text: str) -> None:
    body = path.read_text(encoding="utf-8") if path.exists() else "# Benchmark\n"
    if BEGIN not in body or END not in body:
        body = body.rstrip("\n") + f"\n\n## Whole scans (bench/wholescan.py)\n\n{BEGIN}\n{END}\n"
    head, rest = body.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    path.write_text(f"{head}{BEGIN}\n{text}{END}{tail}", encoding="utf-8")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--only", choices=("estimate", "linear", "depthwise"), action="append")
    ap.add_argument("--profile", type=Path, help="write a cProfile of the one-thread depthwise scan here")
    ap.add_argument("--json", type=Path)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args(argv)
    cfg = QUICK if args.quick else FULL
    only = set(args.only or ("estimate", "linear", "depthwise"))
    machine = {"date": time.strftime("%Y-%m-%d %H:%M"), "load_before": os.getloadavg()[0]}
    res: dict = {"estimate": [], "linear": None, "depthwise": []}
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        if "estimate" in only:
            for t in cfg["threads"]:
                res["estimate"].append(estimate_figure(cfg, work / f"e{t}", t))
                print("estimate", res["estimate"][-1], flush=True)
        if "linear" in only:
            res["linear"] = linear_figure(cfg, work)
            print("linear", res["linear"], flush=True)
        if "depthwise" in only:
            for t in cfg["threads"]:
                res["depthwise"].append(depthwise_figure(cfg, work, t, args.profile if t == 1 else None))
                print("depthwise", res["depthwise"][-1], flush=True)
    machine["load_after"] = os.getloadavg()[0]
    if args.json:
        args.json.write_text(json.dumps({"machine": machine, **res}, indent=1, default=float))
    if res["linear"] is None or not res["estimate"] or not res["depthwise"]:
        return 0
    text = block(res, machine)
    print(text)
    if not args.quick and not args.no_write:
        write_block(HERE / "RESULTS.md", text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
