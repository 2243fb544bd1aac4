"""Results on disk: atomic writes, the one JSON writer, and the per-image store.

Every file the tool writes goes through :func:`write_bytes_atomic` (a temporary file in
the same folder, flushed and fsynced, then renamed over the target), so no reader ever
sees half a file. :func:`to_jsonable` and :func:`write_json` are the one JSON writer:
floats are rounded to 8 significant digits and NaN becomes null, so the same audit
gives the same bytes.

:class:`ResultStore` keeps each image's results in ``results/`` under the output
folder as soon as they exist, keyed by the image's path and tied to a *fingerprint*
(model hash, settings, seed). A rerun with the same fingerprint reuses them; a changed
fingerprint clears them first, so results from different settings never mix.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from .errors import DataError, OutputError, UsageError

__all__ = [
    "read_audit",
    "to_jsonable",
    "dumps",
    "write_bytes_atomic",
    "write_json",
    "ResultStore",
    "inside",
    "remove_stale_temporaries",
]


def to_jsonable(value: Any, *, digits: int = 8) -> Any:
    """A JSON-ready copy of ``value``: numpy to Python, floats rounded, NaN/inf to None."""
    if isinstance(value, dict):
        return {str(k): to_jsonable(v, digits=digits) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v, digits=digits) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v, digits=digits) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        if not math.isfinite(f):
            return None
        return float(f"{f:.{digits}g}")
    if isinstance(value, Path):
        return value.as_posix()
    return value


def dumps(data: Any) -> str:
    """The project's JSON text: sorted keys, two-space indent, UTF-8 safe."""
    return json.dumps(to_jsonable(data), indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def inside(root: Path, target: Path) -> bool:
    """Whether ``target`` resolves inside ``root``."""
    try:
        target.resolve().relative_to(root.resolve())
        return True
    except ValueError:
        return False


def _file_mode() -> int:
    """The mode a plain ``open()`` would give a new file (0666 less the umask)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


_MODE = _file_mode()


def write_bytes_atomic(path: str | Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file and a rename.

    Raises
    ------
    OutputError
        When the folder is read-only, the disk is full, or the path is unusable.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=path.parent)
    except OSError as exc:
        raise OutputError(f"cannot write into {path.parent}: {exc.strerror or exc}. "
                          f"Pass an --out folder you can write to.") from None
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _MODE)          # mkstemp makes 0600; results are ordinary files
        os.replace(tmp, path)
    except BaseException as exc:  # also KeyboardInterrupt: never leave the temporary behind
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if not isinstance(exc, OSError):
            raise
        raise OutputError(f"cannot write {path}: {exc.strerror or exc}. "
                          f"Free some space or pass another --out folder.") from None


def remove_stale_temporaries(folder: str | Path) -> int:
    """Delete temporary files a killed writer left in ``folder`` (not below it)."""
    folder = Path(folder)
    removed = 0
    if folder.is_dir():
        for p in folder.glob(".tmp-*"):
            try:
                p.unlink()
                removed += 1
            except OSError:
                pass
    return removed


def write_json(path: str | Path, data: Any) -> None:
    """Write ``data`` as the project's JSON, atomically."""
    write_bytes_atomic(path, dumps(data).encode("utf-8"))


class ResultStore:
    """Per-image results in ``folder`` tied to a fingerprint.

    Each image has ``<key>.json`` (numbers) and, optionally, ``<key>.npz`` (arrays),
    the arrays written first so a present .json always means a complete entry.
    """

    def __init__(self, folder: str | Path, fingerprint: dict):
        self.folder = Path(folder)
        self.fingerprint = to_jsonable(fingerprint)
        self.reset = False
        remove_stale_temporaries(self.folder)
        marker = self.folder / "fingerprint.json"
        if marker.exists():
            try:
                old = json.loads(marker.read_text(encoding="utf-8"))
            except (OSError, ValueError):
                old = None
            if old != self.fingerprint:
                self.reset = True
                self._clear()
        write_json(marker, self.fingerprint)

    def _clear(self) -> None:
        for p in self.folder.iterdir():
            if p.is_file() and p.suffix in (".json", ".npz"):
                p.unlink()
            elif p.is_dir() and not p.is_symlink():
                shutil.rmtree(p)

    @staticmethod
    def key(path: str) -> str:
        return hashlib.sha256(path.encode("utf-8", "surrogatepass")).hexdigest()[:24]

    def has(self, path: str, source: Any = None) -> bool:
        """Whether a complete record of ``path`` exists (made from ``source``, when given)."""
        jp = self.folder / f"{self.key(path)}.json"
        if source is None or not jp.exists():
            return jp.exists()
        try:
            return json.loads(jp.read_text(encoding="utf-8")).get("source") == to_jsonable(source)
        except (OSError, ValueError):
            return False

    def put(self, path: str, record: dict, arrays: dict[str, np.ndarray] | None = None) -> None:
        k = self.key(path)
        if arrays:
            buf = io.BytesIO()
            np.savez(buf, **arrays)
            write_bytes_atomic(self.folder / f"{k}.npz", buf.getvalue())
        write_json(self.folder / f"{k}.json", dict(record, path=path))

    def get(self, path: str) -> tuple[dict, dict[str, np.ndarray]] | None:
        k = self.key(path)
        jp = self.folder / f"{k}.json"
        if not jp.exists():
            return None
        try:
            record = json.loads(jp.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        arrays: dict[str, np.ndarray] = {}
        npz = self.folder / f"{k}.npz"
        if npz.exists():
            try:
                with np.load(npz, allow_pickle=False) as data:
                    arrays = {name: data[name] for name in data.files}
            except (OSError, ValueError):
                return None
        return record, arrays

    def count(self) -> int:
        return sum(1 for p in self.folder.glob("*.json") if p.name != "fingerprint.json")


def read_audit(audit_dir: str | os.PathLike, *, option: str | None = None,
               schema: int | None = None) -> dict:
    """The audit.json of ``audit_dir`` (the ``--out`` folder of an audit) as a dict.

    The one reader of audit.json, for compare, the report and the pack. ``option`` names
    the command-line option the folder came from in the messages; ``schema`` also
    requires that schema number and the per-image list (what compare needs).

    Raises
    ------
    UsageError
        ``audit_dir`` is not a folder or holds no audit.json.
    DataError
        audit.json is not valid JSON, not an audit (no ``classes`` / ``findings``), or not
        of ``schema``.
    """
    folder = Path(audit_dir)
    where = f"{option} {str(folder)!r}" if option else str(folder)
    if not folder.is_dir():
        raise UsageError(f"{where} is not a folder; pass the --out folder of an audit "
                         f"(run `shortcut-audit audit IMAGES --model MODEL --out DIR` first).")
    path = folder / "audit.json"
    if not path.is_file():
        if option:
            raise UsageError(f"{where} has no audit.json; pass the --out folder of a finished audit.")
        raise UsageError(f"no audit.json in {folder}; run `shortcut-audit audit IMAGES --model MODEL "
                         f"--out {folder}` first, then pass that folder.")
    prefix = f"{option}: " if option else ""
    try:
        audit = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise DataError(f"{prefix}{path} cannot be read as JSON ({type(exc).__name__}); "
                        f"rerun the audit to write it again.") from None
    if not isinstance(audit, dict) or not isinstance(audit.get("classes"), list) \
            or not isinstance(audit.get("findings"), list):
        raise DataError(f"{prefix}{path} is not an audit (no classes or findings); "
                        f"rerun the audit to write it again.")
    if schema is not None and (audit.get("schema") != schema or not isinstance(audit.get("images"), list)):
        raise DataError(f"{prefix}{path} is not an audit.json of schema {schema}; rerun the audit "
                        f"with this version of the tool.")
    return audit
