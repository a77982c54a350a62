"""The equivalence checker (boxwood.verify, ``boxwood verify``): trusted only once it
catches planted faults.

Outside references:
- the fitted scikit-learn models of tests/zoo.py (data sets shipped with scikit-learn,
  sources named there): their own ``decision_function`` / ``predict`` / ``predict_proba``;
- numpy's float64 -> float32 cast (IEEE 754-2019 roundTiesToEven, clause 4.3.1) for the
  float32-compared splits;
- exact rational arithmetic (``fractions.Fraction``) for hand-computed bounds;
- Python's ``xml.etree.ElementTree`` for the JUnit XML, ``jsonschema`` (draft 2020-12) for
  the JSON report.

Faulty artefacts are made by editing a good artefact's document and writing it again with
``boxwood_runtime.scorer.artefact_bytes`` (a valid digest). Unless a test says otherwise the
self-check rows are re-scored by the faulty model itself, so the device loader accepts the
file (each test checks that): the verifier, not the loader, must catch the fault.
"""
from __future__ import annotations

import copy
import json
import math
import xml.etree.ElementTree as ET
from fractions import Fraction
from pathlib import Path

import joblib
import numpy as np
import pytest
from jsonschema import Draft202012Validator

import boxwood_runtime
import zoo
from boxwood.cli import main
from boxwood.ir import LEAF, Ensemble, Feature, Tree
from boxwood.schema import load_schema, validate
from boxwood.sources.model import SourceModel
from boxwood import formats
from boxwood import numerics as floats
from boxwood.verify import Artefact, Evaluator, Outputs, assert_equivalent, verify
from boxwood.verify.structure import Side, prove
from boxwood_runtime import scorer
from test_schema import undescribed

DEVICE = "device scorer"


# ----------------------------------------------------------------------------- helpers
def document(name):
    """(case, artefact document without its digest: a fresh copy to edit)."""
    case, _, data = zoo.exported(name)
    doc = json.loads(data)
    doc.pop("boxwood_digest")
    return case, doc


def _num(v):
    return ("inf" if v > 0 else "-inf") if math.isinf(v) else v


def write(doc, path, self_check="recompute"):
    """Write ``doc`` as an artefact with a valid digest.

    self_check="recompute": the reference rows are re-scored by the (faulty) document, so
    the device loader's self-check passes; "remove": the section is dropped (a default
    device load then refuses the file, the verifier still opens it)."""
    doc = copy.deepcopy(doc)
    if self_check == "recompute":
        m = scorer.Model(doc, scorer.DEFAULT_LIMITS, unknown_category="as_missing")
        ref = doc["self_check"]
        raws = [m.raw_scores(m.prepare(r, i)) for i, r in enumerate(ref["rows"])]
        ref["raw"] = [[_num(v) for v in m.exact_values(r)] for r in raws]
        ref["transformed"] = [[_num(v) for v in m.transform_raw(r)] for r in raws]
        if "decision" in ref:  # and what the self-check compares since issue 11
            ref["decision"] = [[_num(v) for v in m.decision_values(r)] for r in raws]
        if "labels" in ref:
            ref["labels"] = [m.predict_from_raw(r) for r in raws]
    elif self_check == "remove":
        doc.pop("self_check")
    data = scorer.artefact_bytes(doc)
    Path(path).write_bytes(data)
    if self_check == "recompute":
        boxwood_runtime.load(data)  # the loader accepts it: only the verifier can catch the fault
    return path


def evaluator(result, name=DEVICE):
    return next(e for e in result.artefacts[0].evaluators if e.name == name)


def findings(result, kind=None, severity=None, name=DEVICE):
    return [f for f in evaluator(result, name).structure["findings"]
            if (kind is None or f["kind"] == kind) and (severity is None or f["severity"] == severity)]


def status(result, check, name=DEVICE):
    return result.check(check, evaluator=name).status


def first_split(tree_doc):
    return next(i for i, f in enumerate(tree_doc["feature"]) if f >= 0 and str(i) not in tree_doc.get(
        "left_categories", {}))


def raw_bound(result, j=0, name=DEVICE):
    return evaluator(result, name).bound["exact_values"][j]["abs"]


