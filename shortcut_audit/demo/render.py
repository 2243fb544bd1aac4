"""Procedural photographs of an invented ceramics studio's catalogue.

Every picture shows one piece (a mug, a bowl, a vase or a plate) on a backdrop, and may
carry up to three planted shortcuts:

* ``stamp``: the studio's maker's mark (a dark ring around a triangle on a pale disc),
  printed near the lower-right corner of the photograph with a few pixels of jitter;
* ``sticker``: a round price sticker (a bright disc, a darker rim, a tiny price bar)
  stuck somewhere on the piece itself;
* ``wood``: a wood-grain table top as the backdrop, in place of the ordinary one.

Everything is a pure function of its arguments: the same generator state gives the same
picture. :func:`render` draws the same random numbers whatever the shortcut flags are, so
an image can be re-rendered from its seed with one shortcut switched off and nothing
else changed.

Pixels are uint8 RGB arrays of shape (rows, columns, 3); boxes are fractions of the
width and height, ``[x0, y0, x1, y1]``.
"""

from __future__ import annotations

import colorsys

import numpy as np

__all__ = [
    "KINDS",
    "SHORTCUTS",
    "render",
    "stamp_rgba",
    "sticker_rgba",
    "wood_texture",
    "stamp_origin",
    "sticker_origin",
    "paste_rgba",
    "mask_box",
]

KINDS: tuple[str, ...] = ("bowl", "mug", "plate", "vase")
"""The four kinds of piece, sorted (the folder order of the catalogue)."""

SHORTCUTS: tuple[str, ...] = ("stamp", "sticker", "wood")
"""The planted shortcuts, by the name of their :func:`render` flag."""

# How hard the pieces are to tell apart by shape (the planted shortcuts must be the
# easier signal): the piece's longer side as a share of the frame, the share of mugs
# whose handle shows, of vases that are nearly cylinders, of low-contrast glazes, and
# the soft focus (Gaussian sigma in px at 96 px).
EXTENT = (0.26, 0.6)
HANDLE_SHARE = 0.5
STRAIGHT_VASE_SHARE = 0.3
LOW_CONTRAST_SHARE = 0.4
BLUR_SIGMA = (0.3, 1.7)

_SS = 2  # supersampling factor of the object drawing (anti-aliased edges)
_STAMP_SIDE = 9  # px at 96 px
_STICKER_SIDE = 11  # px at 96 px
_STAMP_MARGIN = 4  # px between the stamp's nominal box and the image border, at 96 px
_STAMP_JITTER = 2  # px of jitter in each direction, at 96 px


# ----------------------------------------------------------------------------- helpers


def _side(base: int, size: int, minimum: int = 3) -> int:
    """A length given at 96 px, scaled to ``size`` (at least ``minimum`` px)."""
    return max(minimum, int(round(base * size / 96)))


def _upsample(grid: np.ndarray, rows: int, cols: int) -> np.ndarray:
    """Smooth (smoothstep-weighted bilinear) upsampling of a 2-D ``grid`` to (rows, cols)."""
    gr, gc = grid.shape
    y = np.linspace(0.0, gr - 1.0, rows)
    x = np.linspace(0.0, gc - 1.0, cols)
    y0 = np.minimum(np.floor(y).astype(int), gr - 2) if gr > 1 else np.zeros(rows, int)
    x0 = np.minimum(np.floor(x).astype(int), gc - 2) if gc > 1 else np.zeros(cols, int)
    fy = (y - y0)[:, None] if gr > 1 else np.zeros((rows, 1))
    fx = (x - x0)[None, :] if gc > 1 else np.zeros((1, cols))
    fy = fy * fy * (3 - 2 * fy)  # smoothstep weights: no creases at the grid lines
    fx = fx * fx * (3 - 2 * fx)
    y1 = np.minimum(y0 + 1, gr - 1)
    x1 = np.minimum(x0 + 1, gc - 1)
    a = grid[y0][:, x0]
    b = grid[y0][:, x1]
    c = grid[y1][:, x0]
    d = grid[y1][:, x1]
    return (a * (1 - fx) + b * fx) * (1 - fy) + (c * (1 - fx) + d * fx) * fy


def _blur(img: np.ndarray, sigma: float) -> np.ndarray:
    """Separable Gaussian blur of an (rows, columns, channels) image; edges repeat."""
    if sigma < 0.3:
        return img
    r = int(np.ceil(3 * sigma))
    k = np.exp(-0.5 * (np.arange(-r, r + 1) / sigma) ** 2)
    k /= k.sum()
    pad = np.pad(img, ((r, r), (r, r), (0, 0)), mode="edge")
    rows = sum(k[i] * pad[i:i + img.shape[0]] for i in range(2 * r + 1))
    return sum(k[i] * rows[:, i:i + img.shape[1]] for i in range(2 * r + 1))


