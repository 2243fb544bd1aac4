"""The outcome of a two-armed counterfactual test: counts, Fisher's exact test, examples.

A counterfactual test (probes.py, imagewide.py) scores a test arm and a control arm of
composites; :func:`tally_arms` turns their scores, trial by trial, into a
:class:`ProbeResult`, whose two arms are compared by a one-sided Fisher's exact test
(:func:`fisher_greater`). Pure: arrays in, a frozen dataclass out.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import hypergeom

from .errors import UsageError
from .findings import Thresholds
from .store import to_jsonable

__all__ = ["PROBE_TESTS", "N_EXAMPLES", "fisher_greater", "ProbeResult", "tally_arms"]

PROBE_TESTS = ("transplant", "background-swap", "removal", "residual-transplant")
#: Trials kept in a result for the report.
N_EXAMPLES = 4


def _count(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise UsageError(f"{name} must be a whole number >= 0; got {value!r}.")
    return int(value)


def fisher_greater(a: int, b: int, c: int, d: int) -> float:
    """One-sided Fisher's exact test that row one's success rate exceeds row two's.

    For the 2 x 2 table ``[[a, b], [c, d]]`` (successes and failures of the test arm,
    then of the control arm), the margins fixed, the top-left count follows the
    hypergeometric law: ``a + c`` successes among ``a + b + c + d`` trials, ``a + b`` of
    them drawn into row one. The p-value is ``P(X >= a)``, computed as
    ``scipy.stats.hypergeom.sf(a - 1, a + b + c + d, a + c, a + b)``.

    Parameters
    ----------
    a, b, c, d : int
        Counts, each >= 0.

    Returns
    -------
    float
        In [0, 1]; 1.0 for an empty table.

    >>> round(fisher_greater(4, 0, 0, 4), 6)   # Fisher's tea tasting: 1/70
    0.014286
    """
    a, b, c, d = (_count(v, n) for v, n in zip((a, b, c, d), "abcd"))
    total = a + b + c + d
    if total == 0:
        return 1.0
    p = float(hypergeom.sf(a - 1, total, a + c, a + b))
    return min(1.0, max(0.0, p))


def _json(value):
    """JSON-ready, exactly: the project's converter with every float digit kept."""
    return to_jsonable(value, digits=17)


@dataclass(frozen=True, kw_only=True)
class ProbeResult:
    """The outcome of one counterfactual test.

    Attributes
    ----------
    test : {"transplant", "background-swap", "removal", "residual-transplant"}
    suspect : int
        The class index under test.
    trials, hits, rate : int, int, float
        The test arm: usable trials (targets not already predicted as ``suspect``),
        those whose prediction moved to ``suspect``, and their share.
    control_trials, control_hits, control_rate : int, int, float
        The same for the control arm.
    mean_gain, control_mean_gain : float
        Mean change of the suspect class's probability, perturbed minus unperturbed, over
        each arm's usable trials (0.0 when there are none).
    p_value : float or None
        One-sided Fisher's exact test of the two arms; None when an arm is empty.
    effect : float
        ``rate - control_rate``.
    removal : dict or None
        ``{"images", "accuracy_before", "accuracy_after", "drop", ...}`` from
        :func:`removal_job`, merged with ``dataclasses.replace(result, removal=...)``.
    examples : tuple of dict
        A few trials for the report: ``{"source", "target", "box", "before", "after",
        "control", "hit"}``, indices into the job's ``sources``/``targets`` (or
        ``own``/``others``), ``before``/``after``/``control`` as ``{"pred", "p"}``.
    extra : dict
        Test-specific numbers (the background swap's "away" arm, the placement, ...).

    >>> r = ProbeResult(test="transplant", suspect=0, trials=10, hits=9, rate=0.9,
    ...                 control_trials=10, control_hits=0, control_rate=0.0, mean_gain=0.8,
    ...                 control_mean_gain=0.0, p_value=fisher_greater(9, 1, 0, 10), effect=0.9)
    >>> r.status()
    'confirmed'
    """

    test: str
    suspect: int
    trials: int
    hits: int
    rate: float
    control_trials: int
    control_hits: int
    control_rate: float
    mean_gain: float
    control_mean_gain: float
    p_value: float | None
    effect: float
    removal: dict | None = None
    examples: tuple[dict, ...] = ()
    extra: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.test not in PROBE_TESTS:
            raise UsageError(f"test must be one of {', '.join(PROBE_TESTS)}; got {self.test!r}.")
        for name in ("suspect", "trials", "hits", "control_trials", "control_hits"):
            _count(getattr(self, name), name)
        if self.hits > self.trials or self.control_hits > self.control_trials:
            raise UsageError(
                f"hits cannot exceed trials; got {self.hits}/{self.trials} and "
                f"{self.control_hits}/{self.control_trials}.")

    def status(self, *, alpha: float | None = None, min_effect: float | None = None) -> str:
        """``"confirmed"`` when ``p_value < alpha`` and ``effect >= min_effect``, else
        ``"not-confirmed"``; by default the thresholds ``confirm_alpha`` and
        ``confirm_effect`` of :data:`~shortcut_audit.findings.THRESHOLD_TABLE`."""
        defaults = Thresholds()
        alpha = defaults.confirm_alpha if alpha is None else alpha
        min_effect = defaults.confirm_effect if min_effect is None else min_effect
        if self.p_value is not None and self.p_value < alpha and self.effect >= min_effect:
            return "confirmed"
        return "not-confirmed"

    def to_dict(self) -> dict:
        """A JSON-able copy (non-finite numbers become None)."""
        return _json({
            "test": self.test, "suspect": self.suspect,
            "trials": self.trials, "hits": self.hits, "rate": self.rate,
            "control_trials": self.control_trials, "control_hits": self.control_hits,
            "control_rate": self.control_rate, "mean_gain": self.mean_gain,
            "control_mean_gain": self.control_mean_gain, "p_value": self.p_value,
            "effect": self.effect, "removal": self.removal,
            "examples": list(self.examples), "extra": self.extra,
        })