# ----------------------------------------------------------------------------- clean exports
@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_every_zoo_model_verifies_clean_against_its_own_export(name, tmp_path):
    case, _, data = zoo.exported(name)
    path = tmp_path / (name + ".json")
    path.write_bytes(data)
    result = verify(case.model, str(path))
    assert result.passed, result.summary()
    for ev in result.artefacts[0].evaluators:
        # raw scores proven bit-identical over every input, and observed so
        assert all(v["exact"] for v in ev.bound["exact_values"]), (ev.name, ev.bound["exact_values"])
        assert all(m["max_abs_error"] == 0 for m in ev.empirical["raw"])
        assert ev.structure["counts"] == {"fail": 0, "value": 0, "note": 0}
    report = json.loads(result.to_json())
    validate(report, "verify-report")
    root = ET.fromstring(result.to_junit())
    assert root.get("failures") == "0" and int(root.get("tests")) == len(result.checks)


def test_probes_reach_every_split_of_a_small_model(tmp_path):
    """The split probes are built to reach their node: on a model small enough for the
    default budget, every numeric split of the source sees rows on both sides of it at
    the node (checked by walking the rows down scikit-learn's own fitted trees)."""
    case, _, data = zoo.exported("gbr_squared_error")
    from boxwood.verify import probes
    from boxwood.sources import read_model

    ens = read_model(case.model)
    rows = probes.generate(ens, [], [], budget=probes.DEFAULT_PROBE_ROWS).rows
    X = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)
    X32 = X.astype(np.float32)
    for est in case.model.estimators_[:, 0]:
        t = est.tree_
        with np.errstate(over="ignore", invalid="ignore"):  # extreme probes overflow scikit-learn's sum check
            paths = est.decision_path(X32).toarray().astype(bool)
        for node in np.flatnonzero(t.children_left != -1):
            at = paths[:, node]
            v = X32[at, t.feature[node]]
            assert (v <= t.threshold[node]).any() and (v > t.threshold[node]).any(), node


# ----------------------------------------------------------------------------- planted faults
def test_threshold_moved_one_float64_step_is_caught_at_its_node(tmp_path):
    """hgbr_squared_error compares in float64: moving a threshold t to the next float64 sends
    exactly the input t' = nextafter(t) the other way."""
    case, doc = document("hgbr_squared_error")
    tree = doc["ensemble"]["trees"][5]
    node = first_split(tree)
    t = tree["threshold"][node]
    moved = float(np.nextafter(t, np.inf))
    tree["threshold"][node] = moved
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    assert not result.passed
    hits = findings(result, "threshold", "fail")
    assert [(f["tree"], f["node"]) for f in hits] == [(5, node)]
    feature = doc["inputs"]["features"][tree["feature"][node]]["name"]
    assert hits[0]["feature"] == feature and repr(moved) in hits[0]["message"]
    assert status(result, "structure") == "fail"
    assert status(result, "bound: raw") == "fail"
    assert status(result, "empirical: raw") == "fail"  # the split probes reach that node
    assert status(result, "bound holds") == "pass"
    # the contribution is that tree's, and it is the largest leaf gap below the node
    contrib = evaluator(result).bound["outputs"][0]["largest_contributions"]
    assert contrib[0]["tree"] == 5


def test_float32_model_threshold_step_is_proven_harmless_or_caught(tmp_path):
    """gbc_binary compares float32(x) <= t. A float64 step of t moves no float32 boundary
    (numpy's cast: the last float64 going left is the same), so the proof says 'no effect';
    moving t to the next float32 value does change the left set, and is caught."""
    case, doc = document("gbc_binary")
    tree = doc["ensemble"]["trees"][3]
    node = first_split(tree)
    t = tree["threshold"][node]
    step = float(np.nextafter(t, np.inf))
    b = floats.float32_left_boundary(t)
    # numpy itself: the same float64 inputs go left under t and under t + 1 ulp
    for x in (b, float(np.nextafter(b, np.inf)), t, step):
        assert (float(np.float32(x)) <= t) == (float(np.float32(x)) <= step)
    tree["threshold"][node] = step
    result = verify(case.model, str(write(doc, tmp_path / "harmless.json")))
    assert result.passed, result.summary()
    notes = findings(result, "threshold", "note")
    assert [(f["tree"], f["node"]) for f in notes] == [(3, node)]
    assert all(v["exact"] for v in evaluator(result).bound["exact_values"])

    nxt = floats.next32_above(floats.float32_floor(t))
    assert (float(np.float32(nxt)) <= t) != (float(np.float32(nxt)) <= nxt)  # the float32 value nxt moves
    tree["threshold"][node] = nxt
    result = verify(case.model, str(write(doc, tmp_path / "caught.json")))
    assert [(f["tree"], f["node"]) for f in findings(result, "threshold", "fail")] == [(3, node)]
    assert status(result, "bound: raw") == "fail" and status(result, "bound holds") == "pass"


