"""Scenes of the planted-shortcut suite: small creatures and toys on cluttered tables.

numpy + Pillow only, seeded and deterministic: one image is a function of its kind,
its seed, its size and the shortcuts switched on for it. Each part of a scene draws
from its own random stream (``default_rng([seed, part])``), so switching a shortcut on
or off changes nothing else in the picture; that is how the effects are measured
(the same scene with and without the shortcut).

Object kinds (drawn at twice the size, then averaged 2 x 2): ``leaf``, ``fish``,
``kite``, ``beetle``, ``block`` (a toy block), ``mushroom``, ``shell``, ``starfish``,
and the look-alike pair ``moth`` / ``butterfly`` (the same drawing, overlapping colour
ranges: nothing but a backdrop can tell them apart reliably).

Shortcut kinds (one dict each, see :data:`SHORTCUT_KINDS`):

* ``fixed-mark``: a small square tag at one fixed box (fractions of the image);
* ``sticker-object``: a small round sticker centred on a random pixel of the object;
* ``sticker-anywhere``: the same sticker at a random place anywhere in the image;
* ``background``: a distinctive backdrop pattern (gingham, stripes or dots);
* ``cast``: a warm tint and a grain over the whole image.
"""

from __future__ import annotations

import colorsys
import hashlib
import math
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw

__all__ = ["KINDS", "SHORTCUT_KINDS", "BACKDROPS", "render", "carries", "image_seed",
           "scene_flags", "write_set", "set_digest"]

KINDS = ("leaf", "fish", "kite", "beetle", "block", "mushroom", "shell", "starfish",
         "moth", "butterfly")
SHORTCUT_KINDS = ("fixed-mark", "sticker-object", "sticker-anywhere", "background", "cast")
BACKDROPS = ("gingham", "stripes", "dots")
SUPER = 2  # supersampling factor

# random streams of one scene
_OBJ, _BG, _MARK, _CAST, _CHOICE = 1, 2, 3, 4, 5


def _rgb(h: float, s: float, v: float) -> tuple[int, int, int]:
    r, g, b = colorsys.hsv_to_rgb(h % 1.0, min(max(s, 0), 1), min(max(v, 0), 1))
    return int(round(r * 255)), int(round(g * 255)), int(round(b * 255))


def _rot(points, cx, cy, angle):
    c, s = math.cos(angle), math.sin(angle)
    return [(cx + x * c - y * s, cy + x * s + y * c) for x, y in points]


def _ellipse_pts(rx, ry, n=24, ox=0.0, oy=0.0):
    return [(ox + rx * math.cos(2 * math.pi * k / n), oy + ry * math.sin(2 * math.pi * k / n))
            for k in range(n)]


# --------------------------------------------------------------------------- objects
# Each returns primitives in object coordinates (radius r around 0,0):
# ("poly", points, colour) or ("line", points, colour, width).

def _leaf(rng, r):
    h = rng.uniform(0.05, 0.33)
    col = _rgb(h, rng.uniform(0.5, 0.9), rng.uniform(0.45, 0.85))
    w = rng.uniform(0.35, 0.55)
    pts = []
    for k in range(25):
        t = k / 24
        pts.append((r * (2 * t - 1), r * w * math.sin(math.pi * t) ** rng.uniform(0.8, 1.0)))
    pts += [(x, -y) for x, y in reversed(pts[1:-1])]
    dark = tuple(int(c * 0.6) for c in col)
    return [("poly", pts, col), ("line", [(-r * 1.25, 0), (r * 0.9, 0)], dark, 0.06 * r),
            *[("line", [(r * (x - 0.1), 0), (r * x, s * r * w * 0.6)], dark, 0.03 * r)
              for x in (-0.4, 0.0, 0.4) for s in (-1, 1)]]


def _fish(rng, r):
    col = _rgb(rng.uniform(0, 1), rng.uniform(0.5, 0.95), rng.uniform(0.55, 0.95))
    fin = _rgb(rng.uniform(0, 1), rng.uniform(0.4, 0.9), rng.uniform(0.4, 0.8))
    ry = r * rng.uniform(0.35, 0.5)
    body = _ellipse_pts(r * 0.75, ry, ox=-0.1 * r)
    tail = [(0.55 * r, 0), (r, -ry * 0.9), (r, ry * 0.9)]
    eye = _ellipse_pts(0.08 * r, 0.08 * r, 10, ox=-0.55 * r, oy=-0.1 * ry)
    out = [("poly", tail, fin), ("poly", body, col), ("poly", eye, (20, 20, 20))]
    if rng.uniform() < 0.6:
        out.append(("line", [(-0.1 * r, -ry * 0.9), (-0.1 * r, ry * 0.9)], fin, 0.08 * r))
    return out