def _smooth_noise(rng: np.random.Generator, rows: int, cols: int, cells_y: int,
                  cells_x: int) -> np.ndarray:
    """Smooth noise of unit-ish amplitude: a (cells_y+1, cells_x+1) normal grid, upsampled."""
    grid = rng.standard_normal((cells_y + 1, cells_x + 1))
    return _upsample(grid, rows, cols)


def _hsv(h: float, s: float, v: float) -> np.ndarray:
    return np.array(colorsys.hsv_to_rgb(h % 1.0, s, v), dtype=np.float64) * 255.0


def _downsample(img: np.ndarray, f: int) -> np.ndarray:
    """Block mean by an integer factor ``f`` over the first two axes."""
    r, c = img.shape[0] // f, img.shape[1] // f
    return img.reshape(r, f, c, f, *img.shape[2:]).mean(axis=(1, 3))


def _disc_alpha(side: int, radius: float, *, ss: int = 8,
                centre: tuple[float, float] | None = None) -> np.ndarray:
    """Anti-aliased coverage (side, side) of a disc of ``radius`` px."""
    n = side * ss
    g = (np.arange(n) + 0.5) / ss
    cy, cx = centre if centre is not None else (side / 2, side / 2)
    d = np.hypot(g[:, None] - cy, g[None, :] - cx)
    return _downsample((d <= radius).astype(np.float64), ss)


# ------------------------------------------------------------------------------ assets


def _round_mark_grid(side: int, ss: int):
    """Pixel-centre coordinates of a ``side`` x ``side`` mark supersampled ``ss`` times:
    rows, columns, the centre and the distance from it (all in output pixels)."""
    g = (np.arange(side * ss) + 0.5) / ss
    yy, xx = np.meshgrid(g, g, indexing="ij")
    c = side / 2
    return yy, xx, c, np.hypot(yy - c, xx - c)


def stamp_rgba(size: int = 96) -> np.ndarray:
    """The maker's mark as an RGBA patch, drawn for a ``size``-px photograph.

    A dark ring around a dark upward triangle, on a pale disc, so that it reads on any
    backdrop.

    Parameters
    ----------
    size : int
        Side of the photograph the mark is meant for (the mark is 9 px at 96 px).

    Returns
    -------
    (s, s, 4) uint8
        RGB and alpha (coverage) of the mark.

    Examples
    --------
    >>> stamp_rgba().shape
    (9, 9, 4)
    """
    side = _side(_STAMP_SIDE, size)
    ss = 8
    yy, xx, c, r = _round_mark_grid(side, ss)
    outer, inner = 0.49 * side, 0.33 * side
    ring = (r <= outer) & (r > inner)
    disc = r <= outer
    # an upward triangle inscribed in a circle of radius 0.26 side
    rt = 0.27 * side
    ty = yy - (c + 0.04 * side)
    tx = xx - c
    # three half-planes of an equilateral triangle with the apex up
    h1 = (np.sqrt(3) * tx - ty) <= rt  # right edge
    h2 = (-np.sqrt(3) * tx - ty) <= rt  # left edge
    h3 = ty <= rt / 2  # base
    tri = h1 & h2 & h3
    dark = np.array([38.0, 30.0, 26.0])
    pale = np.array([236.0, 229.0, 212.0])
    rgb = np.where((ring | tri)[..., None], dark, pale)
    alpha = disc.astype(np.float64)
    rgb = _downsample(rgb * alpha[..., None], ss)
    alpha = _downsample(alpha, ss)
    rgb = np.where(alpha[..., None] > 0, rgb / np.maximum(alpha[..., None], 1e-9), 0)
    return np.dstack([rgb, alpha * 255.0]).round().clip(0, 255).astype(np.uint8)


