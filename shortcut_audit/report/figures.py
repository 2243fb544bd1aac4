"""Figures: heatmap overlays and class-mean heatmaps, as PNG bytes.

Heatmaps use matplotlib's ``viridis``, a perceptually uniform colormap designed to stay
readable with the common colour-vision deficiencies; every figure states its scale
with a colour bar. Rendering is pure (arrays in, PNG bytes out); writing goes through
the store's atomic writer.
"""

from __future__ import annotations

import io
import re
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.patches import Rectangle  # noqa: E402

from ..store import write_bytes_atomic  # noqa: E402

__all__ = ["heatmap_overlay_png", "class_mean_png", "write_scan_figures", "safe_name", "HEAT_CMAP"]

HEAT_CMAP = "viridis"


def safe_name(text: str, *, limit: int = 60) -> str:
    """A file-system-safe name for ``text`` (letters, digits, dot, dash, underscore)."""
    clean = re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._")
    return (clean or "item")[:limit]


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight", metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def _show_image(ax, image: np.ndarray) -> None:
    img = np.clip(image, 0, 255).astype(np.uint8)
    if img.shape[2] == 1:
        ax.imshow(img[..., 0], cmap="gray", vmin=0, vmax=255)
    else:
        ax.imshow(img)


def _outline(ax, box, shape, colour="white") -> None:
    if box is None:
        return
    h, w = shape
    x0, y0, x1, y1 = box
    ax.add_patch(Rectangle((x0 * w - 0.5, y0 * h - 0.5), (x1 - x0) * w, (y1 - y0) * h,
                           fill=False, edgecolor=colour, linewidth=2, linestyle="--"))


def heatmap_overlay_png(image: np.ndarray, heatmap: np.ndarray, *, title: str = "",
                        box: list[float] | None = None, vmax: float | None = None) -> bytes:
    """Image, heatmap over the image, and a colour bar; ``box`` outlined (fractions)."""
    heat = np.asarray(heatmap, dtype=np.float64)
    top = vmax if vmax is not None else max(float(np.abs(heat).max()), 1e-12)
    fig, axes = plt.subplots(1, 2, figsize=(6.4, 3.0))
    _show_image(axes[0], image)
    axes[0].set_title("image", fontsize=9)
    _show_image(axes[1], image)
    im = axes[1].imshow(np.clip(heat, 0, None), cmap=HEAT_CMAP, vmin=0, vmax=top, alpha=0.6)
    _outline(axes[1], box, heat.shape)
    axes[1].set_title("score drop when hidden", fontsize=9)
    for ax in axes:
        ax.set_xticks([])
        ax.set_yticks([])
    fig.colorbar(im, ax=axes[1], fraction=0.046, pad=0.04)
    if title:
        fig.suptitle(title, fontsize=10)
    return _png(fig)


def class_mean_png(heatmaps: list[tuple[str, np.ndarray]], *, title: str = "") -> bytes:
    """Class-mean heatmaps side by side on one shared scale."""
    n = max(1, len(heatmaps))
    top = max([float(np.clip(h, 0, None).max()) for _, h in heatmaps] + [1e-12])
    fig, axes = plt.subplots(1, n, figsize=(2.3 * n + 0.8, 2.6), squeeze=False)
    im = None
    for ax, (name, heat) in zip(axes[0], heatmaps):
        im = ax.imshow(np.clip(heat, 0, None), cmap=HEAT_CMAP, vmin=0, vmax=top)
        ax.set_title(name, fontsize=9)
        ax.set_xticks([])
        ax.set_yticks([])
    if im is not None:
        fig.colorbar(im, ax=list(axes[0]), fraction=0.02, pad=0.02)
    if title:
        fig.suptitle(title, fontsize=10)
    return _png(fig)


def write_scan_figures(result, out_dir: Path) -> list[Path]:
    """Class-mean heatmaps and the top examples' overlays, beside audit.json."""
    from ..dataset import load_image
    from ..store import ResultStore

    out_dir = Path(out_dir)
    fig_dir = out_dir / "figures"
    written = []
    means = [(c.name, c.mean_heatmap) for c in result.classes if c.mean_heatmap is not None]
    if means:
        p = fig_dir / "class-means.png"
        write_bytes_atomic(p, class_mean_png(means, title="class-mean heatmaps (shared scale)"))
        written.append(p)
    root = Path(result.dataset["root"])
    size = tuple(result.model["input"]["input"]["size"])
    channels = result.model["input"]["input"]["channels"]
    resize = result.model["input"]["input"]["resize"]
    results = out_dir / "results"
    for f in result.findings:
        for path in f.examples[:4]:
            key = ResultStore.key(path)
            npz = results / f"{key}.npz"
            if not npz.exists():
                continue
            with np.load(npz, allow_pickle=False) as data:
                heat = data["heatmap"]
            try:
                image = load_image(root / path, size=size, channels=channels, resize=resize)
            except Exception:
                continue
            im = next((i for i in result.images if i.path == path), None)
            box = im.decisive_box if im is not None else None
            p = fig_dir / f"{f.id}-{safe_name(Path(path).stem)}-{key[:8]}.png"
            write_bytes_atomic(p, heatmap_overlay_png(image, heat, title=f"{f.id} {f.kind}: {path}", box=box))
            written.append(p)
    return written
