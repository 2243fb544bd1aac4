"""The performance benchmark of shortcut_audit, in one command.

    python bench/run.py            # the full run (about 10 minutes on 2 cores), writes bench/RESULTS.md
    python bench/run.py --quick    # tiny sizes, a few seconds: checks that every figure is produced

Figures, for a 64 x 64 model (the demo's trained ``baseline.onnx`` when it exists, else a
random CNN of the same shape) and a 224 x 224 random CNN built here (no download):

- ``throughput``: onnxruntime's own rate on random batches at the engine's batch size
  (``raw``, the session alone), ``predict`` (with the tool's preprocessing), and the
  engine's rate during ``heatmap`` (:func:`shortcut_audit.heatmap.run_heatmap`) and
  ``scan`` (:func:`shortcut_audit.scan.scan`), in passes per second, with 1 and with 2
  onnxruntime threads; ratios to ``raw`` are taken within each repeat, then the median.
- ``batch_size``: what ``OnnxClassifier`` chose (several constructions) against the
  session's rate at each candidate size.
- ``memory``: peak resident set (VmHWM) of ``scan`` on a small and a large generated set,
  each in its own subprocess, with the per-image store on disk and without it.
- ``adaptive``: the adaptive plan against the exhaustive fine grid: passes, Spearman rank
  correlation of the heatmaps (all pixels, and where either map is at least 5% of the
  exhaustive peak), IoU of the peak boxes and of the decisive boxes.
- ``early_stopping``: masks used and distance to the capped map, for random plans.
- ``reuse``: perturbed images scored twice within one image's analysis.

Everything is printed, written as JSON (``--json``) and, for a full run, into the block
between the markers of bench/RESULTS.md (the rest of that file is left as it is).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import platform
import statistics
import subprocess
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

BEGIN = "<!-- bench:begin -->"
END = "<!-- bench:end -->"
VISIBLE = 0.05          # "visible" pixels: |heat| at least this share of the exhaustive peak
#: How scan keeps per-image results in the memory figures: the store on disk and the
#: report written (as the CLI runs), the store without the report, everything in memory.
MEMORY_MODES = ("store", "store_no_report", "in_memory")
#: Batch size of the memory figures' scans.
MEMORY_BATCH = 32
#: Early-stopping tolerances measured.
EARLY_TOLERANCES = (0.1, 0.2, 0.3)


# ------------------------------------------------------------------ settings

#: Sizes of a full run. ``scan_images``: (images per class, classes) of the scans timed.
FULL = dict(
    repeats=5, raw_seconds=1.0, small_size=64, large_size=224, large_channels=builders.LARGE_CHANNELS,
    large_classes=1000, batch_constructions=3, batch_repeats={"small": 3, "large": 2},
    engine_images={"small": 4, "large": 1}, heatmaps_per_repeat={"small": 3, "large": 1},
    scan_images={"small": (12, 4), "large": (4, 2)},
    memory_sizes=(200, 2000), memory_image=48, memory_report=True, memory_one_process=False,
    adaptive_images={"small": 144, "large": 12}, early_images=12, early_caps=(4000, 2000), reuse_images=20,
)
#: Sizes of ``--quick``: every figure, none of them meaningful.
QUICK = dict(
    repeats=1, raw_seconds=0.02, small_size=16, large_size=32,
    large_channels=((3, 8, 2), (8, 16, 2), (16, 16, 1)), large_classes=10,
    batch_constructions=1, batch_repeats={"small": 1, "large": 1},
    engine_images={"small": 1, "large": 1}, heatmaps_per_repeat={"small": 1, "large": 1},
    scan_images={"small": (1, 2), "large": (1, 2)},
    memory_sizes=(8, 32), memory_image=16, memory_report=False, memory_one_process=True,
    adaptive_images={"small": 4, "large": 2}, early_images=2, early_caps=(400, 200), reuse_images=2,
)


def median(values):
    values = [v for v in values if v is not None and np.isfinite(v)]
    return float(statistics.median(values)) if values else float("nan")


# ------------------------------------------------------------------ machine

def machine() -> dict:
    import onnxruntime

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"nproc": os.cpu_count(), "cpu": cpu, "onnxruntime": onnxruntime.__version__,
            "numpy": np.__version__, "python": platform.python_version(),
            "load_average_before": list(os.getloadavg()),
            "date": time.strftime("%Y-%m-%d %H:%M")}


# ------------------------------------------------------------------ models and images

def prepare_models(cfg: dict, work: Path, quick: bool) -> dict:
    demo = ROOT / "shortcut_audit" / "demo" / "models" / "baseline.onnx"
    models = {}
    if demo.is_file() and not quick:
        models["small"] = {"path": str(demo), "source": "demo baseline.onnx (trained)"}
    else:
        m = builders.small_cnn(size=cfg["small_size"])
        models["small"] = {"path": str(builders.save(m, work / "small.onnx")),
                           "source": f"built: demo-shaped CNN, random weights, {builders.parameter_count(m)} parameters"}
    m = builders.large_cnn(size=cfg["large_size"], channels=cfg["large_channels"], classes=cfg["large_classes"])
    models["large"] = {"path": str(builders.save(m, work / "large.onnx")),
                       "source": f"built: {len(cfg['large_channels'])} conv layers, random weights, "
                                 f"{builders.parameter_count(m)} parameters"}
    return models


def image_root(work: Path, quick: bool) -> tuple[Path, str]:
    demo = ROOT / "demo_images" / "images"
    if demo.is_dir() and any(demo.glob("*/*.png")) and not quick:
        return demo, "demo_images/images (36 a class)"
    root = builders.write_image_set(work / "images", 16, size=24, seed=3)
    return root, "generated (bench/builders.write_image_set)"


def image_files(root: Path, n: int) -> list[Path]:
    files = sorted(root.glob("*/*.png"))
    step = max(1, len(files) // max(1, n))
    return files[::step][:n]


# ------------------------------------------------------------------ throughput

def random_batch(clf, size: int) -> np.ndarray:
    rng = np.random.default_rng(2)
    return rng.uniform(0, 255, size=(size, clf.height, clf.width, clf.channels)).astype(np.float32)


def timed_rate(fn, per_call: int, seconds: float) -> float:
    """Calls of ``fn`` (``per_call`` images each) per second, after one warm-up call,
    over at least ``seconds`` and three calls."""
    fn()
    count, start = 0, time.perf_counter()
    while True:
        fn()
        count += per_call
        elapsed = time.perf_counter() - start
        if elapsed >= seconds and count >= 3 * per_call:
            return count / elapsed


def raw_rate(clf, seconds: float) -> float:
    """The session's own images per second on one random batch at the classifier's batch
    size, already preprocessed (onnxruntime alone)."""
    feed = clf._prepare(random_batch(clf, clf.batch_size))
    names, inputs = [clf.output_name], {clf.input_name: feed}
    return timed_rate(lambda: clf._session.run(names, inputs), clf.batch_size, seconds)


def predict_rate(clf, seconds: float) -> float:
    """Images per second through ``predict`` (preprocessing, session, softmax)."""
    batch = random_batch(clf, clf.batch_size)
    return timed_rate(lambda: clf.predict(batch), clf.batch_size, seconds)


def engine_rate(clf, pixels: list, batch_size: int) -> float:
    """Passes per second of one engine running the default heatmap job of every image."""
    from shortcut_audit.engine import PassEngine
    from shortcut_audit.scan import DEFAULT_FILL, DEFAULT_PLAN
    from shortcut_audit.sensitivity import heatmap_job

    engine = PassEngine.for_classifier(clf, batch_size=batch_size)
    start = time.perf_counter()
    for _key, result in engine.run([(i, heatmap_job(px, plan=DEFAULT_PLAN, fill=DEFAULT_FILL, chunk=batch_size,
                                                    prepared_by=clf))
                                    for i, px in enumerate(pixels)]):
        if isinstance(result, Exception):
            raise result
    return engine.stats.passes / (time.perf_counter() - start)


def heatmap_rate(clf, image: Path, out: Path) -> float:
    """The engine's passes per second during one ``run_heatmap``, as its progress reports it."""
    from shortcut_audit.heatmap import run_heatmap

    seen = []
    run_heatmap(image, clf, out=out, progress=lambda p: seen.append(p["passes_per_second"]))
    return seen[-1]


