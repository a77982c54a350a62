"""The C target (docs/c-target.md): generated C99, compiled with the machine's C compiler, against
scikit-learn's own numbers.

Outside references:
- the fitted scikit-learn models of tests/zoo.py (data sets shipped with scikit-learn, sources
  named there): ``decision_function`` / ``predict`` / ``predict_proba`` on the data rows plus
  probes at every threshold and one float step either side (tests/test_conformance.py builds
  them), raw values bit for bit, probabilities and transformed outputs within 4 ulps (the
  platform's libm exp/pow against numpy's: common practice to allow a few ulps);
- gcc itself: every file compiles with ``-std=c99 -Wall -Wextra -pedantic -Werror`` at -O2
  and at ``-O3 -march=native`` (where contraction into FMA would show if it could apply);
- the device scorer (boxwood_runtime.scorer), the project's reference evaluator, for which
  records a model refuses.
"""
from __future__ import annotations

import ctypes
import re
import subprocess

import numpy as np
import pytest

import boxwood_runtime
import zoo
from boxwood import formats
from boxwood.formats.c import check as c_check
from boxwood.formats.c import reader as c_reader
from boxwood.formats.c import writer as c_writer
from boxwood.formats.c.evaluators import CEvaluator
from boxwood.numerics import ulp_distance
from boxwood.sources.model import SourceEvaluator
from boxwood.verify import verify
from boxwood_runtime import native
from boxwood_runtime.batch import BatchModel
from boxwood_runtime.c_engine import ENGINE
from boxwood_runtime.csource import CTargetError, generate
from test_conformance import probe_rows

pytestmark = pytest.mark.skipif(native.find_compiler() is None, reason="no C compiler on this machine")

C_CASES = [n for n in zoo.ALL_CASES if n not in zoo.PIPELINE_CASES + zoo.C_REFUSED]  # calibration included
ULPS = 4
FLAG_SETS = [("-O2",), ("-O3", "-march=native")]


@pytest.fixture(autouse=True)
def _own_cache(tmp_path_factory, monkeypatch):
    monkeypatch.setenv("BOXWOOD_CACHE", str(tmp_path_factory.getbasetemp() / "c-cache"))


