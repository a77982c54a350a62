"""``boxwood bundle --target c``: a folder for a microcontroller project, built with make on this
computer and on an emulated Cortex-M4, against scikit-learn's own numbers.

Outside references:
- scikit-learn's own ``decision_function`` / ``predict`` / ``predict_proba`` and fitted tree
  attributes (node counts, depths) of the zoo models (tests/zoo.py names the data sets), and
  pandas' own category order for the categorical columns; raw values bit for bit, predictions
  within 8 ulps (the C library's exp against numpy's);
- the system C compiler (``make host``) and, for the Cortex-M4, arm-none-eabi-gcc with newlib
  and qemu-system-arm's mps2-an386 (``make qemu``), and GNU make itself running the Makefile;
- ``arm-none-eabi-size`` for the footprint, run here on what ``make`` built;
- SHA-256 from Python's hashlib (FIPS 180-4) and JSON Schema draft 2020-12 as the ``jsonschema``
  package implements it, for the manifest.
Checks are trusted once they catch planted faults: an expected raw value one ulp off (the
example prints FAIL and the bundle exits 1), a failed post-write check, a broken manifest.

Without arm-none-eabi-gcc, arm-none-eabi-size and qemu-system-arm the board tests skip locally
and fail under CI (CI set), as in tests/test_c_board.py.
"""
from __future__ import annotations

import copy
import hashlib
import json
import math
import os
import re
import shutil
import struct
import subprocess
from pathlib import Path

import joblib
import numpy as np
import pytest
from jsonschema import Draft202012Validator

import zoo
from boxwood.cli import main
from boxwood.formats.c import board
from boxwood.schema import SchemaError, load_schema, validate

# case -> (the scikit-learn method whose values P_raw must give bit for bit, the C prefix)
CASES = {
    "hgbc_categorical": ("decision_function", None),  # text categories: x holds their positions
    "gbr_squared_error": ("predict", None),
    "rfc_multiclass": ("predict_proba", "iris_rf"),
}
OUT_ULPS = 8
BOARD_FILES = ["Makefile", "README.txt", "link.ld", "main.c", "manifest.json", "startup.c"]


def _need(*programs):
    missing = [p for p in programs if shutil.which(p) is None]
    if missing:
        if os.environ.get("CI"):
            pytest.fail("required in CI: %s" % ", ".join(missing))
        pytest.skip("not on PATH: %s" % ", ".join(missing))


@pytest.fixture(scope="module")
def tools():
    reason = board.unavailable_reason()
    if reason:
        if os.environ.get("CI"):
            pytest.fail("the Cortex-M4 toolchain is required in CI: " + reason)
        pytest.skip(reason)
    _need("make")
    return board.toolchain()


@pytest.fixture(scope="module")
def cache(tmp_path_factory):
    with pytest.MonkeyPatch.context() as mp:  # the C check's compiled libraries: not in the user's cache
        mp.setenv("BOXWOOD_CACHE", str(tmp_path_factory.getbasetemp() / "c-cache"))
        yield


@pytest.fixture(scope="module")
def made(tmp_path_factory, cache):
    """{case: (Case, model file, bundle folder, prefix)}, each bundled by the command line."""
    tmp = tmp_path_factory.mktemp("cbundle")
    out = {}
    for name, (_, prefix) in CASES.items():
        case = zoo.fitted(name)
        model_file = tmp / (name + ".joblib")
        joblib.dump(case.model, model_file)
        folder = tmp / name
        args = ["bundle", str(model_file), "--target", "c", "-o", str(folder)]
        args += ["--c-prefix", prefix, "--zip"] if prefix else []
        assert main(args) == 0
        out[name] = (case, model_file, folder, prefix or "model")
    return out


def manifest_of(folder):
    return json.loads((Path(folder) / "manifest.json").read_text(encoding="utf-8"))


def bits(v):
    return struct.unpack("<Q", struct.pack("<d", float(v)))[0]


def ulps(a, b):
    def key(v):
        i = struct.unpack("<q", struct.pack("<d", float(v)))[0]
        return i if i >= 0 else -(i & 0x7FFFFFFFFFFFFFFF)
    return abs(key(a) - key(b))


