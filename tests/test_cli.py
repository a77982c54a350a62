"""The ``boxwood`` command line, end to end.

Models come from the zoo (tests/zoo.py: data sets shipped with scikit-learn, sources
named there), saved with joblib as a user would. Every number is compared with
scikit-learn's own predict / predict_proba / fitted tree attributes; exit codes are
checked against the contract 0 ok, 1 a check failed, 2 bad usage or bad input.
"""
import json
import re
import os
import subprocess
import sys

import joblib
import numpy as np
import pytest

import zoo
from boxwood.cli import main
from boxwood.sources import PICKLE_WARNING
from boxwood_runtime.scorer import artefact_bytes
from test_stream import check_against_sklearn, csv_text, ids_for, jsonl_text, parse_csv, parse_jsonl

# One of each family: histogram trees with string categories and NaN, histogram
# multiclass with NaN, classic binary (float32 compare), classic regression, and a
# log-link regressor (exp post-transform).
CLI_CASES = ["hgbr_categorical_nan", "hgbc_multiclass_nan", "gbc_binary", "gbr_squared_error", "hgbr_poisson"]


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    """{case name: (case, path of the artefact written by `boxwood export`, stdout)}."""
    tmp = tmp_path_factory.mktemp("cli")
    result = {}
    for name in CLI_CASES:
        case = zoo.fitted(name)
        model_file = tmp / (name + ".joblib")
        joblib.dump(case.model, model_file)
        artefact = tmp / (name + ".json")
        result[name] = (case, artefact, model_file)
    return result


def export(exported, name, capsys):
    case, artefact, model_file = exported[name]
    if not artefact.exists():
        assert main(["export", str(model_file), "-o", str(artefact)]) == 0
        capsys.readouterr()
    return case, artefact


def device_for(path):
    from boxwood_runtime import load

    return load(str(path))


# ----------------------------------------------------------------------------- export
def test_export_prints_a_summary_that_matches_the_file(exported, tmp_path, capsys):
    case, _, model_file = exported["gbc_binary"]
    out = tmp_path / "m.json"
    assert main(["export", str(model_file), "-o", str(out), "--reference-rows", "3"]) == 0
    text = capsys.readouterr().out
    model = case.model
    # scikit-learn's own fitted attributes: one tree per stage for a binary classifier.
    n_trees = model.estimators_.size
    n_nodes = sum(e.tree_.node_count for e in model.estimators_.ravel())
    doc = json.loads(out.read_bytes())
    assert "exported sklearn.ensemble.GradientBoostingClassifier to %s" % out in text
    assert "trees       %d\n" % n_trees in text
    assert "nodes       %d\n" % n_nodes in text
    assert "bytes       %d\n" % out.stat().st_size in text
    assert "digest      %s\n" % doc["boxwood_digest"] in text
    assert "3 reference rows reproduced" in text
    assert len(doc["self_check"]["rows"]) == 3


@pytest.mark.parametrize("name", CLI_CASES)
def test_export_then_score_csv_and_jsonl_match_sklearn(exported, name, tmp_path, capsys):
    case, artefact = export(exported, name, capsys)
    device = device_for(artefact)
    n = len(case.rows)
    csv_in, jsonl_in = tmp_path / "in.csv", tmp_path / "in.jsonl"
    csv_in.write_text(csv_text(device.feature_names, case.rows, ids_for(n)), encoding="utf-8")
    jsonl_in.write_text(jsonl_text(device.feature_names, case.rows, ids_for(n)), encoding="utf-8")
    csv_out, jsonl_out = tmp_path / "out.csv", tmp_path / "out.jsonl"
    assert main(["score", str(artefact), str(csv_in), "-o", str(csv_out)]) == 0
    assert main(["score", str(artefact), str(jsonl_in), "-o", str(jsonl_out)]) == 0
    # stderr holds only the two success summaries (counts; the rate is not checked)
    err = capsys.readouterr().err.splitlines()
    assert [re.sub(r"[0-9]+ rows per second$", "R rows per second", e) for e in err] == [
        "boxwood: scored %d rows, 0 errors, R rows per second" % n] * 2
    rows = parse_csv(csv_out.read_text(encoding="utf-8"))
    assert [r["id"] for r in rows] == ids_for(n)
    check_against_sklearn(device, case, rows, text=True)
    rows = parse_jsonl(jsonl_out.read_text(encoding="utf-8"))
    assert [r["id"] for r in rows] == ids_for(n)
    check_against_sklearn(device, case, rows, text=False)


