"""The JSON Schemas of the files boxwood writes, and validation against them.

The schemas live in the repository's top-level ``schemas/`` folder, which ships as
the package ``boxwood.schemas`` (see pyproject.toml). ``load_schema("tree-ensemble")``
returns ``schemas/tree-ensemble.schema.json`` as a dict; ``validate(doc)`` checks a
parsed artefact against it (JSON Schema draft 2020-12) and raises :class:`SchemaError`
naming the first few violations by their JSON path.

    from boxwood.schema import validate
    validate(json.loads(Path("model.json").read_bytes()))

Schema validation checks the layout and the value types; it does not check the
digest, that tree indices are in range or that trees are acyclic. The device
scorer's loader checks those (``boxwood_runtime.load``).
"""
from __future__ import annotations

import functools
import json
from pathlib import Path
from typing import Any, Dict, List, Tuple

__all__ = ["SchemaError", "load_schema", "validate", "schema_names"]

# How many violations a SchemaError message lists; all are kept in ``.violations``.
SHOWN_VIOLATIONS = 5
_SUFFIX = ".schema.json"
# Fallback for a source checkout whose editable install cannot import boxwood.schemas
# (the folder has no __init__.py): exporter/boxwood/schema.py -> <repo>/schemas.
_REPO_SCHEMAS = Path(__file__).resolve().parent.parent.parent / "schemas"


class SchemaError(ValueError):
    """A document does not match its schema.

    ``violations`` lists every ``(json_path, message)`` pair found, in document order;
    the message shows the first few.
    """

    def __init__(self, name: str, violations: List[Tuple[str, str]]):
        self.schema_name = name
        self.violations = violations
        shown = violations[:SHOWN_VIOLATIONS]
        lines = ["the document does not match the %r schema (%d violation%s%s):" % (
            name, len(violations), "" if len(violations) == 1 else "s",
            "; the first %d follow" % len(shown) if len(violations) > len(shown) else "")]
        lines += ["  at %s: %s" % (path, message) for path, message in shown]
        ValueError.__init__(self, "\n".join(lines))


def _schema_files() -> List[Any]:
    """Places to look for schema files, best first (importlib Traversables or Paths)."""
    places: List[Any] = []
    try:
        from importlib.resources import files

        try:
            places.append(files("boxwood.schemas"))
        except (ImportError, TypeError):
            pass
        try:
            places.append(files("boxwood") / "schemas")  # an installed wheel's layout
        except (ImportError, TypeError):
            pass
    except ImportError:  # Python < 3.9 has no importlib.resources.files
        pass
    places.append(_REPO_SCHEMAS)
    return places


@functools.lru_cache(maxsize=None)
def _schema_text(name: str) -> str:
    if not name or "/" in name or "\\" in name or name.startswith("."):
        raise ValueError("schema name %r is not a plain name such as 'tree-ensemble'" % (name,))
    tried = []
    for place in _schema_files():
        candidate = place / (name + _SUFFIX)
        tried.append(str(candidate))
        try:
            if candidate.is_file():
                return candidate.read_text(encoding="utf-8")
        except OSError:
            continue
    raise FileNotFoundError("no schema named %r; looked for %s" % (name, ", ".join(tried)))


def load_schema(name: str = "tree-ensemble") -> Dict[str, Any]:
    """The schema ``schemas/<name>.schema.json`` as a fresh dict (safe to modify)."""
    return json.loads(_schema_text(name))


def schema_names() -> List[str]:
    """Names of the schemas that ship with boxwood (for messages and tooling)."""
    names = set()
    for place in _schema_files():
        try:
            for entry in place.iterdir():
                if entry.name.endswith(_SUFFIX):
                    names.add(entry.name[:-len(_SUFFIX)])
        except (OSError, ValueError):
            continue
    return sorted(names)


@functools.lru_cache(maxsize=None)
def _validator(name: str) -> Any:
    from jsonschema import Draft202012Validator

    schema = load_schema(name)
    Draft202012Validator.check_schema(schema)  # a broken schema fails loudly, not silently
    return Draft202012Validator(schema)


def validate(doc: Any, name: str = "tree-ensemble") -> None:
    """Check ``doc`` (a parsed JSON document) against the schema ``name``.

    Returns None when it matches; raises :class:`SchemaError` listing the first
    violations with their JSON paths (``$.ensemble.trees[0].threshold[3]``) otherwise.
    """
    found = []
    for error in _validator(name).iter_errors(doc):
        found.append((_sort_key(error.absolute_path), error.json_path, error.message))
    if found:
        found.sort(key=lambda item: item[0])
        raise SchemaError(name, [(path, message) for _, path, message in found])


def _sort_key(path: Any) -> Tuple[Tuple[int, Any], ...]:
    """Order violations as they appear in the document (ints and keys never compared)."""
    return tuple((0, p) if isinstance(p, int) else (1, str(p)) for p in path)
