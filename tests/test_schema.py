"""The artefact schema (schemas/tree-ensemble.schema.json), its page (docs/artefact-format.md)
and the files the writer makes, checked against each other and against outside references.

Outside references used here:
- JSON Schema draft 2020-12 and its metaschema, as implemented by the ``jsonschema``
  package (``Draft202012Validator.check_schema``);
- SHA-256 as specified in NIST FIPS 180-4 (2015), computed by Python's ``hashlib`` and,
  where present, by the GNU coreutils ``sha256sum`` command running the page's own recipe;
- canonical JSON as the page defines it, produced by Python's standard ``json`` module;
- the decision rules of the page's worked example, computed by hand (comments below);
- the files the writer actually produces for every zoo model (tests/zoo.py).
"""
from __future__ import annotations

import copy
import functools
import hashlib
import json
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any, Dict, List, Tuple

import pytest
from jsonschema import Draft202012Validator

from boxwood.schema import SHOWN_VIOLATIONS, SchemaError, load_schema, validate

import zoo

ROOT = Path(__file__).resolve().parent.parent
SCHEMA_FILE = ROOT / "schemas" / "tree-ensemble.schema.json"
DOC_FILE = ROOT / "docs" / "artefact-format.md"

# Keywords whose value is a map of name -> subschema for a member of the instance.
_NAMED = {"properties": ".%s", "patternProperties": ".*"}
# Keywords whose value is a list of subschemas / one subschema applying to the same instance.
_COMBINE_LISTS = ("allOf", "anyOf", "oneOf")
_COMBINE_ONE = ("not", "if", "then", "else")


def join(path: str, part: str) -> str:
    if part.startswith("."):
        return path + part if path else part[1:]
    return path + part


def walk(schema: Dict[str, Any]) -> List[Tuple[str, str, Dict[str, Any], bool]]:
    """Every subschema of ``schema`` as (property path, keyword, subschema, in_combinator).

    Paths use the page's notation: ``inputs.features[].name``; ``[]`` for array items,
    ``.*`` for members matched by patternProperties or additionalProperties, and
    ``$defs.<name>`` for shared definitions. ``in_combinator`` is True inside
    allOf/anyOf/oneOf/not/if/then/else (those restate paths that exist elsewhere).
    """
    out: List[Tuple[str, str, Dict[str, Any], bool]] = [("", "root", schema, False)]

    def visit(node: Dict[str, Any], path: str, inner: bool) -> None:
        for kw, fmt in _NAMED.items():
            for name, sub in node.get(kw, {}).items():
                p = join(path, fmt % name if "%s" in fmt else fmt)
                out.append((p, kw, sub, inner))
                visit(sub, p, inner)
        extra = node.get("additionalProperties")
        if isinstance(extra, dict):
            p = join(path, ".*")
            out.append((p, "additionalProperties", extra, inner))
            visit(extra, p, inner)
        items = node.get("items")
        if isinstance(items, dict):
            p = path + "[]"
            out.append((p, "items", items, inner))
            visit(items, p, inner)
        for kw in _COMBINE_LISTS:
            for sub in node.get(kw, []):
                out.append((path, kw, sub, True))
                visit(sub, path, True)
        for kw in _COMBINE_ONE:
            sub = node.get(kw)
            if isinstance(sub, dict):
                out.append((path, kw, sub, True))
                visit(sub, path, True)

    visit(schema, "", False)
    for name, sub in schema.get("$defs", {}).items():
        p = "$defs." + name
        out.append((p, "$defs", sub, False))
        visit(sub, p, False)
    return out


def undescribed(schema: Dict[str, Any]) -> List[str]:
    """Where a subschema lacks a non-empty description (empty list: all described)."""
    missing = []
    for path, kw, sub, _ in walk(schema):
        text = sub.get("description") if isinstance(sub, dict) else None
        if not (isinstance(text, str) and text.strip()):
            missing.append("%s (%s)" % (path or "<root>", kw))
    return missing


