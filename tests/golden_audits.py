"""The demo's audits as recorded (tests/golden/demo_audits.json) and how they are compared.

``python tests/golden_audits.py`` runs the demo and rewrites the record: do that only
when a rule changes on purpose, and say so in the commit. Numbers compare within 2e-3
(onnxruntime's last digits can differ between CPU families); everything else exactly.
"""

from __future__ import annotations

import json
import sys
import tempfile
from pathlib import Path

GOLDEN = Path(__file__).parent / "golden" / "demo_audits.json"
TOLERANCE = 2e-3


def summary(audit: dict) -> dict:
    """What a refactor must not change: findings, statuses, regions, class figures."""
    return {
        "findings": [{"class": f["class"], "kind": f["kind"], "status": f["status"],
                      "region": f["region"]} for f in audit["findings"]],
        "classes": {c["name"]: {"images": c["images"], "correct": c["correct"],
                                "place_box": c["place_box"], "notes": len(c.get("notes", [])),
                                "not_judged": c.get("not_judged", []),
                                "metrics": {k: v for k, v in sorted(c["metrics"].items())
                                            if isinstance(v, (int, float)) and not isinstance(v, bool)}}
                    for c in audit["classes"]},
        "images": len(audit["images"]),
    }


def differences(a, b, path: str = "") -> str | None:
    """The first difference between two summaries (its path), or None."""
    if isinstance(a, dict) and isinstance(b, dict):
        if set(a) != set(b):
            return f"{path}: keys {sorted(set(a) ^ set(b))}"
        for k in a:
            d = differences(a[k], b[k], f"{path}.{k}")
            if d:
                return d
        return None
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return f"{path}: length {len(a)} != {len(b)}"
        for i, (x, y) in enumerate(zip(a, b)):
            d = differences(x, y, f"{path}[{i}]")
            if d:
                return d
        return None
    if (isinstance(a, (int, float)) and isinstance(b, (int, float))
            and not isinstance(a, bool) and not isinstance(b, bool)):
        return None if abs(a - b) <= TOLERANCE else f"{path}: {a} != {b}"
    return None if a == b else f"{path}: {a!r} != {b!r}"


def regenerate() -> None:
    from shortcut_audit.showcase import run_demo

    with tempfile.TemporaryDirectory() as tmp:
        result = run_demo(Path(tmp))
        record = {name: summary(json.loads((Path(tmp) / name / "audit.json").read_text(encoding="utf-8")))
                  for name in result["audits"]}
    GOLDEN.write_text(json.dumps(record, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    print(f"wrote {GOLDEN}")


if __name__ == "__main__":
    regenerate()
    sys.exit(0)
