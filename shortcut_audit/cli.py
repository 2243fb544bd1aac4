"""The command line: thin typer commands over the library.

Each command builds the configuration, calls one library function, writes its output
and maps errors to exit codes: 0 ran and found nothing at the gate, 1 found something
at or above ``--fail-on``, 2 a usage or input error (one line: what is wrong and what
to do), 130 interrupted (finished work kept).
"""

from __future__ import annotations

import functools
import inspect
import json
import typing
import warnings
from dataclasses import dataclass
from enum import Enum
from pathlib import Path
from typing import Callable, Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                           TimeElapsedColumn, TimeRemainingColumn)
from rich.table import Table

from .comparison import FAIL_ON as COMPARE_FAIL_ON
from .engine import SCORES
from .errors import AuditError, UsageError
from .findings import FAIL_ON, Thresholds, parse_threshold_overrides, read_thresholds
from .options import (COLORS, LAYOUTS, OUTPUT_KINDS, RESIZES, ModelConfig, parse_numbers, parse_size, read_labels,
                      read_model_config, some_names)
from .occlusion import FILL_KINDS, PLAN_KINDS, Fill, GridPlan, RandomPatchPlan, SmoothMaskPlan
from .sensitivity import CURVE_IMAGES

app = typer.Typer(
    name="shortcut-audit",
    help="Audit an image classifier (ONNX, CPU) for shortcuts: does it predict from the "
         "object, or from a mark, a sticker or a backdrop?",
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode="rich",
)
err = Console(stderr=True)
out = Console()


def _choices(name: str, values: tuple[str, ...]) -> type[Enum]:
    """A typer choice type made from the library's own tuple: one list to keep."""
    return Enum(name, [(v, v) for v in values], type=str)


Layout = _choices("Layout", LAYOUTS)
Channels = _choices("Channels", COLORS)
Resize = _choices("Resize", RESIZES)
OutputKind = _choices("OutputKind", OUTPUT_KINDS)
PlanKind = _choices("PlanKind", PLAN_KINDS)
FillKind = _choices("FillKind", FILL_KINDS)
Score = _choices("Score", SCORES)
ScanGate = _choices("ScanGate", FAIL_ON)
CompareGate = _choices("CompareGate", COMPARE_FAIL_ON)


MODEL_HELP = "Model options"
PLAN_HELP = "Occlusion options"

LabelsOpt = typer.Option(None, "--labels", help="Class names, one a line, in output order.",
                         exists=True, dir_okay=False, rich_help_panel=MODEL_HELP)
ConfigOpt = typer.Option(None, "--model-config", help="TOML file with any of the model options.",
                         exists=True, dir_okay=False, rich_help_panel=MODEL_HELP)
LayoutOpt = typer.Option(None, "--layout", help="Input layout (default: read from the graph).",
                         rich_help_panel=MODEL_HELP)
SizeOpt = typer.Option(None, "--size", help="Input size HxW, e.g. 224x224 (for dynamic graphs).",
                       rich_help_panel=MODEL_HELP)
ScaleOpt = typer.Option(None, "--scale", help="Multiply pixels (0..255) by this first \\[default: 1/255].",
                        rich_help_panel=MODEL_HELP)
MeanOpt = typer.Option(None, "--mean", help="Subtract after --scale: one number or R,G,B.",
                       rich_help_panel=MODEL_HELP)
StdOpt = typer.Option(None, "--std", help="Divide after --mean: one number or R,G,B.",
                      rich_help_panel=MODEL_HELP)
ChannelsOpt = typer.Option(None, "--channels", help="Channel order the model expects.",
                           rich_help_panel=MODEL_HELP)
ResizeOpt = typer.Option(None, "--resize", help="How images reach the input size \\[default: stretch].",
                         rich_help_panel=MODEL_HELP)
OutputOpt = typer.Option(None, "--output", help="What the model outputs \\[default: detected].",
                         rich_help_panel=MODEL_HELP)
ThreadsOpt = typer.Option(None, "--threads", min=1, help="onnxruntime threads \\[default: all cores].",
                          rich_help_panel=MODEL_HELP)
BatchOpt = typer.Option(None, "--batch-size", min=1, help="Images per model call \\[default: measured].",
                        rich_help_panel=MODEL_HELP)


