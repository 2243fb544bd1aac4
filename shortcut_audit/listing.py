"""Find labelled images on disk: a folder per class, or a CSV manifest.

:func:`list_images` walks the tree (or reads the manifest) and returns
:class:`~shortcut_audit.dataset.ImageEntry` values (paths and labels, nothing decoded)
together with a :class:`~shortcut_audit.dataset.Skip` for every file that cannot take
part, with the reason; :func:`class_names` gives the labels found. Decoding is
:mod:`shortcut_audit.dataset`'s. Paths in results are relative to the dataset root,
with ``/`` separators, and always valid UTF-8 text (bytes of a file name that are not
UTF-8 are shown as ``\\xff`` escapes); ``ImageEntry.file`` keeps the real path.
"""

from __future__ import annotations

import csv
import os
import re
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path, PurePosixPath

import numpy as np

from .dataset import IMAGE_EXTENSIONS, ImageEntry, Skip, _display, _one_line
from .errors import DataError, UsageError

__all__ = ["list_images", "class_names"]


# ------------------------------------------------------------------------- listing


def _hidden(name: str) -> bool:
    return name.startswith(".")


def _is_image_name(name: str, extensions: tuple[str, ...]) -> bool:
    return os.path.splitext(name)[1].lower() in extensions


def _walk(
    folder: Path, parts: tuple[str, ...], root_real: Path, extensions: tuple[str, ...],
    seen: set[Path],
) -> Iterator[tuple[tuple[str, ...], Path] | Skip]:
    """Image files under ``folder`` as (relative name parts, path), and Skips.

    Hidden names (starting with ".") and other extensions are passed over silently.
    Symlinks are followed while they stay inside ``root_real``; a symlinked folder is
    entered once (``seen``), so a link loop ends.
    """
    try:
        names = sorted(os.listdir(folder))
    except OSError as exc:
        yield Skip(path=_display("/".join(parts)) + "/", reason=f"cannot list folder: {_one_line(exc.strerror or exc)}")
        return
    for name in names:
        if _hidden(name):
            continue
        path = folder / name
        rel = parts + (name,)
        if path.is_symlink():
            target = path.resolve()
            if not target.is_relative_to(root_real):
                if target.is_dir() or _is_image_name(name, extensions):
                    suffix = "/" if target.is_dir() else ""
                    yield Skip(path=_display("/".join(rel)) + suffix, reason="symlink points outside the dataset root")
                continue
            if not target.exists():
                if _is_image_name(name, extensions):
                    yield Skip(path=_display("/".join(rel)), reason="broken symlink: target does not exist")
                continue
        if path.is_dir():
            real = path.resolve()
            if real not in seen:
                seen.add(real)
                yield from _walk(path, rel, root_real, extensions, seen)
        elif _is_image_name(name, extensions) and path.is_file():
            yield rel, path


def _check_extensions(extensions) -> tuple[str, ...]:
    if isinstance(extensions, str) or not all(
        isinstance(e, str) and e.startswith(".") and len(e) > 1 for e in extensions
    ):
        raise UsageError(
            f"extensions must be a sequence of endings with a leading dot; got {extensions!r}. "
            "Pass e.g. extensions=('.png', '.jpg')."
        )
    return tuple(e.lower() for e in extensions)


class _MaskIndex:
    """Masks in a folder that mirrors the image tree: ``masks/a/b.<ext>`` for ``a/b.jpg``.

    Same stem; ``.png`` is preferred, then the order of ``extensions``.
    """

    def __init__(self, masks: str | os.PathLike, extensions: tuple[str, ...]):
        folder = Path(masks).absolute()
        if not folder.is_dir():
            raise DataError(
                f"mask folder '{_display(str(masks))}' does not exist or is not a folder; "
                "pass a folder that mirrors the image tree (masks/<class>/<stem>.png)."
            )
        order = (".png",) + tuple(e for e in extensions if e != ".png")
        self._by_stem: dict[tuple[str, ...], Path] = {}
        rank: dict[tuple[str, ...], int] = {}
        for item in _walk(folder, (), folder.resolve(), order, {folder.resolve()}):
            if isinstance(item, Skip):
                continue  # a mask that cannot be used is a missing mask
            parts, path = item
            stem, ext = os.path.splitext(parts[-1])
            key = parts[:-1] + (stem,)
            r = order.index(ext.lower())
            if key not in rank or r < rank[key]:
                rank[key], self._by_stem[key] = r, path

    def find(self, parts: tuple[str, ...]) -> Path | None:
        return self._by_stem.get(parts[:-1] + (os.path.splitext(parts[-1])[0],))


def _cap_per_class(entries: list[ImageEntry], per_class: int | None) -> list[ImageEntry]:
    entries = sorted(entries, key=lambda e: e.path)
    if per_class is None:
        return entries
    kept: list[ImageEntry] = []
    counts: dict[str | None, int] = {}
    for e in entries:
        counts[e.label] = counts.get(e.label, 0) + 1
        if counts[e.label] <= per_class:
            kept.append(e)
    return kept


