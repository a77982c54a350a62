"""CI can trust what ``boxwood verify`` writes: reports exist on every exit code, a check that
compared nothing says so, and the terminal's counts match its lists.

Reports are checked against their own published formats: the JSON report against
schemas/verify-report.schema.json with jsonschema (Draft 2020-12), the JUnit XML parsed with
the standard library's xml.etree (the JUnit XML layout as CI servers read it: testsuite /
testcase / failure / skipped elements; common practice).
"""
from __future__ import annotations

import json
import xml.etree.ElementTree as ET

import joblib
import numpy as np
import pytest
from jsonschema import Draft202012Validator

import zoo
from boxwood.cli import main
from boxwood.schema import load_schema
from boxwood.verify import verify


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    case, _, data = zoo.exported("gbr_squared_error")
    tmp = tmp_path_factory.mktemp("vrep")
    model = tmp / "m.joblib"
    joblib.dump(case.model, model)
    good = tmp / "m.json"
    good.write_bytes(data)
    damaged = tmp / "damaged.json"
    damaged.write_bytes(data[:-40] + b"}\n")
    return case, model, good, damaged


def _reports(tmp_path):
    return tmp_path / "r.json", tmp_path / "r.xml"


def _valid(doc):
    errors = sorted(Draft202012Validator(load_schema("verify-report")).iter_errors(doc), key=str)
    assert not errors, [e.message for e in errors[:3]]


def _junit_cases(path):
    root = ET.parse(path).getroot()
    return [(c.get("name"), c.find("failure") is not None, c.find("skipped") is not None) for c in root.iter("testcase")]


def test_a_damaged_artefact_is_a_failing_case_and_the_others_are_still_verified(files, tmp_path, capsys):
    case, model, good, damaged = files
    rj, rx = _reports(tmp_path)
    code = main(["verify", str(model), str(good), str(damaged), "--probes", "200", "--report-json", str(rj),
                 "--junit", str(rx)])
    out, err = capsys.readouterr()
    assert code == 1  # a damaged artefact is a failed check (README, "Exit codes")
    assert "damaged.json" in out and "Traceback" not in err
    doc = json.loads(rj.read_text())
    _valid(doc)
    assert doc["verdict"] == "fail" and "error" not in doc
    by_path = {a["path"]: a for a in doc["artefacts"]}
    assert by_path[str(good)]["verdict"] == "pass" and by_path[str(good)]["evaluators"]
    bad = by_path[str(damaged)]
    assert bad["verdict"] == "fail" and bad["checks"][0]["name"] == "open"
    assert "digest" in bad["checks"][0]["summary"] or "JSON" in bad["checks"][0]["summary"]
    cases = _junit_cases(rx)
    assert ("open", True, False) in cases
    assert any(name == "structure" and not failed for name, failed, _ in cases)


def test_a_missing_artefact_is_bad_input_and_still_reported(files, tmp_path, capsys):
    case, model, good, _ = files
    rj, rx = _reports(tmp_path)
    gone = tmp_path / "gone.json"
    assert main(["verify", str(model), str(good), str(gone), "--probes", "100", "--report-json", str(rj),
                 "--junit", str(rx)]) == 2
    err = capsys.readouterr().err
    assert "gone.json" in err and "not found" in err and "Traceback" not in err
    doc = json.loads(rj.read_text())
    _valid(doc)
    assert doc["error"]["exit_code"] == 2
    assert {a["path"]: a["verdict"] for a in doc["artefacts"]} == {str(good): "pass", str(gone): "fail"}
    assert ("open", True, False) in _junit_cases(rx)


@pytest.mark.parametrize("which", ["model", "data"])
def test_bad_model_or_data_still_writes_both_reports(files, tmp_path, capsys, which):
    case, model, good, _ = files
    rj, rx = _reports(tmp_path)
    args = ["verify", str(model), str(good), "--report-json", str(rj), "--junit", str(rx)]
    if which == "model":
        bad = tmp_path / "not_a_model.joblib"
        bad.write_bytes(b"\x80\x04 this is not a pickle")
        args[1] = str(bad)
    else:
        bad = tmp_path / "data.csv"
        bad.write_text("no,such,columns\n1,2,3\n")
        args += ["--data", str(bad)]
    assert main(args) == 2
    err = capsys.readouterr().err
    if err.startswith("boxwood: warning: loading "):  # a pickle was loaded: its warning line comes first
        err = err.split("\n", 1)[1]
    assert "Traceback" not in err and err.startswith("boxwood: error:")
    doc = json.loads(rj.read_text())
    _valid(doc)
    assert doc["verdict"] == "fail" and doc["error"]["exit_code"] == 2
    assert [c["name"] for c in doc["checks"]] == ["input"]
    assert doc["checks"][0]["status"] == "fail"
    assert [(n, f) for n, f, _ in _junit_cases(rx)] == [("input", True)]


def test_a_run_that_compares_no_rows_does_not_say_ok(files, tmp_path, capsys):
    case, model, good, _ = files
    result = verify(case.model, str(good), probes=0)
    empirical = [c for c in result.checks if c.name.startswith("empirical") or c.name == "bound holds"]
    assert empirical and all(c.status == "skip" for c in empirical)
    assert all("no rows were compared" in c.summary for c in empirical
               if c.name != "empirical: decisions")  # a regressor's has its own reason to skip
    # the structural proof still ran and passes: the verdict is a pass, and it says no rows were compared
    assert result.check("structure").status == "pass" and result.passed
    assert "no rows compared" in result.summary().splitlines()[0]
    assert main(["verify", str(model), str(good), "--probes", "0", "--junit", str(tmp_path / "j.xml")]) == 0
    out = capsys.readouterr().out
    assert "empirical: raw" in out and "skip" in out
    assert all(skipped for name, _, skipped in _junit_cases(tmp_path / "j.xml")
               if name.startswith("empirical") or name == "bound holds")


def test_the_failure_list_accounts_for_every_counted_difference(files, tmp_path):
    """A check that counts N differences lists N, or says how many more the JSON holds."""
    case, _, good, _ = files
    # plant 6 threshold changes (one float64 step each) in six different trees
    from boxwood_runtime.scorer import artefact_bytes

    body = json.loads(good.read_text())
    body.pop("boxwood_digest")
    changed = 0
    for t in body["ensemble"]["trees"]:
        if changed == 6:
            break
        i = next(i for i, f in enumerate(t["feature"]) if f >= 0)
        t["threshold"][i] = float(np.nextafter(np.float32(t["threshold"][i]), np.float32(np.inf))) + 1.0
        changed += 1
    body.pop("self_check", None)
    bad = tmp_path / "six.json"
    bad.write_bytes(artefact_bytes(body))
    result = verify(case.model, str(bad), probes=300)
    structure = result.check("structure", evaluator="device scorer")
    n = int(structure.summary.split(" ")[0])
    assert structure.status == "fail" and n == len(structure.details) >= 6
    where = result.summary(width=400).split("where:", 1)[1]
    listed = [line for line in where.splitlines() if line.startswith("  structure [")]
    more = [line for line in listed if "... and " in line]
    assert len(listed) - len(more) == 4 and more and ("and %d more" % (n - 4)) in more[0]