PlanOpt = typer.Option(PlanKind.grid, "--plan", help="Where to hide (adaptive: coarse grid, then fine patches where the score moves).", rich_help_panel=PLAN_HELP)
ToleranceOpt = typer.Option(None, "--tolerance", min=0.0, max=1.0, help="Stop a random plan once its map's estimated relative error is below this \\[default: off].", rich_help_panel=PLAN_HELP)
BudgetOpt = typer.Option(None, "--budget", min=2, help="Passes per image for --plan adaptive \\[default: a quarter of the fine grid].", rich_help_panel=PLAN_HELP)
PatchOpt = typer.Option(None, "--patch", help="Patch side: pixels (8) or fraction (0.125).", rich_help_panel=PLAN_HELP)
StrideOpt = typer.Option(None, "--stride", help="Grid step \\[default: half the patch].", rich_help_panel=PLAN_HELP)
CountOpt = typer.Option(None, "--count", help="Patches or masks (random, rise).", rich_help_panel=PLAN_HELP)
MinSizeOpt = typer.Option(None, "--min-size", help="Smallest random patch.", rich_help_panel=PLAN_HELP)
MaxSizeOpt = typer.Option(None, "--max-size", help="Largest random patch.", rich_help_panel=PLAN_HELP)
CellsOpt = typer.Option(8, "--cells", help="RISE grid cells per side.", rich_help_panel=PLAN_HELP)
KeepOpt = typer.Option(0.5, "--keep", help="RISE keep probability.", rich_help_panel=PLAN_HELP)
FillOpt = typer.Option(FillKind.mean, "--fill", help="What hidden pixels become.", rich_help_panel=PLAN_HELP)
FillValueOpt = typer.Option(127.5, "--fill-value", help="Value for --fill constant (0..255).", rich_help_panel=PLAN_HELP)
SeedOpt = typer.Option(0, "--seed", help="Seed of everything random.", rich_help_panel=PLAN_HELP)
ScoreOpt = typer.Option(Score.prob, "--score", help="Score whose drop is mapped.", rich_help_panel=PLAN_HELP)


def model_config(labels=None, config=None, layout=None, size=None, scale=None, mean=None, std=None,
                 channels=None, resize=None, output=None, threads=None, batch_size=None) -> ModelConfig:
    """Command-line model options merged over a --model-config file."""
    given = ModelConfig(
        labels=read_labels(labels) if labels else None,
        layout=layout.value if layout else None,
        size=parse_size(size) if size else None,
        scale=scale,
        mean=parse_numbers(mean, name="--mean") if mean else None,
        std=parse_numbers(std, name="--std") if std else None,
        channels=channels.value if channels else None,
        resize=resize.value if resize else None,
        output=output.value if output else None,
        threads=threads,
        batch_size=batch_size,
    )
    if config is not None:
        return given.merged_over(read_model_config(config))
    return given


def _kw(name: str, annotation, default) -> inspect.Parameter:
    return inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, annotation=annotation, default=default)


#: The model options, one definition for every command that takes a model.
MODEL_OPTIONS = (
    _kw("labels", Optional[Path], LabelsOpt), _kw("config", Optional[Path], ConfigOpt),
    _kw("layout", Optional[Layout], LayoutOpt), _kw("size", Optional[str], SizeOpt),
    _kw("scale", Optional[float], ScaleOpt), _kw("mean", Optional[str], MeanOpt),
    _kw("std", Optional[str], StdOpt), _kw("channels", Optional[Channels], ChannelsOpt),
    _kw("resize", Optional[Resize], ResizeOpt), _kw("output", Optional[OutputKind], OutputOpt),
    _kw("threads", Optional[int], ThreadsOpt), _kw("batch_size", Optional[int], BatchOpt),
)


@dataclass(frozen=True)
class Occlusion:
    """What the occlusion options decide: where to hide, with what, the seed, the score."""

    plan: object
    fill: Fill
    seed: int
    score: str
    tolerance: float | None


def occlusion_options(plan=PlanKind.grid, patch=None, stride=None, count=None, min_size=None,
                      max_size=None, cells=8, keep=0.5, fill=FillKind.mean, fill_value=127.5,
                      seed=0, score=Score.prob, budget=None, tolerance=None) -> Occlusion:
    """The occlusion options as library values."""
    return Occlusion(plan=build_plan(plan, patch, stride, count, min_size, max_size, cells, keep, seed, budget),
                     fill=Fill(kind=fill.value, value=fill_value, seed=seed), seed=seed,
                     score=score.value, tolerance=tolerance)


