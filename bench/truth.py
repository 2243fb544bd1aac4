"""The planted-shortcut scoreboard: what the audit finds on models whose shortcuts are known.

    python bench/truth.py                      # every model of bench/planted/truth.json
    python bench/truth.py --model tag-kite     # one model (repeatable)
    python bench/truth.py --json score.json    # also write the numbers
    python bench/truth.py --suite variants     # the held-out variants (bench/planted/variants/)

For each model its audit images and masks are regenerated from the deterministic scene
generator (bench/planted/scenes.py) into a temporary folder (their digest is checked
against truth.json), the audit is run through the library with the masks and default
settings, and its findings are scored against what was planted:

* planted found: a finding of an accepted kind on the planted class (truth's ``accepted``);
  ``confirmed``: such a finding confirmed; strong (measured pull >= 0.5) and weak apart;
* false confirmed: a confirmed finding on a class where nothing is planted (clean
  classes, sink classes, every class of a clean model);
* other kind: a finding of a kind not accepted on a planted class (counted, not scored);
* cleared: not-confirmed findings;
* box IoU: the fixed-position finding's region against the planted mark's box;
* not judged: classes with fewer correct images than ``min_correct_images``;
* for each falsely confirmed region finding, the mean share of its tested boxes that lies
  on the source image's object (near 1: the model reads a part of the object itself).

No torch; onnxruntime through the library. Timing is wall-clock of the audit call.
"""

from __future__ import annotations

import argparse
import inspect
import json
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
PLANTED = HERE / "planted"
sys.path.insert(0, str(PLANTED))
sys.path.insert(0, str(HERE.parent))

import scenes  # noqa: E402
from suite import SUITES, spec_of  # noqa: E402

import shortcut_audit  # noqa: E402
from shortcut_audit.maps import box_iou  # noqa: E402

STRONG = 0.5


def load_truth(path: Path = PLANTED / "truth.json") -> dict:
    return json.loads(path.read_text(encoding="utf-8"))


iou = box_iou   # the library's, so the scoreboard and the audit measure boxes alike


def _run_audit(images, model_path, masks, out):
    fn = shortcut_audit.audit
    kwargs = {"masks": str(masks), "out": str(out)}
    if "report" in inspect.signature(fn).parameters:
        kwargs["report"] = False
    return fn(str(images), str(model_path), **kwargs)


def score_findings(entry: dict, findings: list[dict], classes: list[dict], min_correct: int) -> dict:
    """Score one model's findings (dicts with class, kind, status, region) against its truth entry.

    ``classes``: the audit's per-class summaries (name, correct).
    """
    planted_rows = []
    planted_classes = {p["class"] for p in entry["planted"]}
    for p in entry["planted"]:
        mine = [f for f in findings if f["class"] == p["class"]]
        right = [f for f in mine if f["kind"] in p["accepted"]]
        conf = [f for f in right if f["status"] == "confirmed"]
        box_iou = None
        if p["planted"] == "fixed-mark":
            ious = [iou(f["region"], p["box"]) for f in right if f["kind"] == "fixed-position"]
            ious = [v for v in ious if v is not None]
            box_iou = max(ious) if ious else None
        planted_rows.append({
            "name": p["name"], "class": p["class"], "planted": p["planted"], "pull": p["pull"],
            "strength": "strong" if p["pull"] >= STRONG else "weak",
            "found": bool(right), "confirmed": bool(conf), "box_iou": box_iou,
            "findings_on_class": [f"{f['kind']}:{f['status']}" for f in mine]})
    false_conf = [f for f in findings if f["status"] == "confirmed" and f["class"] not in planted_classes]
    other_kind = [f for f in findings if f["class"] in planted_classes
                  and not any(f["kind"] in p["accepted"] for p in entry["planted"] if p["class"] == f["class"])]
    return {
        "planted": planted_rows,
        "false_confirmed": [f"{f['class']}:{f['kind']}" for f in false_conf],
        "other_kind": [f"{f['class']}:{f['kind']}:{f['status']}" for f in other_kind],
        "cleared": [f"{f['class']}:{f['kind']}" for f in findings if f["status"] == "not-confirmed"],
        "suspect": [f"{f['class']}:{f['kind']}" for f in findings if f["status"] == "suspect"],
        "not_judged": [c["name"] for c in classes if c["correct"] < min_correct],
        "findings": len(findings),
    }


