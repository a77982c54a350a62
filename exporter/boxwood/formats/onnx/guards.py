"""Checks the ONNX reader makes before it trusts a claim (issue 11; docs/hardening.md,
"ONNX files"): per-node 0/1 flags in their documented domain, claimed sizes against the
attributes' real lengths before anything is allocated, every listed node reachable from a tree
root, text that is UTF-8, and boxwood's metadata of the right types."""
from __future__ import annotations

import math
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from ...ir import Reference
from .parse import MAX_TARGETS, OnnxReadError


def check_flags(where: str, name: str, values: Sequence[Any]) -> None:
    """A per-node 0/1 attribute (the ai.onnx.ml TreeEnsemble operator docs define
    ``nodes_missing_value_tracks_true``, ``nodes_trueleafs`` and ``nodes_falseleafs`` as 0 or 1
    per node): anything else is refused, since runtimes read it differently."""
    for i, v in enumerate(values):
        if v not in (0, 1) or isinstance(v, float):
            raise OnnxReadError("%s: %s[%d] is %r; the operator defines it as 0 or 1" % (where, name, i, v))


def claimed_targets(where: str, a: Dict[str, Any], distinct_targets: int, n_base: int) -> int:
    """The operator's claimed ``n_targets``, checked against what its attributes really hold before
    anything is allocated for it: at least one, at most MAX_TARGETS, and no more than the targets
    its leaves or base values actually name (a file of a few KB claiming 10**9 targets would
    otherwise allocate until MemoryError)."""
    claimed = a.get("n_targets", 1)
    if not isinstance(claimed, int) or claimed < 1:
        raise OnnxReadError("%s: n_targets is %r; it must be a positive integer" % (where, claimed))
    if claimed > MAX_TARGETS or claimed > max(distinct_targets, n_base, 1):
        raise OnnxReadError("%s claims %d targets, but its leaves name %d and its base values %d (at most %d)"
                            % (where, claimed, distinct_targets, n_base, MAX_TARGETS))
    return claimed


def check_reached(where: str, listed: Sequence[Any], reached: set) -> None:
    """Every node (and leaf) the operator lists must be reached from a tree root: a node cut
    off (e.g. an internal node relabelled as a leaf, which orphans its subtree) is refused."""
    missing = [k for k in listed if k not in reached]
    if missing:
        k = missing[0]
        what = ("leaf %d" % k[1]) if k[0] == "l" else ("node %d" % k[1]) if k[0] == "n" else "tree %d node %d" % k
        raise OnnxReadError("%s: %d listed nodes are reached from no tree root (first: %s); every node must "
                            "belong to a tree" % (where, len(missing), what))


def as_text(v: Any, where: str, name: str) -> str:
    if isinstance(v, bytes):
        try:
            return v.decode("utf-8")
        except UnicodeError:
            raise OnnxReadError("%s: %s holds bytes that are not UTF-8 text" % (where, name))
    return str(v)


def meta_list(meta: Dict[str, Any], key: str, kinds: Tuple[type, ...]) -> Optional[List[Any]]:
    """Metadata ``key`` when present: a list whose entries are of ``kinds`` (never bool), else refused."""
    value = meta.get(key)
    if value is None:
        return None
    if not isinstance(value, list) or not all(isinstance(v, kinds) and not isinstance(v, bool) for v in value):
        raise OnnxReadError("metadata %s must be a list of %s" % (key, " or ".join(k.__name__ for k in kinds)))
    return value


def meta_reference(ref: Any) -> Reference:
    """metadata boxwood.reference, checked: rows of cells (number, text or null), raw and transformed
    rows of numbers (or "inf"/"-inf"), one of each per row."""
    if not isinstance(ref, dict):
        raise OnnxReadError("metadata boxwood.reference must be an object")

    def rows_of(key: str, cell: Any) -> List[List[Any]]:
        rows = ref.get(key)
        if not isinstance(rows, list) or not rows or not all(isinstance(r, list) and r for r in rows):
            raise OnnxReadError("metadata boxwood.reference.%s must be a non-empty list of non-empty lists" % key)
        try:
            return [[cell(v) for v in r] for r in rows]
        except (TypeError, ValueError, OverflowError):
            raise OnnxReadError("metadata boxwood.reference.%s holds a value of the wrong type" % key)

    def number(v: Any) -> float:
        if v in ("inf", "-inf") and isinstance(v, str):
            return float(v)
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise TypeError(v)
        return float(v)

    def record_cell(v: Any) -> Any:
        if v is None or isinstance(v, str):
            return float(v) if v in ("inf", "-inf") else v
        return number(v)

    out = Reference(rows=rows_of("rows", record_cell), raw=rows_of("raw", number),
                    transformed=rows_of("transformed", number))
    if not len(out.rows) == len(out.raw) == len(out.transformed):
        raise OnnxReadError("metadata boxwood.reference: rows, raw and transformed differ in length")
    return out


def check_input_mask(graph: Any, path: Any, features: Sequence[Any], where: str) -> None:
    """The check boxwood writes before the tree operator (``build._sanitize_codes``): a category
    code outside 0..n-1 or not a whole number becomes NaN, numeric columns pass, codes shift by
    ``CODE_OFFSET``. The reader leaves unknown codes to the scorer's own rules, so it accepts that
    check only as written, node by node and constant by constant for the features read: another
    bound (a NaN or finite ``code_high`` on a numeric column, found by the fuzz campaign) would
    make onnxruntime treat other values as missing than boxwood does."""
    from .build import CODE_OFFSET  # one package: the writer's own constant

    wheres = [n for n in path.path_nodes if n.op_type == "Where"]
    if not wheres:
        return
    lo = [0.0 if f.is_categorical else -math.inf for f in features]
    hi = [float(len(f.categories) - 1) if f.is_categorical else math.inf for f in features]
    numeric = [not f.is_categorical for f in features]
    offset = [CODE_OFFSET if f.is_categorical else 0.0 for f in features]

    def bad(why: str) -> OnnxReadError:
        return OnnxReadError("%s: the input check before the trees is not the one boxwood writes for these "
                             "features (%s)" % (where, why))

    def node(name: str, op: str) -> Any:
        n = graph.producer.get(name)
        if n is None or n.op_type != op or n.domain not in ("", "ai.onnx"):
            raise bad("expected %s for %r" % (op, name))
        return n

    def same(name: str, want: Sequence[Any], label: str) -> None:
        got = graph.const(name)
        if got is None or np.asarray(got).ravel().tolist() != list(want):
            raise bad("%s is %s, expected %s" % (label, None if got is None else np.asarray(got).ravel().tolist()[:8],
                                                 list(want)[:8]))

    if len(wheres) != 1:
        raise bad("%d Where nodes" % len(wheres))
    cond, values, _ = wheres[0].input
    shifted = node(values, "Add")
    x = shifted.input[0]
    same(shifted.input[1], offset, "the code offsets")
    both = node(cond, "And")
    in_range, whole_or_numeric = both.input
    rng = node(in_range, "And")
    ge, le = node(rng.input[0], "GreaterOrEqual"), node(rng.input[1], "LessOrEqual")
    if ge.input[0] != x or le.input[0] != x:
        raise bad("the range test does not read the input values")
    same(ge.input[1], lo, "the lower bounds")
    same(le.input[1], hi, "the upper bounds")
    either = node(whole_or_numeric, "Or")
    eq = node(either.input[0], "Equal")
    same(either.input[1], numeric, "the numeric-column flags")
    floor = node(eq.input[0], "Floor")
    if eq.input[1] != x or floor.input[0] != x:
        raise bad("the whole-number test does not read the input values")