#: The occlusion options, one definition for heatmap, audit and compare.
OCCLUSION_OPTIONS = (
    _kw("plan", PlanKind, PlanOpt), _kw("patch", Optional[str], PatchOpt),
    _kw("stride", Optional[str], StrideOpt), _kw("count", Optional[int], CountOpt),
    _kw("min_size", Optional[str], MinSizeOpt), _kw("max_size", Optional[str], MaxSizeOpt),
    _kw("cells", int, CellsOpt), _kw("keep", float, KeepOpt), _kw("fill", FillKind, FillOpt),
    _kw("fill_value", float, FillValueOpt), _kw("seed", int, SeedOpt), _kw("score", Score, ScoreOpt),
    _kw("budget", Optional[int], BudgetOpt), _kw("tolerance", Optional[float], ToleranceOpt),
)


def option_group(params: tuple[inspect.Parameter, ...], build: Callable, into: str) -> Callable:
    """Decorator: add ``params`` to a command's options; the command receives the one value
    ``build(**those options)`` as its parameter ``into``.

    typer reads a command's options from its signature, so one tuple of parameters serves
    every command that takes the group.
    """
    names = [p.name for p in params]

    def deco(fn: Callable) -> Callable:
        hints = typing.get_type_hints(fn)
        sig = inspect.signature(fn)
        own = [p.replace(annotation=hints.get(p.name, p.annotation))
               for p in sig.parameters.values() if p.name != into]
        new = sig.replace(parameters=own + list(params))

        @functools.wraps(fn)
        def wrapper(*args, **kwargs):
            values = {name: kwargs.pop(name) for name in names if name in kwargs}
            kwargs[into] = build(**values)
            return fn(*args, **kwargs)

        wrapper.__signature__ = new
        wrapper.__annotations__ = {p.name: p.annotation for p in new.parameters.values()}
        return wrapper
    return deco


model_options = option_group(MODEL_OPTIONS, model_config, "cfg")
occlusion_opts = option_group(OCCLUSION_OPTIONS, occlusion_options, "occ")


def _size_value(text: str | None, name: str):
    if text is None:
        return None
    try:
        return float(text) if "." in text else int(text)
    except ValueError:
        raise UsageError(f"{name} takes pixels (8) or a fraction of the side (0.125); got {text!r}.") from None


def build_plan(plan: PlanKind, patch, stride, count, min_size, max_size, cells, keep, seed,
               budget=None):
    """The occlusion plan from command-line options."""
    if plan == PlanKind.adaptive:
        from .occlusion import AdaptivePlan
        kw = {"budget": budget}
        if patch:
            kw["fine"] = _size_value(patch, "--patch")
        if stride:
            kw["fine_stride"] = _size_value(stride, "--stride")
        return AdaptivePlan(**kw)
    if plan == PlanKind.grid:
        return GridPlan(patch=_size_value(patch, "--patch") or 0.125,
                        stride=_size_value(stride, "--stride") if stride else (None if patch else 0.0625))
    if plan == PlanKind.random:
        return RandomPatchPlan(count=count or 400, min_size=_size_value(min_size, "--min-size") or 0.08,
                               max_size=_size_value(max_size, "--max-size") or 0.25, seed=seed)
    return SmoothMaskPlan(count=count or 1000, cells=cells, keep=keep, seed=seed)


def _fail(exc: BaseException) -> None:
    err.print(f"[bold red]error:[/] {escape(' '.join(str(exc).split()))}", highlight=False, markup=True,
              soft_wrap=True)
    raise typer.Exit(code=2)


