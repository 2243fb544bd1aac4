"""Throughput of the per-image half of a scan: one process, and 1 or 2 local Dask workers.

Not a test (nothing here is timed in CI). It generates a labelled set (the planted-
corner images of tests/scan_fixtures.py, 3 classes) and a model, then times the part
of a scan that a cluster spreads (decode, occlusion passes, statistics):

- ``local``: :func:`shortcut_audit.scan.analyse_entries` in this process, onnxruntime
  with its default threads (all cores), as ``shortcut-audit scan`` runs it;
- ``workers=N``: :func:`shortcut_audit.cluster.iter_cluster_results` on a LocalCluster
  of N worker processes, one thread each (``--cluster local:N``), already started and
  warmed up (model loaded on every worker): start-up is reported on its own line.

Each figure is the best of ``--repeat`` rounds, each round running every configuration
once (so a busy spell on a shared machine does not fall on one only); ratios are
images/s against ``local``.
Every run's results are checked equal to the local ones (store JSON form, arrays bit
for bit), so a fast wrong answer cannot win. On a 2-core machine expect ratios near 1
or below: one process already keeps both cores busy (onnxruntime threads plus the
engine's overlap), and the workers add serialisation and scheduling on the same cores.
Gains need more cores or more machines.

Usage::

    python bench/cluster_bench.py                 # 201 images, 32x32 linear model
    python bench/cluster_bench.py --model conv    # a small conv net at 64x64: heavier passes
    python bench/cluster_bench.py --images 99 --workers 1 2 4
"""

from __future__ import annotations

import argparse
import logging
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))
sys.path.insert(0, str(ROOT))


def conv_model(path: Path, *, size: int = 64, seed: int = 0) -> Path:
    """A small random conv net (3 -> 16 -> 32 channels, global pool, 3 classes) at size^2."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    rng = np.random.default_rng(seed)

    def init(name, shape, scale):
        return numpy_helper.from_array((rng.standard_normal(shape) * scale).astype(np.float32), name)

    nodes = [
        helper.make_node("Conv", ["x", "w1", "b1"], ["c1"], pads=[1, 1, 1, 1]),
        helper.make_node("Relu", ["c1"], ["r1"]),
        helper.make_node("Conv", ["r1", "w2", "b2"], ["c2"], pads=[1, 1, 1, 1], strides=[2, 2]),
        helper.make_node("Relu", ["c2"], ["r2"]),
        helper.make_node("GlobalAveragePool", ["r2"], ["g"]),
        helper.make_node("Flatten", ["g"], ["f"]),
        helper.make_node("Gemm", ["f", "w3", "b3"], ["y"]),
    ]
    graph = helper.make_graph(
        nodes, "bench_conv",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3, size, size])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 3])],
        [init("w1", (16, 3, 3, 3), 0.3), init("b1", (16,), 0.1), init("w2", (32, 16, 3, 3), 0.1),
         init("b2", (32,), 0.1), init("w3", (32, 3), 0.5), init("b3", (3,), 0.0)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    model.ir_version = 8
    meta = model.metadata_props.add()
    meta.key, meta.value = "shortcut_audit", '{"labels": ["alpha", "beta", "gamma"]}'
    onnx.save(model, str(path))
    return path


def _same(a: dict, b: dict) -> bool:
    from shortcut_audit.store import to_jsonable

    if sorted(a) != sorted(b):
        return False
    for p, (rec, arrays) in a.items():
        rec2, arrays2 = b[p]
        if to_jsonable(rec) != to_jsonable(rec2) or sorted(arrays) != sorted(arrays2):
            return False
        if not all(np.array_equal(arrays[k], arrays2[k]) for k in arrays):
            return False
    return True


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--images", type=int, default=201, help="images in all (3 classes)")
    ap.add_argument("--model", choices=("linear", "conv"), default="linear")
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--batch-size", type=int, default=16)
    ap.add_argument("--shard-size", type=int, default=16)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    import distributed
    from scan_fixtures import corner_model, make_dataset

    from shortcut_audit.cluster import iter_cluster_results
    from shortcut_audit.listing import list_images
    from shortcut_audit.model import ModelConfig, OnnxClassifier
    from shortcut_audit.scan import ScanSettings, analyse_entries

    tmp = Path(tempfile.mkdtemp(prefix="cluster-bench-"))
    data = make_dataset(tmp / "data", n=max(1, args.images // 3))
    if args.model == "conv":
        model_path = conv_model(tmp / "m.onnx")
        config = ModelConfig(batch_size=args.batch_size, size=(64, 64))
    else:
        model_path = corner_model(tmp / "m.onnx")
        config = ModelConfig(batch_size=args.batch_size)
    entries, _ = list_images(data)
    settings = ScanSettings(confirm=False)
    clf = OnnxClassifier(model_path, config)
    labels = {name: i for i, name in enumerate(clf.labels)}
    n = len(entries)
    print(f"{n} images, {args.model} model {clf.height}x{clf.width}, batch {clf.batch_size}, "
          f"shard {args.shard_size}, best of {args.repeat}")

    def local_run():
        return {p: (r, a) for p, r, a in analyse_entries(entries, clf, settings, label_index=labels)}

    def cluster_run(lc, subset):
        return {p: (r, a) for p, r, a in iter_cluster_results(
            subset, clf.path, clf.config, settings, label_index=labels,
            address=lc.scheduler_address, sha256=clf.sha256, shard_size=args.shard_size)}

    ref = local_run()
    clusters, notes = {}, {}
    try:
        for workers in args.workers:
            t0 = time.perf_counter()
            lc = distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                          dashboard_address="127.0.0.1:0", silence_logs=logging.CRITICAL)
            started = time.perf_counter() - t0
            t0 = time.perf_counter()
            cluster_run(lc, entries[: workers * args.shard_size])  # imports, model load on each worker
            notes[workers] = f"start-up {started:.1f} s, warm-up {time.perf_counter() - t0:.1f} s"
            clusters[workers] = lc
        # Rounds interleave the configurations, so a busy spell on the machine does not
        # fall on one of them only; each keeps its best round.
        best = {"local": float("inf"), **{w: float("inf") for w in clusters}}
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            local_run()
            best["local"] = min(best["local"], time.perf_counter() - t0)
            for workers, lc in clusters.items():
                t0 = time.perf_counter()
                got = cluster_run(lc, entries)
                best[workers] = min(best[workers], time.perf_counter() - t0)
                if not _same(ref, got):
                    raise SystemExit(f"workers={workers}: results differ from the local run")
    finally:
        for lc in clusters.values():
            lc.close()
    print(f"{'local':>10}: {n / best['local']:7.1f} images/s  ratio 1.00")
    for workers in clusters:
        print(f"{'workers=' + str(workers):>10}: {n / best[workers]:7.1f} images/s  "
              f"ratio {best['local'] / best[workers]:.2f}   ({notes[workers]}, results identical)")

if __name__ == "__main__":
    main()