def _from_folders(
    root: Path, root_real: Path, extensions: tuple[str, ...], masks: _MaskIndex | None
) -> tuple[list[ImageEntry], list[Skip]]:
    entries: list[ImageEntry] = []
    skips: list[Skip] = []
    shown_paths: set[str] = set()
    for item in _walk(root, (), root_real, extensions, {root_real}):
        if isinstance(item, Skip):
            skips.append(item)
            continue
        parts, path = item
        if len(parts) == 1:
            skips.append(Skip(
                path=_display(parts[0]),
                reason="image is not inside a class folder (expected root/<class>/<image>)",
            ))
            continue
        shown = _display("/".join(parts))
        if shown in shown_paths:
            skips.append(Skip(path=shown, reason=(
                "another file is shown under the same name (bytes that are not UTF-8 appear as \\xNN); "
                "rename one of them")))
            continue
        shown_paths.add(shown)
        entries.append(ImageEntry(
            path=shown,
            label=_display(parts[0]),
            file=path,
            mask_file=masks.find(parts) if masks else None,
        ))
    labelled = {e.label for e in entries}
    for name in sorted(os.listdir(root)):
        if not _hidden(name) and (root / name).is_dir() and _display(name) not in labelled:
            if (root / name).resolve().is_relative_to(root_real):
                skips.append(Skip(path=_display(name) + "/", reason="class folder is empty (no image files)"))
    return entries, skips


_MANIFEST_COLUMNS = ("path", "label")


def _manifest_path(
    raw: str, root: Path, root_real: Path
) -> tuple[tuple[str, ...], Path] | str:
    """A manifest cell as (parts, absolute path), or the reason it cannot be used."""
    text = raw.strip().replace("\\", "/")
    if not text:
        return "row has an empty path"
    pure = PurePosixPath(text)
    if pure.is_absolute() or re.match(r"^[A-Za-z]:", text) or ".." in pure.parts:
        return "path leaves the dataset root"
    parts = tuple(p for p in pure.parts if p != ".")
    path = root.joinpath(*parts)
    if not path.resolve().is_relative_to(root_real):
        return "symlink points outside the dataset root"
    if not path.exists():
        return "file not found"
    if not path.is_file():
        return "not a file"
    return parts, path


def _from_manifest(
    manifest: str | os.PathLike, root: Path, root_real: Path, masks: _MaskIndex | None
) -> tuple[list[ImageEntry], list[Skip]]:
    shown = _display(str(manifest))
    try:
        handle = open(manifest, newline="", encoding="utf-8-sig", errors="surrogateescape")
    except FileNotFoundError:
        raise DataError(
            f"manifest '{shown}' does not exist; pass a CSV file with the header path,label[,mask]."
        ) from None
    except OSError as exc:
        raise DataError(f"manifest '{shown}' cannot be read ({_one_line(exc.strerror or exc)}).") from None
    entries: list[ImageEntry] = []
    skips: list[Skip] = []
    first_line: dict[str, int] = {}
    with handle:
        reader = csv.reader(handle)
        try:
            header = [h.strip().lower() for h in next(reader, [])]
            missing = [c for c in _MANIFEST_COLUMNS if c not in header]
            if missing:
                raise DataError(
                    f"manifest '{shown}' needs the columns path,label (mask optional); "
                    f"found: {', '.join(_display(h) for h in header) or 'nothing'}; "
                    f"missing: {', '.join(missing)}. Add a header row such as path,label."
                )
            col = {name: header.index(name) for name in ("path", "label", "mask") if name in header}
            for row in reader:
                line = reader.line_num
                if not any(cell.strip() for cell in row):
                    continue  # blank line
                cells = {name: (row[i] if i < len(row) else "") for name, i in col.items()}
                got = _manifest_path(cells["path"], root, root_real)
                shown_path = _display(cells["path"].strip().replace("\\", "/")) or f"manifest line {line}"
                if isinstance(got, str):
                    skips.append(Skip(path=shown_path, reason=got))
                    continue
                parts, path = got
                rel = _display("/".join(parts))
                if rel in first_line:
                    skips.append(Skip(path=rel, reason=f"duplicate row in manifest (first at line {first_line[rel]})"))
                    continue
                first_line[rel] = line
                mask_file = masks.find(parts) if masks else None
                if cells.get("mask", "").strip():
                    got_mask = _manifest_path(cells["mask"], root, root_real)
                    if isinstance(got_mask, str):
                        skips.append(Skip(path=rel, reason=f"mask: {got_mask}"))
                        continue
                    mask_file = got_mask[1]
                label = cells["label"].strip()
                entries.append(ImageEntry(
                    path=rel, label=_display(label) if label else None, file=path, mask_file=mask_file,
                ))
        except csv.Error as exc:
            raise DataError(f"manifest '{shown}' is not valid CSV at line {reader.line_num}: {_one_line(exc)}.") from None
    return entries, skips


