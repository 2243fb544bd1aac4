"""Distributed scans on Dask: the per-image half of a scan, spread over a cluster.

A scan has two halves. The per-image half (decode, occlusion passes, statistics:
:func:`shortcut_audit.perimage.analyse_entries`) is independent from image to image and
takes nearly all the time; the rest (per-class aggregation, findings, counterfactual
tests, the report) needs every image's results. :func:`iter_cluster_results` runs the
first half on a `Dask <https://distributed.dask.org>`_ cluster and hands the results
back one image at a time, so the caller stores them exactly as a local run does
(``store.put``) and aggregates on this machine as before.

How the work travels:

- images go to workers as **paths**, in shards (lists of :class:`ImageEntry`, 16 by
  default), never as pixels; each worker decodes its own images, so the model file and
  the images must be readable on every worker at the same absolute paths;
- each worker process loads the ONNX session once, on its first shard, and keeps it
  (a per-process cache keyed by the model's path, hash and settings); the file's
  SHA-256 is checked against this machine's, so a different file at the same path is
  an error, not a silently different audit;
- every worker runs the same batch size and settings as this machine (the fully
  resolved :class:`ModelConfig` travels with each shard); unless ``threads`` is set,
  a task uses one onnxruntime thread on a remote cluster (Dask's threads are the
  parallelism) and ``cores // N`` threads on ``local:N``.

Failures: a worker that dies loses only its in-flight shards, which Dask runs again
on another worker; a shard that raises is tried ``retries`` more times, then split
into single images, each tried again, so only an image that fails on every try is
lost, and it comes back as a skip record with the reason. Results are keyed by image
path and each path is handed back once, whatever order tasks finish in and however
often they ran.

Dask is imported only when a cluster scan starts; without it the error says
``pip install "shortcut_audit[cluster]"``.

Examples
--------
>>> parse_cluster("local:4")
ClusterSpec(address=None, workers=4)
>>> parse_cluster("tcp://10.0.0.5:8786")
ClusterSpec(address='tcp://10.0.0.5:8786', workers=None)
"""

from __future__ import annotations

import dataclasses
import logging
import os
import re
import threading
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .dataset import ImageEntry
from .engine import EngineStats
from .errors import AuditError, ClusterError, DataError, ImageSkip, ModelError, OutputError, UsageError
from .options import ModelConfig

__all__ = [
    "ClusterError",
    "ClusterSpec",
    "parse_cluster",
    "check_cluster",
    "iter_cluster_results",
    "DEFAULT_SHARD_SIZE",
    "DEFAULT_RETRIES",
    "INSTALL_HINT",
]

#: Images per task: large enough that the per-task overhead (a few ms) vanishes next to
#: the occlusion passes, small enough that a lost worker loses little.
DEFAULT_SHARD_SIZE = 16
#: Extra tries of a task that raised (a lost worker's tasks are rerun by Dask anyway).
DEFAULT_RETRIES = 2
INSTALL_HINT = 'pip install "shortcut_audit[cluster]"'

_LOCAL = re.compile(r"^local:(.*)$", re.IGNORECASE)
# Skip reasons that, for a file this machine can read, mean a worker cannot see it.
_NOT_FOUND = {"file not found": "file", "mask: file not found": "mask_file"}


@dataclass(frozen=True, kw_only=True)
class ClusterSpec:
    """Where the per-image work runs: a scheduler ``address``, or ``workers`` local processes.

    Examples
    --------
    >>> ClusterSpec(workers=2).describe()
    'local:2'
    """

    address: str | None = None
    workers: int | None = None

    def __post_init__(self) -> None:
        if (self.address is None) == (self.workers is None):
            raise UsageError("a ClusterSpec needs exactly one of address and workers; "
                             "pass e.g. parse_cluster('local:2') or parse_cluster('tcp://host:8786').")
        if self.workers is not None and (
                not isinstance(self.workers, int) or isinstance(self.workers, bool) or self.workers < 1):
            raise UsageError(f"--cluster local:N needs a whole number of workers of at least 1; "
                             f"got {self.workers!r}. Pass e.g. --cluster local:4.")

    def describe(self) -> str:
        return f"local:{self.workers}" if self.workers is not None else str(self.address)


