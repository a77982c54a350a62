"""Speed and size of boxwood's C target against scikit-learn, measured in one process.

Three models, fitted here on generated data that scikit-learn ships the generators for:

- GradientBoostingRegressor, 250 trees of depth 3, on make_friedman1
  (J. H. Friedman (1991), "Multivariate Adaptive Regression Splines", Ann. Statist.);
- RandomForestClassifier, 100 trees of depth at most 8, on make_hastie_10_2
  (Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2009, eq. 10.2);
- HistGradientBoostingClassifier, 100 iterations, on make_hastie_10_2 (the same source).

Part 1, the shipped C target against scikit-learn and the other boxwood engines:

- a batch: ``BatchModel(model, engine="c").predict`` and ``BatchModel(model).predict``
  (numpy) against scikit-learn's ``predict`` on the same 100,000-row float64 ndarray
  (goal: the C engine at or below 1.0x scikit-learn's time);
- one row: ``NativeScorer(model).predict(list)``, the pure-Python ``Model.predict(list)``
  and, when onnxruntime is installed, a one-thread onnxruntime session on boxwood's exact
  ONNX graph, against scikit-learn's ``predict`` on a one-row ndarray (goal: the native
  scorer at or below 0.02x scikit-learn's time).

Part 2, why the shipped C is table-driven: for the regressor and the random forest, a
prototype generator written here (:func:`branch_source`; not part of boxwood) emits the
trees as nested if/else code with the thresholds and leaves as hexadecimal literals, and
the same float64 additions in tree order. Both layouts are compared on:

- flash on a Cortex-M4: text + data of the model's object file built with the board's
  flags (boxwood.formats.c.board.CFLAGS), and the growth of a linked program that calls
  the raw path only (what a firmware that scores records pays; the linker drops the rest);
- host speed (cc -O2, a timing main with clock_gettime): one prepared row at a time, and
  a batch of prepared rows (the table engine's blocked ``walk_many``; the branch code has
  no batch form, so it loops over the rows);
- M4 instructions per row: QEMU -icount with SysTick, one row at a time (a deterministic
  count of instructions, not of cycles);
- exactness: both layouts' raw sums bit for bit against each other and scikit-learn's raw
  scores on 10,000 rows, and on the same rows with a tenth of the values made NaN where the
  model accepts missing values (checked before the host timings), and the sums the board
  computed for the M4 rows (a difference stops the run).

Every figure is a median of repeated timings (time.perf_counter in Python, clock_gettime
in C); one-row timings cycle over a fixed set of different rows. Ratios divide by a
reference measured in this run (below 1: the measured side is faster or smaller). Before
timing, every output is checked against scikit-learn's: raw values exactly for the
regressor, labels for the classifiers.

    python benchmarks/bench_c.py                  # full run (one to three minutes on 2 cores)
    python benchmarks/bench_c.py --quick          # a short run
    python benchmarks/bench_c.py --json out.json  # also save the numbers
"""
import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_latency import median_seconds, median_seconds_per_call  # noqa: E402

HOST_CC_FLAGS = ("-std=c99", "-O2")  # boxwood_runtime.native.DEFAULT_FLAGS
C_GOAL_BATCH = 1.0
C_GOAL_ONE = 0.02


# ------------------------------------------------------------------------------------------
# The models

def fit_models(seed=0):
    from sklearn.datasets import make_friedman1, make_hastie_10_2
    from sklearn.ensemble import (GradientBoostingRegressor, HistGradientBoostingClassifier,
                                  RandomForestClassifier)

    X, y = make_friedman1(n_samples=2000, noise=1.0, random_state=seed)
    gbr = GradientBoostingRegressor(n_estimators=250, max_depth=3, random_state=seed).fit(X, y)
    Xh, yh = make_hastie_10_2(n_samples=4000, random_state=seed)
    rf = RandomForestClassifier(n_estimators=100, max_depth=8, random_state=seed).fit(Xh, yh)
    hgbc = HistGradientBoostingClassifier(max_iter=100, early_stopping=False, random_state=seed).fit(Xh, yh)
    friedman = lambda n: make_friedman1(n_samples=n, noise=1.0, random_state=seed + 1)[0]  # noqa: E731
    hastie = lambda n: make_hastie_10_2(n_samples=n, random_state=seed + 1)[0]  # noqa: E731
    return [
        ("gbr", "GradientBoostingRegressor 250x depth 3 (friedman1)", gbr, friedman),
        ("rf", "RandomForestClassifier 100x depth 8 (hastie_10_2)", rf, hastie),
        ("hgbc", "HistGradientBoostingClassifier 100 iter (hastie_10_2)", hgbc, hastie),
    ]


