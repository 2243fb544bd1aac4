"""Tests of cluster.py: the per-image half of a scan on Dask, against a local scan.

The reference everywhere is the local scan itself (scan.py on one process): a cluster
scan must give the same audit.json byte for byte (apart from "run") and the same
per-image arrays bit for bit, whatever the number of workers, the order tasks finish
in, a worker killed midway, or an interruption and resume. The models are the linear
planted-corner models of tests/scan_fixtures.py, so the audit has a known finding
(alpha, fixed-position) and the comparison is not between two empty audits.
"""

from __future__ import annotations

import dataclasses
import inspect
import json
import os
import signal
import sys
import threading
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from scan_fixtures import corner_model, make_dataset  # noqa: E402
from shortcut_audit import cluster  # noqa: E402
from shortcut_audit import dataset as dataset_module  # noqa: E402
from shortcut_audit.cluster import (ClusterError, check_cluster, iter_cluster_results,  # noqa: E402
                                    parse_cluster)
from shortcut_audit.dataset import Skip  # noqa: E402
from shortcut_audit.listing import list_images  # noqa: E402
from shortcut_audit.errors import ModelError, UsageError  # noqa: E402
from shortcut_audit.model import ModelConfig, OnnxClassifier  # noqa: E402
from shortcut_audit.occlusion import GridPlan  # noqa: E402
from shortcut_audit.scan import ScanSettings, analyse_entries, audit as run_audit  # noqa: E402
from shortcut_audit.store import dumps, to_jsonable  # noqa: E402

# the module (the package re-exports the function scan under the same name)
scan_module = sys.modules["shortcut_audit.scan"]

FAST = ScanSettings(confirm=False)
# The batch size is fixed on both sides: a measured one could differ between runs.
CONFIG = ModelConfig(batch_size=16)


def _audit_text(out: Path) -> str:
    """audit.json in the project's JSON writer's form, without the "run" field."""
    audit = json.loads((out / "audit.json").read_text(encoding="utf-8"))
    audit.pop("run")
    return dumps(audit)


def _arrays(out: Path) -> dict[str, dict[str, np.ndarray]]:
    got = {}
    for npz in sorted((out / "results").glob("*.npz")):
        with np.load(npz) as data:
            got[npz.name] = {k: data[k] for k in data.files}
    return got


def _assert_same_store(a: Path, b: Path) -> None:
    left, right = _arrays(a), _arrays(b)
    assert sorted(left) == sorted(right)
    for name in left:
        assert sorted(left[name]) == sorted(right[name])
        for k in left[name]:
            np.testing.assert_array_equal(left[name][k], right[name][k], err_msg=f"{name}:{k}")


@pytest.fixture(scope="module")
def workers():
    """A LocalCluster of 2 worker processes (one thread each), shared by the tests that
    bring their own cluster; the kill test runs last, as it restarts a worker."""
    import logging
    lc = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address="127.0.0.1:0", silence_logs=logging.CRITICAL)
    client = distributed.Client(lc, set_as_default=False)
    yield client
    client.close()
    lc.close()


@pytest.fixture(scope="module")
def threads_cluster():
    """Two in-process workers: starts in a blink and shares this process's monkeypatches."""
    import logging
    lc = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address="127.0.0.1:0", silence_logs=logging.CRITICAL)
    yield lc.scheduler_address
    lc.close()


@pytest.fixture
def cluster_scan(monkeypatch):
    """``run(data, model, out, address, **scan_kwargs)``: run_audit() with its per-image half
    on ``address``, recording what each call submitted and what came back.

    Once run_audit() has a ``cluster`` parameter it is called with it; until then
    scan.analyse_entries is replaced by the call run_audit(cluster=...) makes."""
    submitted: list[list[str]] = []
    returned: Counter = Counter()
    live = []
    real = cluster.iter_cluster_results

    def recording(entries, *args, **kwargs):
        entries = list(entries)
        kwargs.setdefault("shard_size", 4)
        submitted.append([e.path for e in entries])

        def gen():
            for item in real(entries, *args, **kwargs):
                returned[item[0]] += 1
                yield item
        g = gen()
        live.append(g)
        return g

    monkeypatch.setattr(cluster, "iter_cluster_results", recording)
    wired = "cluster" in inspect.signature(scan_module.audit).parameters
    where = {}
    if not wired:
        local = scan_module.analyse_entries

        def analyse_on_cluster(todo, classifier, settings, *, estimate_masks, label_index, engine):
            if "address" not in where:          # a plain local run_audit() in the same test
                return local(todo, classifier, settings, estimate_masks=estimate_masks,
                             label_index=label_index, engine=engine)
            return cluster.iter_cluster_results(
                todo, classifier.path, classifier.config, settings, label_index=label_index,
                estimate_masks=estimate_masks, address=where["address"], sha256=classifier.sha256,
                stats=engine.stats)
        monkeypatch.setattr(scan_module, "analyse_entries", analyse_on_cluster)

    def run(data, model, out, address, **kwargs):
        kwargs = dict(dict(model_config=CONFIG, settings=FAST), **kwargs)
        if wired:
            return scan_module.audit(data, model, out=out, cluster=address, **kwargs)
        where["address"] = address
        try:
            return scan_module.audit(data, model, out=out, **kwargs)
        finally:
            where.clear()

    run.submitted, run.returned = submitted, returned
    run.close = lambda: [g.close() for g in live]
    return run


