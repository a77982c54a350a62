"""The device side needs nothing beyond the Python standard library and reads as
Python 3.8 (DESIGN.md, "Two sides, two rules")."""
from __future__ import annotations

import ast
import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import zoo

RUNTIME = Path(__file__).resolve().parents[1] / "runtime" / "boxwood_runtime"
CORE = RUNTIME / "scorer.py"
# Modules that live on the device and must stay standard-library only. batch.py is
# the optional numpy evaluator and native.py its compiled engine (numpy for its arrays):
# both are exempt from the import rule (not from 3.8).
STDLIB_ONLY = sorted(p for p in RUNTIME.glob("*.py") if p.name not in ("batch.py", "native.py"))


@pytest.mark.parametrize("path", sorted(RUNTIME.glob("*.py")), ids=lambda p: p.name)
def test_runtime_parses_as_python_38(path):
    # ast's feature_version rejects syntax newer than 3.8 (match, except*, PEP 604 in
    # annotations evaluated at runtime is not syntax, so scan for it below as well).
    source = path.read_text()
    ast.parse(source, filename=str(path), feature_version=(3, 8))


@pytest.mark.parametrize("path", STDLIB_ONLY, ids=lambda p: p.name)
def test_runtime_imports_only_the_standard_library(path):
    # "scorer", "stream": sibling modules imported by name when the files are copied onto a
    # box (stream.py beside scorer.py; box.py, the bundle's entry script, beside both).
    allowed = set(sys.stdlib_module_names) | {"boxwood_runtime", "scorer", "stream"}
    tree = ast.parse(path.read_text())
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:  # relative import inside the package
                continue
            names = [node.module or ""]
        else:
            continue
        for name in names:
            assert name.split(".")[0] in allowed, "%s imports %s" % (path.name, name)


def test_core_module_is_self_contained():
    """scorer.py imports nothing from its own package, so it can be copied alone."""
    tree = ast.parse(CORE.read_text())
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            assert node.level == 0 and node.module != "boxwood_runtime"


def test_core_scores_under_isolated_python(tmp_path):
    """Copy scorer.py alone next to an artefact and score with `python -I -S`: no
    site-packages, no user path, no environment variables."""
    case, ensemble, data = zoo.exported("hgbc_categorical")
    shutil.copy(CORE, tmp_path / "scorer.py")
    (tmp_path / "model.json").write_bytes(data)
    rows = case.rows[:25]
    (tmp_path / "rows.json").write_text(json.dumps(rows))
    script = (
        "import json, sys\n"
        "sys.path.insert(0, '.')\n"
        "import scorer\n"
        "banned = [m for m in ('numpy', 'sklearn', 'scipy', 'boxwood') if m in sys.modules]\n"
        "assert not banned, banned\n"
        "m = scorer.load('model.json')\n"
        "rows = json.load(open('rows.json'))\n"
        "print(json.dumps([m.decision_function(r) for r in rows]))\n"
    )
    out = subprocess.run([sys.executable, "-I", "-S", "-c", script], cwd=tmp_path,
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    got = json.loads(out.stdout)
    from boxwood.sources.model import SourceModel

    want = SourceModel(case.model, ensemble).raw(rows)
    assert [list(g) for g in got] == want.tolist()