def sklearn_raw(est, X):
    """scikit-learn's raw scores, as boxwood's raw path computes them: (n, K) float64."""
    from sklearn.base import is_regressor

    if is_regressor(est):
        r = est.predict(X)
    elif hasattr(est, "decision_function"):
        r = est.decision_function(X)
    else:  # forests: the raw scores are the class probabilities
        r = est.predict_proba(X)
    r = np.asarray(r, dtype=np.float64)
    return r.reshape(len(X), -1)


# ------------------------------------------------------------------------------------------
# Part 1: the shipped C target against scikit-learn

def openmp_threads():
    """How many OpenMP threads scikit-learn's compiled code would use now."""
    from threadpoolctl import threadpool_info

    return max([p["num_threads"] for p in threadpool_info() if p["user_api"] == "openmp"] or [1])


def onnx_session(ensemble):
    """(run one row, output name) with onnxruntime on boxwood's exact graph, or None."""
    try:
        import onnxruntime as ort
    except ImportError:
        return None
    from boxwood.formats.onnx.writer import to_bytes

    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    options.inter_op_num_threads = 1
    options.log_severity_level = 3
    session = ort.InferenceSession(to_bytes(ensemble), options, providers=["CPUExecutionProvider"])
    name = session.get_inputs()[0].name
    output = "prediction" if ensemble.task == "regression" else "label"
    return (lambda row: session.run([output], {name: row})[0]), ort.__version__


def bench_engines(key, label, est, ensemble, model, make_X, one_rows, one_repeats, batch_rows, batch_repeats):
    from boxwood_runtime.batch import BatchModel
    from boxwood_runtime.native import NativeScorer

    t0 = time.perf_counter()
    batch_c = BatchModel(model, engine="c")  # generates and compiles the C target (cached after)
    build_s = time.perf_counter() - t0
    batch_np = BatchModel(model)
    native = NativeScorer(model)
    ort_run = onnx_session(ensemble)
    X = make_X(batch_rows)
    lists = [[float(v) for v in r] for r in X[:one_rows]]
    arrays = [X[i:i + 1] for i in range(one_rows)]
    regression = model.task == "regression"

    # outputs agree with scikit-learn before anything is timed
    want = est.predict(X)
    assert np.array_equal(batch_c.predict(X), want), "%s: engine=c differs from scikit-learn" % key
    assert np.array_equal(batch_np.predict(X), want), "%s: the numpy engine differs from scikit-learn" % key
    assert np.array_equal(batch_c.raw_scores(batch_c.prepare(X[:2000])), sklearn_raw(est, X[:2000])), \
        "%s: engine=c raw scores differ from scikit-learn's" % key
    for i, row in enumerate(lists):
        if regression:
            got = native.predict(row)[0]
        else:  # the native scorer writes probabilities; the label comes from its raw scores
            got = model.classes[int(batch_np.class_index(np.array([native.raw(row)]))[0])]
        assert got == want[i], "%s: NativeScorer row %d: %r, scikit-learn %r" % (key, i, got, want[i])
        assert model.predict(row) == want[i], "%s: the pure-Python scorer differs on row %d" % (key, i)
        if ort_run:
            got = ort_run[0](arrays[i]).ravel()[0]
            assert got == want[i], "%s: onnxruntime row %d: %r, scikit-learn %r" % (key, i, got, want[i])

    res = []
    tb_sk = median_seconds(est.predict, X, batch_repeats)
    tb_c = median_seconds(batch_c.predict, X, batch_repeats)
    tb_np = median_seconds(batch_np.predict, X, batch_repeats)
    rows_s = "%d rows" % batch_rows
    res.append(dict(model=key, measurement="batch %s: BatchModel engine=c" % rows_s, value="%.1f ms" % (tb_c * 1e3),
                    reference="%.1f ms sklearn" % (tb_sk * 1e3), ratio=tb_c / tb_sk, goal=C_GOAL_BATCH,
                    seconds=tb_c, reference_seconds=tb_sk))
    res.append(dict(model=key, measurement="batch %s: BatchModel numpy" % rows_s, value="%.1f ms" % (tb_np * 1e3),
                    reference="%.1f ms sklearn" % (tb_sk * 1e3), ratio=tb_np / tb_sk,
                    seconds=tb_np, reference_seconds=tb_sk))
    t1_sk = median_seconds_per_call(est.predict, arrays, one_repeats)
    ones = [("one row: NativeScorer.predict(list)", native.predict, lists, C_GOAL_ONE),
            ("one row: pure-Python Model.predict(list)", model.predict, lists, None)]
    if ort_run:
        ones.append(("one row: onnxruntime %s, 1 thread" % ort_run[1], ort_run[0], arrays, None))
    t1 = {}
    for what, fn, args, goal in ones:
        t = t1[what] = median_seconds_per_call(fn, args, one_repeats)
        res.append(dict(model=key, measurement=what, value="%.2f us" % (t * 1e6),
                        reference="%.1f us sklearn" % (t1_sk * 1e6), ratio=t / t1_sk, goal=goal,
                        seconds=t, reference_seconds=t1_sk))
    if openmp_threads() > 1 and type(est).__name__.startswith("HistGradientBoosting"):
        # scikit-learn's histogram models predict with OpenMP threads (boxwood's engines use one):
        # the goals are also checked against scikit-learn on one thread, which a busy machine
        # disturbs far less (a thread that waits for a descheduled one can cost milliseconds)
        from threadpoolctl import threadpool_limits

        with threadpool_limits(1, user_api="openmp"):
            tb_sk1 = median_seconds(est.predict, X, batch_repeats)
            t1_sk1 = median_seconds_per_call(est.predict, arrays, one_repeats)
        res.append(dict(model=key, measurement="batch %s: BatchModel engine=c, vs sklearn 1 thread" % rows_s,
                        value="%.1f ms" % (tb_c * 1e3), reference="%.1f ms sklearn 1t" % (tb_sk1 * 1e3),
                        ratio=tb_c / tb_sk1, goal=C_GOAL_BATCH, seconds=tb_c, reference_seconds=tb_sk1))
        what = ones[0][0]
        res.append(dict(model=key, measurement=what + ", vs sklearn 1 thread", value="%.2f us" % (t1[what] * 1e6),
                        reference="%.1f us sklearn 1t" % (t1_sk1 * 1e6), ratio=t1[what] / t1_sk1, goal=C_GOAL_ONE,
                        seconds=t1[what], reference_seconds=t1_sk1))
    info = {"native_build_seconds": build_s, "onnxruntime": ort_run[1] if ort_run else None}
    return res, info