def test_export_refuses_unsupported_models_with_the_list(tmp_path, capsys):
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.linear_model import LinearRegression

    fitted = LinearRegression().fit(np.arange(10.0).reshape(5, 2), np.arange(5.0))
    for model in (fitted, HistGradientBoostingRegressor()):  # not a tree ensemble; not fitted
        path = tmp_path / "m.joblib"
        joblib.dump(model, path)
        assert main(["export", str(path), "-o", str(tmp_path / "m.json")]) == 2
        err = capsys.readouterr().err
        warning, err = err.split("\n", 1)  # loading a pickle: the warning line first (sources.loading)
        assert warning.startswith("boxwood: warning: loading ") and PICKLE_WARNING in warning
        assert err.startswith("boxwood: error: ")
        assert "sklearn.ensemble.HistGradientBoostingClassifier" in err  # the supported list
        assert "Traceback" not in err
    assert not (tmp_path / "m.json").exists()


def test_export_bad_inputs_exit_2(exported, tmp_path, capsys):
    _, _, model_file = exported["gbc_binary"]
    junk = tmp_path / "junk.joblib"
    junk.write_bytes(b"this is not a pickle")
    cases = [
        ["export", str(tmp_path / "absent.joblib"), "-o", str(tmp_path / "a.json")],
        ["export", str(junk), "-o", str(tmp_path / "b.json")],
        ["export", str(model_file), "-o", str(tmp_path / "c.artefact")],
        ["export", str(model_file), "-o", str(tmp_path / "d.json"), "--reference-rows", "0"],
        ["export", str(model_file)],  # -o is required
    ]
    for argv in cases:
        assert main(argv) == 2, argv
        err = capsys.readouterr().err
        assert "error" in err and "Traceback" not in err, argv
    assert sorted(os.listdir(tmp_path)) == ["junk.joblib"]


def test_export_help_warns_that_pickles_run_code(capsys):
    assert main(["export", "--help"]) == 0
    assert "runs code" in " ".join(capsys.readouterr().out.split())


# ----------------------------------------------------------------------------- score
def test_score_mixed_bad_rows_writes_every_row_and_exits_2(exported, tmp_path, capsys):
    case, artefact = export(exported, "hgbr_categorical_nan", capsys)
    device = device_for(artefact)
    names = device.feature_names
    good = [",".join("" if v is None else (v if isinstance(v, str) else repr(v)) for v in r)
            for r in case.rows[:3]]
    bad_number = good[1].split(",")
    bad_number[names.index("s3")] = "n.a."  # not a number, nor one of pandas' missing markers ("n/a" is)
    bad_cat = good[1].split(",")
    bad_cat[names.index("bmi_band")] = "b7"
    text = "\n".join(["id," + ",".join(names), "a," + good[0], "b," + ",".join(bad_number),
                      "c," + ",".join(bad_cat), "d," + good[1] + ",9", "e," + good[2]]) + "\n"
    src, dst = tmp_path / "in.csv", tmp_path / "out.csv"
    src.write_text(text, encoding="utf-8")
    assert main(["score", str(artefact), str(src), "-o", str(dst)]) == 2
    err = capsys.readouterr().err
    assert err == ("boxwood: scored 5 rows, 3 errors (first: row 2 (line 3), field 's3': "
                   "expected a number, got 'n.a.')\n")
    rows = parse_csv(dst.read_text(encoding="utf-8"))
    assert [r["id"] for r in rows] == ["a", "b", "c", "d", "e"]
    assert rows[2]["error"].startswith("row 3 (line 4), field 'bmi_band': unknown category 'b7'")
    assert rows[3]["error"] == "row 4 (line 5): has %d cells, the header has %d" % (len(names) + 2, len(names) + 1)
    check_against_sklearn(device, case, [rows[0], rows[4]], text=True, select=[0, 2])
    # The same unknown category is routed as missing on request, as scikit-learn does.
    one = tmp_path / "one.csv"
    one.write_text("id," + ",".join(names) + "\nc," + ",".join(bad_cat) + "\n", encoding="utf-8")
    assert main(["score", str(artefact), str(one), "-o", str(dst), "--unknown-category", "as_missing"]) == 0
    X = case.X.iloc[[1]].copy()
    X.iloc[0, X.columns.get_loc("bmi_band")] = np.nan
    assert float(parse_csv(dst.read_text(encoding="utf-8"))[0]["prediction"]) == float(case.model.predict(X)[0])


