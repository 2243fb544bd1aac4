"""Does a cheaper occlusion plan give the same AUDIT as the exhaustive grid?

    python bench/agreement.py                       # demo + generated sets, the candidate plans
    python bench/agreement.py --quick               # tiny sets: checks that every figure is produced
    python bench/agreement.py --plan adaptive:budget=45 --plan grid:patch=0.25,stride=0.125

Each set is a ``(model, images, masks)`` triple (:class:`AuditSet`); :func:`compare_plans`
scans it once with the reference plan (the exhaustive grid, 8-pixel patches at stride 4
on a 64-pixel side) and once per candidate, everything else equal (seed, fill, score,
batch size, one onnxruntime thread), and compares what users read of an audit:

- **findings**: the multiset of (class, kind, status) must be identical;
- **region IoU**: for findings present in both with a region (fixed-position, motif),
  the IoU of the two regions (the smallest is shown);
- **decisive area**: the share of images whose decisive area falls within one step of
  the decisive-area ladder (:data:`shortcut_audit.sensitivity.DECISIVE_LADDER`; "no
  decision move within 25%" is the step after the last);
- **per-class metrics**: the largest absolute difference of each metric the rules and
  the report read, against a stated tolerance (:data:`TOLERANCES`);
- **passes per image** of the per-image phase (heatmap, ladder, curves, mask tests) and
  the scan's whole wall time.

Sets: the three demo models on the demo images and masks; the demo's baseline model
wrapped to take 224 x 224 input (a Resize node in front: its findings must not change
with the input size); a random demo-shaped CNN and the random 224 x 224 CNN of
:mod:`builders` on generated images. Other suites (e.g. a planted-shortcut suite) are
added with ``--set NAME=MODEL,IMAGES[,MASKS]`` or by calling :func:`compare_plans`.

The table is printed and written between this script's markers in bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

import builders  # noqa: E402

import shortcut_audit as sa  # noqa: E402
from shortcut_audit.maps import box_iou as _box_iou  # noqa: E402
from shortcut_audit.model import ModelConfig, read_model_config  # noqa: E402
from shortcut_audit.occlusion import GridPlan, plan_from_dict  # noqa: E402
from shortcut_audit.scan import ScanSettings  # noqa: E402
from shortcut_audit.sensitivity import CURVE_IMAGES  # noqa: E402
from shortcut_audit.classes import SMALL_AREA  # noqa: E402

import stability as _stability  # noqa: E402
from stability import scan_step as ladder_step  # noqa: E402  (a decisive area's ladder step)

BEGIN = "<!-- agreement:begin -->"
END = "<!-- agreement:end -->"

#: The exhaustive grid every plan is measured against.
REFERENCE = GridPlan(patch=0.125, stride=0.0625)

#: Largest absolute difference allowed per class metric (a plan "agrees" within these).
#: Rates are shares of a class's images; 0.1 is about 3 images of the demo's 36.
TOLERANCES = {
    "small_area_rate": 0.10,
    "decisive_rate": 0.10,
    "box_agreement": 0.10,
    "median_decisive_area": 0.025,
    "mean_concentration": 0.05,
    "mean_gini": 0.05,
    "mean_deletion_area": 0.05,
    "mean_insertion_area": 0.05,
    "median_background_share": 0.05,
    "object_erased_survival": 0.0,
    "erased_default_rate": 0.0,
    "background_reliance": 0.0,
    "background_erased_survival": 0.0,
}

#: What a plan must reach to be "the same audit".
BAR = {"passes_share": 1 / 3, "region_iou": 0.9, "decisive_within_step": 0.95}


@dataclass(frozen=True)
class AuditSet:
    """One (model, images, masks) triple to audit, with the model's options."""

    name: str
    model: Path
    images: Path
    masks: Path | None = None
    config: ModelConfig | None = None
    note: str = ""


def _scan_fn():
    return sa.audit


def parse_plan(text: str):
    """``grid``, ``adaptive:budget=45``, ``grid:patch=0.25,stride=0.125`` -> a plan."""
    kind, _, rest = text.partition(":")
    kw: dict = {"kind": kind}
    for item in filter(None, rest.split(",")):
        k, _, v = item.partition("=")
        kw[k] = (float(v) if "." in v else int(v)) if v not in ("None", "none") else None
    if kind == "grid" and not rest:
        return REFERENCE
    return plan_from_dict(kw)