def guarded(fn: Callable) -> Callable:
    """Map AuditError to exit 2 with its one line; keep tracebacks for real bugs."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            with warnings.catch_warnings():
                # Pillow's bomb warning is already turned into a listed skip.
                warnings.filterwarnings("ignore", message=".*decompression bomb.*")
                return fn(*args, **kwargs)
        except AuditError as exc:
            _fail(exc)
    return wrapper


class _Bar:
    """A rich progress bar fed by the library's progress callback."""

    def __init__(self, description: str):
        self.progress = Progress(
            TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
            TextColumn("{task.fields[rate]}"), TimeElapsedColumn(), TextColumn("left"),
            TimeRemainingColumn(), console=err, transient=False)
        self.description = description
        self.task = None

    def __enter__(self):
        self.progress.__enter__()
        return self

    def __exit__(self, *exc):
        self.progress.__exit__(*exc)

    def __call__(self, event: dict) -> None:
        if event.get("estimate") is not None:     # stated before the passes are spent
            self.progress.console.print(f"cost: {event['estimate'].describe()}", highlight=False,
                                        markup=False, soft_wrap=True)
            return
        desc = f"{self.description} {event.get('phase', '')}".strip()
        if self.task is None:
            self.task = self.progress.add_task(desc, total=event.get("total", 0), rate="")
        rate = event.get("passes_per_second") or 0.0
        self.progress.update(self.task, description=desc, total=event.get("total", 0),
                             completed=event.get("done", 0),
                             rate=f"{rate:,.0f} passes/s" if rate else "")


# ------------------------------------------------------------------- commands

@app.command("inspect")
@guarded
@model_options
def inspect_model(
    model: Path = typer.Argument(..., help="The .onnx file.", exists=True, dir_okay=False),
    as_json: bool = typer.Option(False, "--json", help="Print JSON instead of a table."),
    cfg: ModelConfig = None,
):
    """What the tool understood of a model, a test forward pass, and its speed.

    [bold]Examples[/]

      shortcut-audit inspect model.onnx

      shortcut-audit inspect model.onnx --size 224x224 --mean 0.485,0.456,0.406 --std 0.229,0.224,0.225
    """
    from .model import OnnxClassifier

    clf = OnnxClassifier(model, cfg)
    info = clf.describe()
    info["passes_per_second"] = round(clf.measure_throughput(seconds=1.0), 1)
    if as_json:
        out.print_json(json.dumps(info))
        return
    table = Table(title=f"{model.name}", show_header=False)
    inp = info["input"]
    rows = [
        ("input", f"{inp['name']}  {inp['layout'].upper()}  {inp['size'][0]}x{inp['size'][1]}  "
                  f"{inp['channels']} channel(s), {inp['color']}, {inp['dtype']}"),
        ("batch", "dynamic" if inp["dynamic_batch"] else f"fixed at {inp['fixed_batch']}"),
        ("preprocessing", f"x * {inp['scale']:.6g}, mean {inp['mean']}, std {inp['std']}, resize {inp['resize']}"),
        ("output", f"{info['output']['name']}: {info['output']['kind']}, {info['output']['n_classes']} classes"),
        ("labels", some_names(info["labels"], 20)),
        ("batch size", str(info["batch_size"])),
        ("speed", f"{info['passes_per_second']:,.0f} passes/s (random inputs, this machine)"),
        ("sha256", info["sha256"]),
    ]
    for k, v in rows:
        table.add_row(k, v)
    out.print(table)


@app.command()
@guarded
@model_options
@occlusion_opts
def heatmap(
    image: Path = typer.Argument(..., help="One image file.", exists=True, dir_okay=False),
    model: Path = typer.Option(..., "--model", "-m", help="The .onnx file.", exists=True, dir_okay=False),
    out_dir: Path = typer.Option(..., "--out", "-o", help="Output folder.", file_okay=False),
    target: Optional[str] = typer.Option(None, "--target", help="Class to explain (name) \\[default: the prediction]."),
    cfg: ModelConfig = None, occ: Occlusion = None,
):
    """The occlusion heatmap of one image: heatmap.npy, overlay.png, heatmap.json.

    [bold]Examples[/]

      shortcut-audit heatmap photo.png --model model.onnx --out hm/

      shortcut-audit heatmap photo.png -m model.onnx -o hm/ --patch 16 --stride 8 --target vase

      shortcut-audit heatmap photo.png -m model.onnx -o hm/ --plan rise --count 2000
    """
    from .heatmap import run_heatmap
    from .report import write_heatmap_files

    with _Bar("heatmap") as bar:
        result = run_heatmap(image, model, out=out_dir, model_config=cfg, plan=occ.plan,
                             fill=occ.fill, target=target, score=occ.score, tolerance=occ.tolerance,
                             progress=bar)
    write_heatmap_files(result, out_dir)
    out.print(f"class [bold]{result['target']}[/] score {result['base_score']:.3f}; "
              f"{result['passes']} passes in {result['elapsed_seconds']:.2f} s")
    out.print(f"wrote {out_dir / 'overlay.png'}", highlight=False)


