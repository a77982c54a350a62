"""Speed and scale of boxwood, every ratio of issue 13 side by side in one run.

Models are fitted here on data from scikit-learn's own generators (make_friedman1:
J. H. Friedman (1991), "Multivariate Adaptive Regression Splines", Ann. Statist.).

1. One record: GradientBoostingRegressor, 250 trees of depth 3. The device scorer walking
   the data (``load(path)``), compiled (``load(path, compiled=True)``), the native C engine
   (``NativeScorer``, when a C compiler is present), onnxruntime on one thread on boxwood's
   ONNX export, against scikit-learn's one-row ``predict``. Goal: compiled <= 0.10x.
2. Batch at 1,000,000 rows (100,000 with --quick): ``BatchModel.predict`` (numpy engine and
   ``engine="c"``) and scikit-learn's ``predict``: time, and peak traced memory (tracemalloc)
   against the input array's bytes. Goal: peak <= 1.5x the input. Measures whatever
   runtime/boxwood_runtime/batch.py is at run time.
3. A big forest: RandomForestRegressor, 100 unlimited-depth trees on 8,000 rows (about
   1,000,000 nodes; 1,600 rows / ~200,000 nodes with --quick). Export (``boxwood.export.export``,
   which includes reading the model and the post-write check, and the JSON writer alone) and
   load (``boxwood_runtime.load``): time, and peak traced memory against the artefact's size.
   Goals: export <= 3x, load <= 4x. Then ``boxwood verify MODEL ARTEFACT`` wall time (its own
   process). Goal: <= 120 s.
4. Verify time as trees and depth grow: trees 10/50/100 x depth 4/8/unlimited (2,000 rows).
5. Dask against one process (``boxwood score ART 'GLOB' --dask local -o DIR``), when
   ``boxwood.scale`` can be imported; else "not available".

Timings are medians of time.perf_counter repeats (one-record timings cycle over different
rows); memory is tracemalloc's peak above what was traced before the call (so a time taken
while tracing is not reported: each is measured untraced). Plots of the scaling curves go to
docs/scale-benchmarks/ (``--plots DIR`` to change, ``--no-plots`` to skip).

    python benchmarks/bench_scale.py             # full run (about ten minutes on 2 cores)
    python benchmarks/bench_scale.py --quick     # a short run
    python benchmarks/bench_scale.py --json results.json
"""
import argparse
import gc
import glob
import json
import os
import pickle
import subprocess
import sys
import tempfile
import time
import tracemalloc

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from bench_c import onnx_session, versions  # noqa: E402
from bench_latency import median_seconds, median_seconds_per_call  # noqa: E402

GOAL_ONE = 0.10
GOAL_BATCH_PEAK = 1.5
GOAL_EXPORT = 3.0
GOAL_LOAD = 4.0
GOAL_VERIFY_S = 120.0


def traced_peak(fn):
    """(result, peak traced bytes above the traced bytes when fn started)."""
    gc.collect()
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        out = fn()
        return out, tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def row(section, measurement, value, reference="", ratio=None, goal=None, **extra):
    r = dict(section=section, measurement=measurement, value=value, reference=reference, ratio=ratio, goal=goal)
    r.update(extra)
    return r


