"""Figures of the report and the evidence pack, as PNG bytes.

Every function here is pure: numpy arrays and plain values in, PNG bytes out; nothing
is read or written (the callers write through the store's atomic writer).

Conventions, shared by every figure:

- Heatmaps use matplotlib's ``viridis`` (:data:`HEAT_CMAP`), a perceptually uniform
  sequential colormap that stays readable with the common colour-vision deficiencies
  and in grey print. A figure never mixes scales: every heat panel of one figure uses
  the same ``vmax``, and the figure (or its companion :func:`scale_bar_png`) states it.
  Heat below zero (hiding the pixel *raised* the score) is shown as zero.
- The decisive region is outlined by a white dashed line over a black one, visible on
  light photos and on every viridis colour alike.
- Lines of several classes take the colour-blind-safe qualitative palette of Okabe and
  Ito ("Color Universal Design", 2008) *and* a line style each, so no curve is told
  apart by colour alone.
- Text that comes from the data (file and class names) goes through :func:`plain_label`
  and is drawn with mathtext off, so a ``$`` in a name cannot break a figure.
"""

from __future__ import annotations

import io
import re
import unicodedata
from collections.abc import Sequence

import matplotlib

matplotlib.use("Agg")
import matplotlib.patheffects as path_effects  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import to_hex  # noqa: E402
from matplotlib.patches import Rectangle  # noqa: E402

__all__ = [
    "HEAT_CMAP",
    "LINE_COLOURS",
    "safe_name",
    "plain_label",
    "heat_stops",
    "positive_max",
    "heatmap_overlay_png",
    "overlay_tile_png",
    "class_mean_png",
    "class_means_png",
    "scale_bar_png",
    "curves_png",
    "crops_strip_png",
    "contact_sheet_png",
]

HEAT_CMAP = "viridis"
#: Okabe and Ito's palette without its black and yellow (kept for text and heat).
LINE_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#56B4E9", "#E69F00", "#000000")
_LINE_STYLES = ("-", "--", "-.", ":")
_DPI = 100
#: Pixels between the two panels of a tile.
TILE_GAP = 6
_WINDOWS_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(1, 10)),
                     *(f"lpt{i}" for i in range(1, 10))}


# ------------------------------------------------------------------------ text

def safe_name(text: str, *, limit: int = 60) -> str:
    """A file-system-safe name for ``text``: ASCII letters, digits, ``.``, ``-``, ``_``.

    Accents are folded to ASCII where they can be (``é`` -> ``e``); every other run of
    characters becomes ``_``. The result never starts with ``.`` or ``-`` (no hidden
    files, nothing an option parser reads), is never empty (``"item"``), never a name
    Windows reserves (``CON``, ``NUL``, ...), and is at most ``limit`` characters.

    >>> safe_name("../../etc/passwd")
    'etc_passwd'
    >>> safe_name('<script>alert(1)</script>')
    'script_alert_1_script'
    >>> safe_name("CON")
    'CON_'
    """
    folded = unicodedata.normalize("NFKD", str(text)).encode("ascii", "ignore").decode("ascii")
    clean = re.sub(r"[^A-Za-z0-9._-]+", "_", folded)
    clean = re.sub(r"_+", "_", re.sub(r"\.{2,}", "_", clean)).strip("._-")
    clean = (clean or "item")[:limit].rstrip("._-") or "item"
    if clean.split(".")[0].lower() in _WINDOWS_RESERVED:
        clean = clean + "_"
    return clean


def plain_label(text: str, *, limit: int = 36) -> str:
    """``text`` made safe to draw: control characters removed, long text shortened in
    the middle with an ellipsis, at most ``limit`` characters.

    >>> plain_label("a\\nb")
    'a b'
    >>> plain_label("x" * 50, limit=9)
    'xxxx…xxxx'
    """
    s = "".join(" " if unicodedata.category(ch)[0] in "CZ" and ch != " " else ch for ch in str(text))
    s = re.sub(r" +", " ", s).strip()
    if len(s) > limit:
        head = (limit - 1) // 2
        tail = limit - 1 - head
        s = s[:head] + "…" + s[len(s) - tail:]
    return s


