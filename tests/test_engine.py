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