def numeric_pipeline():
    """A pipeline with numeric steps only: median imputation, an ordinal encoder on a numeric
    code column (unknown codes -> -1, missing encoded as -2), histogram boosting that treats the
    encoded column as categorical. Fitted on scikit-learn's diabetes data with missing values."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OrdinalEncoder
    from sklearn.datasets import load_diabetes

    X, y = load_diabetes(return_X_y=True)
    X = np.array(X)
    X[:, 1] = np.digitize(X[:, 2], np.quantile(X[:, 2], [0.25, 0.5, 0.75])) * 10.0  # a numeric code column
    rng = np.random.default_rng(7)
    X[rng.random(X.shape) < 0.07] = np.nan
    ct = ColumnTransformer([
        ("code", OrdinalEncoder(handle_unknown="use_encoded_value", unknown_value=-1, encoded_missing_value=-2), [1]),
        ("num", SimpleImputer(strategy="median"), [0, 2, 3, 4, 8]),
    ], remainder="drop")
    model = make_pipeline(ct, HistGradientBoostingRegressor(categorical_features=[0], max_iter=25, random_state=0,
                                                           early_stopping=False)).fit(X, y)
    return model, X


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """name -> (case, ensemble, path of the written .c)."""
    out = {}
    base = tmp_path_factory.mktemp("c")

    def get(name):
        if name not in out:
            case, ensemble, _ = zoo.exported(name)
            path = base / (name + ".c")
            c_writer.write(ensemble, path)
            out[name] = (case, ensemble, path)
        return out[name]

    return get


# ------------------------------------------------------------------------------ conformance
@pytest.mark.parametrize("name", C_CASES)
def test_compiled_code_matches_sklearn(name, written):
    """At -O2 and at -O3 -march=native, each compiled with -std=c99 -Wall -Wextra -pedantic -Werror."""
    case, ensemble, path = written(name)
    back = c_reader.read_c(path)
    rows = probe_rows(case, ensemble)
    want = SourceEvaluator(case.model, ensemble).evaluate(rows)
    for flags in FLAG_SETS:
        got = CEvaluator(path, back, flags).evaluate(rows)
        bad = np.flatnonzero(np.any(got.raw != want.raw, axis=1))
        assert bad.size == 0, "%s row %d: C %r, scikit-learn %r" % (flags, bad[0], got.raw[bad[0]], want.raw[bad[0]])
        assert int(ulp_distance(got.transformed, want.transformed).max()) <= ULPS, flags
        assert got.labels == want.labels, flags


@pytest.mark.parametrize("name", C_CASES)
def test_read_back_is_the_written_model(name, written):
    _, ensemble, path = written(name)
    back = c_reader.read_c(path)
    assert c_check.same_model(ensemble, back) is None
    # and the read-back writes the same C text again (IR -> C -> IR -> C)
    again = c_writer.to_texts(back, "m")
    first = c_writer.to_texts(ensemble, "m")
    assert again[0].split(" * model: ")[1].split("\n", 1)[1] == first[0].split(" * model: ")[1].split("\n", 1)[1]


def test_numeric_pipeline_runs_its_steps_in_c(tmp_path):
    from boxwood.export import build

    model, X = numeric_pipeline()
    ensemble = build(model)
    assert ensemble.fields is not None and any(f.source["steps"] for f in ensemble.features)
    path = tmp_path / "pipe.c"
    c_writer.write(ensemble, path)
    back = c_reader.read_c(path)
    assert c_check.same_model(ensemble, back) is None
    rows = [[None if v != v else float(v) for v in r] for r in X]
    extra = []
    for code in (0.0, 10.0, 20.0, 30.0, 99.0, None):  # every code, an unseen one, missing
        for r in rows[:5]:
            extra.append([r[0], code] + r[2:])
    rows = rows + extra
    got = CEvaluator(path, back).evaluate(rows)
    Xs = np.array([[np.nan if v is None else v for v in r] for r in rows])
    assert np.array_equal(got.raw[:, 0], model.predict(Xs))  # identity regressor: predict is the raw score


def test_text_steps_are_refused_naming_the_field_and_step(tmp_path):
    _, ensemble, _ = zoo.exported("pipe_gbc_strict_encoder")
    with pytest.raises(formats.FormatError, match=r"field 'bmi_band'.*step 1 encodes text categories"):
        c_writer.write(ensemble, tmp_path / "p.c")
    assert not list(tmp_path.iterdir())  # nothing half-written


# ------------------------------------------------------------------------------ refusals
def _library(name, tmp_path, extra=()):
    case, ensemble, data = zoo.exported(name)
    model = boxwood_runtime.load(data)
    c_text, h_text = generate(model, "m")
    lib = native.load_library(native.build_library(c_text, h_text, "m", native.DEFAULT_FLAGS + tuple(extra)), "m")
    return case, model, lib


def _call(lib, row, n_out):
    x = (ctypes.c_double * len(row))(*row)
    out = (ctypes.c_double * n_out)()
    return lib.m_raw(x, out), list(out)


@pytest.mark.parametrize("name,value,code", [
    ("gbr_squared_error", float("nan"), 1),  # classic boosting refuses missing values
    ("gbr_squared_error", float("inf"), 2),  # ... and infinity
    ("dtr_single", 1e39, 2),  # a float32-compared tree: beyond float's range
    ("hgbr_nan", float("inf"), 0),  # histogram boosting takes both
    ("hgbr_nan", float("nan"), 0),
])
def test_refused_records_agree_with_the_device_scorer(name, value, code, tmp_path):
    case, model, lib = _library(name, tmp_path)
    row = [float("nan") if v is None else float(v) for v in case.rows[0]]
    row[0] = value
    rc, raw = _call(lib, row, model.n_exact_values)
    assert rc == code
    if code:
        with pytest.raises(boxwood_runtime.RecordError):
            model.raw_scores(model.prepare(row))
    else:
        assert raw == model.exact_values(model.raw_scores(model.prepare(row)))


def test_unseen_category_value_is_refused_by_default_and_routed_as_missing_on_request(tmp_path):
    case, model, strict = _library("hgbr_categorical_codes", tmp_path)
    _, _, lenient = _library("hgbr_categorical_codes", tmp_path, ("-DM_UNSEEN_AS_MISSING=1",))
    row = [float(v) for v in case.rows[0]]
    row[1] = 7.0  # the column's categories are 0.0 and 1.0
    assert _call(strict, row, 1)[0] == 3
    rc, raw = _call(lenient, row, 1)
    missing = list(row)
    missing[1] = float("nan")
    assert rc == 0 and raw == list(case.model.predict(np.array([missing])))  # scikit-learn: unseen = missing


# ------------------------------------------------------------------------------ verify and planted faults
def _edit_table(text, name, edit):
    """Replace table ``name``'s values by edit(values) (a list of literal tokens), fixing its length."""
    m = re.search(r"^((?:static )?const [^\n]* %s\[)(\d+)(\] = \{\n)(.*?)(\n\};)" % re.escape(name), text, re.M | re.S)
    values = c_reader._split_values(m.group(4))
    values = edit(values)
    body = "\n".join("    " + v + "," for v in values)
    return text[:m.start()] + m.group(1) + str(len(values)) + m.group(3) + body + m.group(5) + text[m.end():]