# ------------------------------------------------------------------------------------------
# Part 2: table-driven against generated-branch code (a prototype, here only)

def _hex(v):
    v = float(v)
    if v != v:
        raise ValueError("a NaN threshold or leaf")
    if v in (float("inf"), float("-inf")):
        return "INFINITY" if v > 0 else "(-INFINITY)"
    return v.hex()


def branch_source(ensemble, prefix="br"):
    """PROTOTYPE: C99 text scoring ``ensemble`` (a boxwood.ir.Ensemble) with one function of
    nested if/else per tree; numeric splits and the raw path only.

    It defines ``int PREFIX_raw(const double *v, double *acc)`` and
    ``size_t PREFIX_walk_many(size_t n, const double *v, double *sums)`` on *prepared*
    values (what the table engine's ``walk``/``walk_many`` take: float32-rounded where the
    model compares in float32). A split tests ``x <= t`` when missing values go right (a
    NaN fails the test) and ``!(x > t)`` when they go left (a NaN passes it): one
    comparison, the missing direction for free. The raw sums are the table engine's: the
    base value, then each tree's leaf added in tree order in double (``combine == "mean"``:
    from 0.0, then base + sum / count)."""
    from boxwood.ir import LEAF

    if any(c is not None for t in ensemble.trees for c in t.left_categories):
        raise ValueError("the branch prototype takes numeric splits only")
    k = ensemble.n_outputs
    out = ["/* PROTOTYPE generated-branch scorer (benchmarks/bench_c.py); not boxwood's C target. */",
           "#include <math.h>", "#include <stddef.h>", "",
           "int %s_raw(const double *v, double *acc);" % prefix,
           "size_t %s_walk_many(size_t n, const double *v, double *sums);" % prefix, ""]
    for ti, tree in enumerate(ensemble.trees):
        out.append("static double %s_t%d(const double *v)" % (prefix, ti))
        out.append("{")
        stack = [(0, 1, None)]  # (node, indent, text to emit instead)
        while stack:
            node, ind, text = stack.pop()
            pad = "    " * ind
            if text is not None:
                out.append(pad + text)
                continue
            if tree.feature[node] == LEAF:
                out.append("%sreturn %s;" % (pad, _hex(tree.value[node])))
                continue
            x, t = "v[%d]" % tree.feature[node], _hex(tree.threshold[node])
            test = ("!(%s > %s)" if tree.missing_left[node] else "%s <= %s") % (x, t)
            out.append("%sif (%s) {" % (pad, test))
            # emitted in reverse: the left subtree, "} else {", the right subtree, "}"
            stack.append((None, ind, "}"))
            stack.append((tree.right[node], ind + 1, None))
            stack.append((None, ind, "} else {"))
            stack.append((tree.left[node], ind + 1, None))
        out.append("}")
        out.append("")
    mean = ensemble.combine == "mean"
    out.append("int %s_raw(const double *v, double *acc)" % prefix)
    out.append("{")
    for j in range(k):
        out.append("    acc[%d] = %s;" % (j, "0.0" if mean else _hex(ensemble.base_values[j])))
    for ti, tree in enumerate(ensemble.trees):
        out.append("    acc[%d] += %s_t%d(v);" % (tree.output, prefix, ti))
    if mean:
        for j in range(k):
            count = sum(1 for t in ensemble.trees if t.output == j)
            base = _hex(ensemble.base_values[j])
            out.append("    acc[%d] = %s;" % (j, "%s + acc[%d] / %d.0" % (base, j, count) if count else base))
    out += ["    return 0;", "}", "",
            "size_t %s_walk_many(size_t n, const double *v, double *sums)" % prefix, "{",
            "    size_t i;",
            "    for (i = 0; i < n; ++i) {",
            "        %s_raw(v + i * %d, sums + i * %d);" % (prefix, len(ensemble.features), k),
            "    }", "    return 0;", "}", ""]
    return "\n".join(out)


