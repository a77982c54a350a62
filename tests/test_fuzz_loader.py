"""The artefact loader and the record parser fail closed (issue 11).

Two kinds of test:

* planted cases, one per crash the fuzzing campaign of issue 11 found (each named after it):
  before the fix each ended in RecursionError, OverflowError, TypeError, ZeroDivisionError or a
  bare ValueError; now each must end in ArtefactError / RecordError with a one-line reason, or
  a failed self-check. Also the tampering the old self-check let through (rotated class
  labels, swapped feature names, a changed isolation-forest offset, digest recomputed).
* property-based tests (hypothesis, derandomized so CI is reproducible): a mutated document
  (a value anywhere replaced, digest recomputed so the mutant gets past it), a mutated file
  (bytes flipped, digest kept) and random record values either load / score or raise the
  project's own error classes, never anything else.

Outside references: the labels the writer stores are checked against scikit-learn's own
``predict``; "a crash" is any exception that is not the scorer's documented
``ArtefactError`` / ``RecordError`` (docs/hardening.md).
"""
from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import boxwood_runtime.scorer as scorer
from boxwood_runtime.scorer import ArtefactError, RecordError, artefact_bytes, load

import zoo

# A pipeline, AdaBoost (two and three classes), an isolation forest, categorical HGB, a multiclass model.
CASES = ["pipe_hgbr_encoded", "ada_binary", "ada_multiclass", "iforest", "hgbc_categorical", "gbc_multiclass"]
FUZZ = settings(max_examples=150, deadline=None, derandomize=True, database=None,
                suppress_health_check=list(HealthCheck))


def doc_of(name):
    return json.loads(zoo.exported(name)[2])


def resigned(doc):
    """The artefact bytes of ``doc`` with its digest recomputed (a mutant that passes the digest)."""
    return artefact_bytes({k: v for k, v in doc.items() if k != scorer.DIGEST_KEY})


def refused(data, *words):
    """Load ``data``; it must raise ArtefactError (not the load() safety net) naming ``words``."""
    with pytest.raises(ArtefactError) as err:
        load(data)
    text = str(err.value)
    assert scorer.UNEXPECTED_CONTENT not in text, text
    assert "\n" not in text
    for w in words:
        assert w in text, text
    return text


# ----------------------------------------------------------------------------- planted crashes
def test_planted_recursion_deep_nesting_canonical_layout():
    # canonical layout, digest recomputed: only the nesting is wrong (json.dumps itself would
    # recurse on it, so the text is written by hand)
    body = json.dumps({k: v for k, v in doc_of("iforest").items() if k != scorer.DIGEST_KEY},
                      sort_keys=True, separators=(",", ":"))
    body = body.replace('"parameters":{', '"parameters":{"junk":' + "[" * 5000 + "]" * 5000 + ",", 1)
    data = (scorer._DIGEST_PREFIX + hashlib.sha256(body.encode()).hexdigest().encode() + b'",'
            + body[1:].encode())
    refused(data, "max_nesting")


def test_planted_recursion_deep_nesting_pretty_layout():
    # not the canonical layout: the old loader parsed it (RecursionError) before any digest check
    refused(b"{\n" + b'"a": ' + b"[" * 100000 + b"]" * 100000 + b"}", "max_nesting")
    refused(b"[" * 100000, "do not pair up")  # never closed: refused before the parse


def test_planted_recursion_deep_dict_source():
    doc = doc_of("iforest")
    deep = []
    for _ in range(3000):
        deep = [deep]
    doc["provenance"]["parameters"]["junk"] = deep
    refused(doc, "max_nesting")


def test_nesting_scan_ignores_brackets_in_strings_and_escapes():
    assert scorer.check_nesting(b'{"a":"[[[[\\"[[","b":[1,[2]]}', 3) == 3
    assert scorer.check_nesting(b'["\\\\",["x"]]', 2) == 2
    with pytest.raises(ArtefactError):
        scorer.check_nesting(b'["\\\\"]]', 5)  # the backslash is escaped: the quote closes, "]" is extra
    with pytest.raises(ArtefactError):
        scorer.check_nesting(b"[[[1]]]", 2)


@pytest.mark.parametrize("path", [("ensemble", "base_values", 0), ("outputs", "post_transform_params", "offset"),
                                  ("outputs", "post_transform_params", "denominator")])