def _text(obj) -> None:
    """Switch mathtext off on a matplotlib Text (``$`` in names stays a dollar)."""
    obj.set_parse_math(False)


# ----------------------------------------------------------------------- helpers

def heat_stops(n: int = 9) -> list[str]:
    """``n`` evenly spaced colours of :data:`HEAT_CMAP`, low to high, as ``#rrggbb``."""
    cmap = matplotlib.colormaps[HEAT_CMAP]
    return [to_hex(cmap(i / (n - 1))) for i in range(n)]


def positive_max(*maps: np.ndarray | None) -> float:
    """The largest positive value over ``maps`` (a shared ``vmax``), at least 1e-12."""
    tops = [float(np.nanmax(m)) for m in maps
            if m is not None and np.size(m) and not np.all(np.isnan(m))]
    return max([t for t in tops if np.isfinite(t)] + [1e-12])


def _png(fig, *, tight: bool = False) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI, bbox_inches="tight" if tight else None,
                pad_inches=0.04, metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def _rgb(image: np.ndarray) -> np.ndarray:
    """(H, W, 3) uint8 from an (H, W, C) 0..255 image, C = 1 or 3."""
    img = np.clip(np.nan_to_num(np.asarray(image, dtype=np.float64)), 0, 255).astype(np.uint8)
    if img.ndim == 2:
        img = img[..., None]
    if img.shape[2] == 1:
        img = np.repeat(img, 3, axis=2)
    return img


def _grey_backdrop(image: np.ndarray) -> np.ndarray:
    """The image in lightened grey: heat colours are never confused with the photo's."""
    img = _rgb(image).astype(np.float64)
    lum = img @ np.array([0.299, 0.587, 0.114])
    lum = 80 + 0.6 * lum
    return np.repeat(lum[..., None], 3, axis=2).astype(np.uint8)


def _bare(ax) -> None:
    ax.set_xticks([])
    ax.set_yticks([])
    for spine in ax.spines.values():
        spine.set_visible(False)


def _outline(ax, box: Sequence[float] | None, shape: tuple[int, int], *, width: float = 1.6) -> None:
    """Outline ``box`` (fractions of width and height) on an axis showing ``shape``."""
    if box is None:
        return
    h, w = shape
    x0, y0, x1, y1 = (float(v) for v in box)
    rect = Rectangle((x0 * w - 0.5, y0 * h - 0.5), (x1 - x0) * w, (y1 - y0) * h, fill=False,
                     edgecolor="white", linewidth=width, linestyle=(0, (3, 2)), clip_on=False)
    rect.set_path_effects([path_effects.Stroke(linewidth=width + 1.6, foreground="black"),
                           path_effects.Normal()])
    ax.add_patch(rect)


def _heat_rgba(heat: np.ndarray, vmax: float) -> np.ndarray:
    """RGBA of the heat on :data:`HEAT_CMAP`; low heat lets the photo show through."""
    cmap = matplotlib.colormaps[HEAT_CMAP]
    t = np.clip(np.nan_to_num(np.asarray(heat, dtype=np.float64)) / vmax, 0.0, 1.0)
    rgba = cmap(t)
    rgba[..., 3] = 0.12 + 0.83 * np.sqrt(t)
    return rgba


# ----------------------------------------------------------------------- figures

def _ticks(vmax: float) -> list[float]:
    """Round tick values from 0 to ``vmax`` (at most 6)."""
    from matplotlib.ticker import MaxNLocator

    vals = MaxNLocator(nbins=5).tick_values(0.0, vmax)
    return [float(f"{v:.6g}") for v in vals if -1e-12 <= v <= vmax * (1 + 1e-9)]


def _upscale(img: np.ndarray, s: int) -> np.ndarray:
    return np.repeat(np.repeat(img, s, axis=0), s, axis=1)


def _factor(shape: tuple[int, int], target: int) -> int:
    return max(1, int(np.ceil(target / max(shape))))