# The table engine's walk is static in the generated file; this line, appended to the file,
# makes it callable from the timing main (one call per row, as the branch code's raw).
TABLE_WRAPPER = ("\nint %(p)s_walk_ext(const double *v, double *acc);\n"
                 "int %(p)s_walk_ext(const double *v, double *acc)\n"
                 "{\n    int j, has_nan = 0;\n"
                 "    for (j = 0; j < %(P)s_N_TREE_FEATURES; ++j) {\n        has_nan |= v[j] != v[j];\n    }\n"
                 "    return %(p)s_walk(v, acc, has_nan);\n}\n")

TIMING_MAIN = r"""/* Host timing of the two layouts (benchmarks/bench_c.py). */
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

int tab_walk_ext(const double *v, double *acc);
size_t tab_walk_many(size_t n, const double *v, double *sums);
int br_raw(const double *v, double *acc);
size_t br_walk_many(size_t n, const double *v, double *sums);

static double now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static int cmp(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

static double median(double *t, int n)
{
    qsort(t, (size_t)n, sizeof *t, cmp);
    return n % 2 ? t[n / 2] : 0.5 * (t[n / 2 - 1] + t[n / 2]);
}

static double one_by_one(int (*fn)(const double *, double *), size_t n, size_t nf, size_t k,
                         const double *v, double *s)
{
    size_t i;
    double t0 = now();
    for (i = 0; i < n; ++i) {
        fn(v + i * nf, s + i * k);
    }
    return (now() - t0) / (double)n;
}

static double batch(size_t (*fn)(size_t, const double *, double *), size_t n, const double *v, double *s)
{
    double t0 = now();
    fn(n, v, s);
    return (now() - t0) / (double)n;
}

/* argv: rows file, n, features, outputs, repeats, sums file to write */
int main(int argc, char **argv)
{
    size_t n, nf, k;
    int reps, r;
    double *v, *s[4], *t[4];
    FILE *fh;
    if (argc != 7) {
        fprintf(stderr, "usage: rows.bin n features outputs repeats sums.bin\n");
        return 2;
    }
    n = strtoul(argv[2], NULL, 10);
    nf = strtoul(argv[3], NULL, 10);
    k = strtoul(argv[4], NULL, 10);
    reps = atoi(argv[5]);
    v = malloc(n * nf * sizeof *v);
    for (r = 0; r < 4; ++r) {
        s[r] = malloc(n * k * sizeof *s[r]);
        t[r] = malloc((size_t)reps * sizeof *t[r]);
    }
    fh = fopen(argv[1], "rb");
    if (!fh || fread(v, sizeof *v, n * nf, fh) != n * nf) {
        fprintf(stderr, "cannot read %s\n", argv[1]);
        return 2;
    }
    fclose(fh);
    /* warm up, and the sums that are compared bit for bit */
    one_by_one(tab_walk_ext, n, nf, k, v, s[0]);
    one_by_one(br_raw, n, nf, k, v, s[1]);
    batch(tab_walk_many, n, v, s[2]);
    batch(br_walk_many, n, v, s[3]);
    fh = fopen(argv[6], "wb");
    for (r = 0; r < 4; ++r) {
        fwrite(s[r], sizeof *s[r], n * k, fh);
    }
    fclose(fh);
    for (r = 0; r < reps; ++r) { /* interleaved, so a slow moment hits both layouts */
        t[0][r] = one_by_one(tab_walk_ext, n, nf, k, v, s[0]);
        t[1][r] = one_by_one(br_raw, n, nf, k, v, s[1]);
        t[2][r] = batch(tab_walk_many, n, v, s[2]);
        t[3][r] = batch(br_walk_many, n, v, s[3]);
    }
    printf("one_table %.6e\none_branch %.6e\nbatch_table %.6e\nbatch_branch %.6e\n",
           median(t[0], reps), median(t[1], reps), median(t[2], reps), median(t[3], reps));
    return 0;
}
"""