def parse_cluster(text: str) -> ClusterSpec:
    """Read the ``--cluster`` value: ``local:N`` or a Dask scheduler address.

    Parameters
    ----------
    text : str
        ``local:N`` (a LocalCluster of N worker processes on this machine, one thread
        each) or a scheduler address such as ``tcp://10.0.0.5:8786`` (what
        ``dask scheduler`` prints).

    Returns
    -------
    ClusterSpec

    Raises
    ------
    UsageError
        Empty, with spaces, or ``local:`` followed by anything but a whole number >= 1.

    Examples
    --------
    >>> parse_cluster("LOCAL:2").workers
    2
    """
    if not isinstance(text, str) or not text.strip():
        raise UsageError(f"--cluster must be a Dask scheduler address (tcp://host:8786) or local:N; "
                         f"got {text!r}.")
    text = text.strip()
    local = _LOCAL.match(text)
    if local:
        n = local.group(1).strip()
        if not n.isdigit() or int(n) < 1:
            raise UsageError(f"--cluster local:N needs a whole number of workers of at least 1; "
                             f"got {text!r}. Pass e.g. --cluster local:4.")
        return ClusterSpec(workers=int(n))
    if any(ch.isspace() for ch in text):
        raise UsageError(f"--cluster address {text!r} contains spaces; pass the address "
                         f"`dask scheduler` printed, e.g. tcp://10.0.0.5:8786.")
    return ClusterSpec(address=text)


def check_cluster(text: str | ClusterSpec) -> ClusterSpec:
    """Parse ``--cluster`` and check that Dask is installed, before any work starts.

    Raises
    ------
    UsageError
        As :func:`parse_cluster`, or Dask is not installed (the message says
        ``pip install "shortcut_audit[cluster]"``).
    """
    spec = text if isinstance(text, ClusterSpec) else parse_cluster(text)
    _require_distributed()
    return spec


def _require_distributed():
    """dask.distributed, imported on first use."""
    try:
        import distributed
    except ImportError:
        raise UsageError(f"--cluster needs Dask, which is not installed; run {INSTALL_HINT} "
                         f"(on this machine and on every worker).") from None
    return distributed


# ------------------------------------------------------------------ worker side


@dataclass(frozen=True, kw_only=True)
class _ShardJob:
    """What every shard needs besides its images (small; travels with each task)."""

    model_path: str
    model_config: ModelConfig
    sha256: str
    tool_version: str
    settings: Any                      # ScanSettings (imported lazily: scan imports us)
    label_index: tuple[tuple[str, int], ...]
    estimate_masks: bool
    curve_paths: frozenset | None = None   # images whose curves are measured (None: all)


@dataclass(frozen=True, kw_only=True)
class _Failure:
    """An AuditError on a worker (wrong model file, wrong version): stops the scan, no retry."""

    kind: str
    message: str


_ERRORS = {cls.__name__: cls for cls in (UsageError, ModelError, DataError, OutputError)}
_CLASSIFIERS: dict[tuple, Any] = {}
_CLASSIFIERS_LOCK = threading.Lock()


def _worker_address() -> str:
    try:
        from distributed import get_worker
        return get_worker().address
    except Exception:  # noqa: BLE001 - outside a worker (direct call)
        return "this process"