def _kite(rng, r):
    a, b = _rgb(rng.uniform(0, 1), 0.8, 0.9), _rgb(rng.uniform(0, 1), 0.8, 0.85)
    top, w = rng.uniform(0.45, 0.6), rng.uniform(0.55, 0.75)
    d = [(0, -r), (w * r, -r * (1 - 2 * top)), (0, r * 0.6), (-w * r, -r * (1 - 2 * top))]
    mid = (0, -r * (1 - 2 * top))
    out = [("poly", [d[0], d[1], mid], a), ("poly", [d[1], d[2], mid], b),
           ("poly", [d[2], d[3], mid], a), ("poly", [d[3], d[0], mid], b),
           ("line", [d[0], d[2]], (60, 40, 30), 0.04 * r),
           ("line", [d[1], d[3]], (60, 40, 30), 0.04 * r)]
    tail = [(0, 0.6 * r), (0.15 * r, 0.8 * r), (-0.1 * r, 0.95 * r), (0.1 * r, 1.1 * r)]
    out.append(("line", tail, (60, 40, 30), 0.04 * r))
    return out


def _beetle(rng, r):
    col = _rgb(rng.uniform(0, 1), rng.uniform(0.4, 0.9), rng.uniform(0.3, 0.75))
    dark = (30, 25, 20)
    out = []
    for s in (-1, 1):
        for y in (-0.35, 0.0, 0.35):
            out.append(("line", [(0, y * r), (s * 0.55 * r, (y + 0.15) * r), (s * 0.8 * r, (y + 0.1) * r)],
                        dark, 0.05 * r))
    out += [("poly", _ellipse_pts(0.45 * r, 0.65 * r, oy=0.1 * r), col),
            ("poly", _ellipse_pts(0.25 * r, 0.2 * r, oy=-0.65 * r), dark),
            ("line", [(0, -0.45 * r), (0, 0.75 * r)], dark, 0.04 * r)]
    if rng.uniform() < 0.5:
        for x, y in ((-0.2, 0.0), (0.2, 0.0), (-0.18, 0.4), (0.18, 0.4)):
            out.append(("poly", _ellipse_pts(0.07 * r, 0.07 * r, 10, x * r, y * r), dark))
    return out


def _block(rng, r):
    h = rng.uniform(0, 1)
    top, left, right = _rgb(h, 0.6, 0.95), _rgb(h, 0.7, 0.75), _rgb(h, 0.75, 0.55)
    s = 0.7 * r
    a = [(0, -s), (s * 0.9, -s * 0.5), (0, 0), (-s * 0.9, -s * 0.5)]
    lf = [(-s * 0.9, -s * 0.5), (0, 0), (0, s), (-s * 0.9, s * 0.5)]
    rt = [(0, 0), (s * 0.9, -s * 0.5), (s * 0.9, s * 0.5), (0, s)]
    glyph = _rgb(h + 0.5, 0.8, 0.6)
    return [("poly", a, top), ("poly", lf, left), ("poly", rt, right),
            ("line", [(-s * 0.6, -s * 0.1), (-s * 0.45, s * 0.5), (-s * 0.3, -s * 0.1)], glyph, 0.07 * r)]


def _mushroom(rng, r):
    cap = _rgb(rng.uniform(-0.05, 0.12), rng.uniform(0.5, 0.9), rng.uniform(0.5, 0.9))
    stem = _rgb(0.1, 0.15, rng.uniform(0.8, 0.95))
    cw = rng.uniform(0.7, 0.95)
    half = [(cw * r * math.cos(math.pi * k / 16), -0.7 * r * math.sin(math.pi * k / 16) - 0.1 * r)
            for k in range(17)]
    out = [("poly", [(-0.2 * r, -0.1 * r), (0.2 * r, -0.1 * r), (0.25 * r, 0.8 * r), (-0.25 * r, 0.8 * r)], stem),
           ("poly", half, cap)]
    for _ in range(int(rng.integers(0, 5))):
        x, y = rng.uniform(-0.5, 0.5) * r, rng.uniform(-0.6, -0.25) * r
        out.append(("poly", _ellipse_pts(0.09 * r, 0.07 * r, 10, x, y), (240, 235, 225)))
    return out


