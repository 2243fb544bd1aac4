"""What an audit will cost, stated before it is spent.

An audit's cost is its forward passes: the engine runs near the model's own rate, so
the time is the number of passes over that rate. :func:`image_passes` counts one
image's passes from the plan and the decisive-area ladder and curves of
:func:`~shortcut_audit.sensitivity.image_job`; :func:`estimate_cost` multiplies by the
images and divides by a measured rate (the classifier measures its session's rate at
each candidate batch size when it picks one: that measurement is reused, so the
estimate costs no extra passes).

Pure: numbers in, a frozen dataclass out.

>>> from shortcut_audit.occlusion import GridPlan
>>> image_passes(GridPlan(patch=0.125, stride=0.0625), 64, 64, masks=False)
269
>>> e = estimate_cost({"a": 100, "b": 50}, GridPlan(patch=0.125, stride=0.0625), 64, 64,
...                   rate=1000.0, masks=False, per_class=(10,), curve_images=None)
>>> e.images, round(e.seconds, 1), e.per_class[10]["images"]
(150, 46.8, 20)
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

from .occlusion import AdaptivePlan, Plan, pass_count
from .sensitivity import CURVE_IMAGES, DECISIVE_BISECT, ladder_keys

__all__ = ["CostEstimate", "image_passes", "estimate_cost", "ENGINE_SHARE", "FIXED_SECONDS"]

#: Share of the session's own rate the engine reaches during a scan (bench/RESULTS.md:
#: 0.87 to 0.96 with one or two threads on a 224 x 224 CNN, 0.76 to 0.93 on a 64 x 64
#: one); the estimate divides by the measured rate times this.
ENGINE_SHARE = 0.9
#: Seconds a scan spends beyond its per-image passes whatever its size (listing, the
#: aggregation, the report's figures): a rough constant, measured in bench/agreement.py.
FIXED_SECONDS = 2.0


def _ladder_passes(height: int, width: int, *, curves: bool = True) -> int:
    """The distinct images of the ladder and the curves (as image_job scores them; without
    curves the ladder stops at the first step that moves the decision: at most all)."""
    return len({k for k in ladder_keys(height * width, curves=curves) if k != ("hide", 0)})


def image_passes(plan: Plan, height: int, width: int, *, masks: bool = True,
                 bisect: float = DECISIVE_BISECT, curves: bool = True) -> int:
    """Forward passes of one image's analysis, at most.

    The heatmap (the plan's passes and the unperturbed image; an adaptive plan's budget),
    the ladder and the curves, ``bisect`` bisection passes (at most ``DECISIVE_BISECT``,
    only when the decision moves) and two erasures with a mask.
    """
    heat = plan.max_passes(height, width) if isinstance(plan, AdaptivePlan) else pass_count(plan, height, width) + 1
    return int(heat + _ladder_passes(height, width, curves=curves) + bisect + (2 if masks else 0))


@dataclass(frozen=True, kw_only=True)
class CostEstimate:
    """The expected cost of an audit's per-image phase.

    Attributes
    ----------
    images : int
        Images to analyse (already stored ones left out).
    passes_per_image : int
        At most, from :func:`image_passes`, averaged over the images with and without
        curves.
    passes : int
    rate : float
        The session's measured passes per second.
    seconds : float
        Expected wall time: ``passes / (rate * ENGINE_SHARE) + FIXED_SECONDS`` (the
        counterfactual tests and the sufficiency scan come on top, a few hundred passes
        per finding and per class).
    per_class : dict
        ``{N: {"images": ..., "seconds": ...}}``: the same with at most N images a class.
    """

    images: int
    passes_per_image: int
    passes: int
    rate: float
    seconds: float
    per_class: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"images": self.images, "passes_per_image": self.passes_per_image, "passes": self.passes,
                "rate": self.rate, "seconds": self.seconds,
                "per_class": {str(k): v for k, v in self.per_class.items()}}

    def describe(self) -> str:
        """One line for people, e.g. for a command line before the scan starts."""
        if not self.rate > 0:
            return f"{self.images} images x {self.passes_per_image} passes (the rate could not be measured)"
        text = (f"{self.images} images x {self.passes_per_image} passes at {self.rate:,.0f} passes/s "
                f"(measured): about {_duration(self.seconds)}")
        if self.per_class:
            text += "; " + ", ".join(f"--per-class {n}: {v['images']} images, {_duration(v['seconds'])}"
                                     for n, v in sorted(self.per_class.items()))
        return text


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _seconds(passes: int, rate: float) -> float:
    return passes / (rate * ENGINE_SHARE) + FIXED_SECONDS if rate > 0 else float("inf")


def estimate_cost(class_counts: Mapping[str, int], plan: Plan, height: int, width: int, *, rate: float,
                  masks: bool = True, per_class: Sequence[int] = (),
                  curve_images: int | None = CURVE_IMAGES) -> CostEstimate:
    """The expected passes and time of auditing images with ``class_counts`` images a class.

    Parameters
    ----------
    class_counts : mapping
        Images to analyse, by class.
    plan : Plan
    height, width : int
        The model's input size.
    rate : float
        The session's passes per second at the batch size the scan uses
        (:attr:`shortcut_audit.model.OnnxClassifier.measured_rate`).
    masks : bool
        Whether images have (given or estimated) object masks: two passes more each.
    per_class : sequence of int
        Caps to state the cost of as well (``--per-class N``).
    curve_images : int or None
        Images a class whose curves are measured (None: every image), as
        :attr:`ScanSettings.curve_images <shortcut_audit.scan.ScanSettings.curve_images>`.
    """
    plain = image_passes(plan, height, width, masks=masks, curves=False)
    with_curves = image_passes(plan, height, width, masks=masks, curves=True)

    def passes(counts) -> int:
        curved = sum(counts) if curve_images is None else sum(min(c, curve_images) for c in counts)
        return int(sum(counts) * plain + curved * (with_curves - plain))

    counts = [int(c) for c in class_counts.values()]
    n = int(sum(counts))
    total = passes(counts)
    caps = {}
    for cap in per_class:
        capped = [min(c, cap) for c in counts]
        if sum(capped) < n:
            caps[int(cap)] = {"images": int(sum(capped)), "seconds": _seconds(passes(capped), rate)}
    return CostEstimate(images=n, passes_per_image=int(round(total / n)) if n else plain, passes=total,
                        rate=float(rate), seconds=_seconds(total, rate), per_class=caps)