def _first_split(text, prefix):
    feature = c_reader._split_values(re.search(r"%s_feature\[\d+\] = \{\n(.*?)\n\};" % prefix, text, re.S).group(1))
    return next(i for i, f in enumerate(feature) if int(f) >= 0 and i > 40)


def _plant(path, fault):
    text = path.read_text()
    prefix = c_reader.parse(text)[0]
    node = _first_split(text, prefix)
    if fault == "threshold one ulp":
        def edit(v):
            v[node] = float.fromhex(v[node]).__float__().__class__(np.nextafter(float.fromhex(v[node]), np.inf)).hex()
            return v
        text = _edit_table(text, prefix + "_value", edit)
    elif fault == "swapped child":
        values = {}
        for side in ("left", "right"):
            values[side] = c_reader._split_values(re.search(r"%s_%s\[\d+\] = \{\n(.*?)\n\};" % (prefix, side), text,
                                                            re.S).group(1))
        text = _edit_table(text, prefix + "_left", lambda v: v[:node] + [values["right"][node]] + v[node + 1:])
        text = _edit_table(text, prefix + "_right", lambda v: v[:node] + [values["left"][node]] + v[node + 1:])
    elif fault == "dropped tree":
        roots = c_reader._split_values(re.search(r"%s_root\[\d+\] = \{\n(.*?)\n\};" % prefix, text, re.S).group(1))
        last = int(roots[-1])
        for table in ("feature", "left", "right", "value", "flags"):
            text = _edit_table(text, prefix + "_" + table, lambda v: v[:last])
        for table in ("root", "tree_output"):
            text = _edit_table(text, prefix + "_" + table, lambda v: v[:-1])
        text = re.sub(r"(#define %s_N_TREES )(\d+)" % prefix.upper(), lambda m: m.group(1) + str(int(m.group(2)) - 1), text)
        text = re.sub(r"(#define %s_N_NODES )(\d+)" % prefix.upper(), lambda m: m.group(1) + str(last), text)
    path.write_text(text)


@pytest.mark.parametrize("fault", ["threshold one ulp", "swapped child", "dropped tree"])
def test_verify_catches_planted_faults_in_a_c_file(fault, tmp_path):
    case, ensemble, _ = zoo.exported("hgbr_squared_error")
    path = tmp_path / "m.c"
    c_writer.write(ensemble, path)
    clean = verify(case.model, str(path))
    assert clean.passed, clean.summary()
    _plant(path, fault)
    c_reader.read_c(path)  # the file still reads: the verifier, not the reader, must catch it
    result = verify(case.model, str(path))
    assert not result.passed
    assert result.check("structure").status == "fail"
    assert result.check("empirical: raw").status == "fail"


# CalibratedClassifierCV in C: planted faults in the calibration tables (the checks of the
# checker), and contraction into FMA that the engine's volatile products must prevent.
def _nudge(tok):
    v = float.fromhex(tok)
    return float(np.nextafter(v, np.inf)).hex()