def test_missing_direction_flip_is_caught_and_self_check_reported(tmp_path):
    """hgbr_nan routes NaN per node. Flipping the root's direction in tree 2 changes every
    row whose value is missing there. Here the self-check is REMOVED (not recomputed): the
    verifier reports that as its own failed check, and the structure check finds the flip."""
    case, doc = document("hgbr_nan")
    tree = doc["ensemble"]["trees"][2]
    node = first_split(tree)
    tree["missing_left"][node] = not tree["missing_left"][node]
    path = write(doc, tmp_path / "m.json", self_check="remove")
    with pytest.raises(boxwood_runtime.ArtefactError):
        boxwood_runtime.load(str(path))  # a default device load refuses a file without self-check
    result = verify(case.model, str(path))
    assert result.check("self-check").status == "fail"
    hits = findings(result, "missing direction", "fail")
    assert [(f["tree"], f["node"]) for f in hits] == [(2, node)]
    assert status(result, "empirical: raw") == "fail"
    over = evaluator(result).empirical["raw"][0]["examples"]
    worst = evaluator(result).empirical["raw"][0]["worst"]
    assert any("missing" in e["origin"] for e in over + [worst])


def test_leaf_last_bit_is_caught_by_structure_and_judged_by_the_tolerance(tmp_path):
    case, doc = document("hgbc_binary")
    tree = doc["ensemble"]["trees"][0]
    leaf = tree["feature"].index(-1)
    v = tree["value"][leaf]
    tree["value"][leaf] = float(np.nextafter(v, np.inf))
    path = str(write(doc, tmp_path / "m.json"))
    strict = verify(case.model, path)
    hits = findings(strict, "leaf value", "value")
    assert [(f["tree"], f["node"]) for f in hits] == [(0, leaf)] and "1 ulp" in hits[0]["message"]
    assert status(strict, "structure") == "pass"  # routing is identical ...
    assert status(strict, "bound: raw") == "fail"  # ... but bit-exactness is no longer proven
    bound = raw_bound(strict)
    assert Fraction(bound) >= abs(Fraction(v) - Fraction(float(np.nextafter(v, np.inf))))
    assert bound < 1e-12
    tolerated = verify(case.model, path, abs_tol=1e-12)
    assert tolerated.passed, tolerated.summary()
    assert findings(tolerated, "leaf value", "value")  # still reported, now within tolerance


def test_dropped_tree_is_found_where_it_was_dropped(tmp_path):
    case, doc = document("gbr_squared_error")
    dropped = doc["ensemble"]["trees"].pop(17)
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    missing = findings(result, "tree missing", "fail")
    assert [f["tree"] for f in missing] == [17]
    assert findings(result, "tree count", "fail")
    # the other trees pair with their counterparts (no shifted pairs, no leaf differences)
    assert not findings(result, "leaf value") and not findings(result, "threshold")
    top = max(abs(Fraction(v)) for v, f in zip(dropped["value"], dropped["feature"]) if f == -1)
    assert Fraction(raw_bound(result)) >= top
    assert status(result, "empirical: raw") == "fail" and status(result, "bound holds") == "pass"


def test_changed_learning_rate_is_named(tmp_path):
    case, doc = document("gbr_squared_error")
    for tree in doc["ensemble"]["trees"]:
        tree["value"] = [0.5 * v for v in tree["value"]]
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    summary = findings(result, "leaf values", "value")
    assert summary and "scaled by 0.5" in summary[0]["message"]
    assert status(result, "bound: raw") == "fail" and status(result, "empirical: raw") == "fail"
    assert status(result, "bound holds") == "pass"


def test_changed_base_value_is_bounded_exactly(tmp_path):
    case, doc = document("hgbr_squared_error")
    base = doc["ensemble"]["base_values"][0]
    doc["ensemble"]["base_values"][0] = base + 1e-3
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    hits = findings(result, "base value", "value")
    assert len(hits) == 1 and hits[0]["output"] == 0
    out = evaluator(result).bound["outputs"][0]
    assert out["leaf_term"] == 0 and out["base_term"] == float(abs(Fraction(base + 1e-3) - Fraction(base)))
    observed = evaluator(result).empirical["raw"][0]["max_abs_error"]
    assert abs(observed - 1e-3) < 1e-9 and observed <= out["raw_abs"]


