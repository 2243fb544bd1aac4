"""compare.html: the comparison of two models on one page, figures embedded.

Three steps, kept apart so that rendering can be checked in a test:

- :func:`compare_figures` reads the two audits' stored heatmaps (and the images, where
  the dataset root is still there) and draws the figures, as PNG bytes;
- :func:`render_compare_page` turns a :class:`~shortcut_audit.comparison.CompareResult`
  and those figures into one self-contained HTML page (pure; the shared environment of
  :mod:`.html`, autoescape on, ``templates/compare.html.j2`` extending ``base.html.j2``,
  every figure a ``data:`` URI, no timestamp);
- :func:`write_compare_page` writes it atomically.

Heatmaps of the two models share one ``viridis`` scale per figure; their difference
(after minus before) uses the diverging ``RdBu_r`` centred at zero: red where hiding a
region costs the after model more than the before model, blue where it costs less.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import Normalize, TwoSlopeNorm  # noqa: E402

from ..errors import AuditError  # noqa: E402
from ..store import write_bytes_atomic  # noqa: E402
from .figures import HEAT_CMAP, plain_label, positive_max  # noqa: E402
from .html import data_uri, render  # noqa: E402
from .words import KIND_TITLES as _KIND_TITLES  # noqa: E402

__all__ = ["DIFF_CMAP", "difference_png", "compare_figures", "render_compare_page",
           "write_compare_page"]

#: Diverging colormap of differences, centred at zero.
DIFF_CMAP = "RdBu_r"
#: Example images shown per finding, and classes whose mean heatmaps are shown.
EXAMPLES_PER_FINDING = 3
MAX_CLASS_FIGURES = 24

_SHORT = {"box_agreement": "box agreement", "small_area_rate": "decisive-area rate",
          "median_background_share": "background share", "motif_coverage": "motif coverage"}
#: The chip style of base.html.j2 for each verdict (the word is always shown too).
_CHIPS = {"new": "confirmed", "persists": "suspect", "weakened": "suspect", "unclear": "not-confirmed",
          "resolved": "clean", "cleared": "clean"}
_VERDICT_ORDER = ("new", "persists", "weakened", "unclear", "resolved", "cleared")


# ------------------------------------------------------------------------ figures

def _png(fig) -> bytes:
    import io

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, pad_inches=0.04,
                metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def _to_shape(heat: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """``heat`` at ``shape`` (rows, columns); bilinear when the models' sizes differ."""
    heat = np.asarray(heat, dtype=np.float64)
    if heat.shape == tuple(shape):
        return heat
    from skimage.transform import resize

    return resize(heat, shape, order=1, mode="edge", anti_aliasing=False, preserve_range=True)


def _rgb(image: np.ndarray) -> np.ndarray:
    img = np.clip(np.nan_to_num(np.asarray(image, dtype=np.float64)), 0, 255).astype(np.uint8)
    if img.ndim == 2:
        img = img[..., None]
    return np.repeat(img, 3, axis=2) if img.shape[2] == 1 else img


def difference_png(before: np.ndarray, after: np.ndarray, *, image: np.ndarray | None = None,
                   title: str = "", heat_label: str = "score drop when hidden") -> bytes:
    """Before and after heatmaps on one scale, and their difference centred at zero.

    Parameters
    ----------
    before, after : (H, W) arrays
        Heatmaps of the same image (or class means); ``after`` is brought to
        ``before``'s shape when the models' input sizes differ.
    image : (H, W, C) array, optional
        The image (0..255, at the before model's input size), shown first.
    title : str
    heat_label : str
        What the heat is (the colour bar's label).

    Returns
    -------
    bytes
        A PNG.
    """
    b = np.asarray(before, dtype=np.float64)
    a = _to_shape(after, b.shape)
    d = a - b
    top = positive_max(b, a)
    span = max(float(np.abs(d).max()), 1e-12)
    panels = (1 if image is not None else 0) + 3
    fig, axes = plt.subplots(1, panels, figsize=(2.1 * panels + 1.6, 2.5), squeeze=False,
                             layout="constrained")
    axes = list(axes[0])
    if image is not None:
        ax = axes.pop(0)
        ax.imshow(_rgb(image), interpolation="nearest")
        ax.set_title("image", fontsize=9)
        ax.set_xticks([])
        ax.set_yticks([])
    heat_norm = Normalize(0, top)
    im = None
    for ax, heat, name in ((axes[0], b, "before"), (axes[1], a, "after")):
        im = ax.imshow(np.clip(heat, 0, None), cmap=HEAT_CMAP, norm=heat_norm, interpolation="nearest")
        ax.set_title(name, fontsize=9)
    dim = axes[2].imshow(d, cmap=DIFF_CMAP, norm=TwoSlopeNorm(vcenter=0.0, vmin=-span, vmax=span),
                         interpolation="nearest")
    axes[2].set_title("difference (after − before)", fontsize=9)
    for ax in axes:
        ax.set_xticks([])
        ax.set_yticks([])
    cb = fig.colorbar(im, ax=axes[:2], fraction=0.05, pad=0.02, shrink=0.9)
    cb.ax.tick_params(labelsize=7)
    cb.set_label(heat_label, fontsize=7)
    cb2 = fig.colorbar(dim, ax=axes[2], fraction=0.1, pad=0.03, shrink=0.9)
    cb2.ax.tick_params(labelsize=7)
    cb2.set_label("after − before", fontsize=7)
    if title:
        t = fig.suptitle(plain_label(title, limit=80), fontsize=10)
        t.set_parse_math(False)
    return _png(fig)