@pytest.mark.parametrize("name,table,edit", [
    ("cal_gbc_isotonic_binary_prefit", "cal_x", lambda v: v[:3] + [_nudge(v[3])] + v[4:]),  # a knot moved one float step
    ("cal_hgbc_isotonic_multiclass", "cal_y", lambda v: v[:1] + [_nudge(v[1])] + v[2:]),
    ("cal_hgbc_sigmoid_binary_prefit", "cal_a", lambda v: [(float.fromhex(v[0]) * 1.01).hex()] + v[1:]),  # sigmoid a
    ("cal_gbc_sigmoid_multiclass", "cal_b", lambda v: v[:-1] + [_nudge(v[-1])]),
])
def test_verify_catches_planted_calibration_faults_in_a_c_file(name, table, edit, tmp_path):
    case, ensemble, _ = zoo.exported(name)
    path = tmp_path / "m.c"
    c_writer.write(ensemble, path)
    clean = verify(case.model, str(path))
    assert clean.passed, clean.summary()
    text = path.read_text()
    path.write_text(_edit_table(text, c_reader.parse(text)[0] + "_" + table, edit))
    back = c_reader.read_c(path)  # the file still reads: the verifier, not the reader, must catch it
    assert c_check.same_model(ensemble, back) is not None
    result = verify(case.model, str(path))
    assert not result.passed
    assert result.check("structure").status == "fail"


@pytest.mark.parametrize("name", [n for n in zoo.CALIBRATION_CASES if n not in zoo.C_REFUSED])
def test_calibration_stage_survives_contraction_into_fma(name, written):
    """GNU C mode contracts a * b + c into one fused multiply-add wherever it can
    (-ffp-contract=fast, gcc's documented default outside ISO C mode); on an FMA machine
    (-march=native) the interpolation and the sigmoid's a * t + b would round once instead of
    twice. The engine's volatile products keep scikit-learn's bits (0 ulps measured on x86-64)."""
    case, _, path = written(name)
    back = c_reader.read_c(path)
    rows = probe_rows(case, back)
    want = SourceEvaluator(case.model, back).evaluate(rows)
    got = CEvaluator(path, back, ("-O3", "-march=native", "-std=gnu99", "-ffp-contract=fast")).evaluate(rows)
    assert np.array_equal(got.raw, want.raw)
    assert int(ulp_distance(got.transformed, want.transformed).max()) <= ULPS
    assert got.labels == want.labels


def test_changed_scoring_code_is_refused(tmp_path):
    case, ensemble, _ = zoo.exported("gbr_squared_error")
    path = tmp_path / "m.c"
    c_writer.write(ensemble, path)
    text = path.read_text()
    assert "go_right = xv > m_value[n];" in text
    path.write_text(text.replace("go_right = xv > m_value[n];", "go_right = xv >= m_value[n];"))
    with pytest.raises(formats.DamagedArtefact, match="scoring code differs from boxwood's at line"):
        c_reader.read_c(path)
    # a damaged boxwood file is a failed check (exit 1), as for a JSON artefact
    import joblib
    from boxwood.cli import main

    joblib.dump(case.model, tmp_path / "m.joblib")
    assert main(["verify", str(tmp_path / "m.joblib"), str(path)]) == 1
    # a file from a boxwood with other scoring code is named as such
    path.write_text(text.replace('"engine":"sha256:', '"engine":"sha256:0'))
    with pytest.raises(formats.FormatError, match="another version of boxwood's scoring code.*export it again"):
        c_reader.read_c(path)
    for bad in ("#define exp(v) 0.0\n", "#include <stdio.h>\n"):
        c_writer.write(ensemble, path)
        text = path.read_text()
        path.write_text(text.replace("#include <float.h>\n", bad + "#include <float.h>\n"))
        with pytest.raises(formats.DamagedArtefact, match="only the header"):
            c_reader.read_c(path)
    c_writer.write(ensemble, path)
    header = path.with_suffix(".h")
    header.write_text(header.read_text().replace("#include <stddef.h>", "#include <stddef.h>\n#define exp(v) 0.0"))
    with pytest.raises(formats.DamagedArtefact, match="differs from the header boxwood writes"):
        CEvaluator(path, c_reader.read_c(path))