def _arms(test: str, suspect: int, hits: np.ndarray, gains: np.ndarray, c_hits: np.ndarray,
          c_gains: np.ndarray, *, examples: tuple[dict, ...], extra: dict) -> ProbeResult:
    """A ProbeResult from per-trial hit flags and gains of the two arms (usable trials only)."""
    n, nc = len(hits), len(c_hits)
    h, hc = int(np.sum(hits)), int(np.sum(c_hits))
    rate = h / n if n else 0.0
    c_rate = hc / nc if nc else 0.0
    p = fisher_greater(h, n - h, hc, nc - hc) if n and nc else None
    return ProbeResult(
        test=test, suspect=suspect, trials=n, hits=h, rate=float(rate),
        control_trials=nc, control_hits=hc, control_rate=float(c_rate),
        mean_gain=float(np.mean(gains)) if n else 0.0,
        control_mean_gain=float(np.mean(c_gains)) if nc else 0.0,
        p_value=p, effect=float(rate - c_rate), examples=examples, extra=extra,
    )


def _pick_examples(rows: list[dict]) -> tuple[dict, ...]:
    """Hits first, then the others, each in trial order; at most N_EXAMPLES."""
    ordered = [r for r in rows if r["hit"]] + [r for r in rows if not r["hit"]]
    return tuple(ordered[:N_EXAMPLES])


def _pred(row: np.ndarray, suspect: int) -> dict:
    return {"pred": int(np.argmax(row)), "p": float(row[suspect])}


def tally_arms(test: str, suspect: int, trials: Sequence[tuple[np.ndarray, dict]], after: np.ndarray,
               ctrl: np.ndarray, *, extra: dict) -> ProbeResult:
    """The :class:`ProbeResult` of a two-armed test, trial by trial.

    ``trials`` holds per trial the recipient's unperturbed scores and what an example row
    says of it (source, target, box); ``after`` and ``ctrl`` are the scores of the test
    and control composites in the same order. A trial with a non-finite score is
    ``invalid``, one whose recipient is already the suspect class ``ineligible``; both
    are counted in ``extra`` and left out of the rates.
    """
    hits, gains, c_hits, c_gains, rows = [], [], [], [], []
    ineligible = invalid = 0
    for i, (b, meta) in enumerate(trials):
        if not (np.all(np.isfinite(b)) and np.all(np.isfinite(after[i])) and np.all(np.isfinite(ctrl[i]))):
            invalid += 1
            continue
        if int(np.argmax(b)) == suspect:
            ineligible += 1
            continue
        hit = int(np.argmax(after[i])) == suspect
        hits.append(hit)
        gains.append(after[i, suspect] - b[suspect])
        c_hits.append(int(np.argmax(ctrl[i])) == suspect)
        c_gains.append(ctrl[i, suspect] - b[suspect])
        rows.append(dict(meta, before=_pred(b, suspect), after=_pred(after[i], suspect),
                         control=_pred(ctrl[i], suspect), hit=hit))
    return _arms(test, suspect, np.array(hits, bool), np.array(gains), np.array(c_hits, bool),
                 np.array(c_gains), examples=_pick_examples(rows),
                 extra=dict(extra, ineligible=ineligible, invalid=invalid))