def _worker_classifier(job: _ShardJob):
    """The worker process's classifier for ``job``, loaded on first use and kept."""
    key = (job.model_path, job.sha256, job.model_config)
    with _CLASSIFIERS_LOCK:
        clf = _CLASSIFIERS.get(key)
        if clf is None:
            from .model import OnnxClassifier
            clf = OnnxClassifier(job.model_path, job.model_config)
            if clf.sha256 != job.sha256:
                raise ModelError(
                    f"the model file {job.model_path} has SHA-256 {clf.sha256[:12]}... here but "
                    f"{job.sha256[:12]}... on the machine that started the scan; copy the same "
                    f"file to the same path on every worker.")
            _CLASSIFIERS.clear()           # one model per worker process at a time
            _CLASSIFIERS[key] = clf
    return clf


def _analyse_shard(entries: Sequence[ImageEntry], job: _ShardJob) -> list[tuple[str, dict, dict]] | _Failure:
    """Run on a worker: the per-image half of a scan over one shard of images.

    Returns the ``(path, record, arrays)`` triples of :func:`analyse_entries`, or a
    :class:`_Failure` for an :class:`AuditError` that is not about one image (the
    model is missing or different here, another tool version): retrying would not help.
    Any other exception propagates, so Dask retries the task.
    """
    from ._version import __version__
    from .perimage import analyse_entries

    try:
        if job.tool_version != __version__:
            raise UsageError(
                f"this worker runs shortcut_audit {__version__} but the scan was started with "
                f"{job.tool_version}; install the same version on every worker.")
        clf = _worker_classifier(job)
        return list(analyse_entries(entries, clf, job.settings, label_index=dict(job.label_index),
                                    estimate_masks=job.estimate_masks, curve_paths=job.curve_paths))
    except AuditError as exc:
        if isinstance(exc, ImageSkip):     # analyse_entries turns these into records; defensive
            raise
        kind = type(exc).__name__ if type(exc).__name__ in _ERRORS else "ModelError"
        return _Failure(kind=kind, message=f"on worker {_worker_address()}: {exc}")


# ------------------------------------------------------------------ client side


@contextmanager
def _connect(spec: ClusterSpec, distributed, *, connect_timeout: float, worker_timeout: float):
    """A Client on the scheduler (or on a new LocalCluster), closed on exit."""
    cluster = None
    try:
        if spec.workers is not None:
            try:
                cluster = distributed.LocalCluster(
                    n_workers=spec.workers, threads_per_worker=1, processes=True,
                    dashboard_address="127.0.0.1:0", silence_logs=logging.CRITICAL)
            except Exception as exc:  # noqa: BLE001 - spawn failures of many kinds
                raise ClusterError(
                    f"could not start {spec.workers} local Dask workers ({type(exc).__name__}: "
                    f"{_one_line(exc)}); from a Python script, call the scan under "
                    f"`if __name__ == \"__main__\":` (each worker re-imports the script), or start "
                    f"workers yourself with `dask scheduler` and `dask worker ADDRESS`.") from None
            client = distributed.Client(cluster, set_as_default=False)
        else:
            try:
                client = distributed.Client(spec.address, timeout=connect_timeout, set_as_default=False)
            except (OSError, ValueError) as exc:
                raise UsageError(
                    f"cannot reach the Dask scheduler at {spec.address} ({_one_line(exc)}); start one "
                    f"with `dask scheduler` and pass the address it prints, or pass --cluster local:N."
                ) from None
        try:
            try:
                client.wait_for_workers(1, timeout=worker_timeout)
            except (TimeoutError, OSError):
                raise ClusterError(
                    f"no worker joined the Dask scheduler at {spec.describe()} within "
                    f"{worker_timeout:g} s; start workers with `dask worker {spec.describe()}`.") from None
            yield client
        finally:
            client.close()
    finally:
        if cluster is not None:
            cluster.close()


def _one_line(exc: BaseException | str, limit: int = 200) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= limit else text[:limit - 3] + "..."


def _check_positive(name: str, value: Any, minimum: int) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        raise UsageError(f"{name} must be a whole number of at least {minimum}; got {value!r}.")
    return value


