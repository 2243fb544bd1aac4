"""Two models, or two audits, of the same images side by side: ``compare``.

``compare`` either scans the same images with two models (into ``out/before`` and
``out/after``, with one plan, fill and seed, so that the only difference is the model)
or loads two saved audits (``audit.json`` and ``results/``) of the same images. It then
lines up, class by class, every statistic the findings read, image by image, and
estimates each difference (after minus before) with a paired bootstrap over images:
the same resampled images go through both models' numbers, so what the two audits
share (which images are easy, which are odd) cancels out of the interval.

Statistics, per class, from each image's numbers in audit.json (none is a new
measurement; the *before* values equal the audit's class metrics):

- ``accuracy``: share of the class's images predicted as the class;
- ``mean_confidence``: mean probability of the predicted class;
- ``small_area_rate`` (decisive-area rate): among correctly predicted images, the share
  whose decision moves with at most :data:`~shortcut_audit.classes.SMALL_AREA` of the
  image hidden;
- ``box_agreement``: among correctly predicted images, the share whose small decisive
  box covers the class's *place*, the pixel of the before model's place box that the
  most before-model boxes cover (so the before value is the audit's box agreement,
  and the after value says how many after-model decisions still sit there);
- ``median_background_share`` and ``object_erased_survival``, where masks exist;
- ``motif_coverage`` and the counterfactual tests' rates, from the findings' evidence.

A difference whose 95% interval excludes zero is a ``change``; otherwise ``no clear
change``. Findings of either audit are matched by class and kind and get a verdict:
``resolved``, ``weakened``, ``persists``, ``new``, ``unclear`` or ``cleared`` (see
:data:`VERDICTS`).

The bootstrap is the percentile bootstrap (Efron and Tibshirani, "An Introduction to
the Bootstrap", 1993, ch. 13), written here with numpy, resampling images with
replacement.
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path
from typing import Callable

from .comparison import SCHEMA, CompareResult, _check_bootstrap, compare_audits
from .errors import UsageError
from .store import read_audit, write_json

__all__ = ["compare"]


def _load_audit(folder: str | os.PathLike, option: str) -> tuple[Path, dict]:
    return Path(folder), read_audit(folder, option=option, schema=SCHEMA)


def _config(value, option: str):
    from .options import ModelConfig, read_model_config

    if value is None or isinstance(value, ModelConfig):
        return value
    if isinstance(value, (str, os.PathLike)):
        return read_model_config(value)
    raise UsageError(f"{option} must be a ModelConfig or the path of a TOML file; got {type(value).__name__}.")


def _over(side, shared):
    """One model's options: its own over the shared ones."""
    if side is None:
        return shared
    return side if shared is None else side.merged_over(shared)


