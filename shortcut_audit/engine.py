"""The one batching loop: many per-image jobs, packed into full model batches.

Every stage that needs forward passes (heatmaps, decisive areas, deletion curves,
counterfactual tests) is written as a *job*: a generator that yields arrays of images
to score, ``(k, H, W, C)``, receives their scores ``(k, K)`` back, and finally returns
its result. The engine runs many jobs at once, packs their requests into batches of
exactly ``batch_size`` rows (splitting and joining requests as needed), and keeps the
model busy: while one batch runs in a worker thread, the next is already queued and
the jobs whose results came back prepare their next requests on the calling thread.

Memory stays flat: the engine starts a new job only while fewer than about two
batches of rows are waiting, and a job yields at most one chunk at a time.

>>> import numpy as np
>>> def job(x):
...     scores = yield np.full((3, 1, 1, 1), x, np.float32)
...     return float(scores.sum())
>>> engine = PassEngine(lambda b: b.reshape(len(b), 1) * 2, batch_size=4, overlap=False)
>>> sorted(engine.run([("a", job(1.0)), ("b", job(2.0))]))
[('a', 6.0), ('b', 12.0)]
"""

from __future__ import annotations

import time
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Callable, Generator, Hashable, Iterable, Iterator

import numpy as np

from .errors import UsageError

__all__ = ["PassEngine", "Job", "EngineStats", "run_job"]

Job = Generator[np.ndarray, np.ndarray, Any]


@dataclass
class EngineStats:
    """Counters of one engine, read by progress bars and the benchmark."""

    passes: int = 0
    batches: int = 0
    model_seconds: float = 0.0
    started: float = field(default_factory=time.perf_counter)

    @property
    def elapsed(self) -> float:
        return time.perf_counter() - self.started

    @property
    def passes_per_second(self) -> float:
        return self.passes / self.elapsed if self.elapsed > 0 else 0.0


class _Request:
    __slots__ = ("job_id", "array", "offset", "parts", "done_rows")

    def __init__(self, job_id: int, array: np.ndarray):
        self.job_id = job_id
        self.array = array
        self.offset = 0          # rows handed to batches so far
        self.parts: list[tuple[int, np.ndarray]] = []
        self.done_rows = 0       # rows whose scores came back

    @property
    def rows(self) -> int:
        return len(self.array)


