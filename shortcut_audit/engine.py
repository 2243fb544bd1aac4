"""The one batching loop: many per-image jobs, packed into full model batches.

Every stage that needs forward passes (heatmaps, decisive areas, deletion curves,
counterfactual tests) is written as a *job*: a generator that yields arrays of images
to score, ``(k, H, W, C)``, receives their scores ``(k, K)`` back, and finally returns
its result. The engine runs many jobs at once, packs their requests into batches of
exactly ``batch_size`` rows (splitting and joining requests as needed), and keeps the
model busy: while one batch runs in a worker thread, the next is already queued and
the jobs whose results came back prepare their next requests on the calling thread.

A job may also run ahead of its scores: it yields :class:`Request` ``(images,
ahead=True)`` to queue images without waiting; the value sent back is None while it has
fewer than ``AHEAD_DEPTH`` requests outstanding, else the scores of its oldest one (the
scores always come back in the order asked). It yields :data:`NEXT` to wait for the
scores of its oldest outstanding request. One image's heatmap so keeps the model busy
while its next batch is being made.

Preparation: with ``prepare`` (e.g. :meth:`OnnxClassifier.prepare
<shortcut_audit.model.OnnxClassifier.prepare>`, pixels to the session's input tensor), the
engine prepares every request on the calling thread as it is queued, so the worker
thread runs the model alone; a request marked ``prepared=True`` is already in that form.

Memory stays flat: the engine starts a new job only while fewer than about two
batches of rows are waiting, and a job has at most ``AHEAD_DEPTH`` chunks outstanding.

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

__all__ = ["PassEngine", "Job", "EngineStats", "Request", "NEXT", "AHEAD_DEPTH", "SCORES", "run_job",
           "make_scorer"]

#: The scores a heatmap can map the drop of: probabilities or logits.
SCORES = ("prob", "logit")

Job = Generator[Any, np.ndarray, Any]

#: Requests a job may have outstanding while it runs ahead.
AHEAD_DEPTH = 2


@dataclass(frozen=True)
class Request:
    """Images for the engine to score, with how to take them.

    ``images`` are (k, H, W, C) pixels, or with ``prepared=True`` (k, ...) rows already in
    the scorer's input form. With ``ahead=True`` the job does not wait for their scores
    (see the module's description). A bare array is ``Request(array)``.
    """

    images: np.ndarray
    ahead: bool = False
    prepared: bool = False


class _Next:
    def __repr__(self) -> str:
        return "NEXT"


#: Yielded by a job to wait for the scores of its oldest outstanding request.
NEXT = _Next()


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
    __slots__ = ("job_id", "array", "offset", "parts", "done_rows", "result")

    def __init__(self, job_id: int, array: np.ndarray):
        self.job_id = job_id
        self.array = array
        self.offset = 0          # rows handed to batches so far
        self.parts: list[tuple[int, np.ndarray]] = []
        self.done_rows = 0       # rows whose scores came back
        self.result: np.ndarray | None = None

    @property
    def rows(self) -> int:
        return len(self.array)


class PassEngine:
    """Run jobs against a scorer in full, overlapped batches.

    Parameters
    ----------
    scorer : callable
        ``scorer(batch (N, H, W, C) float32) -> (N, K)`` scores; with ``prepare``, it takes
        prepared rows instead.
    batch_size : int
        Rows per call of ``scorer``.
    overlap : bool, keyword-only
        Run the scorer in a worker thread so the next batch is prepared meanwhile.
        onnxruntime releases the GIL while it computes, so this overlaps for real.
    on_batch : callable, optional, keyword-only
        Called with the number of rows after each batch (for progress bars).
    prepare : callable, optional, keyword-only
        ``prepare(pixels (k, H, W, C)) -> (k, ...)``, run on the calling thread for every
        request not marked ``prepared``. Without it, requests go to ``scorer`` as they are.
    """

    def __init__(self, scorer: Callable[[np.ndarray], np.ndarray], *, batch_size: int,
                 overlap: bool = True, on_batch: Callable[[int], None] | None = None,
                 prepare: Callable[[np.ndarray], np.ndarray] | None = None):
        if not isinstance(batch_size, int) or batch_size < 1:
            raise UsageError(f"--batch-size must be a whole number of at least 1; got {batch_size!r}.")
        self.scorer = scorer
        self.batch_size = batch_size
        self.overlap = overlap
        self.on_batch = on_batch
        self.prepare = prepare
        self.stats = EngineStats()

    @classmethod
    def for_classifier(cls, classifier, score: str = "prob", **kw) -> "PassEngine":
        """An engine over a classifier's ``score_prepared``, preparing on the calling thread.

        ``score`` is ``"prob"`` or ``"logit"``. A classifier without ``prepare`` and
        ``score_prepared`` (a plain object with ``predict`` and ``logits``) is scored as
        it is. Other keywords go to the constructor; ``batch_size`` defaults to the
        classifier's.
        """
        kw.setdefault("batch_size", classifier.batch_size)
        if hasattr(classifier, "prepare") and hasattr(classifier, "score_prepared"):
            def scorer(rows: np.ndarray) -> np.ndarray:
                return classifier.score_prepared(rows, score=score)
            return cls(scorer, prepare=classifier.prepare, **kw)
        return cls(make_scorer(classifier, score), **kw)

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
        outstanding: dict[int, deque[_Request]] = {}   # job_id -> its requests, oldest first
        queue: deque[_Request] = deque()       # requests with rows not yet batched
        inflight: deque[tuple[Future | np.ndarray, list[tuple[_Request, int, int]]]] = deque()
        finished: list[tuple[Hashable, Any]] = []
        exhausted = False
        next_id = 0
        executor = ThreadPoolExecutor(max_workers=1) if self.overlap else None

        def queued_rows() -> int:
            return sum(r.rows - r.offset for r in queue)

        def end(job_id: int, result: Any) -> None:
            finished.append((gens.pop(job_id)[0], result))
            outstanding.pop(job_id, None)   # rows already queued are scored and dropped

        def fail(job_id: int, message: str) -> None:
            gens[job_id][1].close()
            end(job_id, UsageError(message))

        def advance(job_id: int, value: np.ndarray | None) -> None:
            """Send ``value`` to the job and take its requests until it waits on one."""
            mine = outstanding.setdefault(job_id, deque())
            while True:
                _key, gen = gens[job_id]
                try:
                    request = gen.send(value)
                except StopIteration as stop:
                    end(job_id, stop.value)
                    return
                except Exception as exc:  # the job's own failure, reported as its result
                    end(job_id, exc)
                    return
                value = None
                if request is NEXT:
                    if not mine:
                        fail(job_id, "a job yielded NEXT with no request outstanding.")
                        return
                else:
                    if not isinstance(request, Request):
                        request = Request(request)
                    if not request.ahead and mine:
                        fail(job_id, "a job asked to wait for a request while earlier ones run ahead; "
                                     "yield NEXT for those first.")
                        return
                    array = np.asarray(request.images)
                    if request.prepared and self.prepare is None:
                        fail(job_id, "a job sent prepared rows to an engine that prepares nothing; "
                                     "give the engine the prepare function the job used.")
                        return
                    if request.prepared:
                        ok = array.ndim >= 2 and len(array) > 0
                    else:
                        array = array.astype(np.float32, copy=False)
                        ok = array.ndim == 4 and len(array) > 0
                    if not ok:
                        fail(job_id, f"a job asked to score an array of shape {array.shape}; "
                                     "it must be (k>0, H, W, C).")
                        return
                    if self.prepare is not None and not request.prepared:
                        array = self.prepare(array)
                    req = _Request(job_id, array)
                    mine.append(req)
                    queue.append(req)
                    if request.ahead and len(mine) < AHEAD_DEPTH:
                        continue            # running ahead: the job makes its next request
                if mine[0].result is None:
                    return                  # waits for its oldest request
                value = mine.popleft().result

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
                    req.result = req.parts[0][1] if len(req.parts) == 1 else np.concatenate(
                        [p[1] for p in req.parts], axis=0)
                    mine = outstanding.get(req.job_id)
                    if mine and mine[0] is req:      # the job waits for exactly this one
                        mine.popleft()
                        advance(req.job_id, req.result)

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


def make_scorer(classifier, score: str) -> Callable[[np.ndarray], np.ndarray]:
    """The function an engine calls on pixels: probabilities, or logits when ``score="logit"``
    (one of :data:`SCORES`)."""
    if score == "logit":
        if not hasattr(classifier, "logits"):
            raise UsageError("--score logit needs a classifier with a logits() method.")
        return classifier.logits
    return classifier.predict


def run_job(scorer: Callable[[np.ndarray], np.ndarray], job: Job, *, batch_size: int = 64) -> Any:
    """Run a single job to its result (raising its exception, if any)."""
    engine = PassEngine(scorer, batch_size=batch_size, overlap=False)
    for _key, result in engine.run([(0, job)]):
        if isinstance(result, Exception):
            raise result
        return result
    raise RuntimeError("job produced no result")