ELF_MAIN = r"""/* The smallest firmware that scores one record with the %(what)s layout. */
#include <stddef.h>
int %(fn)s(const double *v, double *acc);
volatile double input[%(nf)d];
volatile double output[%(k)d];
int main(void)
{
    double x[%(nf)d], acc[%(k)d] = {0.0};
    int j, rc;
    for (j = 0; j < %(nf)d; ++j) {
        x[j] = input[j];
    }
    rc = %(call)s;
    for (j = 0; j < %(k)d; ++j) {
        output[j] = acc[j];
    }
    return rc;
}
"""

M4_TIMING_MAIN = r"""/* Instructions per row on the Cortex-M4 under QEMU -icount (benchmarks/bench_c.py). With
   -icount shift=0 each instruction advances QEMU's clock by 1 ns, and SysTick on the processor
   clock (25 MHz on mps2-an386) counts one tick per 40 instructions. */
#include <stdint.h>
#include <stdio.h>
#include <string.h>
int %(fn)s(const double *v, double *acc);
#define SYST_CSR (*(volatile uint32_t *)0xE000E010u)
#define SYST_RVR (*(volatile uint32_t *)0xE000E014u)
#define SYST_CVR (*(volatile uint32_t *)0xE000E018u)
static const double rows[%(n)d][%(nf)d] = {
%(rows)s
};
static double sums[%(n)d][%(k)d];
int main(void)
{
    uint32_t t0, t1;
    int i, k;
    SYST_RVR = 0xFFFFFFu;
    SYST_CVR = 0u;
    SYST_CSR = 5u; /* enabled, processor clock, no interrupt */
    t0 = SYST_CVR;
    for (i = 0; i < %(n)d; ++i) {
        %(fn)s(rows[i], sums[i]);
    }
    t1 = SYST_CVR;
    printf("ticks %%lu\n", (unsigned long)((t0 - t1) & 0xFFFFFFu));
    for (i = 0; i < %(n)d; ++i) {
        for (k = 0; k < %(k)d; ++k) {
            uint64_t b;
            memcpy(&b, &sums[i][k], sizeof b);
            printf("%%08lx%%08lx\n", (unsigned long)(b >> 32), (unsigned long)(b & 0xFFFFFFFFu));
        }
    }
    return 0;
}
"""
M4_TICK_INSTRUCTIONS = 40  # at -icount shift=0 and a 25 MHz SysTick

BASELINE_FN = r"""/* Baseline: no model; touches the values so the program keeps its shape. */
int base_raw(const double *v, double *acc);
int base_raw(const double *v, double *acc)
{
    acc[0] = v[0];
    return 0;
}
"""


def _cc(cmd, what):
    t0 = time.perf_counter()
    done = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    if done.returncode != 0:
        raise RuntimeError("%s failed: %s\n%s" % (what, " ".join(cmd), done.stderr[-3000:]))
    return time.perf_counter() - t0