def iter_cluster_results(
    entries: Sequence[ImageEntry],
    model_path: str | Path,
    model_config: ModelConfig,
    settings,
    *,
    label_index: Mapping[str, int],
    estimate_masks: bool = True,
    address: str | ClusterSpec,
    sha256: str | None = None,
    shard_size: int = DEFAULT_SHARD_SIZE,
    retries: int = DEFAULT_RETRIES,
    stats: EngineStats | None = None,
    on_done: Callable[[int, int], None] | None = None,
    connect_timeout: float = 30.0,
    worker_timeout: float = 60.0,
    curve_paths: frozenset[str] | None = None,
) -> Iterator[tuple[str, dict, dict]]:
    """Yield ``(path, record, arrays)`` for each entry, computed on a Dask cluster.

    The cluster counterpart of :func:`shortcut_audit.perimage.analyse_entries`: the same
    triples (``record`` JSON-able, with ``"skipped"`` for an image that could not be
    analysed; ``arrays`` with the heatmap, the decisive crop and the mask), one per
    entry, in the order shards finish. The caller stores and aggregates them.

    Parameters
    ----------
    entries : sequence of ImageEntry
        The images to analyse (for a resumed scan, only those missing from the store).
        Their ``file`` paths must be readable at the same place on every worker.
    model_path : path
        The .onnx file, at the same absolute path on every worker.
    model_config : ModelConfig
        The fully resolved settings of this machine's classifier
        (``OnnxClassifier.config``): labels, output kind and above all ``batch_size``
        are then the same everywhere. ``threads`` None means one onnxruntime thread per
        task on a remote cluster, this machine's cores divided by N on ``local:N``
        (threads do not change the numbers).
    settings : ScanSettings
    label_index : mapping of str to int
        Class name to output index (from the model's labels).
    estimate_masks : bool
        As :func:`analyse_entries`.
    curve_paths : frozenset of str, optional
        As :func:`analyse_entries`: the images whose curves are measured.
    address : str or ClusterSpec
        ``local:N`` or a Dask scheduler address (see :func:`parse_cluster`).
    sha256 : str, optional
        The model file's hash (``OnnxClassifier.sha256``); computed when not given.
    shard_size : int
        Images per task.
    retries : int
        Extra tries of a task that raised; a task lost with its worker is rerun by Dask.
    stats : EngineStats, optional
        Counters to add this run's passes to (pass the scan's engine stats, so progress
        and ``run`` report the cluster's passes).
    on_done : callable, optional
        ``on_done(images_done, images_total)`` after each finished task.
    connect_timeout, worker_timeout : float
        Seconds to wait for the scheduler, and for a first worker.

    Yields
    ------
    (str, dict, dict)
        ``(path, record, arrays)``, each entry's path exactly once.

    Raises
    ------
    UsageError
        Dask is not installed, ``address`` is malformed or unreachable, or a worker runs
        another version of the tool.
    ModelError
        A worker cannot load the model, or its file at that path differs.
    ClusterError
        No worker joined, the scheduler dropped the tasks, or a worker cannot see an
        image this machine can read.
    """
    spec = address if isinstance(address, ClusterSpec) else parse_cluster(address)
    _check_positive("shard_size", shard_size, 1)
    _check_positive("retries", retries, 0)
    if not isinstance(model_config, ModelConfig):
        raise UsageError(f"model_config must be a ModelConfig (the classifier's .config); "
                         f"got {type(model_config).__name__}.")
    distributed = _require_distributed()
    entries = list(entries)
    return _run(entries, model_path, model_config, settings, label_index=label_index,
                estimate_masks=estimate_masks, spec=spec, sha256=sha256, shard_size=shard_size,
                retries=retries, stats=stats, on_done=on_done, distributed=distributed,
                connect_timeout=connect_timeout, worker_timeout=worker_timeout, curve_paths=curve_paths)