def test_score_id_column_option(exported, tmp_path, capsys):
    case, artefact = export(exported, "gbc_binary", capsys)
    device = device_for(artefact)
    src, dst = tmp_path / "in.csv", tmp_path / "out.csv"
    src.write_text(csv_text(device.feature_names, case.rows[:4], ["w", "x", "y", "z"], id_name="tag"))
    assert main(["score", str(artefact), str(src), "-o", str(dst), "--id-column", "tag"]) == 0
    rows = parse_csv(dst.read_text())
    assert [r["tag"] for r in rows] == ["w", "x", "y", "z"]
    check_against_sklearn(device, case, rows, text=True, select=[0, 1, 2, 3])
    dst.unlink()
    assert main(["score", str(artefact), str(src), "-o", str(dst), "--id-column", "serial"]) == 2
    assert "'serial' is not in the CSV header" in capsys.readouterr().err
    assert not dst.exists()  # nothing half-written


def test_score_through_stdin_and_stdout_in_a_subprocess(exported, tmp_path, capsys):
    case, artefact = export(exported, "hgbc_multiclass_nan", capsys)
    device = device_for(artefact)
    n = 30
    text = jsonl_text(device.feature_names, case.rows[:n], ids_for(n))
    proc = subprocess.run([sys.executable, "-m", "boxwood", "score", str(artefact)],
                          input=text.encode(), capture_output=True, cwd=str(tmp_path), timeout=120)
    assert proc.returncode == 0, proc.stderr
    rows = parse_jsonl(proc.stdout.decode("utf-8"))
    assert [r["id"] for r in rows] == ids_for(n)
    check_against_sklearn(device, case, rows, text=False, select=list(range(n)))
    # A malformed line makes an error row and exit code 2, nothing is lost.
    lines = text.splitlines()
    lines[4] = lines[4][:-3]
    proc = subprocess.run([sys.executable, "-m", "boxwood", "score", str(artefact), "-", "-o", "-"],
                          input="\n".join(lines).encode(), capture_output=True, cwd=str(tmp_path), timeout=120)
    assert proc.returncode == 2
    rows = parse_jsonl(proc.stdout.decode("utf-8"))
    assert len(rows) == n and rows[4]["error"].startswith("row 5 (line 5): not valid JSON")
    assert b"scored 30 rows, 1 errors (first: row 5 (line 5): not valid JSON" in proc.stderr
    assert b"Traceback" not in proc.stderr