def scan_rate(clf, images: Path) -> tuple[float, int]:
    """The engine's passes per second during ``scan``'s per-image analysis (at its last
    image, as its progress reports it; the confirmation tests that follow run on an
    engine of their own) and the passes."""
    from shortcut_audit.scan import ScanSettings, audit

    seen = []
    result = audit(images, clf, settings=ScanSettings(),
                  progress=lambda p: p["phase"] == "images" and seen.append(p["passes_per_second"]))
    return seen[-1], result.run["passes_this_run"]


def scan_folder(images: Path, work: Path, name: str, per_class: int, classes: int) -> Path:
    """A copy of ``per_class`` images of the first ``classes`` classes of ``images``."""
    import shutil

    root = work / f"scan_{name}"
    for folder in sorted(p for p in images.iterdir() if p.is_dir())[:classes]:
        (root / folder.name).mkdir(parents=True, exist_ok=True)
        for f in sorted(folder.glob("*.png"))[:per_class]:
            shutil.copy(f, root / folder.name / f.name)
    return root


def batch_sizes(cfg: dict, models: dict, images: Path) -> dict:
    """What ``OnnxClassifier`` picks, against the session's and the engine's rate at every
    candidate size; the best engine rate gives the batch size of the throughput figures."""
    from shortcut_audit.dataset import load_image
    from shortcut_audit.model import BATCH_CANDIDATES, ModelConfig, OnnxClassifier

    out = {}
    for name, m in models.items():
        for t in (1, 2):
            chosen = [OnnxClassifier(m["path"], ModelConfig(threads=t)).batch_size
                      for _ in range(cfg["batch_constructions"])]
            files = image_files(images, cfg["engine_images"][name])
            raw, eng = {}, {}
            for size in BATCH_CANDIDATES:
                clf = OnnxClassifier(m["path"], ModelConfig(threads=t, batch_size=size))
                pixels = [load_image(f, size=(clf.height, clf.width), channels=clf.channels) for f in files]
                r, e = [], []
                for _ in range(cfg["batch_repeats"][name]):
                    r.append(raw_rate(clf, cfg["raw_seconds"] / 2))
                    e.append(engine_rate(clf, pixels, size))
                raw[str(size)], eng[str(size)] = median(r), median(e)
            best = max(eng, key=eng.get)
            row = {"chosen": chosen, "raw": raw, "engine": eng, "best_engine": int(best),
                   "best_raw": int(max(raw, key=raw.get)),
                   "chosen_engine_share": median([eng[str(c)] / eng[best] for c in chosen if str(c) in eng])}
            out.setdefault(name, {})[f"threads_{t}"] = row
            print(f"  batch size {name:5s} threads={t}: chosen by the tool {chosen}; engine best at {best} "
                  f"({', '.join(f'{k}: {v:.0f}' for k, v in eng.items())} passes/s)", flush=True)
    return out