def test_planted_overflow_huge_integer(path):
    doc = doc_of("iforest")
    obj = doc
    for key in path[:-1]:
        obj = obj[key]
    obj[path[-1]] = 10 ** 400
    refused(resigned(doc), "float64 range")


def test_planted_overflow_huge_integer_threshold_and_leaf():
    doc = doc_of("gbc_multiclass")
    tree = doc["ensemble"]["trees"][0]
    split = tree["feature"].index(next(f for f in tree["feature"] if f >= 0))
    tree["threshold"][split] = -(10 ** 400)
    refused(resigned(doc), "threshold", "float64 range")
    doc = doc_of("gbc_multiclass")
    tree = doc["ensemble"]["trees"][0]
    tree["value"][tree["feature"].index(-1)] = 10 ** 400
    refused(resigned(doc), "value", "float64 range")


@pytest.mark.parametrize("bad", [5, "x", None, {"a": 1}])
def test_planted_typeerror_self_check_row_not_a_list(bad):
    doc = doc_of("gbc_multiclass")
    doc["self_check"]["rows"][0] = bad
    refused(resigned(doc), "self-check failed")
    doc = doc_of("gbc_multiclass")
    doc["self_check"]["raw"][0] = bad
    refused(resigned(doc), "self-check failed")


def test_planted_zerodivision_adaboost_weight_total_zero():
    for name in ("ada_binary", "ada_multiclass"):
        doc = doc_of(name)
        doc["outputs"]["post_transform_params"]["weight_total"] = 0
        refused(resigned(doc), "weight_total")


def test_planted_overflow_isolation_negative_denominator_and_leaves():
    doc = doc_of("iforest")
    doc["outputs"]["post_transform_params"]["denominator"] = -1e-300
    refused(resigned(doc), "denominator")
    doc = doc_of("iforest")
    tree = doc["ensemble"]["trees"][0]
    tree["value"][tree["feature"].index(-1)] = -1e300
    refused(resigned(doc), "path lengths")


def test_planted_valueerror_5000_digit_category_key():
    doc = doc_of("hgbc_categorical")
    tree = next(t for t in doc["ensemble"]["trees"] if t.get("left_categories"))
    key = sorted(tree["left_categories"])[0]
    tree["left_categories"]["1" * 5000] = tree["left_categories"].pop(key)
    refused(resigned(doc), "left_categories")


def test_planted_unicode_error_in_canonical_layout():
    doc = doc_of("iforest")
    doc["provenance"]["estimator"] = "X"
    data = bytearray(resigned(doc))
    i = data.index(b'"X"') + 1
    data[i] = 0xFF  # invalid UTF-8, digest recomputed over the damaged bytes
    n = len(scorer._DIGEST_PREFIX)
    data[n:n + 64] = hashlib.sha256(b"{" + bytes(data[n + 66:]).rstrip(b"\n")).hexdigest().encode()
    refused(bytes(data), "UTF-8")


def test_extra_transformed_value_is_not_ignored():
    # zip() used to stop at the shorter list: a row with fewer stored outputs passed
    doc = doc_of("gbc_multiclass")
    doc["self_check"]["transformed"][0] = doc["self_check"]["transformed"][0][:1]
    refused(resigned(doc), "self-check failed", "outputs")


# ----------------------------------------------------------------------------- meaning-changing fields
def test_self_check_catches_rotated_class_labels():
    doc = doc_of("gbc_multiclass")
    c = doc["outputs"]["classes"]
    doc["outputs"]["classes"] = c[1:] + c[:1]
    refused(resigned(doc), "self-check failed", "label")


def test_self_check_catches_retyped_class_labels():
    doc = doc_of("ada_binary")
    doc["outputs"]["classes"] = [float(c) for c in doc["outputs"]["classes"]]
    refused(resigned(doc), "self-check failed", "label")


def test_self_check_catches_swapped_feature_names():
    doc = doc_of("gbc_multiclass")
    f = doc["inputs"]["features"]
    f[0]["name"], f[1]["name"] = f[1]["name"], f[0]["name"]
    refused(resigned(doc), "self-check failed", "names were changed")


def test_self_check_catches_swapped_pipeline_fields():
    doc = doc_of("pipe_hgbr_encoded")
    fields = doc["inputs"]["fields"]
    fields[0], fields[1] = fields[1], fields[0]
    with pytest.raises(ArtefactError):
        load(resigned(doc))