def schema_paths(schema: Dict[str, Any]) -> Dict[str, str]:
    """Property path -> its description, for every path outside combinators."""
    return {p: s.get("description", "") for p, kw, s, inner in walk(schema) if p and not inner}


def doc_text() -> str:
    return DOC_FILE.read_text(encoding="utf-8")


def doc_section(title: str) -> str:
    """The text of the page's level-2 section whose heading starts with ``title``."""
    text = doc_text()
    m = re.search(r"^## %s.*?$(.*?)(?=^## |\Z)" % re.escape(title), text, re.M | re.S)
    assert m, "docs/artefact-format.md has no section '## %s'" % title
    return m.group(1)


def doc_reference_rows() -> Dict[str, str]:
    """Path -> description from the page's reference table (first and last cells)."""
    rows: Dict[str, str] = {}
    for line in doc_section("Reference").splitlines():
        if not line.startswith("| `"):
            continue
        cells = [c.strip().replace("\\|", "|") for c in re.split(r"(?<!\\)\|", line.strip())[1:-1]]
        path = re.match(r"`([^`]+)`", cells[0]).group(1)
        assert path not in rows, "the reference table lists %s twice" % path
        rows[path] = cells[-1]
    return rows


def code_blocks(section: str, lang: str) -> List[str]:
    return re.findall(r"^```%s\n(.*?)^```" % re.escape(lang), section, re.M | re.S)


def norm(text: str) -> str:
    return " ".join(text.split())


@functools.lru_cache(maxsize=None)
def artefact(name: str) -> bytes:
    """The writer's file bytes for zoo case ``name`` (fitted once per session)."""
    return zoo.exported(name)[2]


def parsed(name: str) -> Dict[str, Any]:
    return json.loads(artefact(name))


# ------------------------------------------------------------------ (a) a valid schema
def test_schema_is_valid_draft_2020_12():
    schema = json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    # Outside reference: the draft 2020-12 metaschema, as shipped in `jsonschema`.
    Draft202012Validator.check_schema(schema)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert schema["$id"] == "https://boxwood.invalid/schemas/tree-ensemble-2.schema.json"
    assert schema["title"].strip() and schema["description"].strip()
    # The metaschema check is not vacuous: it rejects a schema with a bad keyword value.
    broken = copy.deepcopy(schema)
    broken["properties"]["format_version"]["type"] = "whole number"
    with pytest.raises(Exception):
        Draft202012Validator.check_schema(broken)


def test_load_schema_returns_the_shipped_file_as_a_fresh_dict():
    on_disk = json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    first = load_schema()
    assert first == on_disk == load_schema("tree-ensemble")
    first["title"] = "changed by a caller"
    assert load_schema()["title"] == on_disk["title"]
    with pytest.raises(FileNotFoundError):
        load_schema("no-such-format")
    with pytest.raises(ValueError):
        load_schema("../pyproject")


# ------------------------------------------------------ (b) every property is described
def test_every_property_at_every_depth_has_a_description():
    schema = load_schema()
    assert undescribed(schema) == []
    kinds = {kw for _, kw, _, _ in walk(schema)}
    # The walk reaches every kind of position the schema uses, so (b) covers them all.
    assert {"properties", "items", "patternProperties", "additionalProperties", "$defs",
            "allOf", "if", "then", "else", "not", "oneOf", "anyOf"} <= kinds


@pytest.mark.parametrize("target", [
    ("properties", "ensemble.trees[].threshold"),
    ("items", "self_check.rows[][]"),
    ("patternProperties", "ensemble.trees[].left_categories.*"),
    ("additionalProperties", "provenance.parameters.*"),
    ("$defs", "$defs.number_or_infinity"),
    ("then", "inputs.features[]"),
])
def test_description_check_fails_when_one_is_deleted(target):
    kind, path = target
    schema = load_schema()
    hits = [s for p, kw, s, _ in walk(schema) if kw == kind and p == path]
    assert hits, "no %s subschema at %s" % target
    del hits[0]["description"]
    assert undescribed(schema) == ["%s (%s)" % (path, kind)]