def main_c_rows(folder):
    """The rows main.c feeds the model, read from its source (hexadecimal literals, NAN)."""
    text = (Path(folder) / "main.c").read_text()
    block = re.search(r"static const double rows\[\d+\]\[BOXWOOD_N_FEATURES\] = \{\n(.*?)\n\};", text, re.S).group(1)
    return [[math.nan if v == "NAN" else float.fromhex(v) for v in line.strip().strip("{},").split(", ")]
            for line in block.splitlines()]


def sklearn_input(case, rows):
    """The rows as scikit-learn takes them: a DataFrame with pandas' categories for a frame-fitted
    model (a category's position in pandas' own order gives its label), else a float array."""
    if not hasattr(case.X, "columns"):
        return np.array(rows, dtype=np.float64)
    import pandas as pd

    df = pd.DataFrame(rows, columns=list(case.X.columns))
    for col in case.X.columns:
        if isinstance(case.X[col].dtype, pd.CategoricalDtype):
            cats = case.X[col].cat.categories
            df[col] = pd.Categorical([None if v != v else cats[int(v)] for v in df[col]], categories=cats)
    return df


def sklearn_values(case, method, rows):
    """(raw per row, predictions per row) as scikit-learn computes them for these rows."""
    X = sklearn_input(case, rows)
    raw = np.asarray(getattr(case.model, method)(X), dtype=np.float64)
    raw = raw.reshape(len(rows), -1)
    if hasattr(case.model, "predict_proba"):
        out = np.asarray(case.model.predict_proba(X), dtype=np.float64)
    else:
        out = np.asarray(case.model.predict(X), dtype=np.float64).reshape(len(rows), -1)
    return raw, out


def sklearn_trees(model):
    """(trees, nodes, deepest path) from scikit-learn's fitted attributes. A forest classifier's
    tree holds one value per class in each leaf; the artefact (and the C) holds it as one tree
    per class, each with the same nodes."""
    if hasattr(model, "_predictors"):
        preds = [p for stage in model._predictors for p in stage]
        return len(preds), sum(len(p.nodes) for p in preds), max(int(p.nodes["depth"].max()) for p in preds)
    trees = [t.tree_ for t in np.ravel(model.estimators_)]
    per = len(model.classes_) if hasattr(model, "classes_") and not hasattr(model, "loss") else 1
    return per * len(trees), per * sum(t.node_count for t in trees), max(t.max_depth for t in trees)


def make(folder, target):
    return subprocess.run(["make", "-s", target], cwd=str(folder), capture_output=True, text=True,
                          stdin=subprocess.DEVNULL, timeout=300)


def check_against_sklearn(name, case, folder, printed):
    method = CASES[name][0]
    rows = main_c_rows(folder)
    results = board.parse_selftest_output(printed)
    raw, out = sklearn_values(case, method, rows)
    assert len(results) == len(rows) == len(raw) >= 6
    for i, (rc, got_raw, got_out) in enumerate(results):
        assert rc == 0, (name, i)
        assert [bits(v) for v in got_raw] == [bits(v) for v in raw[i]], (name, i, got_raw, list(raw[i]))
        assert len(got_out) == len(out[i]), (name, i)
        assert max(ulps(a, b) for a, b in zip(got_out, out[i])) <= OUT_ULPS, (name, i, got_out, list(out[i]))
    verdict = printed.strip().splitlines()[-1]
    assert verdict.startswith("PASS: %d reference rows, raw values bit for bit" % len(rows)), printed[-500:]