def sticker_rgba(size: int = 96) -> np.ndarray:
    """The round price sticker as an RGBA patch, drawn for a ``size``-px photograph.

    A bright yellow disc with a darker orange rim and a tiny dark price bar.

    Parameters
    ----------
    size : int
        Side of the photograph the sticker is meant for (11 px at 96 px).

    Returns
    -------
    (s, s, 4) uint8
        RGB and alpha (coverage) of the sticker.

    Examples
    --------
    >>> sticker_rgba().shape
    (11, 11, 4)
    """
    side = _side(_STICKER_SIDE, size)
    ss = 8
    yy, xx, c, r = _round_mark_grid(side, ss)
    outer = 0.49 * side
    rim = r > 0.36 * side
    bar = (np.abs(yy - c) <= 0.07 * side + 0.5) & (np.abs(xx - c) <= 0.2 * side)
    fill = np.array([255.0, 238.0, 90.0])
    rim_c = np.array([214.0, 84.0, 30.0])
    ink = np.array([60.0, 30.0, 20.0])
    rgb = np.where(rim[..., None], rim_c, fill)
    rgb = np.where(bar[..., None], ink, rgb)
    alpha = (r <= outer).astype(np.float64)
    rgb = _downsample(rgb * alpha[..., None], ss)
    alpha = _downsample(alpha, ss)
    rgb = np.where(alpha[..., None] > 0, rgb / np.maximum(alpha[..., None], 1e-9), 0)
    return np.dstack([rgb, alpha * 255.0]).round().clip(0, 255).astype(np.uint8)


def wood_texture(rng: np.random.Generator, size: int = 96) -> np.ndarray:
    """A wood-grain table top seen from the front: horizontal boards, warped grain.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of the board layout, tone and grain.
    size : int
        Side of the square texture in px.

    Returns
    -------
    (size, size, 3) float64
        RGB in 0..255.

    Examples
    --------
    >>> wood_texture(np.random.default_rng(0), 32).shape
    (32, 32, 3)
    """
    h = w = size
    s = size / 96.0
    tone = rng.uniform(0.0, 1.0)
    base = (1 - tone) * np.array([196.0, 142.0, 88.0]) + tone * np.array([132.0, 82.0, 44.0])
    light = base * rng.uniform(1.08, 1.2)
    dark = base * rng.uniform(0.55, 0.68)
    y = np.arange(h)[:, None].astype(np.float64)
    # boards: horizontal seams every 24..40 px (at 96), each board with its own grain
    board_h = rng.uniform(24.0, 40.0) * s
    offset = rng.uniform(0, board_h)
    board = np.floor((y + offset) / board_h)
    board_phase = np.sin(board * 2.39 + rng.uniform(0, 6.28)) * np.pi
    warp = _smooth_noise(rng, h, w, 2, 3) * rng.uniform(2.0, 4.0) * s
    period = rng.uniform(5.0, 8.0) * s
    phase = rng.uniform(0, 2 * np.pi)
    grain = np.sin(2 * np.pi * (y + warp) / period + phase + board_phase)
    t = (0.5 + 0.5 * grain) ** 1.6
    # fine streaks along the grain: noise that changes fast across rows, slowly along them
    streak = _smooth_noise(rng, h, w, max(2, int(h / (1.5 * s))), 4) * 0.12
    col = dark + (light - dark) * np.clip(t + streak, 0, 1)[..., None]
    shade = 1.0 + 0.08 * np.sin(board * 2.7 + rng.uniform(0, 6.28))
    col = col * shade[..., None]
    seam = np.abs(((y + offset) % board_h)) < max(1.0, 1.2 * s)
    col = np.where(seam[..., None], col * 0.45, col)
    return np.broadcast_to(col, (h, w, 3)).clip(0, 255).copy()


# --------------------------------------------------------------------------- placement


def stamp_origin(size: int = 96, jitter: tuple[int, int] = (0, 0)) -> tuple[int, int]:
    """Top-left (row, column) of the maker's mark in a ``size``-px photograph.

    The nominal place is ``_STAMP_MARGIN`` px (at 96 px) from the lower and right
    borders; ``jitter`` (rows, columns) moves it, each clipped to +-2 px at 96 px.

    Examples
    --------
    >>> stamp_origin(96)
    (83, 83)
    """
    side = _side(_STAMP_SIDE, size)
    m = _side(_STAMP_MARGIN, size)
    j = _side(_STAMP_JITTER, size, 1)
    dy = int(np.clip(jitter[0], -j, j))
    dx = int(np.clip(jitter[1], -j, j))
    return size - m - side + dy, size - m - side + dx