@app.command()
@guarded
@model_options
@occlusion_opts
def audit(
    images: Path = typer.Argument(..., help="Dataset folder: one sub-folder per class (or the root of --manifest).",
                                  exists=True, file_okay=False),
    model: Path = typer.Option(..., "--model", "-m", help="The .onnx file.", exists=True, dir_okay=False),
    out_dir: Path = typer.Option(..., "--out", "-o", help="Output folder (created; resumes if it holds results).",
                                 file_okay=False),
    masks: Optional[Path] = typer.Option(None, "--masks", help="Object masks, a folder mirroring the images.",
                                         exists=True, file_okay=False),
    manifest: Optional[Path] = typer.Option(None, "--manifest", help="CSV with path,label[,mask].",
                                            exists=True, dir_okay=False),
    per_class: Optional[int] = typer.Option(None, "--per-class", min=1, help="At most this many images a class."),
    confirm: bool = typer.Option(True, "--confirm/--no-confirm", help="Run the counterfactual tests on suspects."),
    test_budget: int = typer.Option(40, "--test-budget", min=4, help="Images per counterfactual test."),
    curve_images: Optional[int] = typer.Option(
        CURVE_IMAGES, "--curve-images", min=1,
        help="Images a class whose deletion and insertion curves are measured (30 passes each)."),
    every_curve: bool = typer.Option(False, "--every-curve", help="Measure the curves of every image."),
    thresholds_file: Optional[Path] = typer.Option(None, "--thresholds", help="TOML file of threshold overrides.",
                                                   exists=True, dir_okay=False),
    threshold: list[str] = typer.Option([], "--threshold", help="Override one threshold: NAME=VALUE (repeatable)."),
    no_estimate: bool = typer.Option(False, "--no-estimate-masks", help="Do not estimate masks on plain backdrops."),
    no_report: bool = typer.Option(False, "--no-report", help="Write audit.json only (no figures, no HTML)."),
    cluster: Optional[str] = typer.Option(
        None, "--cluster", metavar="ADDRESS|local:N",
        help='Spread the per-image work on Dask: a scheduler address (tcp://host:8786) or local:N '
             'worker processes. Needs pip install "shortcut_audit\\[cluster]".'),
    fail_on: ScanGate = typer.Option(ScanGate.confirmed, "--fail-on", help="Exit 1 when a finding is at least this."),
    cfg: ModelConfig = None, occ: Occlusion = None,
):
    """Audit a labelled image set: audit.json, report.html, figures, per-image results.

    [bold]Examples[/]

      shortcut-audit audit photos/ --model model.onnx --out audit/

      shortcut-audit audit photos/ -m model.onnx -o audit/ --masks masks/ --fail-on suspect

      shortcut-audit audit photos/ -m model.onnx -o audit/ --threshold localized_rate=0.5 --per-class 50

      shortcut-audit audit photos/ -m model.onnx -o audit/ --batch-size 16 --cluster local:4

    An interrupted audit keeps what it finished: run the same command again to resume.
    """
    from .scan import ScanSettings, audit as run_audit

    overrides = read_thresholds(thresholds_file) if thresholds_file else {}
    overrides.update(parse_threshold_overrides(threshold))
    settings = ScanSettings(
        plan=occ.plan, fill=occ.fill, seed=occ.seed, score=occ.score,
        thresholds=Thresholds.replace_from(Thresholds(), overrides), confirm=confirm,
        test_budget=test_budget, per_class=per_class, tolerance=occ.tolerance,
        curve_images=None if every_curve else curve_images)
    try:
        with _Bar("audit") as bar:
            result = run_audit(images, model, out=out_dir, masks=masks, manifest=manifest,
                              model_config=cfg, settings=settings, estimate_masks=not no_estimate,
                              progress=bar, cluster=cluster)
    except KeyboardInterrupt:
        kept = len(list((out_dir / "results").glob("*.npz"))) if (out_dir / "results").exists() else 0
        err.print(f"interrupted: the results of {kept} images are kept in {out_dir / 'results'}; "
                  f"run the same command again to resume.", highlight=False)
        raise typer.Exit(code=130)
    page = None
    if not no_report:
        from .report import write_scan_report
        page = write_scan_report(result, out_dir)
    print_summary(result)
    if page is not None:
        out.print(f"report: {page}", highlight=False)
    out.print(f"audit:  {out_dir / 'audit.json'}", highlight=False)
    if result.dataset["audited"] == 0:
        # Nothing audited proves nothing: a launch gate must not pass on it.
        err.print(f"error: no image could be audited ({len(result.skipped)} skipped, reasons in "
                  f"{out_dir / 'audit.json'}); fix the images or the model and run again.",
                  highlight=False, markup=False, soft_wrap=True)
        raise typer.Exit(code=2)
    if result.at_or_above(fail_on.value):
        raise typer.Exit(code=1)


