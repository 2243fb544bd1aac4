"""The counterfactual test that tells an image-wide cast from a backdrop.

A grain, a noise or a processing look laid over a whole class's photos puts the
class's evidence everywhere: the background swap of probes.py confirms it (the
backdrops carry the cast), but it confirms a patterned cloth behind the objects just
as well. What tells them apart is the object: under a cast the object's own pixels
carry it too; in front of a backdrop they do not. The object is too small to carry
the class on its own (a model that pools over the image reads a cast by its area), so
the test spreads what the object carries *besides its own structure* over other
images:

- **residual transplant** (:func:`residual_transplant_job`): the noise residual of the
  suspect class's images (the image less a denoised copy of it, here a 3 x 3 median:
  the signal that camera identification reads a sensor's fingerprint from, Lukáš,
  Fridrich and Goljan, "Digital camera identification from sensor pattern noise",
  IEEE TIFS 2006) is cut into small square tiles *on the object* (each tile wholly
  inside the mask), at the object's flattest places (where a blurred copy varies
  least, so the residual holds the grain and not the object's own lines). Those tiles, laid in a
  shuffled grid, are added over the whole of another class's image. A hit is a
  prediction that moves *to* the suspect class. The control adds tiles cut the same
  way from the objects of a third class (neither the suspect nor the recipient's; the
  recipient's own class when there are only two), to the same recipient.

Pixel tiles, which also carry colour, were tried first and fail: a mosaic of object
colours is a patchwork no training image looked like, and the planted suite's models
sent it to whatever class they fall back on, in the test and the control alike. The
residual carries texture without the objects' colours; a pure colour cast (a tint
with no grain) is therefore *not* seen by this test, and stays a ``background``
finding.

The job validates its arguments when called, draws every random choice from ``seed``
up front and yields all its images in one request, like the tests of probes.py.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy import ndimage

from .engine import Job
from .errors import UsageError
from .outcomes import tally_arms

__all__ = ["FLAT_SIGMA", "MIN_TILES", "SOURCES_PER_TRIAL", "tile_side", "noise_residual",
           "flat_residual_tiles", "mosaic", "residual_transplant_job"]

#: Gaussian blur (pixels) under which a place's variance says how flat it is: the
#: grain averages out, an edge or a line of the object does not.
FLAT_SIGMA = 1.5
#: An image gives tiles only when at least this many whole tiles fit on its object.
MIN_TILES = 2
#: Each composite's mosaic mixes the tiles of this many source images (fewer if fewer).
SOURCES_PER_TRIAL = 4


def tile_side(side: int) -> int:
    """Side of a tile in pixels: an eighth of the image side, at least 4.

    Small enough that many whole tiles fit on an object covering a tenth of the image,
    large enough to hold a grain or a weave.

    >>> tile_side(64), tile_side(96), tile_side(20)
    (8, 12, 4)
    """
    return max(4, int(side) // 8)


def noise_residual(image: np.ndarray) -> np.ndarray:
    """The image less its 3 x 3 median (per channel), as float32.

    A median keeps edges, so what it removes is the grain, not the object's outline
    (a one-pixel line is removed too, which is why tiles come from flat places).

    >>> flat = np.full((5, 5, 3), 100.0)
    >>> float(np.abs(noise_residual(flat)).max())
    0.0
    """
    img = np.asarray(image, dtype=np.float32)
    return img - ndimage.median_filter(img, size=(3, 3, 1), mode="nearest")


def flat_residual_tiles(image: np.ndarray, mask: np.ndarray, side: int, *,
                        share: float) -> np.ndarray:
    """The noise residual's tiles at the flattest ``share`` of the places on the object.

    Places are ``side`` x ``side`` tiles wholly inside ``mask``, at a stride of half a
    tile; the flattest are those where the blurred image varies least (summed over
    channels). At least :data:`MIN_TILES` are kept when that many places exist.

    Parameters
    ----------
    image : (H, W, C) array
    mask : (H, W) bool, True on the object
    side : int
    share : float in (0, 1]

    Returns
    -------
    (k, side, side, C) float32
        ``k`` is 0 when fewer than :data:`MIN_TILES` tiles fit on the object.

    >>> img = np.zeros((8, 8, 1), np.float32); img[1, 1] = 9.0
    >>> m = np.zeros((8, 8), bool); m[:4, :4] = True
    >>> flat_residual_tiles(img, m, 2, share=0.5).shape
    (4, 2, 2, 1)
    """
    img = np.asarray(image, dtype=np.float32)
    m = np.asarray(mask, dtype=bool)
    h, w = m.shape
    if not (1 <= side <= min(h, w)):
        raise UsageError(f"tile side must be between 1 and the image side ({min(h, w)}); got {side}.")
    if not (0.0 < share <= 1.0):
        raise UsageError(f"share of flat tiles must be in (0, 1]; got {share}.")
    residual = noise_residual(img)
    low = ndimage.gaussian_filter(img, sigma=(FLAT_SIGMA, FLAT_SIGMA, 0), mode="nearest")
    step = max(1, side // 2)
    sat = np.pad(m.astype(np.int64).cumsum(0).cumsum(1), ((1, 0), (1, 0)))
    places = [(r, c) for r in range(0, h - side + 1, step) for c in range(0, w - side + 1, step)
              if sat[r + side, c + side] - sat[r, c + side] - sat[r + side, c] + sat[r, c] == side * side]
    if len(places) < MIN_TILES:
        return np.zeros((0, side, side, img.shape[2]), np.float32)
    spread = np.array([low[r:r + side, c:c + side].reshape(-1, img.shape[2]).var(axis=0).sum()
                       for r, c in places])
    keep = max(MIN_TILES, int(round(share * len(places))))
    order = np.argsort(spread, kind="stable")[:keep]
    return np.stack([residual[places[i][0]:places[i][0] + side, places[i][1]:places[i][1] + side]
                     for i in sorted(order)])


def mosaic(tiles: np.ndarray, shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """A frame of ``shape`` covered by a grid of tiles drawn at random from ``tiles``.

    Parameters
    ----------
    tiles : (k, s, s, C) array, k >= 1
    shape : (H, W)
    rng : numpy Generator

    Returns
    -------
    (H, W, C) float32
        Cells on the right and bottom edges take the top-left part of their tile.

    >>> t = np.stack([np.full((2, 2, 1), 1.0), np.full((2, 2, 1), 1.0)])
    >>> mosaic(t, (3, 5), np.random.default_rng(0)).shape
    (3, 5, 1)
    """
    tiles = np.asarray(tiles, dtype=np.float32)
    if tiles.ndim != 4 or len(tiles) == 0:
        raise UsageError(f"mosaic needs at least one (s, s, C) tile; got an array of shape {tiles.shape}.")
    h, w = shape
    s = tiles.shape[1]
    rows, cols = -(-h // s), -(-w // s)
    grid = tiles[rng.integers(len(tiles), size=rows * cols)].reshape(rows, cols, s, s, tiles.shape[3])
    frame = grid.transpose(0, 2, 1, 3, 4).reshape(rows * s, cols * s, tiles.shape[3])
    return np.ascontiguousarray(frame[:h, :w])


def _checked(items, what: str) -> list[tuple[np.ndarray, np.ndarray, int]]:
    out = []
    for i, item in enumerate(items):
        try:
            px, m, label = item
        except (TypeError, ValueError):
            raise UsageError(f"{what} {i} must be (pixels, mask, label); got {type(item).__name__}.") from None
        px = np.asarray(px, dtype=np.float32)
        if px.ndim != 3 or px.shape[2] not in (1, 3):
            raise UsageError(f"{what} {i} must be an (H, W, C) array with C = 1 or 3; got shape {px.shape}.")
        if m is None or np.asarray(m).shape != px.shape[:2]:
            got = None if m is None else np.asarray(m).shape
            raise UsageError(f"{what} {i} needs an (H, W) object mask of shape {px.shape[:2]}; got {got}. "
                             f"Pass object masks.")
        if isinstance(label, bool) or not isinstance(label, (int, np.integer)) or label < 0:
            raise UsageError(f"{what} {i}'s label must be a class index >= 0; got {label!r}.")
        out.append((px, np.asarray(m, dtype=bool), int(label)))
    return out


def _whole(value, name: str, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise UsageError(f"{name} must be a whole number of at least {low}; got {value!r}.")
    return int(value)


def residual_transplant_job(*, own: Sequence[tuple[np.ndarray, np.ndarray, int]],
                            others: Sequence[tuple[np.ndarray, np.ndarray, int]],
                            suspect: int, flat_share: float, trials: int = 40, seed: int = 0,
                            tile: int | None = None,
                            others_scores: Sequence[np.ndarray] | None = None) -> Job:
    """A job that adds the suspect objects' noise residual over other classes' images.

    Parameters
    ----------
    own : sequence of (pixels (H, W, C), mask (H, W) bool, label)
        The suspect class's images with their object masks: the test's tiles.
    others : sequence of (pixels, mask, label)
        Other classes' images with their masks: the recipients, and the control's tiles.
    suspect : int
    flat_share : float in (0, 1]
        Share of each object's places whose residual is used, the flattest
        (threshold ``flat_tile_share``).
    trials : int
        Composites in each arm.
    seed : int
    tile : int, optional
        Tile side in pixels; :func:`tile_side` of the image's shorter side by default.
    others_scores : sequence of (K,) arrays, optional
        Unperturbed scores of ``others`` when already known; they are not scored again.

    Returns
    -------
    Job
        Its result is a :class:`~shortcut_audit.outcomes.ProbeResult` with
        ``test="residual-transplant"``. A trial whose recipient is already predicted
        as ``suspect`` does not count. Examples name the recipient (``target``, an
        index into ``others``); ``extra`` holds ``tile``, ``flat_share``,
        ``requested``, ``ineligible``, ``tile_sources`` (own images that gave tiles)
        and ``control_sources``.

    Raises
    ------
    UsageError
        Images of different shapes, or fewer than two images of the suspect class (or
        of the other classes) on whose object :data:`MIN_TILES` whole tiles fit.

    Notes
    -----
    One request of ``2 * trials`` composites, plus the recipients used, unperturbed,
    unless ``others_scores`` gives their scores. Composites are clipped to 0..255.
    """
    suspect = _whole(suspect, "suspect", 0)
    trials = _whole(trials, "trials", 1)
    own_i, oth_i = _checked(own, "own image"), _checked(others, "other image")
    shapes = {px.shape for px, _m, _l in own_i + oth_i}
    if len(shapes) > 1:
        raise UsageError(f"images must all have the model's input shape; got shapes {sorted(shapes)}. "
                         f"Resize them to the model's size first.")
    if not shapes:
        raise UsageError("residual transplant needs images of the suspect class and of other classes.")
    h, w, _c = next(iter(shapes))
    side = tile_side(min(h, w)) if tile is None else _whole(tile, "tile", 1)
    own_t = [flat_residual_tiles(px, m, side, share=flat_share) for px, m, _l in own_i]
    oth_t = [flat_residual_tiles(px, m, side, share=flat_share) for px, m, _l in oth_i]
    own_ok = [j for j, t in enumerate(own_t) if len(t)]
    oth_ok = [j for j, t in enumerate(oth_t) if len(t)]
    if len(own_ok) < 2 or len(oth_ok) < 2:
        raise UsageError(f"residual transplant needs at least two images of the suspect class and two "
                         f"of other classes on whose object {MIN_TILES} whole {side}x{side} tiles fit; "
                         f"got {len(own_ok)} and {len(oth_ok)}. Pass object masks.")
    known = None
    if others_scores is not None:
        known = [np.asarray(s, dtype=np.float64) for s in others_scores]
        if len(known) != len(oth_i):
            raise UsageError(f"others_scores must give one score vector per other image "
                             f"({len(oth_i)}); got {len(known)}.")
    rng = np.random.default_rng(seed)
    order = np.concatenate([rng.permutation(len(oth_i)) for _ in range(-(-trials // len(oth_i)))])
    rec = [int(j) for j in order[:trials]]
    test_px, ctrl_px = [], []
    for r in rec:
        lab = oth_i[r][2]
        pool = [j for j in oth_ok if oth_i[j][2] != lab] or [j for j in oth_ok if j != r] or oth_ok
        mine = rng.choice(own_ok, size=min(SOURCES_PER_TRIAL, len(own_ok)), replace=False)
        theirs = rng.choice(pool, size=min(SOURCES_PER_TRIAL, len(pool)), replace=False)
        add = mosaic(np.concatenate([own_t[j] for j in mine]), (h, w), rng)
        add_c = mosaic(np.concatenate([oth_t[j] for j in theirs]), (h, w), rng)
        test_px.append(np.clip(oth_i[r][0] + add, 0, 255))
        ctrl_px.append(np.clip(oth_i[r][0] + add_c, 0, 255))
    extra = {"tile": side, "flat_share": float(flat_share), "requested": trials,
             "tile_sources": len(own_ok), "control_sources": len(oth_ok)}
    return _transplant(oth_i, rec, test_px, ctrl_px, known, suspect, extra)


def _transplant(oth_i, rec, test_px, ctrl_px, known, suspect, extra) -> Job:
    used = sorted(set(rec))
    base_rows = [] if known is not None else [oth_i[j][0] for j in used]
    scores = np.asarray((yield np.stack(base_rows + test_px + ctrl_px).astype(np.float32)),
                        dtype=np.float64)
    if not (0 <= suspect < scores.shape[1]):
        raise UsageError(f"suspect class {suspect} is out of range for a model with "
                         f"{scores.shape[1]} classes.")
    k0 = 0 if known is not None else len(used)
    base = {j: (known[j] if known is not None else scores[i]) for i, j in enumerate(used)}
    n = len(rec)
    trials = [(base[r], {"source": None, "target": r, "box": None}) for r in rec]
    return tally_arms("residual-transplant", suspect, trials, scores[k0:k0 + n], scores[k0 + n:], extra=extra)
