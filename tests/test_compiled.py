"""The device scorer's compiled mode (``boxwood_runtime.load(path, compiled=True)``): the tree walk
as Python source generated from the validated trees, compiled once.

Outside references: scikit-learn's own raw scores on every zoo model (tests/zoo.py names the
open data sets), on data rows plus probes at every threshold and one float step either side,
NaN and every category (tests/test_conformance.py builds them); CPython's ``tokenize`` module
for what the generated source contains; the MicroPython WebAssembly port running the same
program as CPython (tests/micropython/score_rows.py).
"""
from __future__ import annotations

import io
import json
import tokenize

import numpy as np
import pytest

import boxwood_runtime
import zoo
from boxwood import micropython as mp
from boxwood.formats.json.writer import to_bytes
from boxwood.sources.model import SourceModel
from boxwood_runtime import scorer
from test_conformance import _nan, probe_rows

ALLOWED_NAMES = {"def", "raw", "x", "if", "else", "and", "not", "in", "return", "_walk_tree", "_DEEP"}


def _bits(values):
    return [float(v).hex() for v in values]


@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_compiled_walk_is_bit_identical_to_the_data_walk_and_sklearn(name):
    case, ensemble, data = zoo.exported(name)
    walk = boxwood_runtime.load(data, unknown_category="as_missing")
    fast = boxwood_runtime.load(data, unknown_category="as_missing", compiled=True)
    assert fast.compiled_reason.startswith("compiled"), fast.compiled_reason
    rows = probe_rows(case, ensemble)
    want = SourceModel(case.model, ensemble).raw(rows)
    for i, row in enumerate(rows):
        x = walk.prepare(_nan(row), i)
        a, b = walk._walk(x), fast.raw_scores(x)
        assert _bits(a) == _bits(b), (i, a, b)
        assert _bits(fast.exact_values(b)) == _bits(want[i]), (i, b, want[i])


def test_deep_subtrees_are_walked_as_data(monkeypatch):
    """Past the nesting limit the generated code hands the subtree to the data walk: still exact."""
    case, ensemble, data = zoo.exported("dtc_nan")
    monkeypatch.setattr(scorer.Model, "COMPILE_NESTING", 2)
    fast = boxwood_runtime.load(data, compiled=True)
    assert fast._deep and "_walk_tree(_DEEP[" in fast._source([])
    walk = boxwood_runtime.load(data)
    for i, row in enumerate(case.rows):
        x = walk.prepare(_nan(row), i)
        assert _bits(walk._walk(x)) == _bits(fast.raw_scores(x))


def _hostile(ensemble):
    import copy

    e = copy.deepcopy(ensemble)
    evil = ["__import__('os').system('touch /tmp/boxwood-pwned')", "x0 = 1\nimport os", "'''", '"""', "#",
            "\\", "exec(open('x').read())"]
    for f, name in zip(e.features, evil):
        f.name = name
    e.output_names = ["]; raise SystemExit #"] * e.n_outputs
    return e, evil


@pytest.mark.parametrize("name", ["gbc_binary", "hgbc_categorical", "rfr_multioutput"])
def test_hostile_names_never_reach_the_generated_source(name):
    _, ensemble, _ = zoo.exported(name)
    e, evil = _hostile(ensemble)
    if e.classes is not None and all(isinstance(c, (int, float)) for c in e.classes):
        e.classes = ["print('owned')", "__class__"] + list(e.classes[2:])
    for f in e.features:
        if f.categories is not None:
            f.categories = ["c%d'); import os; ('" % i for i in range(len(f.categories))]
    model = boxwood_runtime.load(to_bytes(e), compiled=True, self_check=False)  # its rows name the old categories
    assert model._compiled is not None
    source = model._source([])
    for text in evil + ["owned", "import", "os", "SystemExit"]:
        assert text not in source
    kinds = set()
    for tok in tokenize.generate_tokens(io.StringIO(source).readline):
        kinds.add(tokenize.tok_name[tok.type])
        if tok.type == tokenize.NAME:
            assert tok.string in ALLOWED_NAMES or tok.string[0] in "xa" and tok.string[1:].isdigit(), tok.string
        assert tok.type != tokenize.STRING, tok.string
    assert "NUMBER" in kinds


def test_a_float_repr_that_does_not_read_back_keeps_the_data_walk(monkeypatch):
    """MicroPython builds may print floats inexactly: then the model is not compiled, and says why."""
    _, _, data = zoo.exported("gbr_squared_error")
    real = scorer._literal

    def inexact(v):
        if v not in (scorer._INF, -scorer._INF) and v == v and v != 0.0:
            raise ValueError("this Python's float repr does not read back exactly (planted); walking the data")
        return real(v)

    monkeypatch.setattr(scorer, "_literal", inexact)
    model = boxwood_runtime.load(data, compiled=True)
    assert model._compiled is None and "does not read back exactly" in model.compiled_reason
    assert model.self_check()[0]


def test_compiled_mode_on_micropython_matches_cpython(tmp_path):
    """The same program on MicroPython 1.27 with compiled=True: compile() is available there,
    and every raw score, output and label equals CPython's data walk bit for bit."""
    import test_micropython as tm

    tm._need(tm.CURRENT)
    for name in ("gbc_multiclass", "hgbc_categorical", "rfr_nan"):
        case, ensemble, data = zoo.exported(name)
        rows = tm.sample_rows(name)
        files = {"scorer.py": tm.SCORER, "model.json": data, "rows.json": json.dumps(tm._transport(rows))}
        want = tm.run_cpython(tmp_path, files)
        done = mp.run("BOX = '/box'\nCOMPILED = True\n" + tm.PROGRAM, {"/box/" + k: v for k, v in files.items()},
                      heapsize=16 << 20, pystack=16384, port=tm.CURRENT)
        assert done.returncode == 0, done.stderr
        got = done.stdout.splitlines()
        assert got[1].startswith("compiled compiled ("), got[1]
        # trees as built, raw scores and labels bit for bit; outputs within the self-check bound
        tm._assert_same(want, [got[0]] + got[2:], len(rows))


def test_compiled_heap_on_micropython_is_measured():
    """How much heap the compiled code takes under MicroPython (printed; documented in
    docs/device.md): live heap after compile() against the model's own."""
    import test_micropython as tm

    tm._need(tm.CURRENT)
    _, _, data = zoo.exported("gbr_squared_error")
    steps = [
        "import gc, sys\nsys.path.insert(0, '/box')\nimport scorer\nm = scorer.load('/box/model.json')",
        "gc.collect()",
        "before = gc.mem_alloc()\nok = m.compile()",
        "gc.collect()",
        "print(ok, m.compiled_reason, gc.mem_alloc() - before)",
    ]
    done = mp.run(steps, {"/box/scorer.py": tm.SCORER, "/box/model.json": data}, port=tm.CURRENT)
    assert done.returncode == 0, done.stderr
    ok, *_, grown = done.stdout.split()
    assert ok == "True" and int(grown) > 0
    print("compiled code of gbr_squared_error (40 trees, 586 nodes) on MicroPython: %s bytes of heap" % grown)


def test_batchmodel_and_scores_are_unchanged_by_compiling():
    from boxwood_runtime.batch import BatchModel

    case, _, data = zoo.exported("hgbc_multiclass")
    fast = boxwood_runtime.load(data, compiled=True)
    walk = boxwood_runtime.load(data)
    rows = [_nan(r) for r in case.rows[:300]]
    assert fast.predict(rows) == walk.predict(rows)
    assert np.array_equal(BatchModel(fast).predict(rows), BatchModel(walk).predict(rows))