def test_scoring_code_has_no_recursion_malloc_or_stdio():
    """A call graph of the fixed scoring code, read from its text: no function reaches itself."""
    assert not re.search(r"\b(malloc|calloc|realloc|free|printf|fprintf|FILE|stdio)\b", ENGINE)
    bodies = {}
    for m in re.finditer(r"^(?:static )?[a-z_ ]+\b(PFX_\w+)\([^)]*\)\n\{\n(.*?)^\}", ENGINE, re.M | re.S):
        bodies[m.group(1)] = m.group(2)
    assert len(bodies) >= 10
    calls = {f: set(re.findall(r"\b(PFX_\w+)\(", body)) & set(bodies) for f, body in bodies.items()}
    for start in calls:
        seen, todo = set(), list(calls[start])
        while todo:
            f = todo.pop()
            assert f != start, "%s can call itself" % start
            if f not in seen:
                seen.add(f)
                todo.extend(calls[f])


def test_fast_math_is_refused_at_compile_time(tmp_path, written):
    _, _, path = written("gbc_binary")
    cc = native.find_compiler()
    done = subprocess.run(cc + ["-std=c99", "-O2", "-ffast-math", "-c", str(path), "-o", str(tmp_path / "x.o")],
                          capture_output=True, text=True)
    assert done.returncode != 0 and "fast-math" in done.stderr


# ------------------------------------------------------------------------------ native engine
@pytest.mark.parametrize("name", ["gbc_wine", "hgbc_categorical", "rfr_nan", "ada_binary", "iforest_subsets",
                                  "dtc_nan"])
def test_native_engine_is_bit_identical_to_both_python_engines(name):
    case, ensemble, data = zoo.exported(name)
    model = boxwood_runtime.load(data)
    rows = [[float("nan") if v is None else v for v in r] for r in probe_rows(case, ensemble, limit=3000)]
    numpy_engine, c_engine = BatchModel(model), BatchModel(model, engine="c")
    X = numpy_engine.prepare(rows)
    raw_c = c_engine.raw_scores(c_engine.prepare(rows))
    assert np.array_equal(raw_c, numpy_engine.raw_scores(X))
    device = np.array([model.raw_scores(model.prepare(r, i)) for i, r in enumerate(rows)])
    assert np.array_equal(raw_c, device)
    if model.task != "regression":
        assert list(c_engine.predict(rows)) == list(numpy_engine.predict(rows))


def test_native_one_row_scorer_matches_the_device_scorer():
    case, ensemble, data = zoo.exported("gbc_multiclass")
    model = boxwood_runtime.load(data)
    one = native.NativeScorer(model)
    for i, r in enumerate(case.rows[:50]):
        assert one.raw(r) == model.exact_values(model.raw_scores(model.prepare(r, i)))
    with pytest.raises(boxwood_runtime.RecordError, match="does not accept missing"):
        one.raw([float("nan")] * len(case.rows[0]))


def test_no_compiler_is_a_clear_error(monkeypatch, tmp_path):
    _, _, data = zoo.exported("gbr_squared_error")
    monkeypatch.setenv("CC", str(tmp_path / "no-such-cc"))
    monkeypatch.setenv("BOXWOOD_CACHE", str(tmp_path / "empty-cache"))
    with pytest.raises(native.NativeBuildError, match="no C compiler found.*apt-get install gcc"):
        BatchModel(boxwood_runtime.load(data), engine="c")
    with pytest.raises(ValueError, match="engine must be"):
        BatchModel(boxwood_runtime.load(data), engine="gpu")


def test_a_compiler_error_is_reported_with_its_output(tmp_path, monkeypatch):
    monkeypatch.setenv("BOXWOOD_CACHE", str(tmp_path / "cache"))
    with pytest.raises(native.NativeBuildError, match="the C compiler failed.*error"):
        native.build_library("int broken(void) { return }\n", "", "m")
    assert not [p for p in (tmp_path / "cache" / "c").iterdir() if not p.name.startswith(".")]