# --------------------------------------------------------- (c) page and schema in step
def test_docs_reference_table_lists_exactly_the_schema_paths():
    described = schema_paths(load_schema())
    rows = doc_reference_rows()
    assert len(described) > 50 and "inputs.features[].name" in described  # the walk found the tree
    assert sorted(set(described) - set(rows)) == [], "paths missing from docs/artefact-format.md"
    assert sorted(set(rows) - set(described)) == [], "docs list paths the schema lacks"
    # Paths restated inside conditionals exist in the main tree too.
    inner = {p for p, _, _, i in walk(load_schema()) if i and p}
    assert inner <= set(described)


def test_docs_reference_descriptions_match_the_schema():
    described = schema_paths(load_schema())
    rows = doc_reference_rows()
    differ = [p for p in described if norm(rows.get(p, "")) != norm(described[p])]
    assert differ == [], "descriptions differ between schema and page: %s" % differ


# ------------------------------------------------------ (d) the writer's files validate
@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_zoo_artefact_validates(name):
    doc = parsed(name)
    validate(doc)
    # The same verdict straight from the outside implementation.
    assert Draft202012Validator(load_schema()).is_valid(doc)


# ---------------------------------------------------------------- (e) negative checks
def _first_numeric_split(doc):
    for t, tree in enumerate(doc["ensemble"]["trees"]):
        for i, f in enumerate(tree["feature"]):
            if f >= 0 and str(i) not in tree.get("left_categories", {}):
                return t, i
    raise AssertionError("no numeric split")


def _categorical_feature(doc):
    return next(i for i, f in enumerate(doc["inputs"]["features"]) if f["kind"] == "categorical")


def _tree_with_categories(doc):
    return next(t for t, tree in enumerate(doc["ensemble"]["trees"]) if "left_categories" in tree)


def _set_threshold(value):
    def mutate(doc):
        t, i = _first_numeric_split(doc)
        doc["ensemble"]["trees"][t]["threshold"][i] = value
        return "$.ensemble.trees[%d].threshold[%d]" % (t, i)
    return mutate


def _drop(section, key):
    def mutate(doc):
        (doc[section] if section else doc).pop(key)
        return "$.%s" % section if section else "$"
    return mutate


def _put(section, key, value, at=None):
    def mutate(doc):
        (doc[section] if section else doc)[key] = value
        return at or ("$.%s" % section if section else "$")
    return mutate


def _digest(value):
    def mutate(doc):
        doc["boxwood_digest"] = value
        return "$.boxwood_digest"
    return mutate


def _no_categories(doc):
    j = _categorical_feature(doc)
    del doc["inputs"]["features"][j]["categories"]
    return "$.inputs.features[%d]" % j


def _numeric_with_categories(doc):
    j = next(i for i, f in enumerate(doc["inputs"]["features"]) if f["kind"] == "numeric")
    doc["inputs"]["features"][j]["categories"] = ["a", "b"]
    return "$.inputs.features[%d]" % j


def _bad_category_key(doc):
    t = _tree_with_categories(doc)
    cats = doc["ensemble"]["trees"][t]["left_categories"]
    cats["node7"] = cats.pop(next(iter(cats)))
    return "$.ensemble.trees[%d].left_categories" % t


def _one_base_value(doc):
    doc["ensemble"]["base_values"] = doc["ensemble"]["base_values"][:1]
    return "$.ensemble.base_values"