def throughput(cfg: dict, models: dict, images: Path, work: Path, sizes: dict) -> tuple[dict, dict]:
    from shortcut_audit.model import ModelConfig, OnnxClassifier

    clfs = {(name, t): OnnxClassifier(m["path"], ModelConfig(
        threads=t, batch_size=sizes[name][f"threads_{t}"]["best_engine"]))
        for name, m in models.items() for t in (1, 2)}
    one = image_files(images, 1)[0]
    folders = {name: scan_folder(images, work, name, *cfg["scan_images"][name]) for name in models}
    runs = {key: [] for key in clfs}
    for rep in range(cfg["repeats"]):
        for key, clf in clfs.items():
            before = raw_rate(clf, cfg["raw_seconds"])
            pred = predict_rate(clf, cfg["raw_seconds"])
            hm = median([heatmap_rate(clf, one, work / "hm") for _ in range(cfg["heatmaps_per_repeat"][key[0]])])
            sc, passes = scan_rate(clf, folders[key[0]])
            raw = (before + raw_rate(clf, cfg["raw_seconds"])) / 2.0   # the session's rate around them
            runs[key].append({"raw": raw, "predict": pred, "heatmap": hm, "scan": sc, "scan_passes": passes})
            print(f"  repeat {rep + 1} {key[0]:5s} threads={key[1]} batch {clf.batch_size:3d}: raw {raw:8.1f} "
                  f"predict {pred:8.1f} heatmap {hm:8.1f} scan {sc:8.1f} passes/s", flush=True)
    out: dict = {}
    for (name, t), rs in runs.items():
        row = {k: median([r[k] for r in rs]) for k in ("raw", "predict", "heatmap", "scan")}
        row.update({f"ratio_{k}": median([r[k] / r["raw"] for r in rs]) for k in ("predict", "heatmap", "scan")})
        row["batch_size"] = clfs[(name, t)].batch_size
        row["scan_passes"] = rs[0]["scan_passes"]
        row["runs"] = rs
        out.setdefault(name, {})[f"threads_{t}"] = row
    for name in models:
        one_t, two_t = out[name]["threads_1"]["runs"], out[name]["threads_2"]["runs"]
        out[name]["scaling_2_over_1"] = {
            k: median([b[k] / a[k] for a, b in zip(one_t, two_t)]) for k in ("raw", "heatmap", "scan")}
    return out, clfs