def list_images(
    root: str | os.PathLike,
    *,
    manifest: str | os.PathLike | None = None,
    masks: str | os.PathLike | None = None,
    per_class: int | None = None,
    extensions: Sequence[str] = IMAGE_EXTENSIONS,
) -> tuple[list[ImageEntry], list[Skip]]:
    """List the labelled images of a dataset, and the files that cannot take part.

    Parameters
    ----------
    root : str or os.PathLike
        The dataset folder. Without ``manifest``, one sub-folder per class
        (``root/<class>/<image>``); images in nested folders belong to their top class
        folder, and the folder name is the label.
    manifest : str or os.PathLike, optional
        A CSV file with the header ``path,label`` and an optional ``mask`` column; paths
        relative to ``root``. An empty label means unlabelled (label None). Every file
        named is tried whatever its extension.
    masks : str or os.PathLike, optional
        A folder that mirrors the image tree: the mask of ``root/a/b.jpg`` is
        ``masks/a/b.<ext>`` (same stem, ``.png`` preferred). An image without a mask
        gets ``mask_file=None``; that is not a skip. A manifest's ``mask`` cell (relative
        to ``root``) takes precedence.
    per_class : int, optional
        Keep at most this many images per label: the first ones in path order, so the
        same tree always gives the same selection. Images left out are not Skips.
    extensions : sequence of str
        File endings (case-insensitive) taken as images in folder mode.

    Returns
    -------
    entries : list of ImageEntry
        Sorted by path.
    skips : list of Skip
        Sorted by path. In folder mode: images directly in ``root``, symlinks that lead
        outside ``root`` or nowhere, and empty class folders (path ``"<class>/"``, so a
        class that will not be audited is visible). In manifest mode: paths that leave
        the root (absolute, with ``..``, or through a symlink), files not found, and
        duplicate rows (the first row wins). Hidden files and folders (names starting
        with ".") and other extensions are passed over silently.

    Raises
    ------
    DataError
        ``root``, ``manifest`` or ``masks`` does not exist; the manifest lacks the
        ``path`` or ``label`` column or is not CSV; no usable image was found.
    UsageError
        ``per_class`` is not a positive integer, or ``extensions`` is malformed.

    Examples
    --------
    >>> import tempfile
    >>> root = Path(tempfile.mkdtemp())
    >>> (root / "mug").mkdir()
    >>> Image.new("RGB", (2, 2)).save(root / "mug" / "a.png")
    >>> entries, skips = list_images(root)
    >>> [(e.path, e.label) for e in entries], skips
    ([('mug/a.png', 'mug')], [])
    """
    if per_class is not None and (
        not isinstance(per_class, (int, np.integer)) or isinstance(per_class, bool) or per_class < 1
    ):
        raise UsageError(
            f"per_class must be a positive integer or None; got {per_class!r}. Pass e.g. per_class=50."
        )
    extensions = _check_extensions(extensions)
    root_path = Path(root).absolute()
    if not root_path.is_dir():
        raise DataError(
            f"image folder '{_display(str(root))}' does not exist or is not a folder; "
            "pass a folder with one sub-folder per class, or the folder a --manifest is relative to."
        )
    try:
        os.listdir(root_path)
    except OSError as exc:
        raise DataError(
            f"image folder '{_display(str(root))}' cannot be read ({_one_line(exc.strerror or exc)}); "
            "check its permissions."
        ) from None
    root_real = root_path.resolve()
    mask_index = _MaskIndex(masks, extensions) if masks is not None else None
    if manifest is None:
        entries, skips = _from_folders(root_path, root_real, extensions, mask_index)
    else:
        entries, skips = _from_manifest(manifest, root_path, root_real, mask_index)
    if not entries:
        where = f"manifest '{_display(str(manifest))}'" if manifest is not None else f"'{_display(str(root))}'"
        hint = (
            "list existing image files relative to the root in the path column"
            if manifest is not None
            else f"put images ({', '.join(extensions)}) in one sub-folder per class"
        )
        first = f" ({len(skips)} skipped, first: {skips[0].path}: {skips[0].reason})" if skips else ""
        raise DataError(f"no usable images found in {where}{first}; {hint}.")
    return _cap_per_class(entries, per_class), sorted(skips, key=lambda s: s.path)


def class_names(entries: Iterable[ImageEntry]) -> tuple[str, ...]:
    """The sorted unique labels of ``entries`` (unlabelled entries are left out).

    Examples
    --------
    >>> e = [ImageEntry(path=p, label=p[:3], file=Path(p), mask_file=None) for p in ("vas/1", "mug/1", "vas/2")]
    >>> class_names(e)
    ('mug', 'vas')
    """
    return tuple(sorted({e.label for e in entries if e.label is not None}))