def test_self_check_catches_a_changed_isolation_offset():
    doc = doc_of("iforest")
    doc["outputs"]["post_transform_params"]["offset"] += 1e-3
    refused(resigned(doc), "self-check failed", "decision")


def test_artefacts_without_the_new_fields_still_load():
    # written before issue 11: no self_check.inputs / labels / decision
    for name in CASES:
        doc = doc_of(name)
        for key in ("inputs", "labels", "decision"):
            doc["self_check"].pop(key, None)
        assert load(resigned(doc)).self_check()[0]


@pytest.mark.parametrize("name", CASES)
def test_stored_labels_are_scikit_learns_predictions(name):
    # outside reference: scikit-learn's predict on the stored reference rows
    case, ensemble, data = zoo.exported(name)
    ref = json.loads(data)["self_check"]
    assert ref["inputs"] == load(data).input_names
    if case.task == "regression":
        assert "labels" not in ref
        return
    rows = [[np.nan if v is None else v for v in r] for r in ensemble.reference.rows]
    X = case.X
    if hasattr(X, "columns"):
        import pandas as pd
        X = pd.DataFrame(rows, columns=X.columns).astype(X.dtypes.to_dict())
    else:
        X = np.asarray(rows, dtype=np.float64)
    assert ref["labels"] == [v.item() if hasattr(v, "item") else v for v in case.model.predict(X)]
    if hasattr(case.model, "decision_function"):
        d = np.asarray(case.model.decision_function(X), dtype=np.float64).reshape(len(rows), -1)
        np.testing.assert_allclose(np.asarray(ref["decision"]), d, rtol=1e-12, atol=1e-15)


# ----------------------------------------------------------------------------- properties
_ANY = st.recursive(st.one_of(st.none(), st.booleans(), st.integers(), st.integers(min_value=-10 ** 500,
                                                                                   max_value=10 ** 500),
                              st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=8),
                              st.sampled_from(["inf", "-inf", "", "1" * 5000])),
                    lambda inner: st.one_of(st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=4), inner,
                                                                                       max_size=3)),
                    max_leaves=6)