NEGATIVE = [
    # (id, zoo case, mutation returning the JSON path the violation must be reported at)
    ("missing_format", "hgbr_categorical", _drop(None, "format")),
    ("format_version_4", "hgbr_categorical", lambda d: (d.update(format_version=4), "$.format_version")[1]),
    ("format_version_as_text", "gbr_squared_error", lambda d: (d.update(format_version="1"), "$.format_version")[1]),
    ("threshold_abc", "hgbr_categorical", _set_threshold("abc")),
    ("threshold_nan_text", "gbr_squared_error", _set_threshold("nan")),
    ("threshold_infinity_word", "gbr_squared_error", _set_threshold("Infinity")),
    ("digest_not_hex", "hgbr_categorical", _digest("sha256:" + "xyz" * 21 + "x")),
    ("digest_uppercase", "hgbr_categorical", _digest("sha256:" + "AB" * 32)),
    ("digest_other_algorithm", "hgbr_categorical", _digest("md5:" + "ab" * 16)),
    ("digest_short", "hgbr_categorical", _digest("sha256:" + "ab" * 31)),
    ("unknown_top_level_key", "hgbr_categorical", _put(None, "comment", "hello")),
    ("unknown_inputs_key", "hgbr_categorical", _put("inputs", "units", {})),
    ("categorical_without_categories", "hgbr_categorical", _no_categories),
    ("numeric_with_categories", "hgbr_categorical", _numeric_with_categories),
    ("left_categories_bad_node_key", "hgbr_categorical", _bad_category_key),
    ("classifier_without_classes", "gbc_multiclass", _drop("outputs", "classes")),
    ("regressor_with_classes", "gbr_squared_error", _put("outputs", "classes", [0, 1])),
    ("binary_without_rule", "gbc_binary", _drop("outputs", "binary_rule")),
    ("multiclass_with_rule", "gbc_multiclass", _put("outputs", "binary_rule", "raw_gt_0")),
    ("softmax_one_output", "gbc_multiclass", _one_base_value),
    ("unknown_post_transform", "gbr_squared_error", _put("outputs", "post_transform", "tanh", "$.outputs.post_transform")),
]


@pytest.mark.parametrize("case, mutate", [(c, m) for _, c, m in NEGATIVE], ids=[n for n, _, _ in NEGATIVE])
def test_mutated_document_fails_at_the_right_place(case, mutate):
    doc = parsed(case)
    validate(doc)  # the unmutated file passes, so the failure below is the mutation's
    where = mutate(doc)
    with pytest.raises(SchemaError) as caught:
        validate(doc)
    paths = [p for p, _ in caught.value.violations]
    assert where in paths, (where, caught.value.violations)
    assert where in str(caught.value)
    assert not Draft202012Validator(load_schema()).is_valid(doc)  # outside verdict agrees


@pytest.mark.parametrize("value", ["inf", "-inf", 1e308, -0.0, 3])
def test_number_or_infinity_accepts_what_the_writer_may_write(value):
    doc = parsed("hgbr_categorical")
    _set_threshold(value)(doc)
    validate(doc)


def test_schema_error_lists_the_first_few_violations_with_paths():
    doc = parsed("gbr_squared_error")
    tree = doc["ensemble"]["trees"][0]
    splits = [i for i, f in enumerate(tree["feature"]) if f >= 0]
    assert len(splits) > SHOWN_VIOLATIONS
    for i in splits:
        tree["threshold"][i] = "abc"
    with pytest.raises(SchemaError) as caught:
        validate(doc)
    err = caught.value
    assert isinstance(err, ValueError)
    assert len(err.violations) == len(splits)
    listed = [line for line in str(err).splitlines() if line.startswith("  at $.")]
    assert len(listed) == SHOWN_VIOLATIONS
    # Shown in document order: the first split first.
    assert listed[0].startswith("  at $.ensemble.trees[0].threshold[%d]:" % splits[0])


# ------------------------------------------------------------- (f) the digest recipe
# FIPS 180-4 known answer (NIST "SHA-256 example" for the message "abc"; value from memory,
# it is printed in every SHA-2 reference): proves the hashlib reference is SHA-256.
FIPS_ABC = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def body_as_documented(data: bytes) -> bytes:
    """The page's rule: "{" + everything after the digest member and its comma, minus the
    trailing newline."""
    assert data.startswith(b'{"boxwood_digest":"sha256:') and data.endswith(b"\n")
    end = data.index(b'",', 1) + 2
    return b"{" + data[end:-1]