def test_leaves_rounded_to_float32_are_named_and_bounded(tmp_path):
    case, doc = document("hgbr_squared_error")
    scale = Fraction(0)
    for tree in doc["ensemble"]["trees"]:
        leaves = [v for v, f in zip(tree["value"], tree["feature"]) if f == -1]
        scale += max(abs(Fraction(v)) for v in leaves)
        tree["value"] = [float(np.float32(v)) for v in tree["value"]]
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    summary = findings(result, "leaf values", "value")
    assert summary and "rounded to float32" in summary[0]["message"]
    assert status(result, "bound: raw") == "fail" and status(result, "empirical: raw") == "fail"
    # rounding to float32 moves each leaf by at most 2**-24 of it (u of binary32)
    out = evaluator(result).bound["outputs"][0]
    assert 0 < Fraction(out["leaf_term"]) <= scale * Fraction(1, 2 ** 24) + Fraction(1, 10 ** 30)
    assert status(result, "bound holds") == "pass"


def test_category_moved_between_sides_is_caught_with_its_value(tmp_path):
    case, doc = document("hgbc_categorical")
    ti, tree, key = next((i, t, sorted(t["left_categories"], key=int)[0])
                         for i, t in enumerate(doc["ensemble"]["trees"]) if t.get("left_categories"))
    feature = doc["inputs"]["features"][tree["feature"][int(key)]]
    codes = tree["left_categories"][key]
    other = next(c for c in range(len(feature["categories"])) if c not in codes)
    moved_out, moved_in = codes[0], other
    tree["left_categories"][key] = sorted(codes[1:] + [other])
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    hits = findings(result, "categories", "fail")
    assert [(f["tree"], f["node"], f["feature"]) for f in hits] == [(ti, int(key), feature["name"])]
    for code in (moved_out, moved_in):
        assert repr(feature["categories"][code]) in hits[0]["message"]
    assert status(result, "empirical: decisions") in ("pass", "fail")
    assert status(result, "empirical: raw") == "fail" and status(result, "bound holds") == "pass"


@pytest.mark.parametrize("name", ["gbc_binary", "hgbc_multiclass"])
def test_swapped_class_order_is_caught(name, tmp_path):
    """The numbers are unchanged (raw bound exact, no raw-score crossing), the labels are not."""
    case, doc = document(name)
    classes = doc["outputs"]["classes"]
    classes[0], classes[1] = classes[1], classes[0]
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    assert [f["kind"] for f in findings(result, severity="fail")] == ["classes"]
    assert all(v["exact"] for v in evaluator(result).bound["exact_values"])
    assert status(result, "empirical: raw") == "pass"
    decisions = evaluator(result).empirical["decisions"]
    assert decisions["flips"] > 0 and status(result, "empirical: decisions") == "fail"
    if name == "gbc_binary":
        assert decisions["crossings"] == 0
        assert decisions["flips"] == evaluator(result).empirical["rows"]  # every label is the other class


# ----------------------------------------------------------------------------- the bound holds
def _perturb(doc, how, rng):
    trees = doc["ensemble"]["trees"]
    if how == "leaves":
        for ti in rng.choice(len(trees), 6, replace=False):
            t = trees[int(ti)]
            leaves = [i for i, f in enumerate(t["feature"]) if f == -1]
            i = int(rng.choice(leaves))
            t["value"][i] = t["value"][i] * (1 + float(rng.uniform(-1e-3, 1e-3)))
    elif how == "thresholds":
        for ti in rng.choice(len(trees), 6, replace=False):
            t = trees[int(ti)]
            splits = [i for i, f in enumerate(t["feature"]) if f >= 0 and str(i) not in t.get("left_categories", {})]
            if splits:
                i = int(rng.choice(splits))
                t["threshold"][i] = t["threshold"][i] + float(rng.uniform(-0.05, 0.05))
    elif how == "base":
        doc["ensemble"]["base_values"] = [b + 0.25 for b in doc["ensemble"]["base_values"]]


@pytest.mark.parametrize("name", ["hgbr_nan", "gbc_binary", "hgbc_multiclass_nan", "hgbr_poisson",
                                  "hgbr_categorical_nan", "rfr", "ada_multiclass", "iforest"])