# ------------------------------------------------------------------------------------ 1
def one_record(work, quick):
    from sklearn.datasets import make_friedman1
    from sklearn.ensemble import GradientBoostingRegressor

    import boxwood_runtime
    from boxwood.export import export

    X, y = make_friedman1(n_samples=2000, noise=1.0, random_state=0)
    est = GradientBoostingRegressor(n_estimators=250, max_depth=3, random_state=0).fit(X, y)
    path = os.path.join(work, "gbr.json")
    res = export(est, path)
    walk = boxwood_runtime.load(path)
    comp = boxwood_runtime.load(path, compiled=True)
    Xr = make_friedman1(n_samples=200 if quick else 400, noise=1.0, random_state=1)[0]
    lists = [[float(v) for v in r] for r in Xr]
    arrays = [Xr[i:i + 1] for i in range(len(Xr))]
    want = est.predict(Xr)
    for i, r in enumerate(lists):  # outputs agree before anything is timed
        assert walk.predict(r) == want[i] and comp.predict(r) == want[i], "row %d differs" % i
    repeats = 5 if quick else 15
    t_sk = median_seconds_per_call(est.predict, arrays, repeats)
    engines = [("data walk: load(path)", walk.predict, lists),
               ("compiled: load(path, compiled=True)", comp.predict, lists)]
    try:
        from boxwood_runtime.native import NativeScorer, find_compiler

        if find_compiler():
            native = NativeScorer(walk)
            assert all(native.predict(r)[0] == want[i] for i, r in enumerate(lists))
            engines.append(("native C: NativeScorer", native.predict, lists))
        else:
            engines.append(("native C: NativeScorer", None, "no C compiler"))
    except Exception as exc:  # a failed build is reported, not fatal
        engines.append(("native C: NativeScorer", None, "not available (%s)" % exc))
    ort = onnx_session(res.ensemble)
    if ort:
        assert all(ort[0](a).ravel()[0] == want[i] for i, a in enumerate(arrays))
        engines.append(("onnxruntime %s, 1 thread" % ort[1], ort[0], arrays))
    else:
        engines.append(("onnxruntime, 1 thread", None, "onnxruntime not installed"))
    out = [row("one record", "scikit-learn predict (one-row ndarray)", "%.1f us" % (t_sk * 1e6),
               seconds=t_sk)]
    for name, fn, args in engines:
        if fn is None:
            out.append(row("one record", name, args))
            continue
        t = median_seconds_per_call(fn, args, repeats)
        out.append(row("one record", name, "%.2f us" % (t * 1e6), "%.1f us sklearn" % (t_sk * 1e6), t / t_sk,
                       GOAL_ONE if name.startswith("compiled") else None, seconds=t, reference_seconds=t_sk))
    return out, est


# ------------------------------------------------------------------------------------ 2
def batch(work, est, n_rows, quick):
    from sklearn.datasets import make_friedman1

    import boxwood_runtime
    from boxwood_runtime.batch import BatchModel

    model = boxwood_runtime.load(os.path.join(work, "gbr.json"))
    X = np.ascontiguousarray(make_friedman1(n_samples=n_rows, noise=1.0, random_state=2)[0])
    want = est.predict(X)
    engines = [("scikit-learn predict", est.predict)]
    bm = BatchModel(model)
    engines.append(("BatchModel numpy", bm.predict))
    try:
        bc = BatchModel(model, engine="c")
        engines.append(("BatchModel engine=c", bc.predict))
    except Exception as exc:
        engines.append(("BatchModel engine=c", "not available (%s)" % exc))
    out = []
    t_sk = None
    repeats = 1 if quick else 3
    for name, fn in engines:
        if isinstance(fn, str):
            out.append(row("batch %d rows" % n_rows, name, fn))
            continue
        assert np.array_equal(fn(X), want), "%s differs from scikit-learn" % name
        t = median_seconds(fn, X, repeats)
        _, peak = traced_peak(lambda: fn(X))
        t_sk = t if t_sk is None else t_sk
        out.append(row("batch %d rows" % n_rows, name + ": time", "%.2f s" % t, "%.2f s sklearn" % t_sk,
                       t / t_sk, seconds=t))
        out.append(row("batch %d rows" % n_rows, name + ": peak traced memory",
                       "%.1f MB" % (peak / 1e6), "input %.1f MB" % (X.nbytes / 1e6), peak / X.nbytes,
                       None if name.startswith("scikit") else GOAL_BATCH_PEAK, bytes=peak))
    return out


# ------------------------------------------------------------------------------------ 3, 4
def forest(rows, trees, depth, seed=0):
    from sklearn.datasets import make_friedman1
    from sklearn.ensemble import RandomForestRegressor

    X, y = make_friedman1(n_samples=rows, n_features=10, random_state=seed)
    # n_jobs None: scikit-learn then adds the trees in order, which boxwood reproduces bit for bit
    return RandomForestRegressor(n_estimators=trees, max_depth=depth, random_state=seed).fit(X, y)