def bench_layouts(key, label, est, ensemble, model, make_X, work, n_rows, repeats, m4_rows):
    """Part 2 for one model: sizes on the Cortex-M4, host speed, exactness."""
    from boxwood.formats.c import board
    from boxwood_runtime.batch import BatchModel
    from boxwood_runtime.csource import generate
    from boxwood_runtime.native import find_compiler
    from boxwood_runtime.scorer import RecordError

    d = os.path.join(work, key)
    os.makedirs(d)
    c_text, h_text = generate(model, "tab")
    c_text += TABLE_WRAPPER % {"p": "tab", "P": "TAB"}
    b_text = branch_source(ensemble, "br")
    paths = {}
    for name, text in (("tab.c", c_text), ("tab.h", h_text), ("br.c", b_text)):
        paths[name] = os.path.join(d, name)
        with open(paths[name], "w", encoding="utf-8") as fh:
            fh.write(text)

    # exactness first: prepared rows (as the C engine gets them) through both layouts
    batch = BatchModel(model)
    X = make_X(n_rows)
    Xn = X.copy()
    rng = np.random.RandomState(7)
    Xn[rng.rand(*Xn.shape) < 0.1] = np.nan
    cc = find_compiler()
    if not cc:
        raise RuntimeError("no C compiler found")
    exe = os.path.join(d, "timing")
    main_c = os.path.join(d, "main.c")
    with open(main_c, "w", encoding="utf-8") as fh:
        fh.write(TIMING_MAIN)
    host = {}
    objs = []
    for name in ("tab", "br"):
        obj = os.path.join(d, name + ".host.o")
        host[name] = _cc(cc + list(HOST_CC_FLAGS) + ["-I", d, "-c", paths[name + ".c"], "-o", obj],
                         "compiling %s.c for the host" % name)
        objs.append(obj)
    _cc(cc + list(HOST_CC_FLAGS) + [main_c] + objs + ["-lm", "-o", exe], "linking the timing program")

    def run(Xs, reps):
        v = np.ascontiguousarray(batch.prepare(Xs), dtype=np.float64)
        rows_bin, sums_bin = os.path.join(d, "rows.bin"), os.path.join(d, "sums.bin")
        v.tofile(rows_bin)
        k = model.n_outputs
        out = subprocess.run([exe, rows_bin, str(len(v)), str(v.shape[1]), str(k), str(reps), sums_bin],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, check=True).stdout
        sums = np.fromfile(sums_bin, dtype=np.float64).reshape(4, len(v), k)
        return dict(line.split() for line in out.strip().splitlines()), sums

    exact = {}
    for what, Xs in (("data", X), ("nan", Xn)):
        try:
            _, sums = run(Xs, 1)
        except RecordError:  # the model refuses missing values: nothing to compare
            exact[what] = {"table_eq_branch": None, "eq_sklearn": None}
            continue
        same = all(np.array_equal(sums[0].view(np.uint64), sums[i].view(np.uint64)) for i in (1, 2, 3))
        try:
            ref = sklearn_raw(est, Xs)
        except ValueError:  # this scikit-learn model refuses NaN
            ref = None
        exact[what] = {"table_eq_branch": bool(same),
                       "eq_sklearn": None if ref is None else bool(np.array_equal(sums[0], ref) and
                                                                   np.array_equal(sums[1], ref))}
    assert exact["data"]["table_eq_branch"] and exact["data"]["eq_sklearn"], \
        "%s: the layouts' raw sums are not scikit-learn's: %r" % (key, exact)
    assert exact["nan"]["table_eq_branch"] is not False, "%s: with NaN, table and branch differ" % key
    times, _ = run(X, repeats)
    times = {name: float(v) for name, v in times.items()}

    # flash on the Cortex-M4
    sizes = {}
    tc = board.toolchain()
    if tc is not None and board.unavailable_reason() is None:
        arm = {}
        for name in ("tab", "br"):
            obj = os.path.join(d, name + ".m4.o")
            arm[name] = _cc([tc.gcc] + list(board.CFLAGS) + ["-I", d, "-c", paths[name + ".c"], "-o", obj],
                            "compiling %s.c for the Cortex-M4" % name)
            sizes[name + "_object"] = board.footprint(obj)
        base_c = os.path.join(d, "base.c")
        with open(base_c, "w", encoding="utf-8") as fh:
            fh.write(BASELINE_FN)
        nf, k = len(ensemble.features), model.n_outputs
        for name, fn, src in (("base", "base_raw", base_c), ("tab", "tab_raw", paths["tab.c"]),
                              ("br", "br_raw", paths["br.c"])):
            elf_dir = os.path.join(d, "elf_" + name)
            os.makedirs(elf_dir)
            m = os.path.join(elf_dir, "main.c")
            with open(m, "w", encoding="utf-8") as fh:
                fh.write(ELF_MAIN % dict(what=name, fn=fn, nf=nf, k=k, call="%s(x, acc)" % fn))
            elf = board.build_elf(elf_dir, [m, src], include_dirs=[d], name=name)
            sizes[name + "_elf"] = board.footprint(elf)
        sizes["compile_seconds_m4"] = arm
        m4 = m4_instructions(board, d, paths, batch.prepare(X[:m4_rows]), sklearn_raw(est, X[:m4_rows]),
                             model.n_outputs)
    else:
        m4 = None
    return {"m4": m4,"key": key, "label": label, "exact": exact, "host_seconds": times, "host_compile_seconds": host,
            "sizes": sizes, "n_rows": n_rows, "table_source_bytes": len(c_text), "branch_source_bytes": len(b_text)}


