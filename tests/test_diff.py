"""``boxwood diff`` and the split counts of ``inspect``, checked against things outside the code
under test: scikit-learn's own ``predict`` and ``apply`` on the rows diff scored, the fitted
trees' own ``tree_.feature`` arrays, the JSON Schema metaschema (jsonschema's
Draft202012Validator), and documents edited by hand (a planted leaf, a changed byte).

Models: tests/zoo.py (breast cancer and iris, shipped with scikit-learn)."""
import copy
import json
import math
import re
import shutil

import joblib
import numpy as np
import pytest
from jsonschema import Draft202012Validator

import boxwood_runtime
from boxwood.cli import main
from boxwood.diff import diff
from boxwood.schema import load_schema
from boxwood_runtime import scorer

import zoo
from test_schema import undescribed

# scikit-learn's finiteness check sums the probe rows, which overflows on the extreme probes
# (+-max float): numpy warns; the rows are finite and accepted.
pytestmark = pytest.mark.filterwarnings("ignore:invalid value encountered in reduce:RuntimeWarning",
                                        "ignore:overflow encountered in reduce:RuntimeWarning")
HAVE_CC = shutil.which("cc") or shutil.which("gcc") or shutil.which("clang")


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    from sklearn.ensemble import GradientBoostingClassifier as GBC

    tmp = tmp_path_factory.mktemp("diff")
    case = zoo.fitted("gbc_binary")
    joblib.dump(case.model, tmp / "m.joblib")
    assert main(["export", str(tmp / "m.joblib"), "-o", str(tmp / "m.json")]) == 0
    # retrained: another random_state with row subsampling (other trees), and more trees (the
    # first 40 stages are the same fit: same data, same seed)
    other = GBC(n_estimators=40, max_depth=3, subsample=0.8, random_state=7).fit(case.X, case.y)
    joblib.dump(other, tmp / "other.joblib")
    more = GBC(n_estimators=45, max_depth=3, random_state=0).fit(case.X, case.y)
    joblib.dump(more, tmp / "more.joblib")
    fewer_inputs = GBC(n_estimators=5, max_depth=2, random_state=0).fit(case.X[:, :10], case.y)
    joblib.dump(fewer_inputs, tmp / "fewer.joblib")
    header = ",".join("x%d" % j for j in range(case.X.shape[1]))
    (tmp / "data.csv").write_text(header + "\n" + "\n".join(",".join(repr(float(v)) for v in r)
                                                           for r in case.X[:50]) + "\n")
    return tmp, case, other, more


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "Traceback" not in err
    return code, out, err


def as_array(rows):
    return np.array([[np.nan if v is None else float(v) for v in r] for r in rows], dtype=np.float64)


def schema_errors(doc):
    return sorted(e.message for e in Draft202012Validator(load_schema("diff-report")).iter_errors(doc))


# ----------------------------------------------------------------------------- identical
def test_a_model_and_its_own_artefacts_are_proven_identical(files, capsys, tmp_path):
    tmp, _, _, _ = files
    code, out, err = run(["diff", tmp / "m.joblib", tmp / "m.json", "--json", tmp_path / "r.json"], capsys)
    assert code == 0, out + err
    assert out.startswith("boxwood diff: IDENTICAL")
    assert "runs code" in err  # the pickle warning, since OLD is a joblib file
    report = json.loads((tmp_path / "r.json").read_text())
    assert schema_errors(report) == []
    assert report["verdict"] == "identical" and report["exit_code"] == 0
    assert report["proof"]["proven_identical"] and report["structure"]["identical"]
    assert report["behaviour"]["rows_changed"] == 0 and report["behaviour"]["rows"]["split"] > 0
    if HAVE_CC:
        assert main(["export", str(tmp / "m.joblib"), "-o", str(tmp / "m.c")]) == 0
        capsys.readouterr()
        code, out, _ = run(["diff", tmp / "m.json", tmp / "m.c"], capsys)
        assert code == 0 and out.startswith("boxwood diff: IDENTICAL"), out