def _draw_box(canvas: np.ndarray, box: Sequence[float] | None, shape: tuple[int, int], s: int,
              *, left: int = 0, band: int = 3) -> None:
    """Outline ``box`` on ``canvas`` (uint8 RGB): a black band with a white dashed line
    through it, drawn just outside the box (inside only where the image ends), so the
    outlined pixels themselves stay visible."""
    if box is None:
        return
    h, w = shape
    H, W = h * s, w * s
    x0, x1 = int(round(float(box[0]) * W)), int(round(float(box[2]) * W))
    y0, y1 = int(round(float(box[1]) * H)), int(round(float(box[3]) * H))
    if x1 <= x0 or y1 <= y0:
        return
    X0, Y0 = max(0, x0 - band), max(0, y0 - band)
    X1, Y1 = min(W, x1 + band), min(H, y1 + band)      # exclusive
    if X1 - X0 < 2 * band or Y1 - Y0 < 2 * band:
        return
    sub = canvas[:, left:left + W]
    sub[Y0:Y0 + band, X0:X1] = 0
    sub[Y1 - band:Y1, X0:X1] = 0
    sub[Y0:Y1, X0:X0 + band] = 0
    sub[Y0:Y1, X1 - band:X1] = 0
    mid = band // 2
    on_x = (np.arange(X1 - X0) % 8) < 5
    on_y = (np.arange(Y1 - Y0) % 8) < 5
    for y in (Y0 + mid, Y1 - 1 - mid):
        row = sub[y, X0:X1]
        row[on_x] = 255
    for x in (X0 + mid, X1 - 1 - mid):
        col = sub[Y0:Y1, x]
        col[on_y] = 255