@pytest.mark.parametrize("how", ["leaves", "thresholds", "base"])
def test_certified_bound_covers_differences_measured_directly(name, how, tmp_path):
    """For perturbed artefacts, the certified bounds in the JSON report are never below the
    differences measured outside the verifier: the device scorer against scikit-learn on the
    zoo's own data rows (not the verifier's probe rows)."""
    case, doc = document(name)
    _perturb(doc, how, np.random.default_rng(abs(hash((name, how))) % 2 ** 32))
    path = write(doc, tmp_path / "m.json")
    result = verify(case.model, str(path), probes=400)
    assert status(result, "bound holds") == "pass"
    ev = evaluator(result)
    device = boxwood_runtime.load(str(path), unknown_category="as_missing")
    source = SourceModel(case.model, zoo.exported(name)[1])
    rows = case.rows[:300]
    with np.errstate(over="ignore", invalid="ignore"):
        want_raw, want_out = source.raw(rows), source.transformed(rows)
    for i, row in enumerate(rows):
        raw = device.raw_scores(device.prepare(row, i))
        got = device.exact_values(raw)
        out = device.transform_raw(raw)
        for j, vb in enumerate(ev.bound["exact_values"]):
            assert abs(got[j] - want_raw[i, j]) <= vb["abs"], (i, j)
        for j, vb in enumerate(ev.bound["transformed"]):
            assert abs(out[j] - want_out[i, j]) <= vb["abs"], (i, j)
    if how == "base" and name != "ada_multiclass":
        assert not result.passed


# ----------------------------------------------------------------------------- reports
@pytest.fixture(scope="module")
def faulty(tmp_path_factory):
    """(case, clean artefact path, faulty artefact path) for hgbr_nan."""
    tmp = tmp_path_factory.mktemp("verify")
    case, data = zoo.exported("hgbr_nan")[0], zoo.exported("hgbr_nan")[2]
    clean = tmp / "clean.json"
    clean.write_bytes(data)
    _, doc = document("hgbr_nan")
    t = doc["ensemble"]["trees"][4]
    t["threshold"][first_split(t)] = float(np.nextafter(t["threshold"][first_split(t)], -np.inf))
    bad = write(doc, tmp / "bad.json")
    model = tmp / "model.joblib"
    joblib.dump(case.model, model)
    return case, clean, bad, model


def test_junit_parses_and_counts_failures(faulty):
    case, clean, bad, _ = faulty
    result = verify(case.model, [str(clean), str(bad)], probes=500)
    root = ET.fromstring(result.to_junit())  # the standard library's XML parser
    assert root.tag == "testsuites"
    cases = root.findall("./testsuite/testcase")
    assert len(cases) == len(result.checks) == int(root.get("tests"))
    failed = [c for c in cases if c.find("failure") is not None]
    assert len(failed) == sum(c.status == "fail" for c in result.checks) == int(root.get("failures")) > 0
    skipped = [c for c in cases if c.find("skipped") is not None]
    assert len(skipped) == int(root.get("skipped")) == sum(c.status == "skip" for c in result.checks)
    for suite in root.findall("testsuite"):
        assert int(suite.get("failures")) == len([c for c in suite.findall("testcase") if c.find("failure") is not None])
        assert int(suite.get("tests")) == len(suite.findall("testcase"))
    # the failures are the bad artefact's, with the location in the text
    assert {c.get("classname").split(".")[2] for c in failed} == {"bad_json"}
    structure = [c for c in failed if c.get("name") == "structure"]
    assert structure and "tree 4" in structure[0].find("failure").text


def test_json_report_validates_against_its_schema(faulty):
    case, clean, bad, _ = faulty
    schema = load_schema("verify-report")
    Draft202012Validator.check_schema(schema)  # outside reference: the draft 2020-12 metaschema
    assert undescribed(schema) == []  # every property at every depth is described
    report = json.loads(verify(case.model, [str(bad)], probes=300).to_json())
    validate(report, "verify-report")
    assert report["verdict"] == "fail" and report["artefacts"][0]["verdict"] == "fail"
    broken = copy.deepcopy(report)
    broken["verdict"] = "maybe"
    with pytest.raises(Exception):
        validate(broken, "verify-report")