# ------------------------------------------------------------------ memory

def _status(key: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1])
    return -1


def memory_child(args) -> None:
    """Run the scans listed in ``--jobs`` (JSON: [[images, out or null, report], ...]) in turn and
    print, for each, this process's peak resident set (VmHWM) during it, as JSON lines.

    Between scans the peak is reset (``5`` into /proc/self/clear_refs, Linux 4.0+), so with
    several scans each peak is that scan's alone, on top of what the process already holds.
    """
    from shortcut_audit.model import ModelConfig
    from shortcut_audit.occlusion import GridPlan
    from shortcut_audit.scan import ScanSettings, audit

    settings = ScanSettings(plan=GridPlan(patch=0.25, stride=0.25))
    # a fixed batch size: a measured one varies with the machine's load, and with it the
    # memory onnxruntime and the engine hold, which would hide what the image count does
    config = ModelConfig(batch_size=MEMORY_BATCH)
    for images, out, report in json.loads(args.jobs):
        before = _status("VmRSS")
        try:
            Path("/proc/self/clear_refs").write_text("5")
        except OSError:
            pass
        result = audit(images, args.model, out=out, model_config=config, settings=settings)
        if report and out is not None:         # as the command line does after the audit
            from shortcut_audit.report import write_scan_report
            write_scan_report(result, out)
        print(json.dumps({"vmhwm_kb": _status("VmHWM"), "rss_before_kb": before,
                          "images": len(result.images), "passes": result.run["passes_this_run"]}), flush=True)


def memory(cfg: dict, models: dict, work: Path) -> dict:
    """Peak memory of scan on each set size, with the store on disk and without it.

    A full run gives each scan its own process (two at a time); ``--quick`` runs them in
    one process, resetting the peak in between.
    """
    jobs = []
    for n in cfg["memory_sizes"]:
        root = builders.write_image_set(work / f"mem{n}", n, size=cfg["memory_image"], seed=n)
        for mode in MEMORY_MODES:
            jobs.append(((mode, n), [str(root), None if mode == "in_memory" else str(work / f"mem{n}_{mode}"),
                                     mode == "store" and cfg["memory_report"]]))

    def child(batch):
        cmd = [sys.executable, str(HERE / "run.py"), "--memory-child", "--model", models["small"]["path"],
               "--jobs", json.dumps([j for _k, j in batch])]
        return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=str(ROOT))

    groups = [jobs] if cfg["memory_one_process"] else [[j] for j in jobs]
    out: dict = {}
    for pair in range(0, len(groups), 2):
        running = [(g, child(g)) for g in groups[pair:pair + 2]]
        for batch, proc in running:
            stdout, stderr = proc.communicate()
            if proc.returncode != 0:
                raise RuntimeError(f"memory child failed: {stderr.strip().splitlines()[-1:]}")
            for ((mode, n), _j), line in zip(batch, stdout.strip().splitlines()):
                got = json.loads(line)
                out.setdefault(mode, {})[str(n)] = got
                print(f"  memory {mode:9s} {n:5d} images: VmHWM {got['vmhwm_kb'] / 1024:7.1f} MB "
                      f"(before the scan {got['rss_before_kb'] / 1024:.1f} MB)", flush=True)
    small, large = (str(n) for n in cfg["memory_sizes"])
    for mode, rows in out.items():
        rows["ratio"] = rows[large]["vmhwm_kb"] / rows[small]["vmhwm_kb"]
        rows["growth_kb_per_image"] = ((rows[large]["vmhwm_kb"] - rows[small]["vmhwm_kb"])
                                       / (int(large) - int(small)))
    return out