def m4_instructions(board, d, paths, v, want, k):
    """Instructions per row of each layout on the Cortex-M4 (QEMU -icount), one row at a time,
    and whether the board's raw sums are scikit-learn's bit for bit. None when QEMU fails."""
    rows = ",\n".join("    {" + ", ".join(_hex(x) for x in r) + "}" for r in v)
    out = {"rows": len(v)}
    for name, fn in (("tab", "tab_walk_ext"), ("br", "br_raw")):
        elf_dir = os.path.join(d, "m4_" + name)
        os.makedirs(elf_dir)
        m = os.path.join(elf_dir, "main.c")
        with open(m, "w", encoding="utf-8") as fh:
            fh.write(M4_TIMING_MAIN % dict(fn=fn, n=len(v), nf=v.shape[1], k=k, rows=rows))
        elf = board.build_elf(elf_dir, [m, paths[name + ".c"]], include_dirs=[d], name="m4_" + name)
        cmd = board.qemu_command(elf, board.toolchain().qemu) + ["-icount", "shift=0"]
        try:
            done = subprocess.run(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                  text=True, timeout=300)
        except subprocess.TimeoutExpired:
            return None
        lines = done.stdout.split()
        if done.returncode != 0 or len(lines) != 2 + len(v) * k or lines[0] != "ticks":
            print("M4 run of %s failed:\n%s%s" % (name, done.stderr[-1000:], done.stdout[-1000:]))
            return None
        got = np.array([int(h, 16) for h in lines[2:]], dtype=np.uint64).view(np.float64).reshape(len(v), k)
        out[name] = {"instructions_per_row": int(lines[1]) * M4_TICK_INSTRUCTIONS / len(v),
                     "eq_sklearn": bool(np.array_equal(got, want))}
        assert out[name]["eq_sklearn"], "the %s layout's sums on the Cortex-M4 are not scikit-learn's" % name
    return out


def layout_rows(r):
    """Table rows for part 2: branch measured, table-driven the reference."""
    key, t, s = r["key"], r["host_seconds"], r["sizes"]
    rows = []
    if s:
        ot, ob = s["tab_object"]["flash"], s["br_object"]["flash"]
        rows.append(dict(model=key, measurement="M4 flash, model .o text+data: branch vs table",
                         value="%d B" % ob, reference="%d B table" % ot, ratio=ob / ot))
        base = s["base_elf"]["flash"]
        et, eb = s["tab_elf"]["flash"] - base, s["br_elf"]["flash"] - base
        rows.append(dict(model=key, measurement="M4 flash, linked raw path only: branch vs table",
                         value="%d B" % eb, reference="%d B table" % et, ratio=eb / et))
    m4 = r["m4"]
    if m4:
        it, ib = m4["tab"]["instructions_per_row"], m4["br"]["instructions_per_row"]
        rows.append(dict(model=key, measurement="M4 instructions per row (QEMU icount): branch vs table",
                         value="%.0f" % ib, reference="%.0f table" % it, ratio=ib / it))
    rows.append(dict(model=key, measurement="host one prepared row: branch vs table",
                     value="%.3f us" % (t["one_branch"] * 1e6), reference="%.3f us table" % (t["one_table"] * 1e6),
                     ratio=t["one_branch"] / t["one_table"]))
    rows.append(dict(model=key, measurement="host batch, per row: branch vs table",
                     value="%.3f us" % (t["batch_branch"] * 1e6),
                     reference="%.3f us table" % (t["batch_table"] * 1e6),
                     ratio=t["batch_branch"] / t["batch_table"]))
    hc = r["host_compile_seconds"]
    rows.append(dict(model=key, measurement="host compile time (cc -O2): branch vs table",
                     value="%.2f s" % hc["br"], reference="%.2f s table" % hc["tab"], ratio=hc["br"] / hc["tab"]))
    return rows


# ------------------------------------------------------------------------------------------

def versions():
    import sklearn

    from boxwood_runtime.native import find_compiler

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    cc = find_compiler()
    cc_version = subprocess.run(cc + ["--version"], stdout=subprocess.PIPE, text=True).stdout.splitlines()[0] \
        if cc else None
    arm = shutil.which("arm-none-eabi-gcc")
    arm_version = subprocess.run([arm, "--version"], stdout=subprocess.PIPE, text=True).stdout.splitlines()[0] \
        if arm else None
    return {"date": time.strftime("%Y-%m-%d"), "python": platform.python_version(), "numpy": np.__version__,
            "scikit-learn": sklearn.__version__, "cc": cc_version, "arm-none-eabi-gcc": arm_version,
            "cpu": cpu, "cpus": os.cpu_count() or 0, "machine": platform.machine()}