@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_digest_recomputed_by_hand_matches(name):
    assert hashlib.sha256(b"abc").hexdigest() == FIPS_ABC
    data = artefact(name)
    doc = json.loads(data)
    stated = doc["boxwood_digest"]
    body = body_as_documented(data)
    assert stated == "sha256:" + hashlib.sha256(body).hexdigest()
    # The page's other claims about the layout: one line, the digest member at a fixed
    # place (characters 27-90), and the body is the rest of the document, in the
    # canonical form the page defines (standard json: sorted keys, no spaces, ASCII).
    assert data.count(b"\n") == 1
    assert data[26:90].decode("ascii") == stated[len("sha256:"):]
    rest = {k: v for k, v in doc.items() if k != "boxwood_digest"}
    assert json.loads(body) == rest
    canonical = json.dumps(rest, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                           allow_nan=False).encode("ascii")
    assert body == canonical


@pytest.mark.skipif(not all(shutil.which(c) for c in ("bash", "sha256sum", "tail", "head", "cut")),
                    reason="needs bash and GNU coreutils")
@pytest.mark.parametrize("name", ["gbr_squared_error", "hgbc_categorical"])
def test_digest_shell_recipe_in_docs_works(name, tmp_path):
    blocks = [b for b in code_blocks(doc_section("File layout"), "sh") if "sha256sum" in b]
    assert len(blocks) == 1, "the page should show one sha256sum recipe"
    (tmp_path / "model.json").write_bytes(artefact(name))
    out = subprocess.run(["bash", "-euo", "pipefail", "-c", blocks[0]], cwd=tmp_path,
                         capture_output=True, text=True, check=True).stdout.split()
    stated, computed = out[0], out[1]
    assert stated == computed == json.loads(artefact(name))["boxwood_digest"][len("sha256:"):]
    # A changed byte in the body changes what the recipe computes (it hashes the body).
    tampered = artefact(name).replace(b'"format_version":2', b'"format_version":3')
    (tmp_path / "model.json").write_bytes(tampered)
    out = subprocess.run(["bash", "-euo", "pipefail", "-c", blocks[0]], cwd=tmp_path,
                         capture_output=True, text=True, check=True).stdout.split()
    assert out[0] == stated and out[1] != stated


# --------------------------------------------------------------- the worked example
def worked_example() -> Tuple[Dict[str, Any], str]:
    section = doc_section("Worked example")
    body = json.loads(code_blocks(section, "json")[0])
    digest = re.search(r"sha256:[0-9a-f]{64}", section).group(0)
    return body, digest


def test_worked_example_is_a_valid_loadable_artefact():
    import boxwood_runtime
    from boxwood_runtime.scorer import artefact_bytes

    body, shown_digest = worked_example()
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                           allow_nan=False).encode("ascii")
    digest = "sha256:" + hashlib.sha256(canonical).hexdigest()
    assert digest == shown_digest, "the page shows a different digest for its example"
    # The file as the page describes it, built with the standard library only ...
    data = b'{"boxwood_digest":"' + digest.encode() + b'",' + canonical[1:] + b"\n"
    # ... is byte for byte what the device scorer's writer helper makes,
    assert data == artefact_bytes(body)
    size = int(re.search(r"is (\d+) bytes long", doc_section("Worked example")).group(1))
    assert len(data) == size, "the page states the example file's size wrongly"
    validate(json.loads(data))
    # and the device scorer loads it (which runs the example's self_check rows).
    model = boxwood_runtime.load(data)
    # Hand-computed from the page's rules: base 10.0; root: temp_c <= 21.5 -> leaf 1.25,
    # else node 2: room code in {0 (office), 2 (lab)} -> leaf -0.5, else leaf 2.0; a
    # missing temp_c goes left (missing_left true), a missing room goes right (false).
    cases = [
        ({"temp_c": 21.5, "room": "store"}, 11.25),  # equal to the threshold: left
        ({"temp_c": 21.500000000000004, "room": "store"}, 12.0),  # one float64 step above
        ({"temp_c": 30.0, "room": "office"}, 9.5),
        ({"temp_c": 30.0, "room": "lab"}, 9.5),
        ({"temp_c": None, "room": "store"}, 11.25),
        ({"temp_c": 25.0, "room": None}, 12.0),
        ({"temp_c": float("inf"), "room": "lab"}, 9.5),
    ]
    for record, expected in cases:
        assert model.predict(record) == expected, record