# ------------------------------------------------------------------ parsing, install


def test_parse_cluster_reads_local_and_addresses():
    assert parse_cluster("local:3").workers == 3
    assert parse_cluster(" tcp://10.0.0.5:8786 ").address == "tcp://10.0.0.5:8786"
    for bad in ("local:0", "local:two", "local:", "", "tcp://a b"):
        with pytest.raises(UsageError, match="--cluster"):
            parse_cluster(bad)


def test_missing_dask_is_a_usage_error_naming_the_extra(monkeypatch, tmp_path):
    monkeypatch.setitem(sys.modules, "distributed", None)   # import distributed -> ImportError
    with pytest.raises(UsageError, match=r'pip install "shortcut_audit\[cluster\]"'):
        iter_cluster_results([], tmp_path / "m.onnx", CONFIG, FAST, label_index={}, address="local:2")
    with pytest.raises(UsageError, match=r'pip install "shortcut_audit\[cluster\]"'):
        check_cluster("tcp://10.0.0.5:8786")


# ------------------------------------------------------------------ same audit


def test_local_cluster_of_two_workers_gives_the_same_audit_json(tmp_path, cluster_scan):
    data = make_dataset(tmp_path / "data", n=8)
    m = corner_model(tmp_path / "m.onnx")
    # curves on 3 images a class: the cluster's shards must measure the same sample
    settings = dataclasses.replace(FAST, curve_images=3)
    ref = run_audit(data, m, out=tmp_path / "local", model_config=CONFIG, settings=settings)
    got = cluster_scan(data, m, tmp_path / "cluster", "local:2", settings=settings)
    # the audit is not trivially empty: the planted corner is found (test_scan.py)
    assert [(f.class_name, f.kind) for f in got.findings] == [("alpha", "fixed-position")]
    assert sum(1 for im in got.images if im.deletion_area is not None) == 3 * 3
    assert _audit_text(tmp_path / "cluster") == _audit_text(tmp_path / "local")
    _assert_same_store(tmp_path / "local", tmp_path / "cluster")
    # all 24 images went to the cluster, each came back once, and the passes were counted
    assert len(cluster_scan.submitted) == 1 and len(cluster_scan.submitted[0]) == 24
    assert set(cluster_scan.returned.values()) == {1} and len(cluster_scan.returned) == 24
    assert got.run["passes_this_run"] == ref.run["passes_this_run"] > 0


def test_interrupted_cluster_scan_resumes_with_only_the_missing_images(tmp_path, cluster_scan, workers):
    data = make_dataset(tmp_path / "data", n=8)
    m = corner_model(tmp_path / "m.onnx")
    run_audit(data, m, out=tmp_path / "local", model_config=CONFIG, settings=FAST)
    address = workers.scheduler.address

    class Stop(Exception):
        pass

    def stop_after_some(event):
        if event["done"] >= 6:
            raise Stop

    with pytest.raises(Stop):
        cluster_scan(data, m, tmp_path / "cluster", address, progress=stop_after_some)
    cluster_scan.close()                          # what dropping the scan's frame does
    kept = {json.loads(p.read_text())["path"]
            for p in (tmp_path / "cluster" / "results").glob("*.json") if p.name != "fingerprint.json"}
    assert 6 <= len(kept) < 24
    final = cluster_scan(data, m, tmp_path / "cluster", address)
    assert final.run["resumed_images"] == len(kept)
    # the second call submitted exactly the images the store lacked
    assert sorted(cluster_scan.submitted[1]) == sorted(set(cluster_scan.submitted[0]) - kept)
    assert _audit_text(tmp_path / "cluster") == _audit_text(tmp_path / "local")
    _assert_same_store(tmp_path / "local", tmp_path / "cluster")


# ------------------------------------------------------------------ failures