def on_object_share(finding: dict, masks_root: Path) -> float | None:
    """Mean share of a finding's tested boxes (``evidence.test.examples``; a motif's member
    crops) that lies on the source image's object mask: near 1 means the region is a part
    of the object itself."""
    import numpy as np
    from PIL import Image

    shares = []
    evidence = finding.get("evidence") or {}
    if finding.get("kind") == "recurring-motif" and evidence.get("member_boxes"):
        # a motif's tested crops are its members' boxes in their own images (an example's
        # ``box`` is where the crop was pasted in the target)
        pairs = list(zip(evidence["member_boxes"], evidence.get("member_paths", [])))
    else:
        pairs = [(ex.get("box"), ex.get("source_path")) for ex in (evidence.get("test") or {}).get("examples", [])]
    for box, src in pairs:
        path = masks_root / src if src else None
        if box is None or path is None or not path.exists():
            continue
        m = np.asarray(Image.open(path)) > 127
        h, w = m.shape
        x0, y0 = int(np.floor(box[0] * w)), int(np.floor(box[1] * h))
        x1, y1 = max(x0 + 1, int(np.ceil(box[2] * w))), max(y0 + 1, int(np.ceil(box[3] * h)))
        shares.append(float(m[y0:y1, x0:x1].mean()))
    return round(float(np.mean(shares)), 3) if shares else None


def score_model(name: str, entry: dict, workdir: Path, folder: Path = PLANTED) -> dict:
    """Regenerate the audit set of ``name`` under ``workdir``, audit it, score it."""
    spec = spec_of(name)
    written = scenes.write_set(spec, workdir / "set")
    if written["sha256"] != entry["audit_set"]["sha256"]:
        print(f"warning: {name}: regenerated audit set differs from truth.json "
              f"({written['sha256'][:12]} vs {entry['audit_set']['sha256'][:12]})", file=sys.stderr)
    t0 = time.perf_counter()
    result = _run_audit(written["images"], folder / entry["onnx"], written["masks"], workdir / "out")
    seconds = time.perf_counter() - t0
    findings = [f.to_dict() for f in result.findings]
    classes = [{"name": c.name, "correct": c.correct, "images": c.images} for c in result.classes]
    row = score_findings(entry, findings, classes, result.settings.thresholds.min_correct_images)
    # where the falsely confirmed regions lie: on the object (a part of it) or off it
    row["false_confirmed_on_object"] = {
        f"{f['class']}:{f['kind']}": on_object_share(f, written["masks"]) for f in findings
        if f["status"] == "confirmed" and f"{f['class']}:{f['kind']}" in row["false_confirmed"]
        and f["kind"] != "background"}
    row.update(model=name, seconds=round(seconds, 1), set_matches=written["sha256"] == entry["audit_set"]["sha256"],
               clean_classes=[k for k, v in entry["classes"].items() if v != "planted"])
    return row


def totals(rows: list[dict]) -> dict:
    planted = [p for r in rows for p in r["planted"]]
    strong = [p for p in planted if p["strength"] == "strong"]
    weak = [p for p in planted if p["strength"] == "weak"]
    ious = [p["box_iou"] for p in planted if p["planted"] == "fixed-mark"]

    def frac(xs, key):
        return {"hits": sum(1 for x in xs if x[key]), "of": len(xs)}

    return {
        "models": len(rows), "planted": len(planted),
        "found": frac(planted, "found"), "confirmed": frac(planted, "confirmed"),
        "strong_confirmed": frac(strong, "confirmed"), "weak_confirmed": frac(weak, "confirmed"),
        "false_confirmed": sum(len(r["false_confirmed"]) for r in rows),
        "cleared": sum(len(r["cleared"]) for r in rows),
        "other_kind": sum(len(r["other_kind"]) for r in rows),
        "not_judged": sum(len(r["not_judged"]) for r in rows),
        "fixed_marks": len(ious), "box_iou": ious,
        "seconds": round(sum(r["seconds"] for r in rows), 1),
    }