def _files(folder: Path | None, root: Path | None):
    if folder is None or not (folder / "audit.json").is_file():
        return None
    from .sources import AuditFiles

    try:
        return AuditFiles(folder, images=root if root is not None and root.is_dir() else None)
    except (AuditError, OSError):  # an unreadable audit: no figures, the numbers still stand
        return None


def compare_figures(result) -> dict:
    """The page's figures, read from the two audits' ``results/``.

    Returns
    -------
    dict
        ``{"examples": [(finding_index, path, png)], "class_means": [(class, n, png)],
        "missing": [str]}``; figures whose heatmaps are missing are left out and said so.
    """
    out: dict = {"examples": [], "class_means": [], "missing": []}
    fb, fa = _files(result.before_dir, result.image_root), _files(result.after_dir, result.image_root)
    if fb is None or fa is None:
        out["missing"].append("the heatmaps are not shown: an audit folder or its results/ is missing.")
        return out
    cache: dict[tuple[int, str], np.ndarray | None] = {}

    def heat(side: int, path: str) -> np.ndarray | None:
        if (side, path) not in cache:
            arrays = (fb if side == 0 else fa).arrays(path)
            cache[(side, path)] = arrays.get("heatmap")
        return cache[(side, path)]

    lost = 0
    for k, f in enumerate(result.findings):
        for path in f.examples[:EXAMPLES_PER_FINDING]:
            hb, ha = heat(0, path), heat(1, path)
            if hb is None or ha is None:
                lost += 1
                continue
            png = difference_png(hb, ha, image=fb.pixels(path), title=path)
            out["examples"].append((k, path, png))
    if lost:
        out["missing"].append(f"{lost} example heatmap(s) are missing from the audits' results/.")

    paired = set(_paired_paths(fb.audit, fa.audit))
    flagged = [f.class_name for f in result.findings]
    names = [c.name for c in result.classes]
    names = [n for n in names if n in flagged] + [n for n in names if n not in flagged]
    labels = {im["path"]: im.get("label") for im in fb.audit.get("images", [])}
    for name in names[:MAX_CLASS_FIGURES]:
        sb = sa = None
        n = 0
        for path in sorted(p for p in paired if labels.get(p) == name):
            hb, ha = heat(0, path), heat(1, path)
            if hb is None or ha is None:
                continue
            hb = np.asarray(hb, dtype=np.float64)
            ha = _to_shape(ha, hb.shape)
            sb = hb if sb is None else sb + hb
            sa = ha if sa is None else sa + ha
            n += 1
            cache.pop((0, path), None)
            cache.pop((1, path), None)
        if n:
            png = difference_png(sb / n, sa / n, title=f"{name}: class-mean heatmaps ({n} images)",
                                 heat_label="mean score drop")
            out["class_means"].append((name, n, png))
    if len(names) > MAX_CLASS_FIGURES:
        out["missing"].append(f"class-mean heatmaps are shown for {MAX_CLASS_FIGURES} of "
                              f"{len(names)} classes (the flagged ones first).")
    return out


def _paired_paths(before: dict, after: dict) -> list[str]:
    a = {im["path"] for im in after.get("images", [])}
    return [im["path"] for im in before.get("images", []) if im["path"] in a]


# ------------------------------------------------------------------------ words

def _pct(x) -> str:
    return "–" if x is None else f"{100 * x:.0f}%"


def _pp(x) -> str:
    if x is None:
        return "–"
    v = 100 * x
    if abs(v) < 0.05:
        return "0 pts"
    return f"{'+' if v > 0 else '−'}{abs(v):.1f} pts"