class PassEngine:
    """Run jobs against a scorer in full, overlapped batches.

    Parameters
    ----------
    scorer : callable
        ``scorer(batch (N, H, W, C) float32) -> (N, K)`` scores.
    batch_size : int
        Rows per call of ``scorer``.
    overlap : bool, keyword-only
        Run the scorer in a worker thread so the next batch is prepared meanwhile.
        onnxruntime releases the GIL while it computes, so this overlaps for real.
    on_batch : callable, optional, keyword-only
        Called with the number of rows after each batch (for progress bars).
    """

    def __init__(self, scorer: Callable[[np.ndarray], np.ndarray], *, batch_size: int,
                 overlap: bool = True, on_batch: Callable[[int], None] | None = None):
        if not isinstance(batch_size, int) or batch_size < 1:
            raise UsageError(f"--batch-size must be a whole number of at least 1; got {batch_size!r}.")
        self.scorer = scorer
        self.batch_size = batch_size
        self.overlap = overlap
        self.on_batch = on_batch
        self.stats = EngineStats()

    # ------------------------------------------------------------------ scoring
    def _score(self, batch: np.ndarray) -> np.ndarray:
        t0 = time.perf_counter()
        out = np.asarray(self.scorer(batch))
        self.stats.model_seconds += time.perf_counter() - t0
        if out.ndim != 2 or len(out) != len(batch):
            raise UsageError(
                f"the scorer returned shape {out.shape} for a batch of {len(batch)}; it must return (N, K)."
            )
        return out

    # --------------------------------------------------------------------- run
    def run(self, jobs: Iterable[tuple[Hashable, Job]]) -> Iterator[tuple[Hashable, Any]]:
        """Run every job; yield ``(key, result)`` as each finishes.

        A job that raises yields ``(key, exception)`` instead of stopping the others.
        Results come in a deterministic order for a given batch size.
        """
        job_iter = iter(jobs)
        gens: dict[int, tuple[Hashable, Job]] = {}
        waiting: dict[int, _Request] = {}      # job_id -> its request in progress
        queue: deque[_Request] = deque()       # requests with rows not yet batched
        inflight: deque[tuple[Future | np.ndarray, list[tuple[_Request, int, int]]]] = deque()
        finished: list[tuple[Hashable, Any]] = []
        exhausted = False
        next_id = 0
        executor = ThreadPoolExecutor(max_workers=1) if self.overlap else None

        def queued_rows() -> int:
            return sum(r.rows - r.offset for r in queue)

        def advance(job_id: int, value: np.ndarray | None) -> None:
            key, gen = gens[job_id]
            try:
                request = gen.send(value) if value is not None else next(gen)
            except StopIteration as stop:
                finished.append((key, stop.value))
                del gens[job_id]
                return
            except Exception as exc:  # the job's own failure, reported as its result
                finished.append((key, exc))
                del gens[job_id]
                return
            request = np.asarray(request, dtype=np.float32)
            if request.ndim != 4 or len(request) == 0:
                finished.append((key, UsageError(
                    f"a job asked to score an array of shape {request.shape}; it must be (k>0, H, W, C).")))
                gens.pop(job_id)[1].close()
                return
            req = _Request(job_id, request)
            waiting[job_id] = req
            queue.append(req)

        def top_up() -> None:
            nonlocal exhausted, next_id
            while not exhausted and queued_rows() < 2 * self.batch_size:
                try:
                    key, gen = next(job_iter)
                except StopIteration:
                    exhausted = True
                    break
                job_id = next_id
                next_id += 1
                gens[job_id] = (key, gen)
                advance(job_id, None)

        def build_batch() -> tuple[np.ndarray, list[tuple[_Request, int, int]]]:
            pieces: list[tuple[_Request, int, int]] = []
            arrays = []
            room = self.batch_size
            while queue and room > 0:
                req = queue[0]
                take = min(room, req.rows - req.offset)
                pieces.append((req, req.offset, req.offset + take))
                arrays.append(req.array[req.offset:req.offset + take])
                req.offset += take
                room -= take
                if req.offset == req.rows:
                    queue.popleft()
            batch = arrays[0] if len(arrays) == 1 else np.concatenate(arrays, axis=0)
            return batch, pieces

        def submit() -> None:
            batch, pieces = build_batch()
            if executor is not None:
                inflight.append((executor.submit(self._score, batch), pieces))
            else:
                inflight.append((self._score(batch), pieces))

        def collect() -> None:
            handle, pieces = inflight.popleft()
            scores = handle.result() if isinstance(handle, Future) else handle
            self.stats.passes += len(scores)
            self.stats.batches += 1
            if self.on_batch is not None:
                self.on_batch(len(scores))
            pos = 0
            for req, start, stop in pieces:
                n = stop - start
                req.parts.append((start, scores[pos:pos + n]))
                pos += n
                req.done_rows += n
                if req.done_rows == req.rows:
                    req.parts.sort(key=lambda p: p[0])
                    result = req.parts[0][1] if len(req.parts) == 1 else np.concatenate(
                        [p[1] for p in req.parts], axis=0)
                    del waiting[req.job_id]
                    advance(req.job_id, result)

        try:
            while True:
                top_up()
                # Keep up to two batches in flight: one running, one queued behind it.
                while queue and len(inflight) < 2 and (
                        queued_rows() >= self.batch_size or exhausted or not inflight):
                    submit()
                    top_up()
                if finished:
                    yield from finished
                    finished.clear()
                if inflight:
                    collect()
                    continue
                if not queue and exhausted and not gens:
                    break
                if not queue and not inflight and gens:
                    # every live job is waiting on nothing: cannot happen unless a job misbehaves
                    raise RuntimeError("engine stalled: jobs are alive but nothing is queued")
            if finished:
                yield from finished
        finally:
            for _key, gen in list(gens.values()):
                gen.close()
            if executor is not None:
                executor.shutdown(wait=True, cancel_futures=True)


def run_job(scorer: Callable[[np.ndarray], np.ndarray], job: Job, *, batch_size: int = 64) -> Any:
    """Run a single job to its result (raising its exception, if any)."""
    engine = PassEngine(scorer, batch_size=batch_size, overlap=False)
    for _key, result in engine.run([(0, job)]):
        if isinstance(result, Exception):
            raise result
        return result
    raise RuntimeError("job produced no result")