def _paths(obj, path=()):
    """Every (path) into ``obj``: dict keys and list indexes (long lists sampled)."""
    out = [path]
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.extend(_paths(v, path + (k,)))
    elif isinstance(obj, list):
        idx = range(len(obj)) if len(obj) <= 6 else [0, 1, len(obj) // 2, len(obj) - 1]
        for i in idx:
            out.extend(_paths(obj[i], path + (i,)))
    return out


_PATHS = {name: _paths(doc_of(name))[1:] for name in CASES}


def mutate(doc, path, value, action):
    obj = doc
    for key in path[:-1]:
        obj = obj[key]
    last = path[-1]
    if action == "delete":
        del obj[last]
    elif action == "replace":
        obj[last] = value
    elif action == "wrap":
        obj[last] = [obj[last]]
    elif action == "negate" and isinstance(obj[last], (int, float)) and not isinstance(obj[last], bool):
        obj[last] = -obj[last]
    elif action == "grow" and isinstance(obj[last], (int, float)) and not isinstance(obj[last], bool):
        obj[last] = obj[last] * 10 ** 300
    else:
        obj[last] = value
    return doc


def loads_or_refuses(data):
    """The property: the loader returns a model or raises ArtefactError (not via its safety net)."""
    try:
        model = load(data)
    except ArtefactError as exc:
        assert scorer.UNEXPECTED_CONTENT not in str(exc), str(exc)
        return None
    return model


@FUZZ
@given(name=st.sampled_from(CASES), pick=st.integers(min_value=0), value=_ANY,
       action=st.sampled_from(["replace", "delete", "wrap", "negate", "grow"]))
def test_property_mutated_document_digest_recomputed(name, pick, value, action):
    doc = doc_of(name)
    path = _PATHS[name][pick % len(_PATHS[name])]
    mutate(doc, path, value, action)
    try:
        data = resigned(doc)
    except (TypeError, ValueError, OverflowError):  # the mutant is not JSON (e.g. NaN): nothing to load
        return
    model = loads_or_refuses(data)
    if model is not None:  # a digest-valid artefact that passed every check and its self-check: it scores
        for r, row in enumerate(doc_of(name)["self_check"]["rows"]):
            try:
                model.predict(scorer._nan_for_null(row))
            except RecordError:
                pass


@FUZZ
@given(name=st.sampled_from(CASES), edits=st.lists(st.tuples(st.integers(min_value=0), st.integers(0, 255),
                                                             st.sampled_from(["set", "insert", "delete"])),
                                                   min_size=1, max_size=4))
def test_property_mutated_bytes_digest_kept(name, edits):
    original = zoo.exported(name)[2]
    data = bytearray(original)
    for pos, byte, how in edits:
        pos %= len(data)
        if how == "set":
            data[pos] = byte
        elif how == "insert":
            data[pos:pos] = bytes([byte])
        else:
            del data[pos]
    model = loads_or_refuses(bytes(data))
    if model is not None:  # only an edit the digest does not cover (e.g. the final newline) may load
        want = load(original)
        for row in json.loads(original)["self_check"]["rows"]:
            row = scorer._nan_for_null(row)
            assert repr(model.predict(row)) == repr(want.predict(row))


_CELL = st.one_of(st.none(), st.booleans(), st.integers(min_value=-10 ** 400, max_value=10 ** 400),
                  st.floats(), st.text(max_size=6), st.lists(st.integers(), max_size=2),
                  st.dictionaries(st.text(max_size=2), st.integers(), max_size=1))


@FUZZ
@given(name=st.sampled_from(CASES), cells=st.lists(_CELL, min_size=0, max_size=12), as_dict=st.booleans())
def test_property_single_record_parser(name, cells, as_dict):
    model = load(zoo.exported(name)[2])
    record = cells
    if as_dict:
        record = dict(zip(model.input_names, cells))
    try:
        model.prepare(record, 7)
    except RecordError as exc:
        assert exc.row == 7
    try:
        model.record_from_text({n: (c if isinstance(c, str) else str(c)) for n, c in zip(model.input_names, cells)})
    except RecordError:
        pass


# ----------------------------------------------------------------------------- the same on MicroPython
_MP_PROGRAM = """
import sys
sys.path.insert(0, '/box')
import scorer
for name in NAMES:
    with open('/box/' + name, 'rb') as fh:
        data = fh.read()
    try:
        scorer.load(data)
        print(name, 'LOADED')
    except scorer.ArtefactError as exc:
        print(name, 'net' if scorer.UNEXPECTED_CONTENT in str(exc) else 'refused')
"""


def test_planted_cases_fail_closed_on_micropython():
    """The planted crashes, run by the same scorer under MicroPython (1.2x WebAssembly port):
    each ends in ArtefactError from a specific check (MicroPython raises RuntimeError, not
    RecursionError, when it recurses too deep; its float() of a huge integer gives infinity)."""
    import os

    from boxwood import micropython as mp

    reason = mp.unavailable_reason()
    if reason:
        if os.environ.get("CI"):
            pytest.fail("MicroPython is required in CI: " + reason)
        pytest.skip(reason)
    files = {}
    body = json.dumps({k: v for k, v in doc_of("iforest").items() if k != scorer.DIGEST_KEY},
                      sort_keys=True, separators=(",", ":"))
    body = body.replace('"parameters":{', '"parameters":{"junk":' + "[" * 3000 + "]" * 3000 + ",", 1)
    files["deep.json"] = (scorer._DIGEST_PREFIX + hashlib.sha256(body.encode()).hexdigest().encode() + b'",'
                          + body[1:].encode())
    doc = doc_of("iforest")
    doc["ensemble"]["base_values"][0] = 10 ** 400
    files["huge.json"] = resigned(doc)
    doc = doc_of("ada_binary")
    doc["outputs"]["post_transform_params"]["weight_total"] = 0
    files["zero.json"] = resigned(doc)
    doc = doc_of("gbc_multiclass")
    doc["outputs"]["classes"] = doc["outputs"]["classes"][1:] + doc["outputs"]["classes"][:1]
    files["rotated.json"] = resigned(doc)
    doc = doc_of("gbc_multiclass")
    doc["self_check"]["rows"][0] = 5
    files["row.json"] = resigned(doc)
    files["ok.json"] = zoo.exported("gbc_multiclass")[2]
    files["scorer.py"] = mp.SCORER.read_bytes()
    names = sorted(k for k in files if k.endswith(".json"))
    done = mp.run("NAMES = %r\n" % names + _MP_PROGRAM, {"/box/" + k: v for k, v in files.items()},
                  heapsize=16 << 20, pystack=16384)
    assert done.returncode == 0, done.stderr
    got = dict(line.split() for line in done.stdout.splitlines())
    assert got == {n: ("LOADED" if n == "ok.json" else "refused") for n in names}