def _interval(d) -> str:
    if d.low is None:
        return "no interval"
    return f"[{_pp(d.low)}, {_pp(d.high)}]"


def _count(d) -> str:
    if d.method.startswith("paired bootstrap over images"):
        base = f"{d.images} images"
        if d.before_images != d.images or d.after_images != d.images:
            base += f" ({d.before_images} / {d.after_images} counted)"
        return base
    if "trials" in d.method or "binomial" in d.method:
        return f"{d.before_images} / {d.after_images} trials"
    return f"{d.images} images"


def _row(d) -> dict:
    return {"label": d.label, "before": _pct(d.before), "after": _pct(d.after),
            "difference": _pp(d.difference), "interval": _interval(d), "count": _count(d),
            "verdict": d.verdict, "method": d.method, "changed": d.changed}


def _sentence(f) -> str:
    d = f.statistic
    what = f"{f.class_name}, {_KIND_TITLES.get(f.kind, f.kind)}"
    move = f"{_SHORT.get(d.name, d.label)} {_pct(d.before)} → {_pct(d.after)}"
    if f.verdict == "resolved":
        if f.after_status == "not-confirmed":
            return f"Resolved: {what}; still flagged by the heatmap rules, but its test now clears it ({move})."
        return f"Resolved: {what} ({move})."
    if f.verdict == "cleared":
        return f"Never a confirmed shortcut: {what}; its test cleared it ({move})."
    if f.verdict == "new":
        return f"New: {what} ({move})."
    if f.verdict == "weakened":
        return f"Weaker but still flagged: {what} ({move})."
    if f.verdict == "unclear":
        return f"No longer flagged, but not clearly lower: {what} ({move})."
    return f"Still there: {what} ({move})."


def render_compare_page(result, figures: dict | None = None) -> str:
    """compare.html as text (pure: the same result and figures give the same page).

    Parameters
    ----------
    result : CompareResult
    figures : dict, optional
        From :func:`compare_figures`; without it the page has no figures.
    """
    from .._version import __version__
    from ..comparison import CONFIDENCE, VERDICTS

    figures = figures or {"examples": [], "class_means": [], "missing": []}
    examples: dict[int, list[dict]] = {}
    for k, path, png in figures.get("examples", []):
        examples.setdefault(k, []).append({"path": path, "src": data_uri(png)})
    findings = []
    for k, f in enumerate(result.findings):
        findings.append({
            "anchor": f"f{k + 1}", "class_name": f.class_name, "kind": f.kind,
            "kind_title": _KIND_TITLES.get(f.kind, f.kind),
            "before": f.before_status if f.before_id is None else f"{f.before_status} ({f.before_id})",
            "after": f.after_status if f.after_id is None else f"{f.after_status} ({f.after_id})",
            "verdict": f.verdict, "chip": _CHIPS[f.verdict], "meaning": VERDICTS[f.verdict], "sentence": _sentence(f),
            "statistic": _row(f.statistic), "tests": [_row(t) for t in f.tests],
            "examples": examples.get(k, [])})
    counts = result.counts()
    summary = ", ".join(f"{counts[v]} {v}" for v in _VERDICT_ORDER if counts[v]) or "no finding in either audit"
    classes = [{"name": c.name, "images": c.images,
                "place": (None if c.place_box is None else
                          f"[{', '.join(f'{v:.2f}' for v in c.place_box)}] (from the {c.place_from} model)"),
                "rows": [_row(d) for d in c.statistics]} for c in result.classes]
    context = {
        "before": result.before, "after": result.after, "mode": result.mode,
        "paired": result.images["paired"], "summary": summary, "findings": findings,
        "classes": classes, "notes": list(result.notes) + list(figures.get("missing", [])),
        "verdicts": [(v, _CHIPS[v], VERDICTS[v]) for v in _VERDICT_ORDER],
        "tool_version": __version__,
        "confidence": f"{100 * CONFIDENCE:.0f}%",
        "resamples": result.settings["bootstrap"]["resamples"],
        "seed": result.settings["bootstrap"]["seed"],
        "class_means": [{"name": name, "n": n, "src": data_uri(png)}
                        for name, n, png in figures.get("class_means", [])],
        "heat_cmap": HEAT_CMAP, "diff_cmap": DIFF_CMAP,
    }
    return render("compare.html.j2", **context)


def write_compare_page(result, out_dir: str | Path) -> Path:
    """Draw the figures, render compare.html and write it into ``out_dir`` atomically."""
    path = Path(out_dir) / "compare.html"
    write_bytes_atomic(path, render_compare_page(result, compare_figures(result)).encode("utf-8"))
    return path