def test_help_and_version_in_a_subprocess(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "boxwood", "--help"], capture_output=True,
                          cwd=str(tmp_path), timeout=120)
    assert proc.returncode == 0
    out = proc.stdout.decode()
    for command in ("export", "score", "inspect", "demo"):
        assert "\n    %s " % command in out
    import boxwood

    proc = subprocess.run([sys.executable, "-m", "boxwood", "--version"], capture_output=True,
                          cwd=str(tmp_path), timeout=120)
    assert proc.returncode == 0 and proc.stdout.decode().startswith("boxwood %s" % boxwood.__version__)


# ----------------------------------------------------------------------------- exit codes
def test_usage_errors_exit_2(capsys):
    for argv in ([], ["frobnicate"], ["score"], ["inspect"], ["score", "a.json", "--format", "xml"],
                 ["demo", "--rows", "ten"], ["demo", "--rows", "5"]):
        assert main(argv) == 2, argv
        assert "Traceback" not in capsys.readouterr().err


def test_missing_artefacts_exit_2_and_damaged_ones_exit_1(exported, tmp_path, capsys):
    # The exit-code table (README "Exit codes"): a missing file is bad input (2); a file
    # that carries a boxwood digest but is cut short is a damaged artefact: a failed check (1).
    case, artefact = export(exported, "gbc_binary", capsys)
    data = artefact.read_bytes()
    half = tmp_path / "half.json"
    half.write_bytes(data[: len(data) // 2])
    stub = tmp_path / "stub.json"
    stub.write_bytes(data[:20])
    src = tmp_path / "in.csv"
    src.write_text(csv_text(device_for(artefact).feature_names, case.rows[:2]))
    for path, code in ((tmp_path / "absent.json", 2), (half, 1), (stub, 1)):
        for argv in (["inspect", str(path)], ["inspect", str(path), "--json"],
                     ["score", str(path), str(src), "-o", str(tmp_path / "o.csv")]):
            assert main(argv) == code, argv
            err = capsys.readouterr().err
            assert err.startswith("boxwood: error: ") and "Traceback" not in err, (argv, err)
    assert main(["score", str(artefact), str(tmp_path / "absent.csv")]) == 2
    assert "not found" in capsys.readouterr().err
    assert not (tmp_path / "o.csv").exists()


def test_self_check_failure_exits_1(exported, tmp_path, capsys):
    # A planted fault: the stored expected raw score of one reference row moved by one
    # ulp, the file re-written with a valid digest so only the self-check can notice.
    case, artefact = export(exported, "hgbr_categorical_nan", capsys)
    doc = json.loads(artefact.read_bytes())
    del doc["boxwood_digest"]
    raw = doc["self_check"]["raw"][0][0]
    doc["self_check"]["raw"][0][0] = float(np.nextafter(raw, np.inf))
    bad = tmp_path / "bad.json"
    bad.write_bytes(artefact_bytes(doc))
    assert main(["inspect", str(bad)]) == 1
    assert "self-check  FAILED: reference row 0: raw scores" in capsys.readouterr().out
    assert main(["inspect", str(bad), "--json"]) == 1
    info = json.loads(capsys.readouterr().out)
    assert info["self_check"]["ok"] is False
    src = tmp_path / "in.csv"
    src.write_text(csv_text(device_for(artefact).feature_names, case.rows[:2]))
    assert main(["score", str(bad), str(src), "-o", str(tmp_path / "o.csv")]) == 1
    assert "self-check failed" in capsys.readouterr().err
    assert not (tmp_path / "o.csv").exists()
    # the untouched artefact passes
    assert main(["inspect", str(artefact)]) == 0


# ----------------------------------------------------------------------------- inspect
@pytest.mark.parametrize("name", ["hgbc_multiclass_nan", "hgbr_categorical_nan"])
def test_inspect_json_matches_the_ensemble(exported, name, capsys):
    from boxwood.export import build

    case, artefact = export(exported, name, capsys)
    assert main(["inspect", str(artefact), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    ensemble = build(case.model)
    assert info["trees"] == len(ensemble.trees)
    assert info["nodes"] == ensemble.n_nodes
    assert info["max_depth"] == ensemble.max_depth()
    assert info["task"] == ensemble.task
    assert info["features"] == [{"name": f.name, "kind": f.kind,
                                 "categories": len(f.categories) if f.is_categorical else None}
                                for f in ensemble.features]
    assert info["outputs"]["classes"] == ensemble.classes
    assert info["bytes"] == artefact.stat().st_size
    assert info["digest"] == json.loads(artefact.read_bytes())["boxwood_digest"]
    assert info["format_version"] == 2
    assert info["provenance"]["estimator"] == "sklearn.ensemble." + type(case.model).__name__
    import sklearn

    assert info["provenance"]["versions"]["scikit-learn"] == sklearn.__version__
    assert info["self_check"]["ok"] is True


def test_inspect_counts_match_sklearn_tree_attributes(exported, capsys):
    # scikit-learn's own fitted trees (public tree_ attributes) as the reference:
    # tree_.max_depth counts the splits on the longest root-to-leaf path.
    case, artefact = export(exported, "gbr_squared_error", capsys)
    assert main(["inspect", str(artefact), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    trees = [e.tree_ for e in case.model.estimators_.ravel()]
    assert info["trees"] == len(trees)
    assert info["nodes"] == sum(t.node_count for t in trees)
    assert info["max_depth"] == max(t.max_depth for t in trees)
    assert [f["name"] for f in info["features"]] == ["x%d" % i for i in range(case.model.n_features_in_)]
    assert main(["inspect", str(artefact)]) == 0
    table = capsys.readouterr().out
    assert "trees       %d (sum)" % len(trees) in table
    assert "max depth   %d" % max(t.max_depth for t in trees) in table


# ----------------------------------------------------------------------------- demo
def test_demo_runs_end_to_end(tmp_path, capsys):
    # Kept small (--rows 300) so it finishes in seconds; the full-size demo is the
    # same code with more rows.
    out = tmp_path / "demo"
    assert main(["demo", "--rows", "300", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert text.count("(bit-identical: yes)") == 3
    assert "all device raw scores bit-identical to scikit-learn: yes" in text
    for step in range(1, 10):
        assert "\n%d. " % step in text
    names = sorted(p.name for p in out.iterdir())
    assert names == ["defrost_needed_hgb.json", "next_hour_temp_gb_float32.json", "next_hour_temp_hgb.json",
                     "sample_readings.csv", "sample_scored_defrost_needed_hgb.csv",
                     "sample_scored_next_hour_temp_hgb.csv"]
    # The artefacts the demo wrote pass the command line's own inspection.
    for name in names[:3]:
        assert main(["inspect", str(out / name)]) == 0
    scored = parse_csv((out / "sample_scored_defrost_needed_hgb.csv").read_text())
    assert len(scored) == 6 and scored[-1]["error"].startswith("row 6 (line 7), field 'room_type'")


def test_demo_with_every_model_kind(tmp_path, capsys):
    """--models all adds a forest, a tree, an isolation forest, AdaBoost and a pipeline;
    each is compared with scikit-learn bit for bit and labels agree."""
    out = tmp_path / "demo-all"
    assert main(["demo", "--rows", "300", "--models", "all", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert text.count("(bit-identical: yes)") == 8 and "NO" not in text
    for name in ("next_hour_temp_forest", "defrost_needed_tree", "unusual_reading_isolation",
                 "defrost_needed_adaboost", "defrost_needed_pipeline"):
        assert (out / (name + ".json")).is_file()
    # the pipeline's encoder maps the unknown room type to its unknown_value: no error row
    scored = parse_csv((out / "sample_scored_defrost_needed_pipeline.csv").read_text())
    assert len(scored) == 6 and all(r["error"] == "" for r in scored)


def test_demo_rejects_unknown_model_kind(capsys):
    assert main(["demo", "--rows", "300", "--models", "forest,cactus"]) == 2
    assert "cactus" in capsys.readouterr().err
