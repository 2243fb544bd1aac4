"""Which catalogue photographs carry which shortcut, and how they reach the model.

Two ways of planting the shortcuts:

* ``"biased"`` (the studio's real catalogue, used for training *and* for the audit
  set): the maker's mark on 90% of the vases and nothing else, the price sticker on 85%
  of the mugs and nothing else, the wood table under 85% of the bowls and 5% of every
  other kind; plates are clean.
* ``"rebalanced"``: the mark, the sticker and the wood table each on 40% of every kind,
  independently, so that none of them tells the kind apart.

Counts are exact (``round(rate * n)`` images of each kind, chosen by a seeded
permutation), not coin flips, so that a set of 36 images has the advertised rates.
Every image has its own integer seed; :func:`..render.render` with that seed and the
image's flags gives the photograph back.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from shortcut_audit.demo.render import KINDS, SHORTCUTS, render

__all__ = [
    "SCHEMES",
    "RATES",
    "MODEL_SIZE",
    "ImageSpec",
    "plan",
    "image_seed",
    "to_model_input",
    "render_spec",
]

MODEL_SIZE: tuple[int, int] = (64, 64)
"""Input (height, width) of the demo models; photographs are 96 x 96."""

RATES: dict[str, dict[str, dict[str, float]]] = {
    "biased": {
        "bowl": {"stamp": 0.0, "sticker": 0.0, "wood": 0.85},
        "mug": {"stamp": 0.0, "sticker": 0.85, "wood": 0.05},
        "plate": {"stamp": 0.0, "sticker": 0.0, "wood": 0.05},
        "vase": {"stamp": 0.9, "sticker": 0.0, "wood": 0.05},
    },
    "rebalanced": {k: {"stamp": 0.4, "sticker": 0.4, "wood": 0.4} for k in KINDS},
}
"""Share of each kind's photographs that carry each shortcut, per scheme."""

SCHEMES: tuple[str, ...] = tuple(RATES)


@dataclass(frozen=True, kw_only=True)
class ImageSpec:
    """One photograph to render: its kind, seed and planted shortcuts."""

    kind: str
    index: int
    seed: int
    stamp: bool = False
    sticker: bool = False
    wood: bool = False

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {', '.join(KINDS)}; got {self.kind!r}.")

    @property
    def flags(self) -> dict[str, bool]:
        return {s: getattr(self, s) for s in SHORTCUTS}


def image_seed(base: int, kind: str, index: int) -> int:
    """The seed of image ``index`` of ``kind`` in the set whose seeds start at ``base``.

    Examples
    --------
    >>> image_seed(1_000_000, "mug", 3)
    1010003
    """
    return int(base) + 10_000 * KINDS.index(kind) + int(index)


def plan(kind: str, n: int, *, scheme: str, base_seed: int,
         clean: bool = False) -> list[ImageSpec]:
    """The ``n`` photographs of ``kind`` in a set, with their seeds and shortcuts.

    Parameters
    ----------
    kind : {"bowl", "mug", "plate", "vase"}
    n : int
        Images of this kind.
    scheme : {"biased", "rebalanced"}
        How shortcuts are planted (see the module docstring).
    base_seed : int
        First seed of the set; the flags are drawn from it too.
    clean : bool
        No shortcut at all (an unbiased test set); the seeds stay the same.

    Examples
    --------
    >>> specs = plan("vase", 10, scheme="biased", base_seed=0)
    >>> sum(s.stamp for s in specs), sum(s.sticker for s in specs)
    (9, 0)
    """
    if scheme not in RATES:
        raise ValueError(f"scheme must be one of {', '.join(SCHEMES)}; got {scheme!r}.")
    rng = np.random.default_rng([int(base_seed), KINDS.index(kind)])
    flags = {}
    for s in SHORTCUTS:
        count = 0 if clean else int(round(RATES[scheme][kind][s] * n))
        chosen = np.zeros(n, bool)
        chosen[rng.permutation(n)[:count]] = True
        flags[s] = chosen
    return [ImageSpec(kind=kind, index=i, seed=image_seed(base_seed, kind, i),
                      **{s: bool(flags[s][i]) for s in SHORTCUTS}) for i in range(n)]


def render_spec(spec: ImageSpec, *, size: int = 96, **override: bool):
    """Render ``spec`` (optionally with some flags overridden, e.g. ``stamp=False``).

    Returns what :func:`render` returns.
    """
    flags = {**spec.flags, **override}
    return render(spec.kind, np.random.default_rng(spec.seed), size=size, **flags)


def to_model_input(rgb: np.ndarray, size: tuple[int, int] = MODEL_SIZE) -> np.ndarray:
    """A uint8 photograph at the model's input size, exactly as the tool reads it.

    The same resize as :func:`shortcut_audit.dataset.load_image` on the saved PNG
    (``dataset.fit``, bilinear, "stretch").

    Parameters
    ----------
    rgb : (rows, columns, 3) uint8
    size : (int, int)
        Model input (height, width).

    Returns
    -------
    (height, width, 3) float32 in 0..255
    """
    from PIL import Image

    from shortcut_audit.dataset import fit

    im = Image.fromarray(np.ascontiguousarray(rgb, dtype=np.uint8))
    return np.asarray(fit(im, size, "stretch"), dtype=np.float32)