def nodes(est):
    return sum(e.tree_.node_count for e in est.estimators_)


def verify_seconds(model_path, art_path):
    t0 = time.perf_counter()
    p = subprocess.run([sys.executable, "-m", "boxwood", "verify", model_path, art_path],
                       stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    dt = time.perf_counter() - t0
    return dt, p.returncode, (p.stdout.splitlines() or [""])[0]


def big_forest(work, rows):
    import boxwood_runtime
    from boxwood.export import export, read_source
    from boxwood.formats.json import writer

    est = forest(rows, 100, None)
    n = nodes(est)
    model_path = os.path.join(work, "forest.pkl")
    with open(model_path, "wb") as fh:
        pickle.dump(est, fh)
    path = os.path.join(work, "forest.json")
    writer.text_reading()  # pandas' probe (cached): not part of what is measured
    res, t_export = timed(lambda: export(est, path))
    assert res.check[0], res.check
    size = os.path.getsize(path)
    del res
    _, export_peak = traced_peak(lambda: export(est, path))
    ensemble = read_source(est, 6)[0]
    _, t_write = timed(lambda: writer.write(ensemble, path))
    _, write_peak = traced_peak(lambda: writer.write(ensemble, path))
    del ensemble
    gc.collect()
    model, t_load = timed(lambda: boxwood_runtime.load(path))
    del model
    _, load_peak = traced_peak(lambda: boxwood_runtime.load(path))
    t_verify, rc, first = verify_seconds(model_path, path)
    sec = "big forest: 100 trees, %d nodes, %.1f MB JSON" % (n, size / 1e6)
    out = [
        row(sec, "export(model, path): peak traced memory", "%.1f MB" % (export_peak / 1e6),
            "file %.1f MB" % (size / 1e6), export_peak / size, GOAL_EXPORT, seconds=t_export, bytes=export_peak),
        row(sec, "export(model, path): time", "%.1f s" % t_export),
        row(sec, "JSON writer alone: peak traced memory", "%.1f MB" % (write_peak / 1e6),
            "file %.1f MB" % (size / 1e6), write_peak / size, seconds=t_write, bytes=write_peak),
        row(sec, "JSON writer alone: time", "%.1f s" % t_write),
        row(sec, "load(path): peak traced memory", "%.1f MB" % (load_peak / 1e6),
            "file %.1f MB" % (size / 1e6), load_peak / size, GOAL_LOAD, seconds=t_load, bytes=load_peak),
        row(sec, "load(path): time", "%.1f s" % t_load),
        row(sec, "boxwood verify MODEL ART: wall time", "%.1f s" % t_verify, "exit %d: %s" % (rc, first[:60]),
            t_verify / GOAL_VERIFY_S, 1.0, seconds=t_verify, goal_note="<= 120 s"),
    ]
    return out, dict(nodes=n, bytes=size, export_peak=export_peak, load_peak=load_peak, write_peak=write_peak,
                     export_s=t_export, load_s=t_load, verify_s=t_verify)


def verify_grid(work, quick):
    grid = []
    trees_list = (10, 50) if quick else (10, 50, 100)
    for depth in (4, 8, None):
        for trees in trees_list:
            est = forest(2000, trees, depth, seed=1)
            mp = os.path.join(work, "grid.pkl")
            ap = os.path.join(work, "grid.json")
            with open(mp, "wb") as fh:
                pickle.dump(est, fh)
            from boxwood.export import export

            export(est, ap)
            t, rc, _ = verify_seconds(mp, ap)
            grid.append(dict(trees=trees, depth=depth, nodes=nodes(est), seconds=t, exit=rc))
    out = [row("verify grid (2000 rows)", "trees %d, depth %s, %d nodes" % (g["trees"], g["depth"] or "unlimited",
                                                                           g["nodes"]),
               "%.1f s" % g["seconds"], "exit %d" % g["exit"]) for g in grid]
    return out, grid


# ------------------------------------------------------------------------------------ 5
def dask_vs_one(work, quick):
    try:
        import boxwood.scale  # noqa: F401  (the --dask option of `boxwood score`)
    except Exception as exc:
        return [row("Dask vs one process", "boxwood score --dask local", "not available (%s)" % exc)]
    from sklearn.datasets import make_friedman1

    art = os.path.join(work, "gbr.json")
    folder = os.path.join(work, "parts")
    os.makedirs(folder, exist_ok=True)
    n_files, per = (4, 25_000) if quick else (8, 125_000)
    X = make_friedman1(n_samples=n_files * per, noise=1.0, random_state=3)[0]
    header = ",".join("x%d" % j for j in range(X.shape[1]))
    for k in range(n_files):
        np.savetxt(os.path.join(folder, "part%02d.csv" % k), X[k * per:(k + 1) * per], delimiter=",",
                   header=header, comments="", fmt="%.17g")
    t0 = time.perf_counter()
    for k, f in enumerate(sorted(glob.glob(os.path.join(folder, "*.csv")))):
        subprocess.run([sys.executable, "-m", "boxwood", "score", art, f, "-o", os.path.join(work, "one%02d.csv" % k)],
                       check=True, stdout=subprocess.DEVNULL)
    t_one = time.perf_counter() - t0
    t0 = time.perf_counter()
    p = subprocess.run([sys.executable, "-m", "boxwood", "score", art, os.path.join(folder, "*.csv"), "--dask",
                        "local", "-o", os.path.join(work, "dask_out")], stdout=subprocess.PIPE,
                       stderr=subprocess.STDOUT, text=True)
    t_dask = time.perf_counter() - t0
    sec = "Dask vs one process (%d CSV files, %d rows)" % (n_files, n_files * per)
    return [row(sec, "one process, file after file", "%.1f s" % t_one, seconds=t_one),
            row(sec, "--dask local (exit %d)" % p.returncode, "%.1f s" % t_dask, "%.1f s one process" % t_one,
                t_dask / t_one, seconds=t_dask)]


# ------------------------------------------------------------------------------------ output
def print_table(rows):
    head = ("section", "measurement", "measured", "reference", "ratio", "goal")
    cells = []
    for r in rows:
        goal = ""
        if r.get("goal") is not None:
            shown = r.get("goal_note") or "<= %gx" % r["goal"]
            goal = "%s: %s" % (shown, "met" if r["ratio"] <= r["goal"] else "MISSED")
        cells.append((r["section"], r["measurement"], r["value"], r["reference"],
                      "" if r["ratio"] is None else "%.3f" % r["ratio"], goal))
    widths = [max(len(c[i]) for c in cells + [head]) for i in range(6)]
    line = "  ".join("%-*s" % (w, h) for w, h in zip(widths, head))
    print(line)
    print("-" * len(line))
    for c in cells:
        print("  ".join("%-*s" % (w, v) for w, v in zip(widths, c)).rstrip())


def plots(folder, rows, grid, big):
    from boxwood.pages import pyplot

    plt = pyplot()
    os.makedirs(folder, exist_ok=True)
    made = []
    fig, ax = plt.subplots(figsize=(6, 4))
    for depth in (4, 8, None):
        pts = sorted((g["nodes"], g["seconds"]) for g in grid if g["depth"] == depth)
        ax.plot([p[0] for p in pts], [p[1] for p in pts], "o-", label="depth %s" % (depth or "unlimited"))
    if big:
        ax.plot([big["nodes"]], [big["verify_s"]], "k*", markersize=12, label="100 trees, 8000 rows")
    ax.axhline(GOAL_VERIFY_S, color="red", linestyle="--", linewidth=1, label="goal 120 s")
    ax.set_xscale("log")
    ax.set_xlabel("nodes in the forest (10/50/100 trees)")
    ax.set_ylabel("boxwood verify wall time (s)")
    ax.legend(fontsize=8)
    ax.set_title("verify time as trees and depth grow")
    fig.tight_layout()
    made.append(os.path.join(folder, "verify-scaling.png"))
    fig.savefig(made[-1], dpi=100)
    plt.close(fig)

    ratios = [r for r in rows if r.get("ratio") is not None and r.get("goal") is not None]
    if ratios:
        fig, ax = plt.subplots(figsize=(7, 0.45 * len(ratios) + 1.2))
        names = [r["measurement"].replace(": peak traced memory", " peak") for r in ratios]
        vals = [r["ratio"] / r["goal"] for r in ratios]
        colors = ["tab:green" if v <= 1 else "tab:red" for v in vals]
        ax.barh(range(len(vals)), vals, color=colors)
        ax.set_yticks(range(len(vals)))
        ax.set_yticklabels(names, fontsize=8)
        ax.axvline(1.0, color="black", linewidth=1)
        ax.set_xlabel("measured / goal (<= 1: goal met)")
        ax.invert_yaxis()
        fig.tight_layout()
        made.append(os.path.join(folder, "goals.png"))
        fig.savefig(made[-1], dpi=100)
        plt.close(fig)

    mem = [r for r in rows if "peak traced memory" in r["measurement"] and r.get("bytes")]
    if mem:
        fig, ax = plt.subplots(figsize=(7, 0.45 * len(mem) + 1.2))
        ax.barh(range(len(mem)), [r["ratio"] for r in mem])
        ax.set_yticks(range(len(mem)))
        ax.set_yticklabels(["%s (%s)" % (r["measurement"].replace(": peak traced memory", ""),
                                         r["section"].split(":")[0]) for r in mem], fontsize=8)
        ax.set_xlabel("peak traced memory / input (batch) or artefact size (export, load)")
        ax.invert_yaxis()
        fig.tight_layout()
        made.append(os.path.join(folder, "memory.png"))
        fig.savefig(made[-1], dpi=100)
        plt.close(fig)
    return made


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="smaller sizes and fewer repeats, for a short run")
    p.add_argument("--json", metavar="FILE", help="also save the numbers as JSON")
    p.add_argument("--plots", metavar="DIR", default=os.path.join(os.path.dirname(HERE), "docs", "scale-benchmarks"),
                   help="where the PNG plots go (default: docs/scale-benchmarks)")
    p.add_argument("--no-plots", action="store_true", help="do not draw the plots")
    p.add_argument("--batch-rows", type=int, default=None, help="rows in the batch section (1000000; quick 100000)")
    p.add_argument("--forest-rows", type=int, default=None,
                   help="training rows of the big forest (8000: ~1M nodes; quick 1600: ~200k nodes)")
    args = p.parse_args(argv)
    info = versions()
    print("boxwood scale benchmark, %s; Python %s, numpy %s, scikit-learn %s; %s, %d CPUs" % (
        info["date"], info["python"], info["numpy"], info["scikit-learn"], info["cpu"], info["cpus"]))
    rows, grid, big = [], [], None
    with tempfile.TemporaryDirectory() as work:
        one, est = one_record(work, args.quick)
        rows += one
        rows += batch(work, est, args.batch_rows or (100_000 if args.quick else 1_000_000), args.quick)
        found, big = big_forest(work, args.forest_rows or (1600 if args.quick else 8000))
        rows += found
        found, grid = verify_grid(work, args.quick)
        rows += found
        try:
            rows += dask_vs_one(work, args.quick)
        except (OSError, subprocess.SubprocessError) as exc:  # reported, the rest of the run kept
            rows.append(row("Dask vs one process", "boxwood score --dask local", "failed (%s)" % exc))
    print()
    print_table(rows)
    made = [] if args.no_plots else plots(args.plots, rows, grid, big)
    for m in made:
        print("plot:", os.path.relpath(m))
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump({"versions": info, "quick": args.quick, "rows": rows, "verify_grid": grid, "big_forest": big},
                      fh, indent=1, default=str)
    return 0


if __name__ == "__main__":
    sys.exit(main())