def compare(images: str | os.PathLike | None = None, *, before=None, after=None,
            out: str | os.PathLike, model_config=None, before_config=None, after_config=None,
            masks: str | os.PathLike | None = None, manifest: str | os.PathLike | None = None,
            settings=None, before_audit: str | os.PathLike | None = None,
            after_audit: str | os.PathLike | None = None, seed: int = 0, resamples: int = 2000,
            progress: Callable[[dict], None] | None = None) -> CompareResult:
    """Compare two models on the same images, or two saved audits of the same images.

    Either pass ``images`` with ``before`` and ``after`` (model paths or OnnxClassifier):
    both are scanned with the same ``settings`` (plan, fill, seed) into ``out/before`` and
    ``out/after``. Or pass ``before_audit`` and ``after_audit`` (folders a scan wrote).

    Parameters
    ----------
    images : path, optional
        The dataset root. With saved audits: optional, where the images are read from for
        the figures (default: the before audit's dataset root).
    before, after : path or OnnxClassifier, optional
    out : path
        Output folder: compare.json (and before/, after/ when scanning). Write
        compare.html into it with :func:`shortcut_audit.report.write_compare_page`.
    model_config : ModelConfig or path of a TOML file, optional
        Model options for both models.
    before_config, after_config : ModelConfig or path of a TOML file, optional
        Model options for one model, over ``model_config``.
    masks, manifest : path, optional
        As for :func:`~shortcut_audit.scan.audit`; only when scanning.
    settings : ScanSettings, optional
        One for both scans.
    before_audit, after_audit : path, optional
    seed : int
        Seed of the bootstrap (the scans' seed is ``settings.seed``).
    resamples : int
        Bootstrap resamples per interval (at least 100).
    progress : callable, optional
        The scans' progress dicts, with ``"side": "before" | "after"`` added.

    Returns
    -------
    CompareResult

    Raises
    ------
    UsageError
        Models and audits mixed or missing, an audit folder without audit.json, audits of
        different images; and whatever scan raises (ModelError, DataError, OutputError).
    """
    models = before is not None or after is not None
    audits = before_audit is not None or after_audit is not None
    if models and audits:
        raise UsageError("pass either --before and --after (two models to scan) or --before-audit and "
                         "--after-audit (two saved audits), not both.")
    if not models and not audits:
        raise UsageError("nothing to compare: pass IMAGES with --before A.onnx and --after B.onnx, or "
                         "--before-audit DIR and --after-audit DIR.")
    _check_bootstrap(seed, resamples)
    out_dir = Path(out)
    notes: list[str] = []
    if models:
        if before is None or after is None:
            raise UsageError(f"--{'after' if after is None else 'before'} is missing; pass both "
                             f"--before and --after models.")
        if images is None:
            raise UsageError("IMAGES is missing: pass the image folder both models are scanned on.")
        from .scan import ScanSettings, audit

        settings = settings or ScanSettings()
        if not isinstance(settings, ScanSettings):
            raise UsageError(f"settings must be a ScanSettings; got {type(settings).__name__}.")
        shared = _config(model_config, "model_config")
        cfg_b, cfg_a = (_over(_config(before_config, "--before-config"), shared),
                        _over(_config(after_config, "--after-config"), shared))
        sides = {}
        for side, model, cfg in (("before", before, cfg_b), ("after", after, cfg_a)):
            tagged = None if progress is None else (lambda d, s=side: progress(dict(d, side=s)))
            res = audit(images, model, out=out_dir / side, masks=masks, manifest=manifest,
                       model_config=cfg, settings=settings, progress=tagged)
            sides[side] = res.to_dict()
        bdir, adir = out_dir / "before", out_dir / "after"
        ab, aa = sides["before"], sides["after"]
        root = Path(images)
    else:
        if before_audit is None or after_audit is None:
            raise UsageError(f"--{'after' if after_audit is None else 'before'}-audit is missing; pass "
                             f"both --before-audit and --after-audit.")
        for value, option in ((masks, "--masks"), (manifest, "--manifest"), (settings, "settings"),
                              (model_config, "the model options"),
                              (before_config, "--before-config"), (after_config, "--after-config")):
            if value is not None:
                raise UsageError(f"{option} applies only when compare scans two models; the saved "
                                 f"audits already hold their results. Leave it out.")
        if images is not None and not Path(images).is_dir():
            raise UsageError(f"IMAGES {str(images)!r} is not a folder; pass the image set the audits "
                             f"were run on, or leave it out.")
        bdir, ab = _load_audit(before_audit, "--before-audit")
        adir, aa = _load_audit(after_audit, "--after-audit")
        root = Path(images) if images is not None else (
            Path(ab["dataset"]["root"]) if ab.get("dataset", {}).get("root") else None)
        for folder, option in ((bdir, "--before-audit"), (adir, "--after-audit")):
            if not (folder / "results").is_dir():
                notes.append(f"{option} {folder} has no results/ folder: its heatmaps are not shown.")
    result = compare_audits(ab, aa, seed=seed, resamples=resamples, before_dir=bdir, after_dir=adir,
                            image_root=root, mode="models" if models else "audits", notes=notes)
    result = dataclasses.replace(result, out=out_dir)
    write_json(out_dir / "compare.json", result.to_dict())
    return result
