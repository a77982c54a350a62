"""The layout rules of DEVELOPERS.md, checked on the code's own imports (stdlib ``ast``):

* no import circles among the workstation's modules (imports inside functions count too:
  a lazy import that closes a circle is still a circle);
* no upward imports: every module sits in a layer (hub < sources and formats < export and
  verify < bundle and demo < cli) and imports only from its own layer or below;
* a format never imports the verifier, the CLI, the sources, the export pipeline or
  scikit-learn; a source never imports a format, the verifier or the CLI; and formats and
  sources never import one another;
* no workstation module is over 700 lines (the device scorer, one copyable file by design,
  is on the device side and exempt).

The checker is itself checked: a small tree with planted faults (a circle, a format that
imports the verifier, an upward import, a long module) must produce each complaint.
"""
from __future__ import annotations

import ast
from pathlib import Path
from typing import Dict, List, Optional, Set

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "exporter" / "boxwood"
MAX_LINES = 700

# Layers, lowest first; a module belongs to the first prefix that matches it.
LAYERS = [
    ("boxwood", "boxwood.ir", "boxwood.numerics", "boxwood.schema", "boxwood.pages"),
    ("boxwood.contract", "boxwood.reference_rows"),
    ("boxwood.sources", "boxwood.formats", "boxwood.micropython", "boxwood.signing"),
    ("boxwood.export", "boxwood.verify", "boxwood.diff", "boxwood.scale"),
    ("boxwood.bundle", "boxwood.demo"),
    ("boxwood.cli", "boxwood.__main__"),
]
# (importer prefix, forbidden imported prefixes)
FORBIDDEN = [
    ("boxwood.formats", ("boxwood.verify", "boxwood.cli", "boxwood.sources", "boxwood.export", "boxwood.bundle",
                         "sklearn")),
    ("boxwood.sources", ("boxwood.formats", "boxwood.verify", "boxwood.cli", "boxwood.export", "boxwood.bundle")),
    ("boxwood.ir", ("numpy", "sklearn", "boxwood.")),
]


def _under(name: str, prefix: str) -> bool:
    return name == prefix or name.startswith(prefix + ".")


def module_name(path: Path, root: Path, package: str) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join([package] + parts)


