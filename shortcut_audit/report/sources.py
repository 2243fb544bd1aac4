"""Read access to one audit's files, for the report and the evidence pack.

An audit folder holds ``audit.json``, the per-image store ``results/`` (``<key>.json``
with the numbers, ``<key>.npz`` with the arrays ``heatmap`` (H, W) float32, ``crop`` and
optionally ``mask``), and refers to the images under the dataset root named in
``audit.json``. :class:`AuditFiles` reads them, never writes, and never leaves the
dataset root: a path in ``audit.json`` that resolves outside it is treated as missing.
"""

from __future__ import annotations

import json
import os
from pathlib import Path, PurePosixPath

import numpy as np

from ..errors import ImageSkip, UsageError
from ..store import ResultStore, inside, read_audit  # read_audit: the one audit.json reader

__all__ = ["AuditFiles", "read_audit", "model_input"]


def model_input(audit: dict) -> dict:
    """``{"size": (H, W), "channels": C, "resize": ...}`` of the audited model (defaults
    for a hand-made audit without them)."""
    desc = (audit.get("model") or {}).get("input") or {}
    spec = desc.get("input", desc) if isinstance(desc, dict) else {}
    size = spec.get("size") or [64, 64]
    return {"size": (int(size[0]), int(size[1])), "channels": int(spec.get("channels") or 3),
            "resize": spec.get("resize") or "stretch"}


class AuditFiles:
    """The files behind one audit.

    Parameters
    ----------
    audit_dir : path
        The scan's output folder (holding ``results/``).
    audit : dict, optional
        Its audit.json, when already in memory; read from ``audit_dir`` otherwise.
    images : path, optional
        The dataset root, when it is not where audit.json says (the audit was moved).
    """

    def __init__(self, audit_dir: str | os.PathLike, audit: dict | None = None, *,
                 images: str | os.PathLike | None = None):
        self.dir = Path(audit_dir)
        self.audit = audit if audit is not None else read_audit(self.dir)
        self.results = self.dir / "results"
        self.input = model_input(self.audit)
        self.root = self._find_root(images)
        self._records: dict[str, dict | None] = {}

    def _find_root(self, images) -> Path | None:
        if images is not None:
            root = Path(images)
            if not root.is_dir():
                raise UsageError(f"--images {root} is not a folder; pass the image set the audit was run on.")
            return root
        given = (self.audit.get("dataset") or {}).get("root")
        if not given:
            return None
        root = Path(given)
        candidates = [root] if root.is_absolute() else [Path.cwd() / root, self.dir / root, self.dir.parent / root]
        return next((c for c in candidates if c.is_dir()), None)

    # ------------------------------------------------------------------ store

    def record(self, path: str) -> dict | None:
        """The store's record of image ``path`` (None when absent or unreadable)."""
        if path not in self._records:
            rec = None
            file = self.results / f"{ResultStore.key(path)}.json"
            try:
                rec = json.loads(file.read_text(encoding="utf-8"))
            except (OSError, UnicodeDecodeError, ValueError):
                rec = None
            self._records[path] = rec if isinstance(rec, dict) else None
        return self._records[path]

    def arrays(self, path: str) -> dict[str, np.ndarray]:
        """The store's arrays of image ``path`` (empty when absent or unreadable)."""
        file = self.results / f"{ResultStore.key(path)}.npz"
        try:
            with np.load(file, allow_pickle=False) as data:
                return {name: data[name] for name in data.files}
        except (OSError, ValueError, EOFError):
            return {}

    # ----------------------------------------------------------------- images

    def original(self, path: str) -> Path | None:
        """The image file of ``path`` under the dataset root, or None when it is not
        there or would lie outside the root (a hostile or stale audit.json)."""
        if self.root is None or not path:
            return None
        pure = PurePosixPath(path)
        if pure.is_absolute() or ".." in pure.parts:
            return None
        file = self.root.joinpath(*pure.parts)
        if not inside(self.root, file) or not file.is_file():
            return None
        return file

    def pixels(self, path: str) -> np.ndarray | None:
        """Image ``path`` at the model's input size, (H, W, C) float32 0..255, or None."""
        from ..dataset import load_image

        file = self.original(path)
        if file is None:
            return None
        try:
            return load_image(file, size=self.input["size"], channels=self.input["channels"],
                              resize=self.input["resize"])
        except (ImageSkip, UsageError):
            return None