def _mask_edge(mask: np.ndarray, s: int) -> np.ndarray:
    from scipy import ndimage

    up = _upscale(np.asarray(mask, dtype=bool), s)
    return up & ~ndimage.binary_erosion(up, iterations=max(1, s // 3), border_value=1)


def _png_array(canvas: np.ndarray) -> bytes:
    buf = io.BytesIO()
    matplotlib.image.imsave(buf, canvas, format="png", metadata={"Software": None})
    return buf.getvalue()


def overlay_tile_png(image: np.ndarray, heatmap: np.ndarray, *, vmax: float,
                     box: Sequence[float] | None = None, mask: np.ndarray | None = None,
                     side: int = 160) -> bytes:
    """One gallery tile: the image with ``box`` outlined, and its heatmap over the image.

    Drawn pixel by pixel (nearest-neighbour enlargement by a whole factor), so what is
    shown is what the model saw, and a gallery of tiles costs no plotting.

    Parameters
    ----------
    image : (H, W, C) array
        0..255, at the model's input size (what the model saw).
    heatmap : (H, W) array
        Score drop when each pixel is hidden.
    vmax : float
        Top of the colour scale; pass the same value to every tile of one gallery and
        state it with :func:`scale_bar_png`.
    box : [x0, y0, x1, y1], optional
        The decisive region, fractions of width and height.
    mask : (H, W) bool, optional
        The object mask; its outline is drawn in white on the heat panel.
    side : int
        The panels are enlarged by ``ceil(side / max(H, W))``.

    Returns
    -------
    bytes
        A PNG of two panels ``k*H`` high and ``k*W`` wide, ``TILE_GAP`` pixels apart.
    """
    heat = np.asarray(heatmap, dtype=np.float64)
    shape = heat.shape
    s = _factor(shape, side)
    left = _upscale(_rgb(image), s)
    grey = _grey_backdrop(image).astype(np.float64)
    rgba = _heat_rgba(heat, vmax)
    blend = grey * (1 - rgba[..., 3:]) + 255 * rgba[..., :3] * rgba[..., 3:]
    right = _upscale(np.clip(blend, 0, 255).astype(np.uint8), s)
    if mask is not None and np.shape(mask) == shape and np.any(mask) and not np.all(mask):
        right[_mask_edge(mask, s)] = 255
    H, W = left.shape[:2]
    canvas = np.full((H, 2 * W + TILE_GAP, 3), 255, dtype=np.uint8)
    canvas[:, :W] = left
    canvas[:, W + TILE_GAP:] = right
    _draw_box(canvas, box, shape, s, left=0)
    _draw_box(canvas, box, shape, s, left=W + TILE_GAP)
    return _png_array(canvas)


def _tile_canvas(image, heat, vmax, box, mask, side) -> np.ndarray:
    return matplotlib.image.imread(io.BytesIO(overlay_tile_png(image, heat, vmax=vmax, box=box,
                                                               mask=mask, side=side)))


def _vertical_scale(fig, rect, vmax: float, label: str) -> None:
    cax = fig.add_axes(rect)
    cax.imshow(np.linspace(1, 0, 256)[:, None], cmap=HEAT_CMAP, aspect="auto", extent=(0, 1, 0, vmax))
    cax.set_xticks([])
    cax.yaxis.tick_right()
    ticks = _ticks(vmax)
    cax.set_yticks(ticks)
    cax.set_yticklabels([f"{t:g}" for t in ticks])
    cax.tick_params(labelsize=7, length=2, pad=1)
    cax.yaxis.set_label_position("right")
    cax.set_ylabel(label, fontsize=7)


def heatmap_overlay_png(image: np.ndarray, heatmap: np.ndarray, *, title: str = "",
                        box: list[float] | None = None, vmax: float | None = None,
                        mask: np.ndarray | None = None) -> bytes:
    """One image's figure with its own scale: the image with ``box`` outlined, its
    heatmap over a grey copy, a colour bar, and ``title`` (drawn as plain text).

    The figure of the evidence pack's overlays; 600 x 300 pixels.
    """
    heat = np.asarray(heatmap, dtype=np.float64)
    top = vmax if vmax is not None else positive_max(heat)
    canvas = _tile_canvas(image, heat, top, box, mask, 240)
    fig = plt.figure(figsize=(6.0, 3.0))
    ax = fig.add_axes((0.01, 0.03, 0.84, 0.8))
    ax.imshow(canvas, interpolation="nearest")
    _bare(ax)
    half = (canvas.shape[1] - TILE_GAP) / 2 / canvas.shape[1]
    fig.text(0.01 + 0.84 * half / 2, 0.85, "image (model input)", ha="center", fontsize=8)
    fig.text(0.01 + 0.84 * (1 - half / 2), 0.85, "score drop when hidden", ha="center", fontsize=8)
    _vertical_scale(fig, (0.87, 0.08, 0.025, 0.7), top, "score drop")
    if title:
        _text(fig.text(0.5, 0.93, plain_label(title, limit=70), ha="center", fontsize=10))
    return _png(fig)


def class_mean_png(heatmap: np.ndarray, *, vmax: float | None = None,
                   box: Sequence[float] | None = None) -> bytes:
    """One class-mean heatmap with its colour bar; ``box`` (a finding's region) outlined.

    Returns
    -------
    bytes
        A PNG about 260 x 210 pixels.
    """
    heat = np.asarray(heatmap, dtype=np.float64)
    top = vmax if vmax is not None else positive_max(heat)
    fig = plt.figure(figsize=(2.7, 2.15))
    ax = fig.add_axes((0.02, 0.04, 0.7, 0.92))
    im = ax.imshow(np.clip(heat, 0, None), cmap=HEAT_CMAP, vmin=0, vmax=top, interpolation="nearest")
    _outline(ax, box, heat.shape)
    _bare(ax)
    cax = fig.add_axes((0.76, 0.08, 0.05, 0.84))
    cb = fig.colorbar(im, cax=cax)
    cb.ax.tick_params(labelsize=7)
    cb.set_label("mean score drop", fontsize=7)
    return _png(fig)


def class_means_png(heatmaps: Sequence[tuple[str, np.ndarray]], *, per_row: int = 6) -> bytes:
    """Every class's mean heatmap side by side, on one shared scale, one colour bar."""
    n = max(1, len(heatmaps))
    cols = min(n, per_row)
    rows = (n + cols - 1) // cols
    top = positive_max(*[h for _, h in heatmaps])
    fig, axes = plt.subplots(rows, cols, figsize=(1.75 * cols + 0.9, 1.95 * rows), squeeze=False)
    im = None
    for k, ax in enumerate(axes.ravel()):
        _bare(ax)
        if k >= len(heatmaps):
            ax.set_visible(False)
            continue
        name, heat = heatmaps[k]
        im = ax.imshow(np.clip(heat, 0, None), cmap=HEAT_CMAP, vmin=0, vmax=top, interpolation="nearest")
        _text(ax.set_title(plain_label(name, limit=22), fontsize=9))
    if im is not None:
        cb = fig.colorbar(im, ax=list(axes.ravel()), fraction=0.025, pad=0.02)
        cb.ax.tick_params(labelsize=7)
        cb.set_label("mean score drop (one scale)", fontsize=7)
    return _png(fig, tight=True)


def scale_bar_png(vmax: float, *, label: str = "score drop when hidden") -> bytes:
    """A horizontal colour bar from 0 to ``vmax``: the scale of a gallery of tiles."""
    fig = plt.figure(figsize=(3.2, 0.62))
    ax = fig.add_axes((0.03, 0.42, 0.94, 0.26))
    ax.imshow(np.linspace(0, 1, 256)[None, :], cmap=HEAT_CMAP, aspect="auto", extent=(0, vmax, 0, 1))
    ax.set_yticks([])
    ticks = _ticks(vmax)
    ax.set_xticks(ticks)
    ax.set_xticklabels([f"{t:g}" for t in ticks])
    ax.tick_params(labelsize=7, length=2, pad=1)
    _text(ax.set_title(plain_label(label, limit=70), fontsize=7, pad=2))
    return _png(fig)


def curves_png(curves: Sequence[tuple[str, Sequence[float], Sequence[float]]]) -> bytes:
    """Mean deletion and insertion curves, one line per class.

    Parameters
    ----------
    curves : sequence of (name, deletion, insertion)
        ``deletion[i]`` is the mean label score with the hottest ``i / (n - 1)`` of the
        image hidden; ``insertion[i]`` with only that share shown (Petsiuk, Das and
        Saenko, BMVC 2018). Both lists have the same length ``n``.
    """
    fig, axes = plt.subplots(1, 2, figsize=(7.6, 3.2), sharey=True)
    for k, (name, deletion, insertion) in enumerate(curves):
        style = {"color": LINE_COLOURS[k % len(LINE_COLOURS)],
                 "linestyle": _LINE_STYLES[(k // len(LINE_COLOURS) + k) % len(_LINE_STYLES)],
                 "linewidth": 1.6}
        for ax, ys in ((axes[0], deletion), (axes[1], insertion)):
            ys = np.asarray(ys, dtype=np.float64)
            if ys.size < 2:
                continue
            xs = np.linspace(0, 100, ys.size)
            ax.plot(xs, ys, label=plain_label(name, limit=24) if ax is axes[0] else None, **style)
    titles = ("deletion: hottest pixels hidden first", "insertion: hottest pixels shown first")
    xlabels = ("share of the image hidden (%)", "share of the image shown (%)")
    for ax, title, xlabel in zip(axes, titles, xlabels):
        _text(ax.set_title(title, fontsize=9))
        ax.set_xlabel(xlabel, fontsize=8)
        ax.set_xlim(0, 100)
        ax.set_ylim(-0.02, 1.02)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#dddddd", linewidth=0.6)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    axes[0].set_ylabel("score of the label class", fontsize=8)
    fig.tight_layout(rect=(0, 0.1 if curves else 0, 1, 1))
    if curves:
        handles, labels = axes[0].get_legend_handles_labels()
        leg = fig.legend(handles, labels, fontsize=7.5, frameon=False, loc="lower center",
                         ncol=min(len(labels), 6))
        for t in leg.get_texts():
            _text(t)
    return _png(fig)


def _fit_box(ax, crop: np.ndarray) -> None:
    ax.imshow(_rgb(crop), interpolation="nearest")
    _bare(ax)
    for spine in ax.spines.values():
        spine.set_visible(True)
        spine.set_color("#888888")


def crops_strip_png(medoid: np.ndarray, members: Sequence[np.ndarray]) -> bytes:
    """A motif: its medoid crop large, then a strip of member crops (at most 10).

    Crops are at model resolution and are drawn with nearest-neighbour enlargement,
    so what is shown is what the model saw.
    """
    members = [m for m in members if np.size(m)][:10]
    n = len(members)
    fig = plt.figure(figsize=(1.6 + 0.95 * max(n, 1) + 0.2, 1.6))
    ax = fig.add_axes((0.01, 0.02, 1.5 / (1.6 + 0.95 * max(n, 1) + 0.2), 0.84))
    _fit_box(ax, medoid)
    _text(ax.set_title("medoid", fontsize=8))
    width = 1.6 + 0.95 * max(n, 1) + 0.2
    for k, crop in enumerate(members):
        x = (1.7 + 0.95 * k) / width
        a = fig.add_axes((x, 0.22, 0.85 / width, 0.56))
        _fit_box(a, crop)
    if n:
        fig.text((1.7) / width, 0.84, "members", fontsize=8)
    return _png(fig)


def contact_sheet_png(tiles: Sequence[tuple[np.ndarray, Sequence[float] | None, str]], *,
                      title: str = "", note: str = "", columns: int = 6, side: int = 150) -> bytes:
    """A grid of thumbnails with the decisive region outlined and a caption under each.

    Parameters
    ----------
    tiles : sequence of (image, box, caption)
        ``image`` (H, W, C) 0..255; ``box`` fractions or None; ``caption`` is drawn
        through :func:`plain_label` with mathtext off.
    title : str
    note : str
        A line under the title (what the outline means).
    columns : int
    side : int
        Thumbnails are enlarged by a whole factor to about this many pixels.
    """
    n = max(1, len(tiles))
    cols = max(1, min(columns, n))
    rows = (n + cols - 1) // cols
    cell, gap, band = side, 10, 22
    head = (30 if title else 6) + (18 if note else 0)
    width, height = cols * (cell + gap) + gap, head + rows * (cell + band + gap)
    canvas = np.full((height, width, 3), 255, dtype=np.uint8)
    places = []
    for k, (image, box, caption) in enumerate(tiles):
        img = _rgb(image)
        s = max(1, cell // max(img.shape[:2]))
        thumb = _upscale(img, s)
        _draw_box(thumb, box, img.shape[:2], s)
        th, tw = thumb.shape[:2]
        th, tw = min(th, cell), min(tw, cell)
        r, c = divmod(k, cols)
        y = head + r * (cell + band + gap) + (cell - th) // 2
        x = gap + c * (cell + gap) + (cell - tw) // 2
        canvas[y:y + th, x:x + tw] = thumb[:th, :tw]
        places.append((gap + c * (cell + gap) + cell / 2, head + r * (cell + band + gap) + cell + 4, caption))
    fig = plt.figure(figsize=(width / _DPI, height / _DPI))
    ax = fig.add_axes((0, 0, 1, 1))
    ax.imshow(canvas, interpolation="nearest")
    ax.set_xlim(-0.5, width - 0.5)
    ax.set_ylim(height - 0.5, -0.5)
    ax.axis("off")
    for x, y, caption in places:
        _text(ax.text(x, y, plain_label(caption, limit=24), ha="center", va="top", fontsize=7.5))
    if title:
        _text(ax.text(width / 2, 8, plain_label(title, limit=90), ha="center", va="top", fontsize=10))
    if note:
        _text(ax.text(width / 2, head - 22, plain_label(note, limit=120), ha="center", va="top",
                      fontsize=7.5, color="#444444"))
    return _png(fig)