def test_header_names_and_prefix(tmp_path):
    _, ensemble, _ = zoo.exported("hgbc_categorical")
    c_writer.write(ensemble, tmp_path / "pump-2.c")
    h = (tmp_path / "pump-2.h").read_text()
    for macro in ("PUMP_2_N_FEATURES", "PUMP_2_N_OUTPUTS", "PUMP_2_N_CLASSES", "PUMP_2_ERR_MISSING"):
        assert re.search(r"^#define %s \d+" % macro, h, re.M)
    for fn in ("int pump_2_raw(const double *x, double *raw);", "int pump_2_predict(const double *x, double *out);",
               "int pump_2_label(const double *x, int *label);"):
        assert fn in h
    assert "advisory" in h and "advisory" in (tmp_path / "pump-2.c").read_text()
    with pytest.raises(formats.FormatError, match="not a usable identifier"):
        c_writer.write(ensemble, tmp_path / "x.c", c_prefix="int")
    with pytest.raises(CTargetError):
        from boxwood_runtime.csource import prefix_from
        prefix_from("x", "a-b")


def test_hostile_names_stay_inside_string_literals(tmp_path):
    """Names and labels from the file reach the C text only as escaped string literals or in the
    escaped JSON comment: a name that tries to end the comment or a string compiles harmlessly."""
    _, ensemble, _ = zoo.exported("gbc_binary")
    import copy

    e = copy.deepcopy(ensemble)
    e.features[0].name = 'x */ int evil; /* "\\??/'
    e.features[1].name = "y\n#define exp(v) 0"
    e.classes = ['a"b', "c*/d"]
    path = tmp_path / "h.c"
    c_writer.write(e, path)
    back = c_reader.read_c(path)
    assert [f.name for f in back.features[:2]] == [e.features[0].name, e.features[1].name]
    assert back.classes == e.classes
    ok, message = c_check.check(path, e)
    assert ok, message
    assert "evil" not in re.sub(r'"(?:[^"\\]|\\.)*"', "", path.read_text().split(" * model: ")[0] +
                                path.read_text().split(" */", 1)[1])


def test_pairwise_sum_is_numpys_row_sum(tmp_path):
    """The scoring code's softmax sum without recursion, taken from its text, against numpy.sum
    on contiguous rows of 1 to 300 values (numpy sums those pairwise; scikit-learn's softmax
    relies on it)."""
    funcs = re.search(r"^static double PFX_block_sum.*?^}\n\n/\*.*?^static double PFX_pairwise_sum.*?^}\n",
                      ENGINE, re.M | re.S).group(0)
    src = "#include <stddef.h>\n" + funcs.replace("PFX_", "t_") + (
        "double t_sum(const double *e, int n) { return t_pairwise_sum(e, n); }\n")
    lib = ctypes.CDLL(native.build_library(src, "", "t", native.DEFAULT_FLAGS + ("-Wall", "-Werror")))
    lib.t_sum.restype = ctypes.c_double
    lib.t_sum.argtypes = [ctypes.POINTER(ctypes.c_double), ctypes.c_int]
    rng = np.random.default_rng(11)
    for n in list(range(1, 300)) + [1000, 4099]:
        e = np.exp(rng.normal(size=n) * 30)
        got = lib.t_sum(e.ctypes.data_as(ctypes.POINTER(ctypes.c_double)), n)
        assert got == float(np.sum(e)), n


def test_without_a_compiler_export_says_so_and_verify_exits_2(tmp_path, monkeypatch, capsys):
    import joblib

    from boxwood.cli import main

    case = zoo.fitted("gbr_squared_error")
    joblib.dump(case.model, tmp_path / "m.joblib")
    monkeypatch.setenv("CC", str(tmp_path / "no-such-cc"))
    assert main(["export", str(tmp_path / "m.joblib"), "-o", str(tmp_path / "m.c")]) == 0
    assert "not compiled here (no C compiler found)" in capsys.readouterr().out
    assert main(["verify", str(tmp_path / "m.joblib"), str(tmp_path / "m.c")]) == 2
    assert "needs a C compiler" in capsys.readouterr().err
    monkeypatch.delenv("CC")
    assert main(["verify", str(tmp_path / "m.joblib"), str(tmp_path / "m.c")]) == 0