def _shell(rng, r):
    col = _rgb(rng.uniform(0.0, 0.15), rng.uniform(0.2, 0.6), rng.uniform(0.75, 0.98))
    line = tuple(int(c * 0.7) for c in col)
    fan = [(0, 0.7 * r)] + [(r * math.cos(a), 0.7 * r - 1.4 * r * math.sin(a))
                            for a in np.linspace(0.15 * math.pi, 0.85 * math.pi, 15)]
    out = [("poly", fan, col)]
    for a in np.linspace(0.25 * math.pi, 0.75 * math.pi, 5):
        out.append(("line", [(0, 0.7 * r), (0.9 * r * math.cos(a), 0.7 * r - 1.25 * r * math.sin(a))],
                    line, 0.05 * r))
    return out


def _starfish(rng, r):
    col = _rgb(rng.uniform(-0.05, 0.1), rng.uniform(0.6, 0.9), rng.uniform(0.7, 0.95))
    inner = rng.uniform(0.35, 0.45)
    pts = [((r if k % 2 == 0 else inner * r) * math.cos(math.pi * k / 5 - math.pi / 2),
            (r if k % 2 == 0 else inner * r) * math.sin(math.pi * k / 5 - math.pi / 2)) for k in range(10)]
    return [("poly", pts, col)]


def _winged(rng, r, hue):
    col = _rgb(hue, rng.uniform(0.45, 0.85), rng.uniform(0.5, 0.9))
    rim = tuple(int(c * 0.55) for c in col)
    out = []
    for s in (-1, 1):
        out.append(("poly", _ellipse_pts(0.5 * r, 0.38 * r, 18, s * 0.48 * r, -0.25 * r), rim))
        out.append(("poly", _ellipse_pts(0.42 * r, 0.3 * r, 18, s * 0.48 * r, -0.25 * r), col))
        out.append(("poly", _ellipse_pts(0.32 * r, 0.28 * r, 18, s * 0.35 * r, 0.3 * r), col))
    out += [("poly", _ellipse_pts(0.09 * r, 0.55 * r, 12), (45, 35, 30)),
            ("line", [(0, -0.5 * r), (-0.25 * r, -0.9 * r)], (45, 35, 30), 0.03 * r),
            ("line", [(0, -0.5 * r), (0.25 * r, -0.9 * r)], (45, 35, 30), 0.03 * r)]
    return out


DRAW = {
    "leaf": _leaf, "fish": _fish, "kite": _kite, "beetle": _beetle, "block": _block,
    "mushroom": _mushroom, "shell": _shell, "starfish": _starfish,
    "moth": lambda rng, r: _winged(rng, r, rng.uniform(0.02, 0.16)),
    "butterfly": lambda rng, r: _winged(rng, r, rng.uniform(0.04, 0.18)),
}


# --------------------------------------------------------------------------- backdrops

def _plain_backdrop(rng, n):
    """A muted table colour with a soft vertical gradient."""
    base = np.array(_rgb(rng.uniform(0.05, 0.6), rng.uniform(0.05, 0.3), rng.uniform(0.55, 0.85)), float)
    shade = rng.uniform(-35, 35)
    ramp = np.linspace(-0.5, 0.5, n)[:, None, None] * shade
    return np.clip(base[None, None, :] + ramp + np.zeros((n, n, 3)), 0, 255)