def test_terminal_summary_leads_with_the_verdict(faulty):
    case, clean, bad, _ = faulty
    good = verify(case.model, str(clean), probes=200)
    assert good.summary().splitlines()[0].startswith("PASS: ")
    text = verify(case.model, str(bad), probes=200).summary()
    lines = text.splitlines()
    assert lines[0].startswith("FAIL: ") and "checks failed" in lines[0]
    assert any(l.startswith("structure ") and "FAIL" in l for l in lines)
    assert "tree 4" in text and "where:" in text


def test_assert_equivalent_for_pytest(faulty):
    case, clean, bad, _ = faulty
    assert assert_equivalent(case.model, str(clean), probes=200).passed
    with pytest.raises(AssertionError) as err:
        assert_equivalent(case.model, str(bad), probes=200)
    assert "FAIL" in str(err.value) and "tree 4" in str(err.value)


# ----------------------------------------------------------------------------- CLI
def test_cli_exit_codes_and_report_files(faulty, tmp_path, capsys):
    case, clean, bad, model = faulty
    report, junit = tmp_path / "r.json", tmp_path / "r.xml"
    assert main(["verify", str(model), str(clean), "--report-json", str(report), "--junit", str(junit),
                 "--probes", "300"]) == 0
    out, err = capsys.readouterr()
    # no progress bar when stderr is not a terminal; only the warning that a pickle was loaded
    assert out.startswith("PASS: ") and err.startswith("boxwood: warning: loading ") and err.count("\n") == 1
    validate(json.loads(report.read_text()), "verify-report")
    assert ET.parse(str(junit)).getroot().get("failures") == "0"
    assert main(["verify", str(model), str(bad), "--quiet", "--probes", "300"]) == 1
    out, _ = capsys.readouterr()
    assert out.startswith("FAIL: ") and len(out.strip().splitlines()) == 1
    # bad usage or input: exit 2, one error line, no traceback
    for argv in (["verify", str(tmp_path / "nope.joblib"), str(clean)],
                 ["verify", str(model), str(tmp_path / "nope.json")],
                 ["verify", str(model), str(report)],  # a JSON file that is no artefact
                 ["verify", str(model), str(clean), "--abs-tol", "-1"],
                 ["verify", str(model)]):
        assert main(argv) == 2, argv
        _, err = capsys.readouterr()
        assert "Traceback" not in err and err.strip()


def test_progress_bar_goes_to_stderr_only_when_asked_or_on_a_terminal(faulty, capsys):
    case, clean, _, _ = faulty
    verify(case.model, str(clean), probes=100, progress=True)
    out, err = capsys.readouterr()
    assert out == "" and "verify" in err  # tqdm writes its bar to stderr
    verify(case.model, str(clean), probes=100)  # progress=None: stderr is not a terminal here
    assert capsys.readouterr() == ("", "")


def test_cli_data_file_csv_and_jsonl(faulty, tmp_path, capsys):
    case, clean, _, model = faulty
    names = zoo.exported("hgbr_nan")[1].features
    rows = case.rows[:25]
    csv_path = tmp_path / "d.csv"
    lines = [",".join(f.name for f in names)]
    for r in rows:
        lines.append(",".join("NA" if v is None else repr(v) for v in r))
    csv_path.write_text("\n".join(lines) + "\n")
    jsonl = tmp_path / "d.jsonl"
    jsonl.write_text("".join(json.dumps({f.name: v for f, v in zip(names, r)}) + "\n" for r in rows))
    for data in (csv_path, jsonl):
        report = tmp_path / "r.json"
        assert main(["verify", str(model), str(clean), "--data", str(data), "--probes", "0",
                     "--report-json", str(report)]) == 0
        capsys.readouterr()
        doc = json.loads(report.read_text())
        assert doc["rows"]["data"] == 25 and doc["rows"]["total"] == 25
    bad = tmp_path / "bad.csv"
    bad.write_text(lines[0] + "\n" + lines[1] + "\n" + lines[2].replace(lines[2].split(",")[0], "warm", 1) + "\n")
    assert main(["verify", str(model), str(clean), "--data", str(bad)]) == 2
    _, err = capsys.readouterr()
    assert "data row 2 (line 3)" in err and repr(names[0].name) in err