# ------------------------------------------------------------------ adaptive plan

def adaptive(cfg: dict, models: dict, images: Path, clfs: dict, quick: bool) -> dict:
    from scipy.stats import spearmanr

    from shortcut_audit.dataset import load_image
    from shortcut_audit.engine import PassEngine
    from shortcut_audit.maps import box_iou
    from shortcut_audit.occlusion import AdaptivePlan, GridPlan
    from shortcut_audit.scan import DEFAULT_FILL, DEFAULT_PLAN
    from shortcut_audit.sensitivity import image_job

    out = {}
    cases = [("small", "prob"), ("small", "logit"), ("large", "prob")]
    for name, score in cases:
        clf = clfs[(name, 2)]
        files = image_files(images, cfg["adaptive_images"][name])
        pixels = [load_image(f, size=(clf.height, clf.width), channels=clf.channels) for f in files]
        scorer = clf.predict if score == "prob" else clf.logits
        results = {}
        for label, plan in (("exhaustive", GridPlan(patch=DEFAULT_PLAN.patch, stride=DEFAULT_PLAN.stride)),
                            ("adaptive", AdaptivePlan())):
            engine = PassEngine(scorer, batch_size=clf.batch_size)
            jobs = [(i, image_job(px, plan=plan, fill=DEFAULT_FILL, chunk=clf.batch_size))
                    for i, px in enumerate(pixels)]
            results[label] = dict(engine.run(jobs))
        rho, rho_vis, peak, decisive, share = [], [], [], [], []
        both_none = 0
        for i in range(len(pixels)):
            e, a = results["exhaustive"][i], results["adaptive"][i]
            if isinstance(e, Exception) or isinstance(a, Exception):
                continue
            ev, av = e.heatmap.values, a.heatmap.values
            share.append(a.heatmap.passes / e.heatmap.passes)
            rho.append(spearmanr(av.ravel(), ev.ravel())[0])
            vis = np.maximum(np.abs(av), np.abs(ev)) >= VISIBLE * np.abs(ev).max()
            rho_vis.append(spearmanr(av[vis], ev[vis])[0] if vis.sum() > 2 else float("nan"))
            peak.append(box_iou(a.peak_box, e.peak_box))
            if e.decisive_box is None and a.decisive_box is None:
                both_none += 1
            else:
                decisive.append(box_iou(a.decisive_box, e.decisive_box) or 0.0)
        peak_ok = [p for p in peak if p is not None]
        row = {
            "model": name, "score": score, "images": len(share),
            "exhaustive_passes": int(results["exhaustive"][0].heatmap.passes),
            "adaptive_passes_median": median([s * results["exhaustive"][0].heatmap.passes for s in share]),
            "pass_share": median(share),
            "spearman_median": median(rho), "spearman_share_at_least_0.9": float(np.mean(np.array(rho) >= 0.9)),
            "spearman_visible_median": median(rho_vis),
            "peak_iou_median": median(peak_ok),
            "peak_iou_share_at_least_0.8": float(np.mean(np.array(peak_ok) >= 0.8)) if peak_ok else float("nan"),
            "decisive_images": len(decisive), "decisive_both_none": both_none,
            "decisive_iou_median": median(decisive),
            "decisive_iou_share_at_least_0.8": float(np.mean(np.array(decisive) >= 0.8)) if decisive else float("nan"),
        }
        out[f"{name}/{score}"] = row
        print(f"  adaptive {name}/{score}: passes {row['pass_share']:.3f} of exhaustive, spearman "
              f"{row['spearman_median']:.3f} (visible {row['spearman_visible_median']:.3f}), peak IoU "
              f"{row['peak_iou_median']:.2f}, decisive IoU {row['decisive_iou_median']:.2f} "
              f"(>=0.8 in {row['decisive_iou_share_at_least_0.8']:.0%} of {len(decisive)})", flush=True)
    return out


# ------------------------------------------------------------------ early stopping