def print_table(rows):
    head = ("model", "measurement", "measured", "reference", "ratio", "goal")
    cells = [(r["model"], r["measurement"], r["value"], r["reference"], "%.4f" % r["ratio"],
              "" if r.get("goal") is None else
              "<= %g: %s" % (r["goal"], "met" if r["ratio"] <= r["goal"] else "MISSED"))
             for r in rows]
    widths = [max(len(c[i]) for c in cells + [head]) for i in range(6)]
    line = "  ".join("%-*s" % (w, h) for w, h in zip(widths, head))
    print(line)
    print("-" * len(line))
    for c in cells:
        print("  ".join("%-*s" % (w, v) for w, v in zip(widths, c)).rstrip())


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="fewer repeats and rows, for a short run")
    p.add_argument("--batch-rows", type=int, default=None, help="rows in the batch timing (100000; quick 20000)")
    p.add_argument("--json", metavar="FILE", help="also save the numbers as JSON")
    p.add_argument("--sklearn-threads", type=int, default=None,
                   help="limit scikit-learn's OpenMP/BLAS threads (threadpoolctl) for the whole run; "
                        "default: scikit-learn's own (all cores; only the histogram model uses them)")
    args = p.parse_args(argv)
    if args.sklearn_threads:
        from threadpoolctl import threadpool_limits

        with threadpool_limits(args.sklearn_threads):
            return run(args)
    return run(args)


def run(args):
    if args.quick:
        one_rows, one_repeats, batch_repeats, layout_rows_n, layout_repeats, m4_rows = 100, 5, 3, 10000, 5, 20
        batch_rows = args.batch_rows or 20000
    else:
        one_rows, one_repeats, batch_repeats, layout_rows_n, layout_repeats, m4_rows = 200, 15, 7, 10000, 21, 100
        batch_rows = args.batch_rows or 100000

    work = tempfile.mkdtemp(prefix="bench_c-")
    os.environ.setdefault("BOXWOOD_CACHE", os.path.join(work, "cache"))  # a fresh build, removed after
    try:
        env = versions()
        print("python %s, numpy %s, scikit-learn %s, %s; %s, %d CPUs, %s; scikit-learn threads: %s%s" % (
            env["python"], env["numpy"], env["scikit-learn"], env["cc"], env["cpu"], env["cpus"], env["machine"],
            args.sklearn_threads or "default (%d OpenMP)" % openmp_threads(), ", quick run" if args.quick else ""))
        from boxwood.export import build
        from boxwood.formats.json.writer import to_bytes
        from boxwood_runtime import load

        rows, models, layouts, pending = [], {}, [], []
        for key, label, est, make_X in fit_models():
            ensemble = build(est)
            model = load(to_bytes(ensemble))
            s = model.summary()
            print("%s = %s: %d trees, %d nodes, max depth %d" % (key, label, s["n_trees"], s["n_nodes"],
                                                                 s["max_depth"]), flush=True)
            res, info = bench_engines(key, label, est, ensemble, model, make_X, one_rows, one_repeats,
                                      batch_rows, batch_repeats)
            rows += res
            models[key] = dict(label=label, n_trees=s["n_trees"], n_nodes=s["n_nodes"], max_depth=s["max_depth"],
                               **info)
            if key in ("gbr", "rf"):
                pending.append((key, label, est, ensemble, model, make_X))
        # part 2 after every part-1 timing: compiling the branch code loads the machine
        for key, label, est, ensemble, model, make_X in pending:
            print("%s: table-driven vs branch code (compiling for the host and the Cortex-M4)" % key, flush=True)
            layouts.append(bench_layouts(key, label, est, ensemble, model, make_X, work, layout_rows_n,
                                         layout_repeats, m4_rows))
        for r in layouts:
            rows += layout_rows(r)
        print()
        print_table(rows)
        print("\nMedians. Part 1 ratios: boxwood's time / scikit-learn's (below 1: boxwood is faster).")
        print("Part 2 ratios: the prototype branch code / the shipped table-driven code (below 1: branch "
              "smaller or faster).")
        for r in layouts:
            e = r["exact"]
            print("%s: %d rows, raw sums bit-identical table = branch = scikit-learn: %s; with 10%% NaN: %s" % (
                r["key"], r["n_rows"], e["data"]["table_eq_branch"] and e["data"]["eq_sklearn"],
                "not run (the model refuses missing values)" if e["nan"]["table_eq_branch"] is None else
                "table = branch %s, = scikit-learn %s" % (e["nan"]["table_eq_branch"], e["nan"]["eq_sklearn"])))
            if r["m4"]:
                print("%s: on the Cortex-M4 (QEMU), %d rows: table = scikit-learn %s, branch = scikit-learn %s"
                      % (r["key"], r["m4"]["rows"], r["m4"]["tab"]["eq_sklearn"], r["m4"]["br"]["eq_sklearn"]))
        for key, m in models.items():
            print("%s: native build (generate + compile) %.2f s" % (key, m["native_build_seconds"]))
        if args.json:
            with open(args.json, "w", encoding="utf-8") as fh:
                json.dump({"environment": env, "quick": args.quick, "sklearn_threads": args.sklearn_threads,
                           "batch_rows": batch_rows,
                           "one_rows": one_rows, "models": models, "rows": rows, "layouts": layouts},
                          fh, indent=1, sort_keys=True)
            print("saved", args.json)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