# ----------------------------------------------------------------------------- plug-in kinds
class _FsumEvaluator(Evaluator):
    """A stand-in for another target: takes float32 inputs and adds the leaves with
    math.fsum (a different summation: correctly rounded, not left to right)."""

    name = "fsum float32"
    input_precision = "float32"
    summation_order = "any"

    def __init__(self, ensemble):
        self.e = ensemble

    def _leaf(self, t, x):
        node = 0
        while t.feature[node] != LEAF:
            v = x[t.feature[node]]
            b = floats.left_boundary(t.threshold[node], self.e.compare_precision)
            if v is None:
                node = t.left[node] if t.missing_left[node] else t.right[node]
            else:
                node = t.left[node] if v <= b else t.right[node]
        return t.value[node]

    def evaluate(self, rows):
        raw = np.array([[math.fsum([self.e.base_values[k]] + [self._leaf(t, r) for t in self.e.trees if t.output == k])
                         for k in range(self.e.n_outputs)] for r in rows])
        return Outputs(raw, raw.copy(), None)


def test_registered_artefact_kind_with_float32_inputs_and_another_summation(tmp_path):
    from boxwood.formats.json.reader import from_document

    case, _, data = zoo.exported("hgbr_squared_error")
    path = tmp_path / "m.fsum"
    path.write_bytes(data)

    def load(p):
        e = from_document(boxwood_runtime.load(str(p)).doc)
        return Artefact(str(p), e, [_FsumEvaluator(e)], format="test kind")

    formats.register(formats.Format(name="fsum", extensions=(".fsum",), title="test format", open=load))
    try:
        strict = verify(case.model, str(path), probes=800)
        tolerant = verify(case.model, str(path), probes=800, abs_tol=1e-9)
    finally:
        formats.unregister("fsum")
    ev = evaluator(strict, "fsum float32")
    assert ev.properties["input_precision"] == "float32"
    assert any("float32 values" in d for d in ev.structure["domain"])
    out = ev.bound["outputs"][0]
    # not provably bit-identical: only the rounding term of both sums (Higham eq. 4.4)
    assert not out["exact"] and out["leaf_term"] == 0 and out["rounding_term"] > 0
    assert status(strict, "bound: raw", "fsum float32") == "fail"
    assert status(strict, "bound holds", "fsum float32") == "pass"
    assert tolerant.passed, tolerant.summary()


def test_unknown_artefact_kind_is_bad_usage(tmp_path):
    case = zoo.fitted("gbr_squared_error")
    p = tmp_path / "m.xyz"
    p.write_text("model,weights\n1,2\n")
    with pytest.raises(ValueError, match="not an artefact of any known format"):
        verify(case.model, str(p))
    p.write_text("{}")  # an unknown extension, but JSON content: opened as a JSON artefact, and refused
    with pytest.raises(ValueError, match="boxwood_digest"):
        verify(case.model, str(p))


# ----------------------------------------------------------------------------- hand-built proofs
def _stump(threshold, left=1.0, right=3.0, missing_left=True, feature=0):
    return Tree(0, [feature, LEAF, LEAF], [threshold, 0.0, 0.0], [1, LEAF, LEAF], [2, LEAF, LEAF],
                [missing_left, False, False], [0.0, left, right])


def _ens(trees, precision="float64", base=0.5, features=None, missing="route"):
    return Ensemble("regression", features or [Feature("x0"), Feature("x1")], trees, [base],
                    compare_precision=precision, missing_values=missing).check()


def test_compare_precision_difference_is_an_exact_interval():
    """Source float32(x) <= 0.1, artefact x <= 0.1. numpy: float32(0.1) = 0.100000001490116...
    > 0.1, so x = 0.1 goes right in the source and left in the artefact; the proof finds the
    interval (B, 0.1] and bounds the tree by its leaf gap |1 - 3| = 2, exactly."""
    assert not float(np.float32(0.1)) <= 0.1  # compared in float64, as scikit-learn does
    src = _ens([_stump(0.1)], "float32", missing="reject")
    art = _ens([_stump(0.1)], "float64", missing="reject")
    proof = prove(Side(src, "float32"), Side(art, "float64"))
    hits = [f for f in proof.findings if f.kind == "threshold" and f.severity == "fail"]
    assert len(hits) == 1 and hits[0].tree == 0 and hits[0].node == 0
    b = floats.float32_left_boundary(0.1)
    assert repr(float(np.nextafter(b, 1.0))) in hits[0].message
    assert proof.outputs[0].leaf_term == 2.0 and not proof.outputs[0].exact


