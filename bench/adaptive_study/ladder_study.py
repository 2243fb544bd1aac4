"""Why no cheaper plan reaches 95% decisive-area agreement: the study behind bench/RESULTS.md.

    python bench/adaptive_study/ladder_study.py            # demo + planted suite, ~8 minutes on 2 cores
    python bench/adaptive_study/ladder_study.py --only demo/baseline

For every set of bench/agreement.py (the demo models, the planted-shortcut suite) it
computes the exhaustive grid's patch drops of every image once (bench/stability.py, the
scan's own patches, fill and target; cached in out/), then climbs the decisive-area ladder
on heatmaps rebuilt from:

- the grid's drops with noise: Gaussian, 0.5% of the image's largest drop, or 1e-6 and
  1e-7 absolute (float32 probabilities near 1 are spaced about 6e-8);
- the adaptive plan at several budgets, simulated on the cached drops: the tool's own
  prediction and refinement (shortcut_audit.adaptive) choose which fine patches to
  "run", and a run patch takes its cached drop, which is exactly what running it gives;
- the same with a tolerance instead of a budget (refine while any patch left is
  predicted above ``tol`` times the largest move);
- both again with the pixels below 5% of the peak ordered by their distance to the
  pixels above it instead of by their heat (an order that does not read near-zero heat).

It prints, per set, the share of images whose first decision-moving step lies within one
step of the exact grid's, and the mean heatmap passes. Not part of the tool or its tests.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np
from scipy import ndimage

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent.parent))
sys.path.insert(0, str(HERE.parent))

import agreement  # noqa: E402
import stability  # noqa: E402
from shortcut_audit.adaptive import adaptive_job  # noqa: E402
from shortcut_audit.engine import run_job  # noqa: E402
from shortcut_audit.occlusion import AdaptivePlan  # noqa: E402
from shortcut_audit.adaptive import _area, _spread, coarse_density, grid_heatmap, predict_drops  # noqa: E402
from shortcut_audit.dataset import load_image  # noqa: E402
from shortcut_audit.maps import heat_order  # noqa: E402
from shortcut_audit.model import OnnxClassifier  # noqa: E402
from shortcut_audit.occlusion import GridPlan, fill_image, hidden_image, patch_boxes  # noqa: E402
from shortcut_audit.scan import DEFAULT_FILL  # noqa: E402
from shortcut_audit.sensitivity import DECISIVE_LADDER  # noqa: E402

OUT = HERE / "out"
FINE = GridPlan(patch=0.125, stride=0.0625)
COARSE = GridPlan(patch=0.25, stride=0.25)


def load(s: agreement.AuditSet):
    """Images, hidden images, labels and the grid and coarse drops of one set (cached)."""
    clf = OnnxClassifier(s.model, s.config)
    h, w = clf.height, clf.width
    fine, coarse = patch_boxes(FINE, h, w), patch_boxes(COARSE, h, w)
    paths = sorted(p for p in Path(s.images).rglob("*") if p.suffix.lower() in (".png", ".jpg", ".jpeg"))
    X, FILLED, HID, T = [], [], [], []
    for p in paths:
        x = load_image(p, size=(h, w), channels=clf.channels, resize=clf.resize)
        X.append(x)
        FILLED.append(fill_image(x, DEFAULT_FILL))
        HID.append(hidden_image(x, FILLED[-1]))
        T.append(clf.labels.index(p.parent.name))
    cache = OUT / (s.name.replace("/", "_").replace(" ", "_") + ".npz")
    if cache.exists():
        z = np.load(cache)
        gd, cd = z["gd"], z["cd"]
    else:
        gd = np.array([stability.grid_drops(clf.predict, x, f, fine, t) for x, f, t in zip(X, FILLED, T)])
        cd = np.array([stability.grid_drops(clf.predict, x, f, coarse, t) for x, f, t in zip(X, FILLED, T)])
        OUT.mkdir(exist_ok=True)
        np.savez_compressed(cache, gd=gd, cd=cd)
    return clf, fine, coarse, X, HID, T, gd, cd


def adaptive_sim(x, hid, fine, coarse, gd, cd, *, budget, tol=0.0, per=None, rounds=4):
    """The adaptive plan's drops and passes, its patches' drops taken from ``gd``."""
    h, w, _ = x.shape
    energy = np.sqrt(((x - hid).astype(np.float64) ** 2).sum(axis=2))
    prior = predict_drops(coarse_density(h, w, coarse, cd, energy), fine)
    grid = (len(np.unique(fine[:, 0])), len(np.unique(fine[:, 2])))
    refine = min(budget - 1 - len(coarse), len(fine))
    per = per or int(math.ceil(refine / rounds))
    drops, measured = prior.copy(), np.full(len(fine), np.nan)
    scale = float(np.max(np.abs(cd))) * _area(fine) / _area(coarse)
    used, left = 1 + len(coarse), refine
    while left > 0:
        cand = np.flatnonzero(np.isnan(measured))
        pick = cand[np.argsort(-np.abs(drops[cand]), kind="stable")][:min(per, left)]
        pick = pick[np.abs(drops[pick]) > tol * scale]
        if pick.size == 0:
            break
        measured[pick] = gd[pick]
        used, left = used + len(pick), left - len(pick)
        scale = max(scale, float(np.max(np.abs(gd[pick]))))
        done = np.flatnonzero(~np.isnan(measured))
        corr = _spread(measured[done] - prior[done], done, grid).ravel()
        drops = np.where(np.isnan(measured), prior + corr, measured)
    return drops, used


def near_hot_order(values: np.ndarray, floor: float = 0.05) -> np.ndarray:
    """Pixels above ``floor`` of the peak by heat, then the rest by distance to them."""
    v = np.asarray(values, np.float64)
    if not v.max() > 0:
        return heat_order(v)
    hot = v > floor * v.max()
    dist = ndimage.distance_transform_edt(~hot)
    return np.lexsort((np.arange(v.size), dist.ravel(), np.where(hot, -v, np.inf).ravel()))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--only", action="append", default=[])
    args = ap.parse_args(argv)
    work = OUT / "sets"
    sets = agreement.demo_sets() + agreement.planted_sets(work)
    if args.only:
        sets = [s for s in sets if any(o in s.name for o in args.only)]
    rng = np.random.default_rng(0)
    plans = {
        "noise 0.5% of peak": lambda d, i: (d[6][i] + rng.normal(0, 0.005 * np.abs(d[6][i]).max(), d[6][i].shape), 0),
        "noise 1e-6": lambda d, i: (d[6][i] + rng.normal(0, 1e-6, d[6][i].shape), 0),
        "noise 1e-7": lambda d, i: (d[6][i] + rng.normal(0, 1e-7, d[6][i].shape), 0),
    }
    for b in (48, 64, 80, 96):
        plans[f"adaptive {b}"] = lambda d, i, b=b: adaptive_sim(d[3][i], d[4][i], d[1], d[2], d[6][i], d[7][i], budget=b)
    plans["adaptive tol 0.02"] = lambda d, i: adaptive_sim(d[3][i], d[4][i], d[1], d[2], d[6][i], d[7][i],
                                                           budget=10**6, tol=0.02, per=16)
    orders = {"heat order": heat_order, "near-hot order": near_hot_order}
    summary = {}
    moved: list[dict] = []
    shifts: list[float] = []
    for s in sets:
        d = load(s)
        clf, fine, _, X, HID, T, gd, _ = d
        h, w = X[0].shape[:2]

        def steps(drop_list, order_of):
            return np.array([stability.first_step(clf.predict, x, m, grid_heatmap(h, w, fine, g)[0].astype(np.float32), t,
                                                  order_of=order_of)
                             for x, m, t, g in zip(X, HID, T, drop_list)])
        # the simulation is the real plan: its heatmaps equal adaptive_job's on a few images
        for i in range(min(4, len(X))):
            real = run_job(clf.predict, adaptive_job(X[i], plan=AdaptivePlan(budget=64), fill=DEFAULT_FILL,
                                                     target=T[i])).values
            sim = grid_heatmap(h, w, fine, plans["adaptive 64"](d, i)[0])[0].astype(np.float32)
            assert np.allclose(real, sim, atol=1e-6), (s.name, i, float(np.abs(real - sim).max()))
        line = [f"{s.name} ({len(X)} images)"]
        refs = {}
        for oname, order_of in orders.items():
            ref = refs[oname] = steps(gd, order_of)
            for pname, plan in plans.items():
                if oname != "heat order" and pname.startswith("noise 1e"):
                    continue
                got = [plan(d, i) for i in range(len(X))]
                a = steps([g for g, _ in got], order_of)
                within = float(np.mean(np.abs(a - ref) <= 1))
                passes = float(np.mean([p for _, p in got]))
                summary.setdefault((oname, pname), []).append((within, passes))
                line.append(f"{oname}/{pname}: {within:.2f}")
                if oname == "heat order" and pname.startswith("noise 0.5%"):
                    moved.extend(describe(clf, X, T, gd, ref, a))
        shift = float(np.mean(np.abs(refs["near-hot order"] - refs["heat order"]) <= 1))
        shifts.append(shift)
        line.append(f"near-hot order's exact steps within 1 step of the tool's: {shift:.2f}")
        print("; ".join(line), flush=True)
    print("\n| order | heatmap | decisive area within 1 step: min over sets | mean | heatmap passes/image (mean) |")
    print("| --- | --- | --- | --- | --- |")
    for (oname, pname), v in summary.items():
        v = np.array(v)
        print(f"| {oname} | {pname} | {v[:, 0].min():.2f} | {v[:, 0].mean():.3f} | "
              f"{v[:, 1].mean():.1f} |" if not pname.startswith("noise") else
              f"| {oname} | {pname} | {v[:, 0].min():.2f} | {v[:, 0].mean():.3f} | (grid, 226) |")
    print(f"\nnear-hot order against the tool's (exact grid): exact steps within one step on "
          f"{min(shifts):.2f} to {max(shifts):.2f} of a set's images")
    if moved:
        p = np.array([m["label_probability"] for m in moved])
        k = np.array([m["patches_above_0.001"] for m in moved])
        st = np.array([m["step"] for m in moved])
        print(f"\nimages whose step moved by more than one under noise of 0.5% of the peak: {len(moved)}; "
              f"label probability median {np.median(p):.4f} (quartiles {np.quantile(p, 0.25):.4f}, "
              f"{np.quantile(p, 0.75):.4f}; above 0.997: {np.mean(p > 0.997):.0%}); patches moving the score "
              f"by more than 0.001: median {np.median(k):.0f} (quartiles {np.quantile(k, 0.25):.0f}, "
              f"{np.quantile(k, 0.75):.0f}) of 225; the exact grid's step: "
              + ", ".join(f"{DECISIVE_LADDER[j] if j < len(DECISIVE_LADDER) else 'none'}: {int(np.sum(st == j))}"
                          for j in range(len(DECISIVE_LADDER) + 1) if np.sum(st == j)))
    return 0


def describe(clf, X, T, gd, ref, got) -> list[dict]:
    """The images whose step moved by more than one: what they have in common."""
    out = []
    for i in np.flatnonzero(np.abs(got - ref) > 1):
        prob = float(clf.predict(X[i][None])[0, T[i]])
        out.append({"label_probability": prob, "patches_above_0.001": int(np.sum(gd[i] > 1e-3)),
                    "step": int(ref[i])})
    return out


if __name__ == "__main__":
    raise SystemExit(main())
