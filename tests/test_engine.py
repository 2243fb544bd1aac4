"""Tests of engine.py: the batching loop packs requests into full batches, in order."""

import numpy as np
import pytest

from shortcut_audit.engine import PassEngine, run_job


def _job(value, sizes):
    total = 0.0
    for k in sizes:
        scores = yield np.full((k, 2, 2, 1), value, np.float32)
        assert scores.shape == (k, 1)
        total += float(scores.sum())
    return total


@pytest.mark.parametrize("overlap", [False, True])
@pytest.mark.parametrize("batch", [1, 3, 8, 50])
def test_results_independent_of_batching(overlap, batch):
    calls = []

    def scorer(b):
        calls.append(len(b))
        return b.reshape(len(b), -1)[:, :1] * 2.0

    engine = PassEngine(scorer, batch_size=batch, overlap=overlap)
    jobs = [(i, _job(float(i), [1, 5, 2])) for i in range(7)]
    got = dict(engine.run(jobs))
    # each job scores 8 rows of value i, doubled
    assert got == {i: 16.0 * i for i in range(7)}
    assert sum(calls) == 56 == engine.stats.passes
    # Batches are packed: at most one partly filled batch per request depth (3 here),
    # beyond the ceil(rows / batch) a perfect packing needs.
    assert len(calls) <= -(-56 // batch) + 3
    assert max(calls) <= batch


def test_job_failure_is_reported_not_raised():
    def bad():
        yield np.zeros((1, 2, 2, 1), np.float32)
        raise ValueError("boom")

    engine = PassEngine(lambda b: np.zeros((len(b), 1)), batch_size=4, overlap=False)
    got = dict(engine.run([("a", bad()), ("b", _job(1.0, [2]))]))
    assert isinstance(got["a"], ValueError)
    assert got["b"] == 0.0


def test_scorer_shape_is_checked():
    with pytest.raises(Exception, match=r"must return \(N, K\)"):
        run_job(lambda b: np.zeros(len(b)), _job(1.0, [2]))


# ------------------------------------------------------------- running ahead

from shortcut_audit.engine import AHEAD_DEPTH, NEXT, Request  # noqa: E402


def _ahead_job(n, log):
    """Asks for n one-row requests without waiting; logs what it makes and gets."""
    got = []
    for j in range(n):
        log.append(("made", j))
        value = yield Request(np.full((1, 1, 1, 1), j, np.float32), ahead=True)
        if value is not None:
            log.append(("took", len(got)))
            got.append(float(value[0, 0]))
    while len(got) < n:
        value = yield NEXT
        log.append(("took", len(got)))
        got.append(float(value[0, 0]))
    return got


@pytest.mark.parametrize("overlap", [False, True])
@pytest.mark.parametrize("batch", [1, 2, 5])
def test_a_job_running_ahead_gets_its_scores_in_order(overlap, batch):
    log = []
    engine = PassEngine(lambda b: b.reshape(len(b), 1) * 10.0, batch_size=batch, overlap=overlap)
    got = dict(engine.run([("a", _ahead_job(6, log))]))
    assert got["a"] == [0.0, 10.0, 20.0, 30.0, 40.0, 50.0]
    # it made its second request before it took the scores of the first, and never had
    # more than AHEAD_DEPTH requests outstanding
    assert log.index(("made", 1)) < log.index(("took", 0))
    outstanding = 0
    for kind, _j in log:
        outstanding += 1 if kind == "made" else -1
        assert 0 <= outstanding <= AHEAD_DEPTH


def test_ahead_jobs_mixed_with_waiting_jobs():
    engine = PassEngine(lambda b: b.reshape(len(b), 1) + 1.0, batch_size=4, overlap=True)
    def waiting(value):
        total = 0.0
        for k in (3, 2):
            total += float((yield np.full((k, 1, 1, 1), value, np.float32)).sum())
        return total

    jobs = [(("ahead", i), _ahead_job(5, [])) for i in range(3)] + \
           [(("wait", i), waiting(float(i))) for i in range(3)]
    got = dict(engine.run(jobs))
    assert all(got[("ahead", i)] == [1.0, 2.0, 3.0, 4.0, 5.0] for i in range(3))
    # reference: each waiting job's rows are i + 1, five of them
    assert all(got[("wait", i)] == 5 * (i + 1.0) for i in range(3))


def _bad_next():
    yield NEXT


def _wait_behind_ahead():
    yield Request(np.zeros((1, 2, 2, 1), np.float32), ahead=True)
    yield np.zeros((1, 2, 2, 1), np.float32)


def _prepared_rows():
    yield Request(np.zeros((2, 3)), prepared=True)


@pytest.mark.parametrize("job, match", [
    (_bad_next, "NEXT with no request outstanding"),
    (_wait_behind_ahead, "yield NEXT for those first"),
    (_prepared_rows, "prepares nothing"),
])
def test_misused_requests_fail_that_job_alone(job, match):
    engine = PassEngine(lambda b: np.zeros((len(b), 1)), batch_size=4, overlap=False)
    got = dict(engine.run([("bad", job()), ("good", _job(1.0, [2]))]))
    assert isinstance(got["bad"], Exception) and match in str(got["bad"])
    assert got["good"] == 0.0


def test_prepare_runs_on_pixel_requests_only():
    seen = []

    def scorer(rows):
        seen.append(rows.shape)
        return rows[:, :1].astype(np.float64)

    def job():
        a = yield np.full((2, 2, 2, 1), 3.0, np.float32)               # pixels: prepared
        b = yield Request(np.full((2, 5), 7.0), prepared=True)         # already rows
        return float(a.sum()), float(b.sum())

    engine = PassEngine(scorer, batch_size=2, overlap=False,
                        prepare=lambda px: px.reshape(len(px), -1).sum(axis=1, keepdims=True))
    got = dict(engine.run([(0, job())]))
    assert got[0] == (2 * 12.0, 2 * 7.0)     # each pixel image sums to 4 * 3
    assert seen == [(2, 1), (2, 5)]