def test_float32_inputs_hide_a_float64_step():
    """Thresholds 0.1 and nextafter(0.1): over float64 inputs they differ at exactly one
    input; over float32 inputs no value lies between them, so the trees agree."""
    src = _ens([_stump(0.1)])
    art = _ens([_stump(float(np.nextafter(0.1, 1.0)))])
    wide = prove(Side(src, "float64"), Side(art, "float64"), "float64")
    assert wide.count("fail") == 1 and wide.outputs[0].leaf_term == 2.0
    narrow = prove(Side(src, "float64"), Side(art, "float64"), "float32")
    assert narrow.count("fail") == 0 and narrow.outputs[0].exact


def test_unreachable_missing_flip_has_no_effect():
    """Missing values go right at the root, so they never reach the left child: flipping
    the child's direction changes no output."""
    def tree(child_missing_left):
        return Tree(0, [0, 0, LEAF, LEAF, LEAF], [0.5, 0.25, 0.0, 0.0, 0.0], [1, 3, LEAF, LEAF, LEAF],
                    [2, 4, LEAF, LEAF, LEAF], [False, child_missing_left, False, False, False],
                    [0.0, 0.0, 7.0, 1.0, 2.0])

    proof = prove(Side(_ens([tree(True)]), "float64"), Side(_ens([tree(False)]), "float64"))
    notes = [f for f in proof.findings if f.kind == "missing direction"]
    assert [(f.severity, f.node) for f in notes] == [("note", 1)] and proof.outputs[0].exact


def test_another_summation_order_costs_exactly_the_gamma_term():
    """Identical trees, but the artefact adds in another order: bound = 2 gamma_T (|b| + sum
    of largest |leaf|), T = 3 trees, u = 2**-53 (Higham 2002, eq. 4.4), by hand."""
    trees = [_stump(0.1, -1.0, 4.0), _stump(0.2, 2.0, -8.0), _stump(0.3, 0.5, 0.25)]
    e = _ens(trees, base=1.5)
    proof = prove(Side(e, "float64"), Side(e, "float64", summation_order="any"))
    u = Fraction(1, 2 ** 53)
    gamma3 = 3 * u / (1 - 3 * u)
    want = 2 * gamma3 * (Fraction(3, 2) + 4 + 8 + Fraction(1, 2))
    out = proof.outputs[0]
    assert not out.exact and out.leaf_term == 0 and Fraction(out.rounding_term) >= want
    assert Fraction(out.rounding_term) - want <= want * Fraction(1, 2 ** 50)


def test_reordered_category_list_with_unchanged_codes_is_caught():
    """Same trees, same codes, but the artefact lists the categories in another order: code 0
    now means 'b'. By value, 'a' and 'b' swap sides: a routing difference, not a note."""
    def tree():
        return Tree(0, [0, LEAF, LEAF], [0.0, 0.0, 0.0], [1, LEAF, LEAF], [2, LEAF, LEAF],
                    [False, False, False], [0.0, 1.0, 2.0], [(0,), None, None])

    src = _ens([tree()], features=[Feature("c", "categorical", ["a", "b"]), Feature("x1")])
    art = _ens([tree()], features=[Feature("c", "categorical", ["b", "a"]), Feature("x1")])
    proof = prove(Side(src, "float64"), Side(art, "float64"))
    hits = [f for f in proof.findings if f.kind == "categories" and f.severity == "fail"]
    assert len(hits) == 1 and "'a'" in hits[0].message and "'b'" in hits[0].message
    assert proof.outputs[0].leaf_term == 1.0 and not proof.outputs[0].exact


def test_category_only_the_artefact_knows_is_routed_as_unseen_by_the_source():
    """The artefact lists a category 'z' and sends it left; the source never saw 'z', so it
    routes it like a missing value (right here): a routing difference on 'z' alone."""
    feats_s = [Feature("c", "categorical", ["a", "b"]), Feature("x1")]
    feats_a = [Feature("c", "categorical", ["a", "b", "z"]), Feature("x1")]

    def tree(codes):
        return Tree(0, [0, LEAF, LEAF], [0.0, 0.0, 0.0], [1, LEAF, LEAF], [2, LEAF, LEAF],
                    [False, False, False], [0.0, 1.0, 2.0], [tuple(codes), None, None])

    src = _ens([tree([0])], features=feats_s)
    art = _ens([tree([0, 2])], features=feats_a)
    proof = prove(Side(src, "float64"), Side(art, "float64"))
    hits = [f for f in proof.findings if f.kind == "categories" and f.severity == "fail"]
    assert len(hits) == 1 and "'z'" in hits[0].message and "'a'" not in hits[0].message
    assert proof.outputs[0].leaf_term == 1.0
