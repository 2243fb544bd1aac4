"""The shipped demo: an invented ceramics studio's catalogue with planted shortcuts.

Three small ONNX classifiers of mugs, bowls, vases and plates (``baseline``,
``dropout``, ``rebalanced``), an audit set of 36 photographs per class with object
masks, and ``truth.json``: which shortcut was planted where (a maker's mark in the
lower-right corner of the vases, a price sticker on the mugs, a wood table under the
bowls), the seeds that re-render every photograph, and each model's *measured*
reliance on each shortcut, so that an audit's answers can be checked.

How the demo was made (``torch`` only for the training step)::

    python -m shortcut_audit.demo.build assets images
    python -m shortcut_audit.demo.train            # pip install torch==2.13.0 onnxscript
    python -m shortcut_audit.demo.build truth

Examples
--------
>>> p = demo_paths()
>>> sorted(p.models)
['baseline', 'dropout', 'rebalanced']
>>> p.models["baseline"].config is None
True
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

__all__ = ["DemoModel", "DemoPaths", "demo_paths", "MODEL_NAMES"]

MODEL_NAMES: tuple[str, ...] = ("baseline", "dropout", "rebalanced")
"""The shipped demo models, in the order they are shown."""

_CONFIGS = {"rebalanced": "rebalanced.toml"}


@dataclass(frozen=True, kw_only=True)
class DemoModel:
    """One shipped model: its ``.onnx`` file and its TOML model config (None when none)."""

    name: str
    onnx: Path
    config: Path | None


@dataclass(frozen=True, kw_only=True)
class DemoPaths:
    """Where the shipped demo lives on this machine.

    Attributes
    ----------
    root : Path
        The demo image folder (holds ``images/``, ``masks/`` and ``truth.json``).
    images : Path
        Audit images, one folder per class: ``images/<class>/<class>_NN.png``.
    masks : Path
        Object masks mirroring ``images`` (``--masks``).
    truth : Path
        ``truth.json``.
    assets : Path
        The shortcut images (``stamp.png``, ``sticker.png``, ``wood.png``).
    models : dict of str to DemoModel
        ``baseline``, ``dropout``, ``rebalanced``.
    """

    root: Path
    images: Path
    masks: Path
    truth: Path
    assets: Path
    models: dict[str, DemoModel]


def _images_root() -> Path:
    # An installed wheel (and an editable install) carries demo_images/ as the package
    # shortcut_audit.demo_images; a plain checkout has it at the repository's root.
    try:
        from shortcut_audit import demo_images  # type: ignore[attr-defined]
    except ImportError:
        return Path(__file__).resolve().parents[2] / "demo_images"
    return Path(next(iter(demo_images.__path__))).resolve()


def demo_paths() -> DemoPaths:
    """The shipped demo's files: images, masks, truth.json, assets and the three models.

    Works from a checkout (``pip install -e .`` or none) and from an installed wheel.
    The paths are returned whether or not the files exist yet (a fresh build).

    Returns
    -------
    DemoPaths

    Examples
    --------
    >>> demo_paths().images.name
    'images'
    """
    here = Path(__file__).resolve().parent
    root = _images_root()
    models_dir = here / "models"
    models = {
        name: DemoModel(
            name=name,
            onnx=models_dir / f"{name}.onnx",
            config=(models_dir / _CONFIGS[name]) if name in _CONFIGS else None,
        )
        for name in MODEL_NAMES
    }
    return DemoPaths(root=root, images=root / "images", masks=root / "masks",
                     truth=root / "truth.json", assets=here / "assets", models=models)