def test_failing_image_is_skipped_with_reason_and_its_shard_mates_survive(tmp_path, monkeypatch,
                                                                         threads_cluster):
    data = make_dataset(tmp_path / "data", n=3)
    m = corner_model(tmp_path / "m.onnx")
    entries, _ = list_images(data)
    clf = OnnxClassifier(m, CONFIG)
    labels = {name: i for i, name in enumerate(clf.labels)}
    ref = {p: (r, a) for p, r, a in analyse_entries(entries, clf, FAST, label_index=labels)}
    poison, tries = "beta/beta_01.png", []
    real_record = dataset_module._record

    def flaky(entry, opts):
        if entry.path == poison:
            tries.append(threading.get_ident())
            raise RuntimeError("decoder exploded")    # not an ImageSkip: the task itself fails
        return real_record(entry, opts)

    monkeypatch.setattr(dataset_module, "_record", flaky)
    done = []
    got = list(iter_cluster_results(entries, m, clf.config, FAST, label_index=labels,
                                    address=threads_cluster, shard_size=4, retries=1,
                                    on_done=lambda d, t: done.append((d, t))))
    assert Counter(p for p, _, _ in got) == Counter(e.path for e in entries)   # none lost, none twice
    by_path = {p: (r, a) for p, r, a in got}
    assert by_path[poison] == ({"skipped": "analysis failed on every try (2): RuntimeError: "
                                           "decoder exploded"}, {})
    # 1 + retries tries in its shard of 4, then 1 + retries alone
    assert len(tries) == 4
    for p, (record, arrays) in ref.items():
        if p != poison:
            assert to_jsonable(by_path[p][0]) == to_jsonable(record)
            for k in arrays:
                np.testing.assert_array_equal(by_path[p][1][k], arrays[k])
    assert done[-1] == (9, 9)


def test_worker_with_another_model_file_stops_the_scan(tmp_path, threads_cluster):
    data = make_dataset(tmp_path / "data", n=1)
    m = corner_model(tmp_path / "m.onnx")
    entries, _ = list_images(data)
    clf = OnnxClassifier(m, CONFIG)
    with pytest.raises(ModelError, match="copy the same file to the same path on every worker"):
        list(iter_cluster_results(entries, m, clf.config, FAST, sha256="0" * 64,
                                  label_index={n: i for i, n in enumerate(clf.labels)},
                                  address=threads_cluster))


def test_worker_that_cannot_see_an_image_stops_the_scan(tmp_path, monkeypatch, threads_cluster):
    data = make_dataset(tmp_path / "data", n=1)
    m = corner_model(tmp_path / "m.onnx")
    entries, _ = list_images(data)
    clf = OnnxClassifier(m, CONFIG)
    real_record = dataset_module._record
    monkeypatch.setattr(dataset_module, "_record", lambda e, o: Skip(path=e.path, reason="file not found")
                        if e.path == "gamma/gamma_00.png" else real_record(e, o))
    with pytest.raises(ClusterError, match="every worker must see the images"):
        list(iter_cluster_results(entries, m, clf.config, FAST,
                                  label_index={n: i for i, n in enumerate(clf.labels)},
                                  address=threads_cluster))


def test_worker_killed_midway_loses_nothing_and_counts_nothing_twice(tmp_path, cluster_scan, workers):
    # a denser grid (841 passes an image) so each task of 4 images runs long enough to
    # be caught in flight
    settings = ScanSettings(confirm=False, plan=GridPlan(patch=4, stride=1))
    data = make_dataset(tmp_path / "data", n=12)
    m = corner_model(tmp_path / "m.onnx")
    run_audit(data, m, out=tmp_path / "local", model_config=CONFIG, settings=settings)
    pids = workers.run(os.getpid)
    killed = []

    def kill_one_busy_worker(event):
        if killed or event["done"] < 8:
            return
        busy = [w for w, keys in workers.processing().items() if keys and w in pids]
        if busy:
            os.kill(pids[busy[0]], signal.SIGKILL)
            killed.append(busy[0])

    got = cluster_scan(data, m, tmp_path / "cluster", workers.scheduler.address,
                       settings=settings, progress=kill_one_busy_worker)
    assert killed, "no worker was busy when the test tried to kill one"
    assert pids[killed[0]] not in workers.run(os.getpid).values()   # it is gone for real
    assert len(got.images) == 36 and got.skipped == []
    assert set(cluster_scan.returned.values()) == {1} and len(cluster_scan.returned) == 36
    assert _audit_text(tmp_path / "cluster") == _audit_text(tmp_path / "local")
    _assert_same_store(tmp_path / "local", tmp_path / "cluster")