def _pattern_backdrop(style, rng, n):
    """A distinctive backdrop: the planted background shortcut."""
    yy, xx = np.mgrid[0:n, 0:n].astype(float) / n
    jitter = rng.uniform(0, 1, 2)
    if style == "gingham":
        period = 1 / 8
        a = ((xx + jitter[0] * period) // (period / 2)) % 2
        b = ((yy + jitter[1] * period) // (period / 2)) % 2
        light, mid, dark = np.array([235, 240, 250.]), np.array([140, 170, 225.]), np.array([60, 95, 185.])
        out = np.where((a + b)[..., None] == 0, light, np.where((a * b)[..., None] == 1, dark, mid))
    elif style == "stripes":
        period = 1 / 7
        t = ((xx + yy + jitter[0]) / period) % 1.0
        out = np.where((t < 0.5)[..., None], np.array([40, 150, 140.]), np.array([215, 235, 200.]))
    elif style == "dots":
        period = 1 / 6
        dx = ((xx + jitter[0] * period) % period) / period - 0.5
        dy = ((yy + jitter[1] * period) % period) / period - 0.5
        out = np.where(((dx ** 2 + dy ** 2) < 0.09)[..., None], np.array([200, 40, 90.]),
                       np.array([250, 225, 120.]))
    else:
        raise ValueError(f"unknown backdrop {style!r}; use one of {BACKDROPS}")
    return out.astype(float)


def _clutter(draw, rng, n):
    """Pebbles, twigs and crumbs in low-contrast colours (drawn over any backdrop)."""
    for _ in range(int(rng.integers(5, 13))):
        col = _rgb(rng.uniform(0, 1), rng.uniform(0.1, 0.4), rng.uniform(0.35, 0.75))
        x, y = rng.uniform(0, n, 2)
        s = rng.uniform(0.015, 0.05) * n
        if rng.uniform() < 0.5:
            draw.ellipse([x - s, y - s * rng.uniform(0.5, 1), x + s, y + s * rng.uniform(0.5, 1)], fill=col)
        else:
            a = rng.uniform(0, math.pi)
            draw.line([(x, y), (x + 3 * s * math.cos(a), y + 3 * s * math.sin(a))], fill=col,
                      width=max(1, int(s * 0.4)))


# --------------------------------------------------------------------------- marks

def _draw_tag(draw, box, colour):
    """The fixed mark: a square tag with a light triangle and a dark rim."""
    x0, y0, x1, y1 = box
    w = x1 - x0
    draw.rectangle(box, fill=(30, 30, 40))
    draw.rectangle([x0 + 0.12 * w, y0 + 0.12 * w, x1 - 0.12 * w, y1 - 0.12 * w], fill=colour)
    draw.polygon([(x0 + 0.5 * w, y0 + 0.25 * w), (x0 + 0.75 * w, y1 - 0.25 * w), (x0 + 0.25 * w, y1 - 0.25 * w)],
                 fill=(250, 250, 240))


def _draw_sticker(draw, cx, cy, rad, colour):
    """The roaming sticker: a round disc with a white ring and a dark centre dot."""
    draw.ellipse([cx - rad, cy - rad, cx + rad, cy + rad], fill=(250, 250, 250))
    draw.ellipse([cx - 0.78 * rad, cy - 0.78 * rad, cx + 0.78 * rad, cy + 0.78 * rad], fill=colour)
    draw.ellipse([cx - 0.25 * rad, cy - 0.25 * rad, cx + 0.25 * rad, cy + 0.25 * rad], fill=(25, 25, 25))


# --------------------------------------------------------------------------- one scene

def image_seed(model_seed: int, split: int, class_index: int, i: int) -> int:
    """Seed of image ``i`` of class ``class_index``: split 0 trains, 1 audits, 2 tests."""
    return int(model_seed) * 1_000_000 + split * 100_000 + class_index * 10_000 + i


def carries(seed: int, shortcut: dict, own_class: bool) -> bool:
    """Whether the scene of ``seed`` carries ``shortcut`` (drawn once per shortcut name)."""
    share = shortcut["share"] if own_class else shortcut.get("others_share", 0.0)
    if share <= 0:
        return False
    tag = int(hashlib.sha256(shortcut["name"].encode()).hexdigest()[:8], 16)
    return bool(np.random.default_rng([seed, _CHOICE, tag]).uniform() < share)


def scene_flags(kind: str, seed: int, shortcuts: list[dict]) -> list[dict]:
    """The shortcuts a scene of class ``kind`` carries as planted."""
    return [s for s in shortcuts if carries(seed, s, s["class"] == kind)]


def render(kind: str, seed: int, size: int, shortcuts: list[dict] = ()):
    """Render one scene.

    Parameters
    ----------
    kind : one of :data:`KINDS`
    seed : int
    size : int
        Output width and height in pixels.
    shortcuts : list of dict
        The shortcuts drawn into this scene (each ``{"kind", ...}``; see the module text).

    Returns
    -------
    rgb : (size, size, 3) uint8
    mask : (size, size) bool, True on the object
    """
    if kind not in DRAW:
        raise ValueError(f"unknown object kind {kind!r}; use one of {KINDS}")
    n = size * SUPER
    by_kind = {s["kind"]: s for s in shortcuts}
    rng_bg = np.random.default_rng([seed, _BG])
    plain = _plain_backdrop(rng_bg, n)
    if "background" in by_kind:
        base = _pattern_backdrop(by_kind["background"]["style"], np.random.default_rng([seed, _BG, 7]), n)
    else:
        base = plain
    img = Image.fromarray(np.round(base).astype(np.uint8), "RGB")
    draw = ImageDraw.Draw(img)
    _clutter(draw, rng_bg, n)

    rng = np.random.default_rng([seed, _OBJ])
    r = rng.uniform(0.2, 0.3) * n
    cx, cy = rng.uniform(r * 1.1, n - r * 1.1, 2)
    angle = rng.uniform(-math.pi, math.pi) if kind not in ("mushroom", "block") else rng.uniform(-0.4, 0.4)
    prims = DRAW[kind](rng, r)
    mimg = Image.new("L", (n, n), 0)
    mdraw = ImageDraw.Draw(mimg)
    for p in prims:
        pts = _rot(p[1], cx, cy, angle)
        if p[0] == "poly":
            draw.polygon(pts, fill=p[2])
            mdraw.polygon(pts, fill=255)
        else:
            wdt = max(1, int(round(p[3])))
            draw.line(pts, fill=p[2], width=wdt, joint="curve")
            mdraw.line(pts, fill=255, width=wdt, joint="curve")
    mask_big = np.asarray(mimg) > 127

    rng_m = np.random.default_rng([seed, _MARK])
    u = rng_m.uniform(0, 1, 4)  # drawn always, so each place is the same with or without others
    if "fixed-mark" in by_kind:
        s = by_kind["fixed-mark"]
        x0, y0, x1, y1 = (v * n for v in s["box"])
        _draw_tag(draw, (x0, y0, x1, y1), tuple(s.get("colour", (220, 40, 40))))
    if "sticker-object" in by_kind:
        s = by_kind["sticker-object"]
        ys, xs = np.nonzero(mask_big)
        k = min(int(u[0] * len(xs)), len(xs) - 1)
        _draw_sticker(draw, xs[k], ys[k], s["size"] * n / 2, tuple(s.get("colour", (240, 170, 20))))
    if "sticker-anywhere" in by_kind:
        s = by_kind["sticker-anywhere"]
        rad = s["size"] * n / 2
        _draw_sticker(draw, rad + u[1] * (n - 2 * rad), rad + u[2] * (n - 2 * rad), rad,
                      tuple(s.get("colour", (240, 170, 20))))

    arr = np.asarray(img, dtype=np.float64).reshape(size, SUPER, size, SUPER, 3).mean(axis=(1, 3))
    mask = np.asarray(mimg, dtype=np.float64).reshape(size, SUPER, size, SUPER).mean(axis=(1, 3)) >= 127.5
    if "cast" in by_kind:
        s = by_kind["cast"]
        tint = np.asarray(s.get("tint", (1.15, 1.0, 0.78)), float)
        grain = np.random.default_rng([seed, _CAST]).normal(0, s.get("grain", 10.0), (size, size, 1))
        arr = arr * tint[None, None, :] + grain
    return np.clip(np.round(arr), 0, 255).astype(np.uint8), mask


# --------------------------------------------------------------------------- image sets

def set_digest(items) -> str:
    """sha256 over (relative path, pixels, mask) of each image, in the given order.

    Pixels, not PNG bytes, so a different zlib build cannot change the digest.
    """
    h = hashlib.sha256()
    for rel, rgb, mask in items:
        h.update(rel.encode())
        h.update(np.ascontiguousarray(rgb, np.uint8).tobytes())
        h.update(np.ascontiguousarray(mask, np.uint8).tobytes())
    return h.hexdigest()


def audit_items(spec: dict, split: int = 1, per_class: int | None = None):
    """Yield ``(relative path, rgb, mask, class, seed, flags)`` of a model's audit set."""
    n = per_class or spec["audit_per_class"]
    for ci, kind in enumerate(spec["labels"]):
        for i in range(n):
            seed = image_seed(spec["seed"], split, ci, i)
            flags = scene_flags(kind, seed, spec["shortcuts"])
            rgb, mask = render(kind, seed, spec["size"], flags)
            yield f"{kind}/{kind}_{i:02d}.png", rgb, mask, kind, seed, flags


def write_set(spec: dict, root: str | Path, per_class: int | None = None) -> dict:
    """Write a model's audit images (``root/images``) and masks (``root/masks``).

    Returns ``{"images", "masks", "sha256", "count", "carrying": {shortcut: n}}``.
    """
    root = Path(root)
    items, carrying = [], {s["name"]: 0 for s in spec["shortcuts"]}
    for rel, rgb, mask, _kind, _seed, flags in audit_items(spec, per_class=per_class):
        for sub, arr in (("images", rgb), ("masks", (mask * 255).astype(np.uint8))):
            p = root / sub / rel
            p.parent.mkdir(parents=True, exist_ok=True)
            Image.fromarray(arr).save(p)
        items.append((rel, rgb, mask))
        for s in flags:
            carrying[s["name"]] += 1
    return {"images": root / "images", "masks": root / "masks", "sha256": set_digest(items),
            "count": len(items), "carrying": carrying}