def imports_of(path: Path, name: str, is_package: bool, modules: Set[str]) -> Set[str]:
    """Every module ``path`` imports, anywhere in the file, as absolute names. ``from P
    import m`` counts as an import of the submodule ``P.m`` when ``modules`` has one (the
    package P is then already being imported by whoever imports the importer), else of P."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    here = name.split(".") if is_package else name.split(".")[:-1]
    out: Set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = here[:len(here) - (node.level - 1)] if node.level > 1 else here
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            for a in node.names:
                sub = mod + "." + a.name
                out.add(sub if sub in modules else mod)
    return out


def import_graph(root: Path, package: str = "boxwood") -> Dict[str, Set[str]]:
    """{module: what it imports}: modules of the package, and external modules (numpy,
    sklearn.tree, ...) by their full names."""
    files = {module_name(p, root, package): p for p in root.rglob("*.py")}
    graph: Dict[str, Set[str]] = {}
    for name, path in files.items():
        found = imports_of(path, name, path.name == "__init__.py", set(files))
        graph[name] = {m for m in found if m != name and (m in files or not _under(m, package))}
    return graph


def circles(graph: Dict[str, Set[str]]) -> List[List[str]]:
    """Strongly connected components with more than one module, or a module importing itself
    (Tarjan's algorithm, R. Tarjan, "Depth-first search and linear graph algorithms", SIAM J.
    Computing 1(2), 1972)."""
    index: Dict[str, int] = {}
    low: Dict[str, int] = {}
    stack: List[str] = []
    on: Set[str] = set()
    out: List[List[str]] = []
    counter = [0]

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in graph:
                continue
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1 or v in graph.get(v, ()):
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def layer(name: str) -> Optional[int]:
    best = None
    for i, prefixes in enumerate(LAYERS):
        for p in prefixes:
            if _under(name, p) and (best is None or len(p) > best[1]):
                best = (i, len(p))
    return None if best is None else best[0]


def problems(root: Path, package: str = "boxwood") -> List[str]:
    graph = import_graph(root, package)
    found = ["import circle: %s" % " -> ".join(c) for c in circles(graph)]
    for mod, deps in sorted(graph.items()):
        mine = layer(mod)
        if mine is None:
            found.append("%s is in no layer (add it to LAYERS in tests/test_layout.py)" % mod)
            continue
        for dep in sorted(deps):
            if _under(dep, package) and dep in graph:
                theirs = layer(dep)
                if dep != package and theirs is not None and theirs > mine:
                    found.append("upward import: %s (layer %d) imports %s (layer %d)" % (mod, mine, dep, theirs))
            for importer, banned in FORBIDDEN:
                if _under(mod, importer) and any(_under(dep, b) or (b.endswith(".") and dep.startswith(b))
                                                 for b in banned) and not _under(dep, importer):
                    found.append("forbidden import: %s imports %s" % (mod, dep))
    for path in sorted(root.rglob("*.py")):
        n = len(path.read_text(encoding="utf-8").splitlines())
        if n > MAX_LINES:
            found.append("%s has %d lines (at most %d)" % (path.relative_to(root), n, MAX_LINES))
    return found


def test_workstation_layout_has_no_circles_upward_or_forbidden_imports():
    assert problems(PACKAGE) == []


def test_every_format_package_is_registered_and_complete():
    from boxwood import formats

    packages = sorted(p.name for p in (PACKAGE / "formats").iterdir() if (p / "__init__.py").is_file())
    assert packages == sorted(formats.FORMATS)
    for fmt in formats.FORMATS.values():
        for capability in ("sniff", "write", "read", "open", "check", "describe"):
            assert getattr(fmt, capability) is not None, (fmt.name, capability)


def _plant(tmp: Path, files: Dict[str, str]) -> Path:
    root = tmp / "boxwood"
    for rel, text in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text, encoding="utf-8")
    return root


def test_the_layout_checker_catches_planted_faults(tmp_path):
    clean = {
        "__init__.py": "",
        "ir.py": "import math\n",
        "formats/__init__.py": "from . import json\n",
        "formats/json/__init__.py": "from ...ir import x\n",
        "verify/__init__.py": "from ..formats import y\n",
        "cli/__init__.py": "from ..verify import z\n",
    }
    assert problems(_plant(tmp_path / "clean", clean)) == []
    faulty = dict(clean)
    faulty["formats/json/check.py"] = "def f():\n    from ...verify import core\n"  # lazy, still counted
    faulty["verify/core.py"] = "from ..formats.json import check\n"  # closes a circle through the lazy import
    faulty["ir.py"] = "import numpy\nfrom .cli import main\n"  # upward and forbidden
    faulty["sources/__init__.py"] = "from ..formats import json\n"
    faulty["formats/onnx/__init__.py"] = "import sklearn.tree\n" + "x = 1\n" * (MAX_LINES + 1)
    found = problems(_plant(tmp_path / "faulty", faulty))
    text = "\n".join(found)
    assert "import circle: boxwood.formats.json.check -> boxwood.verify.core" in text
    assert "forbidden import: boxwood.formats.json.check imports boxwood.verify" in text
    assert "upward import: boxwood.ir (layer 0) imports boxwood.cli (layer 5)" in text
    assert "forbidden import: boxwood.ir imports numpy" in text
    assert "forbidden import: boxwood.sources imports boxwood.formats" in text
    assert "forbidden import: boxwood.formats.onnx imports sklearn.tree" in text
    assert "formats/onnx/__init__.py has %d lines" % (MAX_LINES + 2) in text