def plan_label(plan) -> str:
    d = plan.to_dict()
    kind = d.pop("kind")
    if plan == REFERENCE:
        return "grid"
    keep = {k: v for k, v in d.items() if v is not None and k not in ("seed",)}
    if kind == "adaptive":
        from shortcut_audit.occlusion import AdaptivePlan
        default = AdaptivePlan().to_dict()
        keep = {k: v for k, v in keep.items() if default.get(k) != v}
    return kind + (":" + ",".join(f"{k}={v}" for k, v in keep.items()) if keep else "")


# ------------------------------------------------------------------ sets

def demo_sets() -> list[AuditSet]:
    from shortcut_audit.demo import demo_paths

    p = demo_paths()
    out = []
    for name, m in p.models.items():
        cfg = read_model_config(m.config) if m.config else None
        out.append(AuditSet(f"demo/{name}", m.onnx, p.images, p.masks, cfg, "trained, 144 images"))
    return out


def planted_sets(work: Path, only: list[str] | None = None) -> list[AuditSet]:
    """The planted-shortcut suite's models on their regenerated audit sets (bench/planted)."""
    sys.path.insert(0, str(HERE / "planted"))
    import scenes
    from suite import spec_of

    truth = json.loads((HERE / "planted" / "truth.json").read_text(encoding="utf-8"))["models"]
    out = []
    for name, entry in truth.items():
        if only and not any(o in f"planted/{name}" for o in only):
            continue
        written = scenes.write_set(spec_of(name), work / "planted" / name)
        out.append(AuditSet(f"planted/{name}", HERE / "planted" / entry["onnx"], written["images"],
                            written["masks"], None, "planted-shortcut suite, 20 images a class"))
    return out