# ----------------------------------------------------------------------------- retrained
def test_retrained_model_differs_and_label_changes_match_scikit_learn(files, capsys, tmp_path):
    tmp, case, other, _ = files
    code, out, _ = run(["diff", tmp / "m.json", tmp / "other.joblib", "--json", tmp_path / "r.json",
                        "--report-html", tmp_path / "r.html", "--data", tmp / "data.csv"], capsys)
    assert code == 1 and out.startswith("boxwood diff: DIFFERS")
    report = json.loads((tmp_path / "r.json").read_text())
    assert schema_errors(report) == []
    result = diff(tmp / "m.json", tmp / "other.joblib", data=tmp / "data.csv")
    b = result.behaviour
    assert b["rows"]["refused_old"] == b["rows"]["refused_new"] == 0
    assert b["rows"]["data"] == 50 and result.rows.origins[0].startswith("data row 1 ")
    X = as_array(result.rows.rows)
    expected = int((case.model.predict(X) != other.predict(X)).sum())  # scikit-learn's own labels
    assert expected > 0
    assert b["labels_changed"] == expected == report["behaviour"]["labels_changed"]
    # the probability changes, against scikit-learn's predict_proba on the same rows
    moved = np.abs(other.predict_proba(X)[:, 1] - case.model.predict_proba(X)[:, 1])
    out_stats = next(o for o in b["outputs"] if o["kind"] == "transformed")
    assert out_stats["changed"] == int((moved > 0).sum())
    assert out_stats["max"] == pytest.approx(moved.max(), rel=1e-12)
    top = b["most_changed"][0]
    assert top["label_changed"] or expected == 0
    # the page: self-contained (no network reference of any kind)
    html = (tmp_path / "r.html").read_text()
    stripped = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", html)
    assert "<img" in html and "DIFFERS" in html
    assert not re.search(r"https?:|//|url\(|@import", stripped), re.findall(r".{20}(?:https?:|//).{20}", stripped)
    assert all(src.startswith("data:") for src in re.findall(r'src="([^"]*)"', html))
    assert "<script" not in html and "<link" not in html


def test_more_trees_are_found_as_added(files):
    tmp, case, _, more = files
    result = diff(tmp / "m.joblib", tmp / "more.joblib")
    t = result.structure["trees"]
    assert (t["same"], t["changed"]["count"], t["removed"]["count"]) == (40, 0, 0)
    assert [i["tree"] for i in t["added"]["items"]] == [40, 41, 42, 43, 44]
    assert result.exit_code == 1 and result.verdict == "differs"
    X = as_array(result.rows.rows)
    assert result.behaviour["labels_changed"] == int((case.model.predict(X) != more.predict(X)).sum())


# ----------------------------------------------------------------------------- planted leaf
def write_artefact(doc, path):
    """``doc`` written with a valid digest and its self-check rows re-scored by the edited
    document (as tests/test_verify.py's ``write``): only a comparison can see the edit."""
    doc = copy.deepcopy(doc)
    doc.pop(scorer.DIGEST_KEY, None)
    m = scorer.Model(doc, scorer.DEFAULT_LIMITS, unknown_category="as_missing")
    ref = doc["self_check"]
    raws = [m.raw_scores(m.prepare(r, i)) for i, r in enumerate(ref["rows"])]
    ref["raw"] = [[v if math.isfinite(v) else ("inf" if v > 0 else "-inf") for v in m.exact_values(r)] for r in raws]
    ref["transformed"] = [list(m.transform_raw(r)) for r in raws]
    if "decision" in ref:  # and what the self-check compares since issue 11
        ref["decision"] = [[v if math.isfinite(v) else ("inf" if v > 0 else "-inf") for v in m.decision_values(r)]
                           for r in raws]
    if "labels" in ref:
        ref["labels"] = [m.predict_from_raw(r) for r in raws]
    data = scorer.artefact_bytes(doc)
    path.write_bytes(data)
    boxwood_runtime.load(data)
    return path


def test_a_planted_leaf_change_is_found_located_and_its_rows_reported(files, tmp_path):
    tmp, case, _, _ = files
    doc = json.loads((tmp / "m.json").read_bytes())
    tree, node = 3, 6
    old_value = doc["ensemble"]["trees"][tree]["value"][node]
    assert doc["ensemble"]["trees"][tree]["feature"][node] == -1  # a leaf
    doc["ensemble"]["trees"][tree]["value"][node] = old_value + 0.75
    write_artefact(doc, tmp_path / "planted.json")
    result = diff(tmp / "m.json", tmp_path / "planted.json")
    s = result.structure
    assert s["leaves_changed"]["count"] == 1 and s["thresholds_moved"]["count"] == 0
    assert s["node_changes"]["count"] == 0 and s["trees"]["same"] == 39
    leaf = s["leaves_changed"]["items"][0]
    assert (leaf["tree"], leaf["node"], leaf["old"], leaf["new"]) == (tree, node, old_value, old_value + 0.75)
    assert result.exit_code == 1
    # the rows that change are exactly the rows reaching that leaf, by scikit-learn's own apply
    X = as_array(result.rows.rows)
    reach = case.model.estimators_[tree, 0].apply(X.astype(np.float32)) == node
    changed = {m["row"] for m in result.behaviour["most_changed"]}
    assert reach.sum() > 0 and result.behaviour["rows_changed"] == int(reach.sum())
    assert changed <= set(np.flatnonzero(reach).tolist())
    raw = next(o for o in result.behaviour["outputs"] if o["kind"] == "raw")
    assert raw["changed"] == int(reach.sum()) and raw["max"] == pytest.approx(0.75, rel=1e-12)