# ----------------------------------------------------------------------------- the folder
@pytest.mark.parametrize("name", list(CASES))
def test_folder_holds_the_files_and_a_true_manifest(name, made):
    case, _, folder, prefix = made[name]
    assert sorted(p.name for p in folder.iterdir()) == sorted(BOARD_FILES + [prefix + ".c", prefix + ".h"])
    manifest = manifest_of(folder)
    validate(manifest, "bundle-manifest")
    assert Draft202012Validator(load_schema("bundle-manifest")).is_valid(manifest)
    assert manifest["target"] == "c" and manifest["entry"] == "main.c" and "python" not in manifest
    assert sorted(manifest["files"]) == sorted(p.name for p in folder.iterdir() if p.name != "manifest.json")
    for file, entry in manifest["files"].items():  # hashlib's SHA-256 of the bytes on disk
        data = (folder / file).read_bytes()
        assert entry == {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
    c = manifest["c"]
    assert (c["prefix"], c["source"], c["header"]) == (prefix, prefix + ".c", prefix + ".h")
    # The source artefact: the digest boxwood export gives the same model, named in the C file too.
    export_json = folder.parent / (name + ".json")
    assert main(["export", str(made[name][1]), "-o", str(export_json)]) == 0
    digest = json.loads(export_json.read_bytes())["boxwood_digest"]
    assert manifest["artefact"]["digest"] == digest
    assert '"source_digest":"%s"' % digest in (folder / (prefix + ".c")).read_text()
    # Counts against scikit-learn's own fitted trees and inputs.
    foot = manifest["footprint"]
    assert (foot["trees"], foot["nodes"], foot["max_depth"]) == sklearn_trees(case.model)
    assert len(c["inputs"]) == case.model.n_features_in_
    if hasattr(case.model, "feature_names_in_"):
        assert c["inputs"] == list(case.model.feature_names_in_)
    assert c["classes"] == (case.model.classes_.tolist() if hasattr(case.model, "classes_") else None)
    assert c["reference_rows"] == len(main_c_rows(folder))
    header = (folder / (prefix + ".h")).read_text()
    up = prefix.upper()
    assert "#define %s_N_OUTPUTS %d " % (up, c["n_outputs"]) in header
    assert "#define %s_N_PREDICTIONS %d " % (up, c["n_predictions"]) in header


def test_zip_holds_the_folder(made):
    import zipfile

    _, _, folder, _ = made["rfc_multiclass"]
    with zipfile.ZipFile(str(folder) + ".zip") as zf:
        assert sorted(zf.namelist()) == sorted("%s/%s" % (folder.name, p.name) for p in folder.iterdir())
        for p in folder.iterdir():
            assert zf.read("%s/%s" % (folder.name, p.name)) == p.read_bytes()


@pytest.mark.parametrize("name", ["hgbc_categorical", "rfc_multiclass"])
def test_readme_says_how_to_build_the_api_inputs_footprint_and_cautions(name, made):
    case, _, folder, prefix = made[name]
    readme = (folder / "README.txt").read_text()
    manifest = manifest_of(folder)
    for needed in ("make host", "make qemu", "make clean", "int %s_raw(" % prefix, "int %s_predict(" % prefix,
                   "int %s_label(" % prefix, "%s_OK" % prefix.upper(), "%s_ERR_MISSING" % prefix.upper(),
                   "advisory", "can hurt someone", "applicable standards and", "local codes",
                   "single precision", "software", "no heap"):
        assert needed in readme, needed
    positions = [readme.index("x[%d]  %s  (" % (j, n)) for j, n in enumerate(manifest["c"]["inputs"])]
    assert positions == sorted(positions)  # every input, in order
    if hasattr(case.X, "columns"):  # text categories: positions in pandas' own category order
        cats = case.X["bmi_band"].cat.categories
        assert ", ".join('%d = "%s"' % (i, c) for i, c in enumerate(cats)) in readme
    m4 = manifest["footprint"]["cortex_m4"]
    if m4["measured"]:
        for part in ("model", "program"):
            assert "flash %d bytes, RAM %d bytes" % (m4[part]["flash"], m4[part]["ram"]) in readme
    else:
        assert m4["why"] in readme


# ----------------------------------------------------------------------------- builds
@pytest.mark.parametrize("name", list(CASES))
def test_make_host_prints_pass_and_sklearns_bits(name, made, tmp_path):
    _need("make", "cc")
    case, _, folder, _ = made[name]
    copy_dir = tmp_path / "project"
    shutil.copytree(folder, copy_dir)
    done = make(copy_dir, "host")
    assert done.returncode == 0, done.stderr + done.stdout[-2000:]
    check_against_sklearn(name, case, folder, done.stdout)


@pytest.mark.parametrize("name", list(CASES))
def test_make_qemu_gives_the_same_bits_and_the_manifests_footprint(name, made, tools, tmp_path):
    case, _, folder, prefix = made[name]
    copy_dir = tmp_path / "project"
    shutil.copytree(folder, copy_dir)
    done = make(copy_dir, "qemu")
    assert done.returncode == 0, done.stderr + done.stdout[-2000:]
    check_against_sklearn(name, case, folder, done.stdout)
    m4 = manifest_of(folder)["footprint"]["cortex_m4"]
    assert m4["measured"] is True and m4["self_test"] == done.stdout.strip().splitlines()[-1]
    # The numbers arm-none-eabi-size prints for what make built (Berkeley format).
    for part, file in (("program", prefix + ".elf"), ("model", prefix + ".arm.o")):
        printed = subprocess.run([tools.size, "-B", file], cwd=str(copy_dir), capture_output=True, text=True,
                                 check=True).stdout.splitlines()
        assert printed[0].split()[:3] == ["text", "data", "bss"]
        text, data, bss = (int(v) for v in printed[1].split()[:3])
        assert m4[part] == {"file": m4[part]["file"], "text": text, "data": data, "bss": bss,
                            "flash": text + data, "ram": data + bss}, part
    assert m4["model"]["ram"] == 0  # every table is const: the model needs no RAM but its stack


def test_numeric_pipeline_runs_its_steps_in_c_on_the_host(cache, tmp_path):
    """Median imputation and an ordinal encoder run in C: make host gives scikit-learn's predict."""
    _need("make", "cc")
    from test_c_target import numeric_pipeline

    model, _ = numeric_pipeline()
    joblib.dump(model, tmp_path / "pipe.joblib")
    folder = tmp_path / "b"
    assert main(["bundle", str(tmp_path / "pipe.joblib"), "--target", "c", "-o", str(folder), "--c-prefix", "pump"]) == 0
    readme = (folder / "README.txt").read_text()
    assert "x[0]  x0  (a number; imputed in C)" in readme and "x[1]  x1  (a number; encoded in C)" in readme
    done = make(folder, "host")
    assert done.returncode == 0, done.stderr
    rows = main_c_rows(folder)
    want = model.predict(np.array(rows))  # identity regressor: predict is the raw score
    assert [bits(raw[0]) for _, raw, _ in board.parse_selftest_output(done.stdout)] == [bits(v) for v in want]
    assert any(v != v for r in rows for v in r) and done.stdout.strip().splitlines()[-1].startswith("PASS")


@pytest.mark.parametrize("name", ["cal_hgbc_isotonic_multiclass", "cal_hgbc_sigmoid_binary_prefit"])
def test_calibrated_classifier_bundle_on_the_host_and_the_m4(name, cache, tmp_path):
    """CalibratedClassifierCV (docs/calibration.md): P_raw gives every fold's own
    decision_function side by side (scikit-learn's calibrated_classifiers_[f].estimator), bit for
    bit; P_predict gives predict_proba of all classes within OUT_ULPS; on the host and, where the
    toolchain is installed, on the emulated Cortex-M4."""
    _need("make", "cc")
    case = zoo.fitted(name)
    joblib.dump(case.model, tmp_path / "m.joblib")
    folder = tmp_path / "b"
    assert main(["bundle", str(tmp_path / "m.joblib"), "--target", "c", "-o", str(folder)]) == 0
    rows = main_c_rows(folder)
    X = sklearn_input(case, rows)
    raw = np.hstack([np.asarray(cc.estimator.decision_function(X), dtype=np.float64).reshape(len(rows), -1)
                     for cc in case.model.calibrated_classifiers_])
    out = np.asarray(case.model.predict_proba(X), dtype=np.float64)
    targets = ["host"] + ([] if board.unavailable_reason() else ["qemu"])
    for target in targets:
        copy_dir = tmp_path / target
        shutil.copytree(folder, copy_dir)
        done = make(copy_dir, target)
        assert done.returncode == 0, done.stderr + done.stdout[-2000:]
        results = board.parse_selftest_output(done.stdout)
        assert len(results) == len(rows) >= 6
        for i, (rc, got_raw, got_out) in enumerate(results):
            assert rc == 0
            assert [bits(v) for v in got_raw] == [bits(v) for v in raw[i]], (target, i)
            assert len(got_out) == out.shape[1] and max(ulps(a, b) for a, b in zip(got_out, out[i])) <= OUT_ULPS
        assert done.stdout.strip().splitlines()[-1].startswith("PASS"), done.stdout[-500:]


def test_a_wrong_expected_value_makes_the_example_fail(made, tools, tmp_path):
    """Planted fault: one expected raw value one ulp off. The example prints FAIL and exits 1
    on the board, and the bundle is not made (the post-write check fails: exit 1)."""
    case, model_file, folder, _ = made["gbr_squared_error"]
    manifest = manifest_of(folder)
    rows = main_c_rows(folder)
    raw, out = sklearn_values(case, "predict", rows)
    raw[2][0] = np.nextafter(raw[2][0], np.inf)
    copy_dir = tmp_path / "project"
    shutil.copytree(folder, copy_dir)
    board.write_bundle(copy_dir, "model", rows, 1, 1, raw.tolist(), out.tolist(), OUT_ULPS)
    done = make(copy_dir, "qemu")
    assert done.returncode != 0
    assert "mismatch row 2: raw 0 differs" in done.stdout and "FAIL: 1 of %d reference rows differ" % len(rows) \
        in done.stdout
    original = board.write_bundle

    def nudged(folder_, prefix, rows_, n_out, n_pred, expected_raw, expected_out, out_ulps):
        expected_raw = [list(r) for r in expected_raw]
        expected_raw[0][0] = float(np.nextafter(expected_raw[0][0], -np.inf))
        return original(folder_, prefix, rows_, n_out, n_pred, expected_raw, expected_out, out_ulps)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(board, "write_bundle", nudged)
        assert main(["bundle", str(model_file), "--target", "c", "-o", str(tmp_path / "b")]) == 1
    assert not (tmp_path / "b").exists()
    assert manifest["footprint"]["cortex_m4"]["self_test"].startswith("PASS")


def test_checking_main_refuses_expectations_of_the_wrong_shape():
    rows = [[1.0, 2.0], [3.0, 4.0]]
    with pytest.raises(ValueError, match="expected_raw"):
        board.selftest_main_c("toy", rows, 1, 2, expected_raw=[[0.5]])
    with pytest.raises(ValueError, match="expected_out"):
        board.selftest_main_c("toy", rows, 1, 2, expected_raw=[[0.5], [0.5]], expected_out=[[0.1], [0.2]])
    with pytest.raises(ValueError, match="needs expected_raw"):
        board.selftest_main_c("toy", rows, 1, 1, expected_out=[[0.1], [0.2]])
    plain = board.selftest_main_c("toy", rows, 1, 1)
    assert "PASS" not in plain and "expected_raw" not in plain  # without expectations: as before


# ----------------------------------------------------------------------------- determinism, refusals
def test_same_model_same_bytes(made, tmp_path):
    _, model_file, folder, _ = made["gbr_squared_error"]
    outs = []
    for side in ("one", "two"):
        out = tmp_path / side / "b"
        assert main(["bundle", str(model_file), "--target", "c", "-o", str(out), "--zip"]) == 0
        outs.append(out)
    one, two = outs
    assert sorted(p.name for p in one.iterdir()) == sorted(p.name for p in two.iterdir())
    for p in one.iterdir():
        assert p.read_bytes() == (two / p.name).read_bytes(), p.name
        assert p.read_bytes() == (folder / p.name).read_bytes(), p.name  # and the fixture's, made earlier
    assert (tmp_path / "one" / "b.zip").read_bytes() == (tmp_path / "two" / "b.zip").read_bytes()


def test_text_steps_are_refused_with_exit_2_naming_the_step(cache, tmp_path, capsys):
    model_file = tmp_path / "pipe.joblib"
    joblib.dump(zoo.fitted("pipe_gbc_strict_encoder").model, model_file)
    assert main(["bundle", str(model_file), "--target", "c", "-o", str(tmp_path / "b")]) == 2
    warning, err = capsys.readouterr().err.split("\n", 1)  # loading a pickle: its warning line first
    assert warning.startswith("boxwood: warning: loading ")
    assert err.startswith("boxwood: error: cannot write C:") and "step" in err and "text categories" in err
    assert err.count("\n") == 1
    assert not (tmp_path / "b").exists() and [p.name for p in tmp_path.iterdir()] == ["pipe.joblib"]


def test_usage_errors_exit_2(made, tmp_path, capsys):
    _, model_file, folder, _ = made["gbr_squared_error"]
    cases = [
        (["--target", "c", "-o", str(folder)], "not an empty folder"),
        (["--target", "c", "-o", str(tmp_path / "b"), "--c-prefix", "main"], "would overwrite"),
        (["--target", "c", "-o", str(tmp_path / "b"), "--c-prefix", "2x"], "not a usable identifier"),
        (["--target", "c", "-o", str(tmp_path / "b"), "--c-prefix", "int"], "not a usable identifier"),
        (["-o", str(tmp_path / "b"), "--c-prefix", "pump"], "--target c only"),
        (["--target", "c", "-o", str(tmp_path / "b"), "--micropython-footprint", "skip"], "--target python only"),
        (["--target", "cpp", "-o", str(tmp_path / "b")], "invalid choice"),
    ]
    for extra, message in cases:
        assert main(["bundle", str(model_file)] + extra) == 2, extra
        assert message in capsys.readouterr().err, extra
    assert not (tmp_path / "b").exists()


def test_a_failed_post_write_check_exits_1(made, tmp_path, capsys, monkeypatch):
    from boxwood.formats.c import check as c_check

    _, model_file, _, _ = made["gbr_squared_error"]
    monkeypatch.setattr(c_check, "check", lambda path, expected=None: (False, "planted: reference row 0 differs"))
    assert main(["bundle", str(model_file), "--target", "c", "-o", str(tmp_path / "b")]) == 1
    assert "planted: reference row 0 differs" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []


def test_without_the_toolchain_the_footprint_says_why(made, tmp_path, monkeypatch):
    _, model_file, _, _ = made["gbr_squared_error"]
    monkeypatch.setattr(board, "unavailable_reason", lambda: "not on PATH: arm-none-eabi-gcc (planted)")
    assert main(["bundle", str(model_file), "--target", "c", "-o", str(tmp_path / "b")]) == 0
    manifest = manifest_of(tmp_path / "b")
    validate(manifest, "bundle-manifest")
    assert manifest["footprint"]["cortex_m4"] == {"measured": False,
                                                  "why": "not measured: not on PATH: arm-none-eabi-gcc (planted)"}
    assert "not measured: not on PATH: arm-none-eabi-gcc (planted)" in (tmp_path / "b" / "README.txt").read_text()


# ----------------------------------------------------------------------------- the schema
def test_manifest_schema_is_valid_and_not_vacuous(made):
    schema = load_schema("bundle-manifest")
    Draft202012Validator.check_schema(schema)
    good = manifest_of(made["hgbc_categorical"][2])
    faults = {
        "no target (read as a python bundle)": lambda m: m.pop("target"),
        "a python field": lambda m: m.__setitem__("python", {"cpython": "3.8"}),
        "box.py as entry": lambda m: m.__setitem__("entry", "box.py"),
        "a failed self-test": lambda m: m["footprint"]["cortex_m4"].__setitem__("self_test", "FAIL: 1 of 7"),
        "no main.c": lambda m: m["files"].pop("main.c"),
        "a python footprint": lambda m: m["footprint"].__setitem__("micropython", {"measured": False, "why": "x"}),
        "a bad prefix": lambda m: m["c"].__setitem__("prefix", "1x"),
    }
    for what, plant in faults.items():
        bad = copy.deepcopy(good)
        plant(bad)
        with pytest.raises(SchemaError):
            validate(bad, "bundle-manifest")
        assert not Draft202012Validator(schema).is_valid(bad), what


def test_python_bundle_is_unchanged_by_the_c_options(made, tmp_path):
    _, model_file, _, _ = made["gbr_squared_error"]
    out = tmp_path / "py"
    assert main(["bundle", str(model_file), "--target", "python", "-o", str(out),
                 "--micropython-footprint", "skip"]) == 0
    manifest = manifest_of(out)
    validate(manifest, "bundle-manifest")
    assert "target" not in manifest and "c" not in manifest and manifest["entry"] == "box.py"
    assert sorted(p.name for p in out.iterdir()) == ["README.txt", "box.py", "manifest.json", "model.json",
                                                     "scorer.py", "signature.py", "stream.py"]
