"""Latency of the boxwood device scorer against scikit-learn, measured in one process.

Two models, fitted here on generated data that scikit-learn ships the generators for:

- GradientBoostingRegressor, 250 trees of depth 3, on make_friedman1
  (J. H. Friedman (1991), "Multivariate Adaptive Regression Splines", Ann. Statist.);
- HistGradientBoostingClassifier, 100 iterations, on make_hastie_10_2
  (Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2009, eq. 10.2).

Each is exported to a boxwood artefact and loaded with the pure-Python scorer. Measured:

- one record: ``Model.predict`` on a dict record and on a list record already in feature
  order, against scikit-learn's ``predict`` on a one-row ndarray;
- a batch: ``BatchModel.predict`` (numpy) against scikit-learn's ``predict`` on the
  same 100,000-row ndarray.

Every figure is the median of repeated timings with time.perf_counter; one-record
timings cycle over a fixed set of different rows. Ratios are device time divided by
scikit-learn time, both measured in this run (below 1: the device side is faster).
Before timing, the outputs are checked against scikit-learn's.

    python benchmarks/bench_latency.py            # full run
    python benchmarks/bench_latency.py --quick    # a short run
"""
import argparse
import os
import platform
import statistics
import sys
import time

import numpy as np


def median_seconds_per_call(fn, args, repeats):
    """Median over ``repeats`` of (time to call fn on every item of args) / len(args)."""
    for a in args[: max(1, len(args) // 10)]:  # warm up
        fn(a)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for a in args:
            fn(a)
        times.append((time.perf_counter() - t0) / len(args))
    return statistics.median(times)


def median_seconds(fn, arg, repeats):
    fn(arg)  # warm up
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn(arg)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def fit_models(seed=0):
    from sklearn.datasets import make_friedman1, make_hastie_10_2
    from sklearn.ensemble import GradientBoostingRegressor, HistGradientBoostingClassifier

    X, y = make_friedman1(n_samples=2000, noise=1.0, random_state=seed)
    gbr = GradientBoostingRegressor(n_estimators=250, max_depth=3, random_state=seed).fit(X, y)
    Xh, yh = make_hastie_10_2(n_samples=4000, random_state=seed)
    hgbc = HistGradientBoostingClassifier(max_iter=100, early_stopping=False, random_state=seed).fit(Xh, yh)
    return [
        ("GradientBoostingRegressor 250x depth 3 (friedman1)", gbr,
         lambda n: make_friedman1(n_samples=n, noise=1.0, random_state=seed + 1)[0]),
        ("HistGradientBoostingClassifier 100 iter (hastie_10_2)", hgbc,
         lambda n: make_hastie_10_2(n_samples=n, random_state=seed + 1)[0]),
    ]


def bench(label, est, make_X, one_rows, one_repeats, batch_rows, batch_repeats):
    from boxwood.export import build
    from boxwood.formats.json.writer import to_bytes
    from boxwood_runtime import load
    from boxwood_runtime.batch import BatchModel

    model = load(to_bytes(build(est)))
    batch = BatchModel(model)
    X = make_X(batch_rows)
    lists = [[float(v) for v in r] for r in X[:one_rows]]
    dicts = [dict(zip(model.feature_names, r)) for r in lists]
    arrays = [X[i:i + 1] for i in range(one_rows)]

    # outputs agree with scikit-learn before anything is timed
    want = est.predict(X[:one_rows])
    assert [model.predict(d) for d in dicts] == list(want)
    assert np.array_equal(batch.predict(X[:one_rows]), want)

    results = []
    sk_one = median_seconds_per_call(est.predict, arrays, one_repeats)
    for what, records in (("one record, dict", dicts), ("one record, ordered list", lists)):
        t = median_seconds_per_call(model.predict, records, one_repeats)
        results.append((label, what, "%.1f us" % (t * 1e6), "%.1f us" % (sk_one * 1e6), t / sk_one))
    tb = median_seconds(batch.predict, X, batch_repeats)
    ts = median_seconds(est.predict, X, batch_repeats)
    results.append((label, "%d rows, rows/s" % batch_rows, "%.0f" % (batch_rows / tb),
                    "%.0f" % (batch_rows / ts), tb / ts))
    return model, results


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="fewer repeats, for a short run")
    p.add_argument("--batch-rows", type=int, default=100000, help="rows in the batch timing (100000)")
    args = p.parse_args(argv)
    one_rows, one_repeats, batch_repeats = (100, 5, 2) if args.quick else (200, 31, 7)

    import sklearn

    print("python %s, numpy %s, scikit-learn %s, %s, %d CPUs%s" % (
        platform.python_version(), np.__version__, sklearn.__version__, platform.machine(),
        os.cpu_count() or 0, ", quick run" if args.quick else ""))
    rows = []
    for label, est, make_X in fit_models():
        model, res = bench(label, est, make_X, one_rows, one_repeats, args.batch_rows, batch_repeats)
        s = model.summary()
        print("%s: %d trees, %d nodes, max depth %d" % (label, s["n_trees"], s["n_nodes"], s["max_depth"]))
        rows += res
    head = ("model", "measurement", "boxwood", "scikit-learn", "time ratio boxwood/sklearn")
    widths = [max(len(str(r[i])) if i < 4 else 8 for r in rows + [head]) for i in range(5)]
    widths[4] = len(head[4])
    line = "  ".join("%-*s" % (w, h) for w, h in zip(widths, head))
    print()
    print(line)
    print("-" * len(line))
    for r in rows:
        print("  ".join(["%-*s" % (widths[i], r[i]) for i in range(4)] + ["%.3f" % r[4]]))
    print("\nMedians; one-record figures are per call. Ratio < 1: boxwood takes less time.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