# ----------------------------------------------------------------------------- bad input
def test_damaged_missing_and_wrong_kind_inputs(files, capsys, tmp_path):
    tmp, _, _, _ = files
    data = bytearray((tmp / "m.json").read_bytes())
    i = data.index(b'"value":[') + 12
    data[i] = ord("7") if data[i] != ord("7") else ord("8")  # one byte of a number: the digest no longer holds
    (tmp_path / "damaged.json").write_bytes(bytes(data))
    code, _, err = run(["diff", tmp / "m.json", tmp_path / "damaged.json"], capsys)
    assert code == 1 and "damaged" in err and err.count("\n") == 1, err
    for argv, needle in (
            (["diff", tmp / "m.json", tmp_path / "absent.json"], "not found"),
            (["diff", tmp / "data.csv", tmp / "m.json"], "is a data file (CSV text)"),
            (["diff", tmp / "m.json", tmp_path], "is a folder"),
            (["diff", tmp / "m.json", tmp / "m.json", "--data", tmp_path / "absent.csv"], "not found")):
        code, _, err = run(argv, capsys)
        assert code == 2 and err.startswith("boxwood: error: ") and needle in err, (argv, err)


def test_models_with_other_inputs_are_incomparable(files, capsys, tmp_path):
    tmp, _, _, _ = files
    code, out, err = run(["diff", tmp / "m.joblib", tmp / "fewer.joblib", "--json", tmp_path / "r.json"], capsys)
    assert code == 2 and "INCOMPARABLE" in out and "different inputs" in err
    report = json.loads((tmp_path / "r.json").read_text())
    assert schema_errors(report) == [] and report["behaviour"] is None
    assert report["structure"]["features"]["removed"] == ["x%d" % j for j in range(10, 30)]


# ----------------------------------------------------------------------------- schema
def test_the_schema_is_valid_described_and_not_vacuous(files):
    tmp, _, _, _ = files
    schema = load_schema("diff-report")
    Draft202012Validator.check_schema(schema)
    assert undescribed(schema) == []
    doc = diff(tmp / "m.json", tmp / "m.json", probes=50).to_json()
    assert schema_errors(doc) == [] and doc["verdict"] == "identical"
    for broken in (dict(doc, verdict="same"), {k: v for k, v in doc.items() if k != "proof"},
                   dict(doc, structure=dict(doc["structure"], extra=1))):
        assert schema_errors(broken)


# ----------------------------------------------------------------------------- inspect
def sklearn_counts(model, names):
    counts = dict.fromkeys(names, 0)
    for est in np.ravel(model.estimators_):
        for f in est.tree_.feature:
            if f >= 0:
                counts[names[f]] += 1
    return counts


@pytest.mark.parametrize("name", ["gbc_binary", "gbc_multiclass"])
def test_inspect_split_counts_equal_scikit_learns_trees(name, capsys, tmp_path):
    case = zoo.fitted(name)
    joblib.dump(case.model, tmp_path / "m.joblib")
    exts = ["json", "onnx"] + (["c"] if HAVE_CC else [])
    for ext in exts:
        assert main(["export", str(tmp_path / "m.joblib"), "-o", str(tmp_path / ("m." + ext))]) == 0
    capsys.readouterr()
    names = ["x%d" % j for j in range(case.X.shape[1])]
    expected = sklearn_counts(case.model, names)
    assert sum(expected.values()) > 0
    for ext in exts:
        code, out, _ = run(["inspect", tmp_path / ("m." + ext), "--json"], capsys)
        assert code == 0 and json.loads(out)["split_counts"] == expected, ext
    code, out, _ = run(["inspect", tmp_path / "m.json"], capsys)
    top = max(expected, key=expected.get)
    assert re.search(r"^  %s\s+%d$" % (top, expected[top]), out, re.M)


def test_diff_page_renders_in_headless_chromium(files, capsys, tmp_path):
    """The diff page drawn by a real browser is not blank (the check itself is shown to reject
    an empty page in tests/test_report_html.py)."""
    from test_report_html import blank_reason, require_chromium, screenshot

    binary = require_chromium()
    tmp, _, _, _ = files
    code, _, _ = run(["diff", tmp / "m.json", tmp / "other.joblib", "--report-html", tmp_path / "d.html"], capsys)
    assert code == 1
    png = screenshot(binary, tmp_path / "d.html", tmp_path / "d.png", tmp_path / "profile")
    assert blank_reason(png) is None, blank_reason(png)