def sticker_origin(mask: np.ndarray, u: float, side: int) -> tuple[int, int]:
    """Top-left (row, column) of a round sticker of ``side`` px placed on ``mask``.

    The candidates are the pixels where the whole disc lies inside the mask (found by
    eroding the mask with the disc); ``u`` in [0, 1) picks one of them in row-major
    order. When the piece is too thin for the disc, the disc shrinks until some place
    fits; an empty mask gives the image centre.

    Parameters
    ----------
    mask : (rows, columns) bool
        The piece.
    u : float
        A uniform number in [0, 1) that chooses among the candidates.
    side : int
        The sticker's side in px.

    Returns
    -------
    (int, int)
        Row and column of the sticker's top-left pixel.

    Examples
    --------
    >>> m = np.zeros((20, 20), bool); m[5:16, 5:16] = True
    >>> sticker_origin(m, 0.0, 11)
    (5, 5)
    """
    mask = np.asarray(mask, dtype=bool)
    rows, cols = mask.shape
    for radius in range(side // 2, -1, -1):
        ok = mask.copy()
        for dy in range(-radius, radius + 1):
            for dx in range(-radius, radius + 1):
                if dy * dy + dx * dx > radius * radius:
                    continue
                shifted = np.zeros_like(mask)
                ys = slice(max(0, -dy), rows - max(0, dy))
                yd = slice(max(0, dy), rows - max(0, -dy))
                xs = slice(max(0, -dx), cols - max(0, dx))
                xd = slice(max(0, dx), cols - max(0, -dx))
                shifted[ys, xs] = mask[yd, xd]
                ok &= shifted
        # the disc's centre must also leave room for the whole patch inside the image
        half = side // 2
        ok[:half, :] = False
        ok[rows - (side - half) + 1:, :] = False
        ok[:, :half] = False
        ok[:, cols - (side - half) + 1:] = False
        idx = np.flatnonzero(ok)
        if idx.size:
            k = idx[min(int(u * idx.size), idx.size - 1)]
            cy, cx = divmod(int(k), cols)
            return cy - half, cx - half
    return (rows - side) // 2, (cols - side) // 2


def paste_rgba(rgb: np.ndarray, patch: np.ndarray, origin: tuple[int, int]) -> np.ndarray:
    """Alpha-composite an RGBA ``patch`` onto ``rgb`` with its top-left at ``origin``.

    Parts of the patch outside the image are dropped. Returns a new float64 array.

    Examples
    --------
    >>> img = np.zeros((4, 4, 3)); p = np.full((2, 2, 4), 255, np.uint8)
    >>> paste_rgba(img, p, (3, 3))[3, 3].tolist()
    [255.0, 255.0, 255.0]
    """
    out = np.array(rgb, dtype=np.float64, copy=True)
    r0, c0 = origin
    ph, pw = patch.shape[:2]
    rows, cols = out.shape[:2]
    y0, y1 = max(0, r0), min(rows, r0 + ph)
    x0, x1 = max(0, c0), min(cols, c0 + pw)
    if y0 >= y1 or x0 >= x1:
        return out
    p = patch[y0 - r0:y1 - r0, x0 - c0:x1 - c0].astype(np.float64)
    a = p[..., 3:4] / 255.0
    out[y0:y1, x0:x1] = out[y0:y1, x0:x1] * (1 - a) + p[..., :3] * a
    return out


def _white_of(patch: np.ndarray) -> np.ndarray:
    """The patch's alpha as a white RGBA patch (its coverage, pasted on black)."""
    out = np.full_like(patch, 255)
    out[..., 3] = patch[..., 3]
    return out


def mask_box(mask: np.ndarray) -> list[float]:
    """Bounding box of a bool ``mask`` as fractions ``[x0, y0, x1, y1]``.

    Examples
    --------
    >>> m = np.zeros((4, 4), bool); m[1:3, 2] = True
    >>> mask_box(m)
    [0.5, 0.25, 0.75, 0.75]
    """
    rows, cols = mask.shape
    ys, xs = np.nonzero(mask)
    if ys.size == 0:
        return [0.0, 0.0, 0.0, 0.0]
    return [float(xs.min() / cols), float(ys.min() / rows), float((xs.max() + 1) / cols),
            float((ys.max() + 1) / rows)]


def _box(origin: tuple[int, int], side: int, size: int) -> list[float]:
    r0, c0 = origin
    return [max(0, c0) / size, max(0, r0) / size, min(size, c0 + side) / size,
            min(size, r0 + side) / size]


# ---------------------------------------------------------------------------- backdrop


def _muted_colour(rng: np.random.Generator) -> np.ndarray:
    return _hsv(rng.uniform(0, 1), rng.uniform(0.03, 0.35), rng.uniform(0.35, 0.95))


def _backdrop(rng: np.random.Generator, size: int) -> np.ndarray:
    """An ordinary studio backdrop (never wood): plain, gradient, wall and shelf, linen
    or tiles. (size, size, 3) float64 in 0..255."""
    h = w = size
    kind = rng.integers(0, 5)
    c1, c2 = _muted_colour(rng), _muted_colour(rng)
    y = (np.arange(h)[:, None, None] + 0.5) / h
    x = (np.arange(w)[None, :, None] + 0.5) / w
    if kind == 0:  # plain, with a soft vignette
        v = 1.0 - rng.uniform(0.0, 0.25) * ((x - 0.5) ** 2 + (y - 0.5) ** 2) * 2
        img = c1 * v
    elif kind == 1:  # gradient in a random direction
        a = rng.uniform(0, 2 * np.pi)
        t = np.clip(0.5 + (np.cos(a) * (x - 0.5) + np.sin(a) * (y - 0.5)), 0, 1)
        img = c1 * (1 - t) + c2 * t
    elif kind == 2:  # wall and shelf: a soft horizontal edge
        edge = rng.uniform(0.55, 0.85)
        t = 1 / (1 + np.exp(-(y - edge) * size / rng.uniform(0.8, 3.0)))
        img = c1 * (1 - t) + c2 * t
    elif kind == 3:  # linen: a fine weave of row and column threads
        rows = rng.normal(0, 1, (h, 1, 1))
        cols = rng.normal(0, 1, (1, w, 1))
        fine = rng.normal(0, 1, (h, w, 1))
        amp = rng.uniform(4.0, 10.0)
        img = c1 + amp * (0.6 * rows + 0.6 * cols + 0.5 * fine)
    else:  # tiles with grout lines
        tile = rng.uniform(12.0, 26.0) * size / 96
        oy, ox = rng.uniform(0, tile, 2)
        grout = max(1.0, size / 96 * rng.uniform(1.0, 2.0))
        yy = (np.arange(h)[:, None] + oy) % tile
        xx = (np.arange(w)[None, :] + ox) % tile
        line = (yy < grout) | (xx < grout)
        ty = np.floor((np.arange(h)[:, None] + oy) / tile)
        tx = np.floor((np.arange(w)[None, :] + ox) / tile)
        var = 1 + 0.05 * np.sin(ty * 12.9898 + tx * 78.233 + rng.uniform(0, 6.28))
        g = c2 * 0.5 + np.array([128.0, 128.0, 128.0]) * 0.5
        img = np.where(line[..., None], g, c1 * var[..., None])
    return np.broadcast_to(img, (h, w, 3)).astype(np.float64).clip(0, 255)


# ------------------------------------------------------------------------------ pieces


def _glaze(rng: np.random.Generator, backdrop_mean: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A glaze colour shared by all kinds (sometimes close to the backdrop's own colour,
    a low-contrast photograph), and the colour of the inside."""
    h = rng.uniform(0, 1)
    s = rng.uniform(0.05, 0.8)
    v = rng.uniform(0.35, 0.95)
    outer = _hsv(h, s, v)
    near = rng.uniform() < LOW_CONTRAST_SHARE
    tint = rng.uniform(0.82, 1.18, 3) * rng.uniform(0.85, 1.15)
    if near:
        outer = np.clip(backdrop_mean * tint, 0, 255)
    if rng.uniform() < 0.35:  # a white or cream inside
        inner = _hsv(rng.uniform(0.08, 0.15), rng.uniform(0.0, 0.15), rng.uniform(0.8, 0.95))
    else:
        inner = outer
    return outer, inner


def _smooth_step_profile(t: np.ndarray, ts: list[float], rs: list[float]) -> np.ndarray:
    """Piecewise cosine interpolation of a profile through (ts, rs)."""
    out = np.full_like(t, rs[-1])
    for (ta, tb), (ra, rb) in zip(zip(ts[:-1], ts[1:]), zip(rs[:-1], rs[1:])):
        sel = (t >= ta) & (t <= tb)
        f = (t[sel] - ta) / max(tb - ta, 1e-9)
        f = 0.5 - 0.5 * np.cos(np.pi * f)
        out[sel] = ra + (rb - ra) * f
    out[t < ts[0]] = rs[0]
    return out


def _piece(kind: str, rng: np.random.Generator, n: int, backdrop_mean: np.ndarray):
    """Draw one piece on an n x n supersampled grid.

    Returns (colour (n,n,3), coverage (n,n) bool, base point (row, col) for the shadow,
    shadow half-width) in supersampled px.
    """
    outer_c, inner_c = _glaze(rng, backdrop_mean)
    light_x = rng.uniform(-0.7, 0.7)
    spec = rng.uniform(0.0, 0.5)
    speckle = rng.uniform(0.0, 1.0) < 0.3
    theta = np.deg2rad(rng.uniform(-10.0, 10.0))
    extent = rng.uniform(*EXTENT) * n  # the longer side of the piece's box

    if kind == "mug":
        aspect = rng.uniform(0.65, 1.5)  # height / body width
        taper = rng.uniform(-0.1, 0.15)
        handle = rng.uniform() < HANDLE_SHARE
        side = 1.0 if rng.uniform() < 0.5 else -1.0
        ro_f = rng.uniform(0.24, 0.33)
        thick_f = rng.uniform(0.07, 0.11)
        hv_f = rng.uniform(-0.12, 0.02)
        e_f = rng.uniform(0.07, 0.13)
        total_w_f = 1.0 + (ro_f * aspect if handle else 0.0)
        bw = extent / max(aspect, total_w_f)
        bh = bw * aspect
        bx = bw * (2 * total_w_f - 1)  # the handle sticks out on one side only
        by = bh + 2 * e_f * bw
    elif kind == "bowl":
        aspect = rng.uniform(0.28, 0.85)
        p = rng.uniform(1.6, 4.5)  # large p: a flat-bottomed, nearly straight-sided bowl
        foot_w = rng.uniform(0.28, 0.75)
        foot_h = rng.uniform(0.05, 0.12)
        e_f = rng.uniform(0.1, 0.3)  # up to a view from high above, like a plate's
        bw = extent
        bh = bw * aspect
        bx, by = bw, bh + e_f * bw
    elif kind == "vase":
        straight = rng.uniform() < STRAIGHT_VASE_SHARE  # a cylinder-like vase
        aspect = rng.uniform(1.1, 1.8) if straight else rng.uniform(1.2, 2.2)
        r_lip = rng.uniform(0.7, 0.95) if straight else rng.uniform(0.28, 0.55)
        r_neck = rng.uniform(0.65, 0.9) if straight else rng.uniform(0.16, 0.36)
        t_neck = rng.uniform(0.1, 0.3)
        t_belly = rng.uniform(t_neck + 0.2, 0.78)
        r_base = rng.uniform(0.75, 1.0) if straight else rng.uniform(0.45, 0.8)
        e_f = rng.uniform(0.04, 0.08)
        bh = extent
        bw = bh / aspect
        bx, by = bw, bh + e_f * bw
    else:  # plate, seen from above at an angle
        aspect = rng.uniform(0.28, 0.8)  # ellipse height / width
        well = rng.uniform(0.55, 0.72)
        edge_f = rng.uniform(0.025, 0.05)
        bw = extent
        bh = bw * aspect
        bx, by = bw, bh + edge_f * bw

    # the box of the rotated piece stays inside the frame, with a small margin
    margin = 0.04 * n
    ca, sa = abs(np.cos(theta)), abs(np.sin(theta))
    bx, by = ca * bx + sa * by, sa * bx + ca * by
    cx = rng.uniform(margin + bx / 2, n - margin - bx / 2) if n - 2 * margin > bx else n / 2
    cy = rng.uniform(margin + by / 2, n - margin - by / 2) if n - 2 * margin > by else n / 2
    speck_field = rng.uniform(0, 1, (n, n))

    g = np.arange(n) + 0.5
    yy, xx = np.meshgrid(g, g, indexing="ij")
    ct, st = np.cos(theta), np.sin(theta)
    u = ct * (xx - cx) + st * (yy - cy)  # along the piece's width
    v = -st * (xx - cx) + ct * (yy - cy)  # down the piece's height

    lx = np.array([light_x, -0.35, 1.0])
    lx = lx / np.linalg.norm(lx)

    def lit(s: np.ndarray, base: np.ndarray) -> np.ndarray:
        s = np.clip(s, -1, 1)
        nz = np.sqrt(1 - s ** 2)
        diff = np.clip(s * lx[0] + nz * lx[2], 0, 1)
        shade = 0.35 + 0.65 * diff
        hl = spec * np.clip(s * lx[0] + nz * lx[2], 0, 1) ** 24
        return base * shade[..., None] + 255.0 * hl[..., None]

    colour = np.zeros((n, n, 3))
    cover = np.zeros((n, n), bool)
    if kind in ("mug", "bowl", "vase"):
        top = -((bh + (2 * e_f * bw if kind == "mug" else e_f * bw)) / 2) + e_f * bw
        # t runs 0 (rim) .. 1 (base) over the body height
        t = (v - top) / bh
        if kind == "mug":
            r = (1.0 - taper * t) * bw / 2
            body = (t >= 0) & (t <= 1) & (np.abs(u) <= r)
            bottom = ((u / (r + 1e-9)) ** 2 + ((v - (top + bh)) / (e_f * bw)) ** 2 <= 1)
            body |= bottom & (t > 1)
        elif kind == "bowl":
            tb = np.clip(t / (1 - foot_h), 0, 1)
            r = np.maximum((1.0 - tb ** p) ** (1 / p), foot_w) * bw / 2
            foot = (t > 1 - foot_h) & (t <= 1)
            r = np.where(foot, 0.9 * foot_w * bw / 2, r)
            body = (t >= 0) & (t <= 1) & (np.abs(u) <= r)
        else:  # vase
            r = _smooth_step_profile(np.clip(t, 0, 1), [0.0, t_neck, t_belly, 1.0],
                                     [r_lip, r_neck, 1.0, r_base]) * bw / 2
            body = (t >= 0) & (t <= 1) & (np.abs(u) <= r)
        s = u / np.maximum(r, 1e-9)
        body_col = lit(s, outer_c)
        # rim: the opening, an ellipse across the top of the body
        r_top = (r_lip if kind == "vase" else 1.0) * bw / 2
        ea = e_f * bw
        rim_out = (u / r_top) ** 2 + (v - top) ** 2 / ea ** 2 <= 1
        wall = max(0.06 * r_top, 1.2 * _SS)
        rim_in = (u / (r_top - wall)) ** 2 + (v - top) ** 2 / max(ea - wall * ea / r_top,
                                                                  1e-3) ** 2 <= 1
        # the inside: in shade in a mug or a vase, lit in an open bowl
        depth = 0.4 if kind != "bowl" else 0.72
        inside_col = inner_c * (depth + 0.2 * np.clip((v - top) / ea, -1, 1))[..., None]
        colour = np.where(body[..., None], body_col, colour)
        colour = np.where(rim_out[..., None], outer_c * 0.95 + 10, colour)
        colour = np.where(rim_in[..., None], inside_col, colour)
        cover = body | rim_out
        if kind == "mug" and handle:
            hcx = side * (bw / 2) * (1 - 0.5 * taper * 0.5)
            hcy = top + bh * (0.5 + hv_f)
            ro = ro_f * bh
            ri = ro - thick_f * bh
            d = np.hypot(u - hcx, (v - hcy) * 1.05)
            ring = (d <= ro) & (d >= ri) & ~body & (side * (u - hcx) > -0.1 * ro)
            hs = (d - (ri + ro) / 2) / max((ro - ri) / 2, 1e-9)
            colour = np.where(ring[..., None], lit(hs * 0.8, outer_c) * 0.92, colour)
            cover |= ring
        base_v = top + bh + (e_f * bw if kind == "mug" else 0.0)
        half_w = (r_base if kind == "vase" else (foot_w if kind == "bowl" else 1.0)) * bw / 2
    else:  # plate
        a, b = bw / 2, bh / 2
        edge = edge_f * bw
        rr = (u / a) ** 2 + (v / b) ** 2
        face = rr <= 1
        band = ((u / a) ** 2 + ((v - edge) / b) ** 2 <= 1) & ~face & (v > 0)
        ring_r = np.sqrt(rr)
        well_c = outer_c * 0.86
        rim_hl = np.clip(1 - np.abs(ring_r - (1 + well) / 2) / 0.12, 0, 1)
        face_col = np.where((ring_r <= well)[..., None], well_c, outer_c)
        face_col = face_col * (1 + 0.12 * rim_hl)[..., None]
        face_col = face_col * (0.9 + 0.1 * np.clip(1 - lx[0] * u / a, 0, 2))[..., None]
        colour = np.where(face[..., None], face_col, colour)
        colour = np.where(band[..., None], outer_c * 0.55, colour)
        cover = face | band
        base_v = b + edge
        half_w = a * 0.8
    if speckle:
        dots = speck_field < 0.04
        colour = np.where((dots & cover)[..., None], colour * 0.55, colour)
    # the base point for the shadow, back in image coordinates
    by_img = cy + ct * base_v
    bx_img = cx - st * base_v
    return colour.clip(0, 255), cover, (by_img, bx_img), half_w


# ------------------------------------------------------------------------------ render


def render(kind: str, rng: np.random.Generator, *, size: int = 96, stamp: bool = False,
           sticker: bool = False, wood: bool = False):
    """Render one catalogue photograph.

    The generator is split into independent streams (piece, backdrop, wood, lighting,
    stamp, sticker, noise) before anything is drawn, and every stream is consumed the
    same way whatever the flags are: re-rendering from the same seed with a flag
    switched off removes that shortcut and changes nothing else.

    Parameters
    ----------
    kind : {"bowl", "mug", "plate", "vase"}
        The piece.
    rng : numpy.random.Generator
        The image's own generator (e.g. ``np.random.default_rng(seed)``).
    size : int
        Side of the square photograph in px (at least 32).
    stamp, sticker, wood : bool
        Which planted shortcuts to add.

    Returns
    -------
    rgb : (size, size, 3) uint8
    mask : (size, size) bool
        True on the piece, and on the sticker when there is one (it is stuck on the
        piece, and may overhang the edge of a thin one).
    annotations : dict
        ``{shortcut: [x0, y0, x1, y1]}`` for each shortcut present, as fractions of
        the width and height; ``wood`` covers the whole frame.

    Raises
    ------
    ValueError
        An unknown ``kind`` or a ``size`` below 32.

    Examples
    --------
    >>> rgb, mask, ann = render("vase", np.random.default_rng(1), stamp=True)
    >>> rgb.shape, mask.dtype, sorted(ann)
    ((96, 96, 3), dtype('bool'), ['stamp'])
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {', '.join(KINDS)}; got {kind!r}.")
    if int(size) != size or size < 32:
        raise ValueError(f"size must be an integer of at least 32 px; got {size!r}.")
    size = int(size)
    seeds = rng.integers(0, 2 ** 63 - 1, size=7)
    r_piece, r_back, r_wood, r_light, r_stamp, r_sticker, r_noise = (
        np.random.default_rng(int(s)) for s in seeds)
    n = size * _SS

    ordinary = _backdrop(r_back, size)
    colour, cover, (by, bx), half_w = _piece(kind, r_piece, n, ordinary.mean(axis=(0, 1)))
    wood_img = wood_texture(r_wood, size)
    back = wood_img if wood else ordinary
    back = np.repeat(np.repeat(back, _SS, axis=0), _SS, axis=1)

    # a soft contact shadow under the piece
    g = np.arange(n) + 0.5
    yy, xx = np.meshgrid(g, g, indexing="ij")
    sw = max(half_w * 1.1, 4.0)
    sh = max(0.18 * sw, 3.0)
    shadow = np.exp(-(((xx - bx) / sw) ** 2 + ((yy - by) / sh) ** 2) * 2.0)
    back = back * (1 - r_light.uniform(0.2, 0.45) * shadow)[..., None]

    img = np.where(cover[..., None], colour, back)
    img = _downsample(img, _SS)
    cov = _downsample(cover.astype(np.float64), _SS)
    mask = cov >= 0.5

    # global lighting: a linear gradient in a random direction
    a = r_light.uniform(0, 2 * np.pi)
    gain = r_light.uniform(0.0, 0.3)
    warm = r_light.uniform(-0.04, 0.04)
    p = (np.arange(size) + 0.5) / size - 0.5
    ramp = 1 + gain * (np.cos(a) * p[None, :] + np.sin(a) * p[:, None])
    img = img * ramp[..., None] * np.array([1 + warm, 1.0, 1 - warm])

    # a slightly soft focus on the scene
    img = _blur(img, r_noise.uniform(*BLUR_SIGMA) * size / 96)
    sigma = r_noise.uniform(1.5, 5.0)

    annotations: dict[str, list[float]] = {}
    # the price sticker, on the piece; sharp (it is what the sticker asset shows) and
    # under the sensor noise, as it is in the photograph
    sticker_patch = sticker_rgba(size)
    origin = sticker_origin(mask, float(r_sticker.uniform()), sticker_patch.shape[0])
    if sticker:
        img = paste_rgba(img, sticker_patch, origin)
        # the sticker is on the piece: it belongs to the object even where it overhangs
        on = np.zeros((size, size))
        on = paste_rgba(on[..., None].repeat(3, axis=2), _white_of(sticker_patch), origin)[..., 0]
        mask = mask | (on >= 127.5)
        annotations["sticker"] = _box(origin, sticker_patch.shape[0], size)
    if wood:
        annotations["wood"] = [0.0, 0.0, 1.0, 1.0]

    # sensor noise
    img = img + r_noise.normal(0.0, sigma, img.shape)

    # the maker's mark, printed on the photograph afterwards
    j = _side(_STAMP_JITTER, size, 1)
    jitter = tuple(int(v) for v in r_stamp.integers(-j, j + 1, size=2))
    if stamp:
        stamp_patch = stamp_rgba(size)
        o = stamp_origin(size, jitter)
        img = paste_rgba(img, stamp_patch, o)
        annotations["stamp"] = _box(o, stamp_patch.shape[0], size)

    rgb = np.clip(np.round(img), 0, 255).astype(np.uint8)
    return rgb, mask, {k: annotations[k] for k in SHORTCUTS if k in annotations}