@app.command()
@guarded
@model_options
@occlusion_opts
def compare(
    images: Optional[Path] = typer.Argument(None, help="Dataset folder (omit with --before-audit/--after-audit).",
                                            exists=True, file_okay=False),
    before: Optional[Path] = typer.Option(None, "--before", help="The model before the change.", exists=True, dir_okay=False),
    after: Optional[Path] = typer.Option(None, "--after", help="The model after the change.", exists=True, dir_okay=False),
    out_dir: Path = typer.Option(..., "--out", "-o", help="Output folder: compare.json, compare.html, before/, after/.",
                                 file_okay=False),
    before_config: Optional[Path] = typer.Option(
        None, "--before-config", help="TOML model options of --before only (over the model options below).",
        exists=True, dir_okay=False),
    after_config: Optional[Path] = typer.Option(
        None, "--after-config", help="TOML model options of --after only (over the model options below).",
        exists=True, dir_okay=False),
    before_audit: Optional[Path] = typer.Option(None, "--before-audit", help="A folder an audit wrote (instead of --before).",
                                                exists=True, file_okay=False),
    after_audit: Optional[Path] = typer.Option(None, "--after-audit", help="A folder an audit wrote (instead of --after).",
                                               exists=True, file_okay=False),
    masks: Optional[Path] = typer.Option(None, "--masks", help="Object masks mirroring the images.", exists=True, file_okay=False),
    manifest: Optional[Path] = typer.Option(None, "--manifest", help="CSV with path,label[,mask].", exists=True, dir_okay=False),
    resamples: int = typer.Option(2000, "--resamples", min=100, help="Bootstrap resamples per interval."),
    confirm: bool = typer.Option(True, "--confirm/--no-confirm", help="Run the counterfactual tests on both models."),
    test_budget: int = typer.Option(40, "--test-budget", min=4, help="Images per counterfactual test."),
    fail_on: CompareGate = typer.Option(CompareGate.new, "--fail-on", help="Exit 1 on a new finding, or on any that persists."),
    cfg: ModelConfig = None, occ: Occlusion = None,
):
    """The same images through two models: which shortcuts were resolved, which persist, which are new.

    The model options apply to both models; --before-config and --after-config override
    them for one model. --seed seeds the audits and the bootstrap.

    [bold]Examples[/]

      shortcut-audit compare photos/ --before base.onnx --after dropout.onnx --out cmp/

      shortcut-audit compare photos/ --before a.onnx --after b.onnx -o cmp/ --labels labels.txt --size 224x224

      shortcut-audit compare --before-audit audit_a/ --after-audit audit_b/ --out cmp/ --fail-on persists
    """
    from .compare import compare as run_compare
    from .scan import ScanSettings

    models = before is not None or after is not None
    settings = None
    if models:
        settings = ScanSettings(plan=occ.plan, fill=occ.fill, seed=occ.seed, score=occ.score,
                                confirm=confirm, test_budget=test_budget, tolerance=occ.tolerance)
    with _Bar("compare") as bar:
        result = run_compare(images, before=before, after=after, out=out_dir,
                             model_config=None if cfg.is_empty() else cfg,
                             before_config=before_config, after_config=after_config, masks=masks,
                             manifest=manifest, settings=settings, before_audit=before_audit,
                             after_audit=after_audit, seed=occ.seed, resamples=resamples, progress=bar)
    from .report import write_compare_page

    page = write_compare_page(result, out_dir)
    print_comparison(result)
    out.print(f"report: {page}", highlight=False)
    code = result.exit_code(fail_on.value)
    if code:
        raise typer.Exit(code=code)