def _run(entries, model_path, model_config, settings, *, label_index, estimate_masks, spec, sha256,
         shard_size, retries, stats, on_done, distributed, connect_timeout, worker_timeout, curve_paths=None):
    if not entries:
        return
    from ._version import __version__

    path = Path(model_path).absolute()
    if sha256 is None:
        from .model import _file_sha256
        sha256 = _file_sha256(path)
    if model_config.threads is None:
        model_config = dataclasses.replace(model_config, threads=_task_threads(spec))
    job = _ShardJob(model_path=str(path), model_config=model_config, sha256=sha256,
                    tool_version=__version__, settings=settings,
                    label_index=tuple(sorted(label_index.items())),
                    estimate_masks=bool(estimate_masks),
                    curve_paths=None if curve_paths is None else frozenset(curve_paths))
    by_path = {e.path: e for e in entries}
    total = len(by_path)
    run_id = uuid.uuid4().hex[:10]
    tries = retries + 1

    with _connect(spec, distributed, connect_timeout=connect_timeout,
                  worker_timeout=worker_timeout) as client:
        pending: dict[Any, list[ImageEntry]] = {}
        done = distributed.as_completed(loop=client.loop)
        count = 0

        def submit(shard: list[ImageEntry]) -> None:
            nonlocal count
            fut = client.submit(_analyse_shard, shard, job, key=f"shortcut-audit-{run_id}-{count}",
                                retries=retries, pure=False)
            count += 1
            pending[fut] = shard
            done.add(fut)

        seen: set[str] = set()
        try:
            for start in range(0, len(entries), shard_size):
                submit(entries[start:start + shard_size])
            for fut in done:
                shard = pending.pop(fut)
                if fut.status == "finished":
                    out = fut.result()
                    if isinstance(out, _Failure):
                        raise _ERRORS.get(out.kind, ModelError)(out.message)
                    results = out
                elif fut.status == "error":
                    if len(shard) > 1:        # find the image that fails: try each alone
                        for e in shard:
                            submit([e])
                        continue
                    exc = fut.exception()
                    if isinstance(exc, distributed.KilledWorker):
                        why = "analysis failed on every try: the worker running it died each time"
                    else:
                        why = f"analysis failed on every try ({tries}): {type(exc).__name__}: {_one_line(exc)}"
                    results = [(shard[0].path, {"skipped": why}, {})]
                else:
                    raise ClusterError(
                        f"the Dask scheduler at {spec.describe()} dropped the scan's tasks "
                        f"({fut.status}); the finished images are kept in the store: run the same "
                        f"command again to resume.")
                del fut
                for image, record, arrays in results:
                    if image in seen or image not in by_path:
                        continue
                    _check_visible(by_path[image], record)
                    seen.add(image)
                    if stats is not None and "skipped" not in record:
                        stats.passes += int(record.get("passes", 0))
                    yield image, record, arrays
                if on_done is not None:
                    on_done(len(seen), total)
        finally:
            if pending:
                client.cancel(list(pending), force=True)
            pending.clear()
    missing = total - len(seen)
    if missing:   # every shard finished, so this cannot happen unless a task misbehaves
        raise ClusterError(f"{missing} images came back without a result; run the same command again.")


def _task_threads(spec: ClusterSpec) -> int:
    """onnxruntime threads per task when not set: this machine's cores shared among
    ``local:N``'s single-threaded workers; 1 on a remote cluster, whose parallelism is
    its workers' threads (``dask worker --nthreads``)."""
    if spec.workers is None:
        return 1
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    return max(1, cores // spec.workers)


def _check_visible(entry: ImageEntry, record: dict) -> None:
    """A worker that cannot find a file this machine reads is a set-up error, not a skip."""
    field = _NOT_FOUND.get(record.get("skipped", ""))
    if field is None:
        return
    file = getattr(entry, field)
    if file is not None and Path(file).exists():
        raise ClusterError(
            f"a worker cannot find {file}, which this machine reads; every worker must see the "
            f"images (and masks) at the same paths: share the folder or copy it to the same place.")