def early_stopping(cfg: dict, images: Path, clfs: dict) -> dict:
    from shortcut_audit.dataset import load_image
    from shortcut_audit.engine import PassEngine
    from shortcut_audit.occlusion import RandomPatchPlan, SmoothMaskPlan
    from shortcut_audit.scan import DEFAULT_FILL
    from shortcut_audit.sensitivity import heatmap_job

    clf = clfs[("small", 2)]
    pixels = [load_image(f, size=(clf.height, clf.width), channels=clf.channels)
              for f in image_files(images, cfg["early_images"])]

    def maps(plan, tolerance):
        engine = PassEngine(clf.predict, batch_size=clf.batch_size)
        return dict(engine.run([(i, heatmap_job(px, plan=plan, fill=DEFAULT_FILL, chunk=clf.batch_size,
                                                 tolerance=tolerance)) for i, px in enumerate(pixels)]))

    out = {}
    for label, plan in (("rise", SmoothMaskPlan(count=cfg["early_caps"][0])),
                        ("random", RandomPatchPlan(count=cfg["early_caps"][1]))):
        # a tolerance no estimate reaches: the capped map, with its estimated error near the cap
        capped = maps(plan, 1e-12)
        at_cap = median([capped[i].error_estimate for i in range(len(pixels))])
        for tol in EARLY_TOLERANCES:
            early = maps(plan, tol)
            dist, used = [], []
            for i in range(len(pixels)):
                c, e = capped[i], early[i]
                dist.append(float(np.linalg.norm(e.values - c.values) / max(np.linalg.norm(c.values), 1e-12)))
                used.append((e.passes - 1) / (c.passes - 1))
            row = out[f"{label}/{tol}"] = {
                "plan": label, "tolerance": tol, "cap": plan.count, "error_at_cap_median": at_cap,
                "mask_share_median": median(used),
                "distance_median": median(dist), "distance_max": float(max(dist)),
                "within_tolerance_share": float(np.mean(np.array(dist) <= tol))}
            print(f"  early stopping {label}: tolerance {tol}, masks {row['mask_share_median']:.2f} of "
                  f"{plan.count}, distance to capped median {row['distance_median']:.3f} max "
                  f"{row['distance_max']:.3f}", flush=True)
    return out


# ------------------------------------------------------------------ reuse of passes

def reuse(cfg: dict, images: Path, clfs: dict) -> dict:
    """Perturbed images that one image's analysis scores more than once."""
    from shortcut_audit.dataset import load_image
    from shortcut_audit.engine import run_job
    from shortcut_audit.scan import DEFAULT_FILL, DEFAULT_PLAN
    from shortcut_audit.sensitivity import image_job

    clf = clfs[("small", 2)]
    dupes, total = [], []
    for f in image_files(images, cfg["reuse_images"]):
        px = load_image(f, size=(clf.height, clf.width), channels=clf.channels)
        seen: dict[bytes, int] = {}

        def scorer(batch):
            for x in batch:
                key = hashlib.blake2b(np.ascontiguousarray(x).tobytes(), digest_size=16).digest()
                seen[key] = seen.get(key, 0) + 1
            return clf.predict(batch)

        stats = run_job(scorer, image_job(px, plan=DEFAULT_PLAN, fill=DEFAULT_FILL, chunk=clf.batch_size),
                        batch_size=clf.batch_size)
        dupes.append(sum(v - 1 for v in seen.values()))
        total.append(stats.passes)
    out = {"images": len(dupes), "passes_per_image_median": median(total),
           "repeated_passes_per_image_mean": float(np.mean(dupes)), "repeated_passes_max": int(max(dupes))}
    print(f"  reuse: {out['repeated_passes_per_image_mean']:.2f} of {out['passes_per_image_median']:.0f} passes "
          f"an image score an image already scored", flush=True)
    return out


# ------------------------------------------------------------------ writing