def table(rows: list[dict], tot: dict) -> str:
    head = ("model", "planted (pull)", "found", "confirmed", "box IoU", "false conf.", "cleared",
            "other kind", "not judged", "s")
    lines = []
    for r in rows:
        planted = "; ".join(f"{p['planted']}->{p['class']} ({p['pull']:.2f})" for p in r["planted"]) or "- (clean)"
        found = "; ".join("yes" if p["found"] else "no" for p in r["planted"]) or "-"
        conf = "; ".join("yes" if p["confirmed"] else "no" for p in r["planted"]) or "-"
        ious = "; ".join("-" if p["box_iou"] is None else f"{p['box_iou']:.2f}"
                         for p in r["planted"] if p["planted"] == "fixed-mark") or "-"
        lines.append((r["model"], planted, found, conf, ious, str(len(r["false_confirmed"])),
                      str(len(r["cleared"])), str(len(r["other_kind"])), str(len(r["not_judged"])),
                      f"{r['seconds']:.0f}"))
    widths = [max(len(str(x[i])) for x in [head, *lines]) for i in range(len(head))]
    fmt = " | ".join(f"{{:<{w}}}" for w in widths)
    out = [fmt.format(*head), "-+-".join("-" * w for w in widths), *(fmt.format(*x) for x in lines), "",
           "findings behind the counts (class:kind[:status]):"]
    for r in rows:
        parts = [f"{label} {', '.join(r[key])}" for label, key in
                 (("false confirmed:", "false_confirmed"), ("cleared:", "cleared"),
                  ("other kind:", "other_kind"), ("still suspect:", "suspect"), ("not judged:", "not_judged"))
                 if r[key]]
        on_planted = "; ".join(f"{p['class']}: {', '.join(p['findings_on_class']) or 'nothing'}"
                               for p in r["planted"])
        if on_planted:
            parts.insert(0, f"on planted classes: {on_planted}")
        if r.get("false_confirmed_on_object"):
            parts.append("tested regions on the object: " + ", ".join(
                f"{k} {'-' if v is None else f'{v:.0%}'}" for k, v in r["false_confirmed_on_object"].items()))
        out.append(f"  {r['model']}: " + ("; ".join(parts) if parts else "no findings"))
    t = tot
    ious = [v for v in t["box_iou"]]
    iou_txt = ", ".join("none" if v is None else f"{v:.2f}" for v in ious) or "-"
    out += ["",
            f"planted found with the right kind: {t['found']['hits']}/{t['found']['of']}; "
            f"and confirmed: {t['confirmed']['hits']}/{t['confirmed']['of']} "
            f"(strong, pull >= {STRONG}: {t['strong_confirmed']['hits']}/{t['strong_confirmed']['of']}; "
            f"weak: {t['weak_confirmed']['hits']}/{t['weak_confirmed']['of']})",
            f"false confirmed (nothing planted on the class): {t['false_confirmed']}",
            f"cleared suspicions (not-confirmed): {t['cleared']}; findings of another kind on planted "
            f"classes: {t['other_kind']}",
            f"fixed-mark box IoU: {iou_txt}",
            f"classes not judged: {t['not_judged']}",
            f"audit time: {t['seconds']:.0f} s over {t['models']} models"]
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--model", action="append", help="score only this model (repeatable)")
    ap.add_argument("--json", type=Path, help="write the per-model rows and totals here")
    ap.add_argument("--keep", type=Path, help="keep the regenerated sets and audits in this folder")
    ap.add_argument("--suite", choices=sorted(SUITES), default="planted",
                    help="the suite to score (variants: the held-out models, bench/planted/variants/)")
    args = ap.parse_args(argv)
    folder = PLANTED / SUITES[args.suite][1]
    truth = load_truth(folder / "truth.json")["models"]
    names = args.model or list(truth)
    unknown = [n for n in names if n not in truth]
    if unknown:
        print(f"error: no model {', '.join(unknown)} in bench/planted/truth.json; known: {', '.join(truth)}",
              file=sys.stderr)
        return 2
    t_all = time.perf_counter()
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        base = args.keep or Path(tmp)
        for name in names:
            row = score_model(name, truth[name], base / name, folder)
            rows.append(row)
            print(f"{name}: {row['findings']} findings, {row['seconds']:.0f} s", flush=True)
    tot = totals(rows)
    tot["wall_seconds"] = round(time.perf_counter() - t_all, 1)
    print()
    print(table(rows, tot))
    print(f"scoreboard wall time (regeneration included): {tot['wall_seconds']:.0f} s")
    if args.json:
        args.json.write_text(json.dumps({"models": rows, "totals": tot}, indent=1) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