def wrap_at_size(src: Path, dst: Path, size: int) -> Path:
    """``src`` (an NCHW model) with a bilinear Resize from ``size`` x ``size`` in front."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    m = onnx.load(str(src))
    g = m.graph
    inp = g.input[0]
    dims = inp.type.tensor_type.shape.dim
    h, w = dims[2].dim_value, dims[3].dim_value
    old = inp.name
    new_in = helper.make_tensor_value_info(old, TensorProto.FLOAT, ["N", 3, size, size])
    inner = old + "_resized"
    for node in g.node:
        node.input[:] = [inner if x == old else x for x in node.input]
    hw = numpy_helper.from_array(np.array([h, w], np.int64), "resize_hw")
    nodes = [
        helper.make_node("Shape", [old], ["resize_shape"]),
        helper.make_node("Slice", ["resize_shape", "resize_zero", "resize_two"], ["resize_nc"]),
        helper.make_node("Concat", ["resize_nc", "resize_hw"], ["resize_sizes"], axis=0),
        helper.make_node("Resize", [old, "", "", "resize_sizes"], [inner], mode="linear"),
    ]
    consts = [hw, numpy_helper.from_array(np.array([0], np.int64), "resize_zero"),
              numpy_helper.from_array(np.array([2], np.int64), "resize_two")]
    graph = helper.make_graph(nodes + list(g.node), g.name + f"_at{size}", [new_in], list(g.output),
                              consts + list(g.initializer))
    model = helper.make_model(graph, opset_imports=list(m.opset_import), producer_name="shortcut_audit-bench")
    model.ir_version = m.ir_version
    for p in m.metadata_props:
        e = model.metadata_props.add()
        e.key, e.value = p.key, p.value
    onnx.checker.check_model(model)
    onnx.save(model, str(dst))
    return dst


def generated_sets(work: Path, quick: bool) -> list[AuditSet]:
    from shortcut_audit.demo import demo_paths

    p = demo_paths()
    out = []
    if not quick:
        at224 = wrap_at_size(p.models["baseline"].onnx, work / "baseline_at224.onnx", 224)
        out.append(AuditSet("demo baseline at 224", at224, p.images, p.masks, None,
                            "trained 64 model behind a 224->64 Resize, 144 images"))
    n_small, n_large = (8, 4) if quick else (48, 16)
    small = builders.save(builders.small_cnn(size=32 if quick else 64, seed=1), work / "small_random.onnx")
    imgs = builders.write_image_set(work / "gen48", n_small, size=48, seed=5)
    out.append(AuditSet("random 64 CNN", small, imgs, None, None, f"random weights, {n_small} generated images"))
    channels = ((3, 8, 2), (8, 16, 2), (16, 16, 1)) if quick else builders.LARGE_CHANNELS
    large = builders.save(builders.large_cnn(size=32 if quick else 224, channels=channels,
                                             classes=10 if quick else 1000), work / "large_random.onnx")
    imgs224 = builders.write_image_set(work / "gen224", n_large, size=32 if quick else 224, seed=6)
    out.append(AuditSet("random 224 CNN", large, imgs224, None, None,
                        f"random weights, {n_large} generated images"))
    return out


# ------------------------------------------------------------------ comparing

def _small(area: float | None) -> bool:
    """The call the small-area rule reads of an image: decisive area at most SMALL_AREA."""
    return area is not None and area <= SMALL_AREA + 1e-12


def box_iou(a, b) -> float:
    """maps.box_iou, with no box on either side counted as agreement (NaN: left out)
    and a box on one side only as none."""
    if a is None or b is None:
        return float("nan") if a is None and b is None else 0.0
    return _box_iou(a, b)


def model_config(s: AuditSet, *, batch: int, threads: int = 1) -> ModelConfig:
    """The model configuration every audit of ``s`` runs with."""
    cfg = ModelConfig(batch_size=batch, threads=threads)
    return cfg.merged_over(s.config) if s.config is not None else cfg


def run_audit(s: AuditSet, plan, out: Path, *, batch: int, threads: int = 1, every_curve: bool = False):
    cfg = model_config(s, batch=batch, threads=threads)
    # the reference is the exhaustive audit: every patch, and the curves of every image
    settings = ScanSettings(plan=plan, curve_images=None) if every_curve else ScanSettings(plan=plan)
    t0 = time.perf_counter()
    result = _scan_fn()(s.images, s.model, out=out, masks=s.masks, model_config=cfg, settings=settings)
    return result, time.perf_counter() - t0


def findings_key(result) -> list[tuple]:
    return sorted(Counter((f.class_name, f.kind, f.status) for f in result.findings).items())


def compare(ref, cand) -> dict:
    """What a user reads of the two audits, side by side."""
    same = findings_key(ref) == findings_key(cand)
    ious = []
    ref_regions = {(f.class_name, f.kind): f.region for f in ref.findings if f.region is not None}
    for f in cand.findings:
        if f.region is not None and (f.class_name, f.kind) in ref_regions:
            ious.append(box_iou(ref_regions[(f.class_name, f.kind)], f.region))
    a = {im.path: im for im in ref.images}
    b = {im.path: im for im in cand.images}
    common = sorted(set(a) & set(b))
    within = [abs(ladder_step(a[p].decisive_area) - ladder_step(b[p].decisive_area)) <= 1 for p in common]
    same_step = [ladder_step(a[p].decisive_area) == ladder_step(b[p].decisive_area) for p in common]
    small_call = [_small(a[p].decisive_area) == _small(b[p].decisive_area) for p in common]
    metric_diff: dict[str, float] = {}
    ca = {c.name: c.metrics for c in ref.classes}
    for c in cand.classes:
        for k, tol in TOLERANCES.items():
            x, y = ca.get(c.name, {}).get(k), c.metrics.get(k)
            if x is None and y is None:
                continue
            d = float("inf") if (x is None) != (y is None) else abs(float(x) - float(y))
            metric_diff[k] = max(metric_diff.get(k, 0.0), d)
    over = sorted(k for k, d in metric_diff.items() if d > TOLERANCES[k] + 1e-9)
    return {
        "findings_ref": [f"{k[0]} {k[1]} ({k[2]})" for k, _ in findings_key(ref)],
        "findings": [f"{k[0]} {k[1]} ({k[2]})" for k, _ in findings_key(cand)],
        "same_findings": same,
        "region_iou_min": min(ious) if ious else None,
        "decisive_within_step": float(np.mean(within)) if within else float("nan"),
        "decisive_same_step": float(np.mean(same_step)) if same_step else float("nan"),
        "small_call_same": float(np.mean(small_call)) if small_call else float("nan"),
        "metric_diff": metric_diff,
        "metrics_over_tolerance": over,
    }


def passes_per_image(result) -> float:
    return result.run["passes_this_run"] / max(1, result.dataset["audited"])


def compare_plans(sets: list[AuditSet], plans: list, work: Path, *, batch: int = 32,
                  log=print, floors: list | None = None) -> list[dict]:
    """Scan every set with the reference grid and with each plan; one row per (set, plan).

    With ``floors`` (a list), the reference's own stability on each set
    (:func:`stability.stability`) is appended to it, one dict per set."""
    rows = []
    for s in sets:
        ref, t_ref = run_audit(s, REFERENCE, work / "runs" / s.name.replace("/", "_").replace(" ", "_") / "ref",
                               batch=batch, every_curve=True)
        ref_pp = passes_per_image(ref)
        log(f"{s.name}: reference {ref_pp:.1f} passes/image, {t_ref:.1f} s; findings "
            f"{[f'{f.class_name} {f.kind} ({f.status})' for f in ref.findings]}")
        if floors is not None:
            st = _stability.stability(s.model, s.images, ref, config=model_config(s, batch=batch))
            floors.append({"set": s.name, **st.__dict__})
            log(f"  the grid against its own drops perturbed by {st.relative:.1%} of the peak: within a step "
                f"{st.within_step:.3f} (same {st.same_step:.3f}), small-area call {st.small_call:.3f}; "
                f"exact steps equal to the scan's on {st.reproduces:.3f}")
        for plan in plans:
            tag = plan_label(plan).replace(":", "_").replace(",", "_").replace("=", "")
            cand, t = run_audit(s, plan, work / "runs" / s.name.replace("/", "_").replace(" ", "_") / tag,
                                batch=batch)
            row = {"set": s.name, "note": s.note, "plan": plan_label(plan), "images": cand.dataset["audited"],
                   "passes_ref": ref_pp, "passes": passes_per_image(cand),
                   "passes_share": passes_per_image(cand) / ref_pp, "seconds_ref": t_ref, "seconds": t,
                   "time_share": t / t_ref}
            row.update(compare(ref, cand))
            row["meets_bar"] = bool(
                row["same_findings"] and row["passes_share"] <= BAR["passes_share"] + 1e-9
                and (row["region_iou_min"] is None or row["region_iou_min"] >= BAR["region_iou"])
                and row["decisive_within_step"] >= BAR["decisive_within_step"])
            log(f"  {row['plan']}: {row['passes']:.1f} passes/image ({row['passes_share']:.2f}), "
                f"{t:.1f} s ({row['time_share']:.2f}); same findings {row['same_findings']}; "
                f"region IoU {row['region_iou_min']}; decisive within a step {row['decisive_within_step']:.3f}; "
                f"small-area call {row['small_call_same']:.3f}; "
                f"metrics over tolerance {row['metrics_over_tolerance']}; meets bar {row['meets_bar']}")
            if not row["same_findings"]:
                log(f"    reference: {row['findings_ref']}\n    this plan: {row['findings']}")
            rows.append(row)
    return rows


# ------------------------------------------------------------------ output

def _fmt(x, spec=".2f"):
    if x is None:
        return "-"
    if isinstance(x, float) and not np.isfinite(x):
        return "nan"
    return format(x, spec)


def table(rows: list[dict]) -> str:
    lines = ["| set | plan | images | passes/image (share of grid) | time (share) | same findings | "
             "region IoU min | decisive area within 1 step (same step) | small-area call same | "
             "metrics over tolerance | meets bar |",
             "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        lines.append(
            f"| {r['set']} | {r['plan']} | {r['images']} | {r['passes']:.1f} of {r['passes_ref']:.1f} "
            f"({r['passes_share']:.2f}) | {r['seconds']:.1f} s of {r['seconds_ref']:.1f} s ({r['time_share']:.2f}) | "
            f"{'yes' if r['same_findings'] else 'NO'} | {_fmt(r['region_iou_min'])} | "
            f"{_fmt(r['decisive_within_step'])} ({_fmt(r['decisive_same_step'])}) | {_fmt(r['small_call_same'])} | "
            f"{', '.join(r['metrics_over_tolerance']) or 'none'} | {'yes' if r['meets_bar'] else 'no'} |")
    return "\n".join(lines) + "\n"


def findings_table(rows: list[dict]) -> str:
    seen = {}
    for r in rows:
        seen.setdefault(r["set"], r["findings_ref"])
    lines = ["| set | findings of the exhaustive grid |", "| --- | --- |"]
    for s, f in seen.items():
        lines.append(f"| {s} | {'; '.join(f) or 'none'} |")
    return "\n".join(lines) + "\n"


def floor_table(floors: list[dict]) -> str:
    lines = ["| set | images | grid against itself, drops perturbed by 0.5% of the peak: decisive area within 1 step "
             "(same step) | small-area call same | exact steps equal to the scan's |",
             "| --- | --- | --- | --- | --- |"]
    for f in floors:
        lines.append(f"| {f['set']} | {f['images']} | {_fmt(f['within_step'])} ({_fmt(f['same_step'])}) | "
                     f"{_fmt(f['small_call'])} | {_fmt(f['reproduces'])} |")
    return "\n".join(lines) + "\n"


def write_block(path: Path, block: str) -> None:
    text = path.read_text(encoding="utf-8") if path.exists() else "# Benchmark\n"
    if BEGIN not in text or END not in text:
        text = text.rstrip("\n") + f"\n\n## Audit agreement (bench/agreement.py)\n\n{BEGIN}\n{END}\n"
    head, rest = text.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    path.write_text(f"{head}{BEGIN}\n{block}{END}{tail}", encoding="utf-8")


DEFAULT_PLANS = ("grid", "adaptive:budget=64", "adaptive:budget=80")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="tiny generated sets only")
    ap.add_argument("--plan", action="append", help="a candidate plan (repeatable), e.g. adaptive:budget=45")
    ap.add_argument("--set", action="append", default=[], metavar="NAME=MODEL,IMAGES[,MASKS]",
                    help="an extra (model, images, masks) set (repeatable)")
    ap.add_argument("--only", action="append", default=[], help="only the sets whose name contains this")
    ap.add_argument("--no-demo", action="store_true")
    ap.add_argument("--no-generated", action="store_true")
    ap.add_argument("--no-planted", action="store_true", help="leave out the planted-shortcut suite")
    ap.add_argument("--no-floor", action="store_true",
                    help="leave out the reference's own stability (the grid against its perturbed drops)")
    ap.add_argument("--json", type=Path)
    ap.add_argument("--no-write", action="store_true", help="do not write bench/RESULTS.md")
    args = ap.parse_args(argv)
    plans = [parse_plan(p) for p in (args.plan or DEFAULT_PLANS)]
    load_before = os.getloadavg()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        sets: list[AuditSet] = []
        if not args.quick and not args.no_demo:
            sets += demo_sets()
        if not args.no_generated:
            sets += generated_sets(work, args.quick)
        if not args.quick and not args.no_planted:
            sets += planted_sets(work, args.only)
        for spec in args.set:
            name, _, rest = spec.partition("=")
            parts = rest.split(",")
            sets.append(AuditSet(name, Path(parts[0]), Path(parts[1]),
                                 Path(parts[2]) if len(parts) > 2 and parts[2] else None))
        if args.only:
            sets = [s for s in sets if any(o in s.name for o in args.only)]
        floors: list | None = None if args.no_floor else []
        rows = compare_plans(sets, plans, work, floors=floors)
    load_after = os.getloadavg()
    head = (f"Run: `python bench/agreement.py` on {time.strftime('%Y-%m-%d %H:%M')}; load average before "
            f"{load_before[0]:.2f}, after {load_after[0]:.2f}; batch size 32, one onnxruntime thread, "
            f"seed 0, mean fill, probability score. Reference: the exhaustive audit (the grid of 8-pixel "
            f"patches at stride 4 on 64 pixels, the curves of every image); every candidate, `grid` "
            f"included, measures the curves of the default sample ({CURVE_IMAGES} images a class). Bar: passes per image <= 1/3 of the grid's, identical findings "
            f"(class, kind, status), region IoU >= 0.9, decisive area within one ladder step on >= 95% "
            f"of the images. Tolerances of the per-class metrics: "
            + ", ".join(f"{k} {v}" for k, v in TOLERANCES.items()) + ".\n\n")
    block = head + table(rows) + "\n" + findings_table(rows)
    if floors:
        block += ("\nThe reference's own stability (bench/stability.py): the exhaustive grid's patch drops "
                  "recomputed, perturbed by Gaussian noise of 0.5% of each image's largest drop (seed 0), "
                  "and the ladder climbed again. 'Small-area call' is what the small-area rule reads: "
                  f"decisive area at most {SMALL_AREA:.0%} or not.\n\n" + floor_table(floors))
    print(block)
    if args.json:
        args.json.write_text(json.dumps({"rows": rows, "floors": floors, "load": [load_before, load_after]}, indent=1,
                                        default=float))
    if not args.quick and not args.no_write:
        write_block(HERE / "RESULTS.md", block)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