def markdown(res: dict) -> str:
    m = res["machine"]
    lines = [f"Run: `python bench/run.py` on {m['date']}; {m['nproc']} CPUs, {m['cpu']}; onnxruntime "
             f"{m['onnxruntime']}, numpy {m['numpy']}, Python {m['python']}. Load average before "
             f"{m['load_average_before'][0]:.2f}, after {m['load_average_after'][0]:.2f} (other work on the "
             "machine slows every figure; the ratios are taken within each repeat). Medians of "
             f"{res['settings']['repeats']} repeats.", ""]
    for name, info in res["models"].items():
        lines.append(f"- `{name}`: {info['source']}; input {info['size']}.")
    lines += ["", "Throughput, passes (images) per second; ratios to the session's own rate (raw) at the "
              "engine's batch size:", "",
              "| model | threads | batch | raw | predict | heatmap | scan | predict/raw | heatmap/raw | scan/raw |",
              "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for name, rows in res["throughput"].items():
        for t in (1, 2):
            r = rows[f"threads_{t}"]
            lines.append(f"| {name} | {t} | {r['batch_size']} | {r['raw']:.1f} | {r['predict']:.1f} | "
                         f"{r['heatmap']:.1f} | {r['scan']:.1f} | {r['ratio_predict']:.2f} | "
                         f"{r['ratio_heatmap']:.2f} | {r['ratio_scan']:.2f} |")
    lines += ["", "Scaling from 1 to 2 onnxruntime threads (rate with 2 / rate with 1):", "",
              "| model | raw | heatmap | scan |", "| --- | --- | --- | --- |"]
    for name, rows in res["throughput"].items():
        s = rows["scaling_2_over_1"]
        lines.append(f"| {name} | {s['raw']:.2f} | {s['heatmap']:.2f} | {s['scan']:.2f} |")
    lines += ["", "Batch size: what `OnnxClassifier` chose (several constructions), and the engine's rate (the default "
              "heatmap job of a few images through `PassEngine`) and the session's own rate at each candidate size, "
              "passes per second. The throughput figures above use the best engine size.", "",
              "| model | threads | chosen by the tool | engine rate there / best | best for the engine | "
              "engine rate by size | best for the session alone | session rate by size |",
              "| --- | --- | --- | --- | --- | --- | --- | --- |"]
    for name, rows in res["batch_size"].items():
        for t in (1, 2):
            r = rows[f"threads_{t}"]
            eng = ", ".join(f"{k}: {v:.0f}" for k, v in r["engine"].items())
            raw = ", ".join(f"{k}: {v:.0f}" for k, v in r["raw"].items())
            lines.append(f"| {name} | {t} | {r['chosen']} | {r['chosen_engine_share']:.2f} | {r['best_engine']} | "
                         f"{eng} | {r['best_raw']} | {raw} |")
    mem = res["memory"]
    small, large = (k for k in mem["store"] if k.isdigit())
    lines += ["", f"Peak resident set (VmHWM) of `scan` ({res['models']['small']['size']} model, batch size "
              f"{MEMORY_BATCH}, a 4 x 4 grid to keep it short), each scan in its own process:", "",
              f"| per-image results | {small} images | {large} images | ratio | growth per image |",
              "| --- | --- | --- | --- | --- |"]
    for mode, label in (("store", "on disk, report written (`--out`, as the CLI runs)"),
                        ("store_no_report", "on disk, no report (no `write_scan_report`)"),
                        ("in_memory", "in memory (`out=None`)")):
        r = mem[mode]
        lines.append(f"| {label} | {r[small]['vmhwm_kb'] / 1024:.1f} MB | {r[large]['vmhwm_kb'] / 1024:.1f} MB | "
                     f"{r['ratio']:.2f} | {r['growth_kb_per_image']:.1f} kB |")
    lines += ["", "Adaptive plan (defaults) against the exhaustive grid of its fine patches (the scan's default "
              "grid), per image:", "",
              "| model / score | images | passes (share) | Spearman all | share >= 0.9 | Spearman visible | "
              "peak-box IoU | share >= 0.8 | decisive-box IoU | share >= 0.8 (images) |",
              "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for key, r in res["adaptive"].items():
        lines.append(f"| {key} | {r['images']} | {r['adaptive_passes_median']:.0f} of {r['exhaustive_passes']} "
                     f"({r['pass_share']:.2f}) | {r['spearman_median']:.3f} | {r['spearman_share_at_least_0.9']:.2f} | "
                     f"{r['spearman_visible_median']:.3f} | {r['peak_iou_median']:.2f} | "
                     f"{r['peak_iou_share_at_least_0.8']:.2f} | {r['decisive_iou_median']:.2f} | "
                     f"{r['decisive_iou_share_at_least_0.8']:.2f} ({r['decisive_images']}) |")
    lines += ["", "Early stopping of random plans (default score and fill, small model), per image:", "",
              "| plan | estimated error of the capped map | tolerance | masks used (share of cap) | "
              "distance to capped map, median | max | share within tolerance |",
              "| --- | --- | --- | --- | --- | --- | --- |"]
    for key, r in res["early_stopping"].items():
        lines.append(f"| {r['plan']} (cap {r['cap']}) | {r['error_at_cap_median']:.3f} | {r['tolerance']} | "
                     f"{r['mask_share_median']:.2f} | "
                     f"{r['distance_median']:.3f} | {r['distance_max']:.3f} | {r['within_tolerance_share']:.2f} |")
    u = res["reuse"]
    lines += ["", f"Reuse: one image's analysis (`image_job`, default grid) scores "
              f"{u['repeated_passes_per_image_mean']:.2f} images on average (at most {u['repeated_passes_max']}) "
              f"that it had already scored, of {u['passes_per_image_median']:.0f} passes ({u['images']} images)."]
    return "\n".join(lines) + "\n"


def write_results(path: Path, block: str) -> None:
    text = path.read_text(encoding="utf-8") if path.exists() else f"# Benchmark\n\n{BEGIN}\n{END}\n"
    if BEGIN not in text or END not in text:
        text = text.rstrip("\n") + f"\n\n{BEGIN}\n{END}\n"
    head, rest = text.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    path.write_text(f"{head}{BEGIN}\n{block}{END}{tail}", encoding="utf-8")


# ------------------------------------------------------------------ main

def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="shortcut_audit performance benchmark")
    parser.add_argument("--quick", action="store_true", help="tiny sizes, a few seconds (checks the figures only)")
    parser.add_argument("--repeats", type=int, default=None, help="repeats of the throughput figures")
    parser.add_argument("--json", type=Path, default=None, help="also write the results as JSON here")
    parser.add_argument("--out", type=Path, default=None,
                        help="markdown file to update (default bench/RESULTS.md for a full run, none for --quick)")
    parser.add_argument("--memory-child", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--model", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--jobs", default="[]", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.memory_child:
        memory_child(args)
        return 0
    cfg = dict(QUICK if args.quick else FULL)
    if args.repeats is not None:
        cfg["repeats"] = max(1, args.repeats)
    out_md = args.out if args.out is not None else (None if args.quick else HERE / "RESULTS.md")
    import warnings
    warnings.simplefilter("ignore")
    res: dict = {"settings": {"quick": args.quick, "repeats": cfg["repeats"]}, "machine": machine()}
    with tempfile.TemporaryDirectory(prefix="sa-bench-") as tmp:
        work = Path(tmp)
        models = prepare_models(cfg, work, args.quick)
        images, source = image_root(work, args.quick)
        res["images"] = source
        print(f"machine: {res['machine']['nproc']} CPUs, {res['machine']['cpu']}, onnxruntime "
              f"{res['machine']['onnxruntime']}; images: {source}", flush=True)
        seconds = res["seconds"] = {}

        def section(name, fn, *a):
            print(name, flush=True)
            start = time.perf_counter()
            value = fn(*a)
            seconds[name] = round(time.perf_counter() - start, 1)
            return value

        res["batch_size"] = section("batch_size", batch_sizes, cfg, models, images)
        res["throughput"], clfs = section("throughput", throughput, cfg, models, images, work, res["batch_size"])
        for name, info in models.items():
            clf = clfs[(name, 2)]
            info["size"] = f"{clf.height}x{clf.width}x{clf.channels}"
        res["models"] = models
        res["memory"] = section("memory", memory, cfg, models, work)
        res["adaptive"] = section("adaptive", adaptive, cfg, models, images, clfs, args.quick)
        res["early_stopping"] = section("early_stopping", early_stopping, cfg, images, clfs)
        res["reuse"] = section("reuse", reuse, cfg, images, clfs)
        print("seconds per section:", seconds, flush=True)
    res["machine"]["load_average_after"] = list(os.getloadavg())
    block = markdown(res)
    print()
    print(block)
    if args.json is not None:
        args.json.write_text(json.dumps(res, indent=1, default=float), encoding="utf-8")
    if out_md is not None:
        write_results(out_md, block)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