@app.command()
@guarded
def pack(
    audit_dir: Path = typer.Argument(..., help="A folder an audit wrote (holds audit.json).", exists=True, file_okay=False),
    out_path: Path = typer.Option(..., "--out", "-o", help="A folder, or a file ending in .zip."),
    finding: Optional[str] = typer.Option(None, "--finding", help="Only this finding (e.g. F2), whatever its status \\[default: every confirmed one]."),
    images: Optional[Path] = typer.Option(None, "--images", help="Where the images are now, if they moved.",
                                          exists=True, file_okay=False),
    leads: bool = typer.Option(False, "--leads", help="Also pack the findings no test confirmed, marked as "
                                                      "leads for review (they ask for no photos)."),
):
    """The evidence pack of an audit's findings, for whoever collects data.

    Per confirmed finding: the flagged images (copied), their overlays, manifest.csv, a
    contact sheet and request.md in plain words. --leads adds the findings no test
    confirmed, marked as leads that ask for no photos.

    [bold]Examples[/]

      shortcut-audit pack audit/ --out evidence/

      shortcut-audit pack audit/ --out vase-mark.zip --finding F1

      shortcut-audit pack audit/ --out review/ --leads
    """
    from .pack import make_pack

    written = make_pack(audit_dir, out_path, finding=finding, images=images, leads=leads)
    out.print(f"evidence pack: {written}", highlight=False)


@app.command()
@guarded
def demo(
    out_dir: Path = typer.Option(Path("demo_audit"), "--out", "-o", help="Output folder.", file_okay=False),
):
    """The whole job on the shipped demo: a ceramics catalogue with planted shortcuts.

    Scans the catalogue with three models (baseline, dropout, rebalanced), compares
    baseline against each, and writes the reports and the evidence pack.

    [bold]Examples[/]

      shortcut-audit demo --out demo_audit
    """
    from .showcase import run_demo

    with _Bar("demo") as bar:
        result = run_demo(out_dir, progress=bar)
    table = Table(title="demo: what each model's audit found")
    table.add_column("model")
    classes = [c.name for c in result["audits"]["baseline"].classes]
    for name in classes:
        table.add_column(name, overflow="fold")
    for model, audit in result["audits"].items():
        cells = []
        for name in classes:
            fs = [f for f in audit.findings if f.class_name == name]
            notes = [n for c in audit.classes if c.name == name for n in c.notes]
            cells.append(", ".join([f"{f.kind} ({f.status})" for f in fs]
                                   + (["note (object part)"] if notes else [])) or "-")
        table.add_row(model, *cells)
    out.print(table)
    for name, cmp in result["comparisons"].items():
        counts = {k: v for k, v in cmp.counts().items() if v}
        text = ", ".join(f"{v} {k}" for k, v in counts.items()) or "no finding in either"
        out.print(f"baseline -> {name}: {text}", highlight=False)
    for label, path in result["reports"].items():
        out.print(f"report ({label}): {path}", highlight=False)
    if result["pack"] is not None:
        out.print(f"evidence pack: {result['pack']}", highlight=False)
    out.print(f"done in {result['elapsed_seconds']:.0f} s", highlight=False)


def print_comparison(result) -> None:
    """The verdict per finding of a comparison."""
    table = Table(title="before -> after")
    for col in ("class", "finding", "before", "after", "verdict"):
        table.add_column(col)
    for f in result.findings:
        table.add_row(f.class_name, f.kind, f.before_status, f.after_status, f.verdict)
    if not result.findings:
        table.add_row("-", "no finding in either audit", "-", "-", "-")
    out.print(table)


def print_summary(result) -> None:
    """The per-class verdict table of an audit."""
    table = Table(title="per-class verdict")
    for col in ("class", "images", "accuracy", "confidence", "findings"):
        table.add_column(col)
    by_class: dict[str, list] = {}
    for f in result.findings:
        by_class.setdefault(f.class_name, []).append(f)
    for c in result.classes:
        fs = by_class.get(c.name, [])
        text = "; ".join(f"{f.id} {f.kind} ({f.status})" for f in fs)
        if c.not_judged:
            text = "; ".join(([text] if text else []) + ["not judged: " + r for r in c.not_judged])
        if c.notes:
            text = "; ".join(([text] if text else []) + ["note: reads a small part of the object"])
        text = text or "none"
        table.add_row(escape(c.name), str(c.images), f"{c.accuracy:.0%}", f"{c.mean_confidence:.2f}", escape(text))
    out.print(table)
    if result.skipped:
        out.print(f"{len(result.skipped)} file(s) skipped; reasons in audit.json", highlight=False)


def main() -> None:
    """Console entry point."""
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
