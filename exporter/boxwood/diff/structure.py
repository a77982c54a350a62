"""Structural comparison of two ensembles: trees added, removed or changed, per-feature split
counts, thresholds moved, leaves changed, base values, settings, features and classes.

Trees are paired per output by their position among that output's trees (the j-th tree of
output k in OLD with the j-th tree of output k in NEW); a NEW tree without partner is added,
an OLD one removed. A pair is the same tree when every node's feature, threshold bits,
children, missing direction, categories and leaf bits are equal (the verifier's tree
fingerprint, :func:`boxwood.verify.findings.fingerprint`). In a changed pair, nodes are
matched by their position (the path from the root), so a node renumbering does not hide a
moved threshold: a split on the same feature with other threshold bits is a moved
threshold, a leaf with other bits a changed leaf, anything else (another feature, a leaf
that became a split, another missing direction or category set) a node change, below
which the pair is not walked further.
"""
from __future__ import annotations

import struct
from typing import Any, Dict, List, Optional, Tuple

from ..ir import LEAF, Ensemble, Tree, split_counts
from ..verify.findings import fingerprint

# Items kept per list in the report (every item is counted).
MAX_ITEMS = 500

# Settings that change what a model computes from the same trees (compared one by one;
# softmax_sum only where a softmax is computed: it has no effect elsewhere).
SETTINGS = ("task", "post_transform", "post_transform_params", "combine", "compare_precision", "missing_values",
            "accepts_infinity", "binary_rule", "softmax_sum", "fields")


def same_bits(a: float, b: float) -> bool:
    return struct.pack("<d", a) == struct.pack("<d", b)


def output_name(e: Ensemble, k: int) -> str:
    if e.output_names and k < len(e.output_names):
        return str(e.output_names[k])
    return "output %d" % k


class Listed:
    """A counted list that keeps its first MAX_ITEMS items."""

    def __init__(self) -> None:
        self.count = 0
        self.items: List[Dict[str, Any]] = []

    def add(self, item: Dict[str, Any]) -> None:
        self.count += 1
        if len(self.items) < MAX_ITEMS:
            self.items.append(item)

    def to_dict(self) -> Dict[str, Any]:
        return {"count": self.count, "items": self.items}


def _walk_pair(old: Tree, new: Tree, where: Dict[str, Any], thresholds: Listed, leaves: Listed, nodes: Listed,
               names_old: List[str], names_new: List[str]) -> Tuple[int, int, int]:
    """Compare two trees position by position; (thresholds moved, leaves changed, node changes)."""
    counts = [0, 0, 0]
    stack = [(0, 0, "root")]
    while stack:
        a, b, path = stack.pop()
        fa, fb = old.feature[a], new.feature[b]
        at = dict(where, node=a, node_new=b, path=path)
        if fa == LEAF and fb == LEAF:
            if not same_bits(old.value[a], new.value[b]):
                leaves.add(dict(at, old=old.value[a], new=new.value[b], delta=new.value[b] - old.value[a]))
                counts[1] += 1
            continue
        if fa == LEAF or fb == LEAF:
            nodes.add(dict(at, what="a leaf became a split on %r" % names_new[fb] if fa == LEAF else
                           "a split on %r became a leaf" % names_old[fa]))
            counts[2] += 1
            continue
        if names_old[fa] != names_new[fb]:
            nodes.add(dict(at, what="splits on %r, now on %r (subtree not compared further)"
                           % (names_old[fa], names_new[fb])))
            counts[2] += 1
            continue
        changed = False
        ca, cb = old.left_categories[a], new.left_categories[b]
        if (ca is None) != (cb is None) or (ca is not None and tuple(ca) != tuple(cb)):
            nodes.add(dict(at, what="categories going left on %r: %r, now %r" % (names_old[fa], ca, cb)))
            changed = True
        elif ca is None and not same_bits(old.threshold[a], new.threshold[b]):
            thresholds.add(dict(at, feature=names_old[fa], old=old.threshold[a], new=new.threshold[b]))
            counts[0] += 1
        if old.missing_left[a] != new.missing_left[b]:
            nodes.add(dict(at, what="missing values on %r go %s, now %s" % (
                names_old[fa], "left" if old.missing_left[a] else "right", "left" if new.missing_left[b] else "right")))
            changed = True
        counts[2] += changed
        stack.append((old.right[a], new.right[b], path + "R" if path != "root" else "R"))
        stack.append((old.left[a], new.left[b], path + "L" if path != "root" else "L"))
    return counts[0], counts[1], counts[2]


def _setting(e: Ensemble, name: str) -> Any:
    v = getattr(e, name, None)
    return dict(v) if isinstance(v, dict) else v


def _equal(a: Any, b: Any) -> bool:
    if isinstance(a, float) and isinstance(b, float):
        return same_bits(a, b)
    if isinstance(a, dict) and isinstance(b, dict):
        return sorted(a) == sorted(b) and all(_equal(a[k], b[k]) for k in a)
    return a == b


def compare(old: Ensemble, new: Ensemble) -> Dict[str, Any]:
    """The structural differences of ``new`` against ``old`` as a JSON-friendly dict
    (schemas/diff-report.schema.json, ``structure``)."""
    names_old = [f.name for f in old.features]
    names_new = [f.name for f in new.features]
    thresholds, leaves, nodes = Listed(), Listed(), Listed()
    changed, added, removed = Listed(), Listed(), Listed()
    same = 0
    for k in range(max(old.n_outputs, new.n_outputs)):
        t_old = [(i, t) for i, t in enumerate(old.trees) if t.output == k]
        t_new = [(i, t) for i, t in enumerate(new.trees) if t.output == k]
        for j in range(max(len(t_old), len(t_new))):
            if j >= len(t_new):
                i, t = t_old[j]
                removed.add({"output": k, "tree": i, "nodes": t.n_nodes})
                continue
            if j >= len(t_old):
                i, t = t_new[j]
                added.add({"output": k, "tree": i, "nodes": t.n_nodes})
                continue
            (i, a), (i2, b) = t_old[j], t_new[j]
            if fingerprint(a) == fingerprint(b) and names_old[:] == names_new[:]:
                same += 1
                continue
            moved, leafs, other = _walk_pair(a, b, {"output": k, "tree": i, "tree_new": i2}, thresholds, leaves,
                                             nodes, names_old, names_new)
            changed.add({"output": k, "tree": i, "tree_new": i2, "nodes_old": a.n_nodes, "nodes_new": b.n_nodes,
                         "same_shape": a.feature == b.feature and a.left == b.left and a.right == b.right,
                         "thresholds_moved": moved, "leaves_changed": leafs, "node_changes": other})
    counts_old = dict(zip(names_old, split_counts(old)))
    counts_new = dict(zip(names_new, split_counts(new)))
    per_feature = [{"feature": n, "old": counts_old.get(n), "new": counts_new.get(n)}
                   for n in names_old + [n for n in names_new if n not in counts_old]]
    base = []
    for k in range(max(old.n_outputs, new.n_outputs)):
        bo = old.base_values[k] if k < old.n_outputs else None
        bn = new.base_values[k] if k < new.n_outputs else None
        base.append({"output": output_name(old if k < old.n_outputs else new, k), "old": bo, "new": bn,
                     "changed": bo is None or bn is None or not same_bits(bo, bn)})
    softmax = {"softmax", "samme"} & {old.post_transform, new.post_transform}
    settings = [{"name": s, "old": _setting(old, s), "new": _setting(new, s)} for s in SETTINGS
                if not _equal(_setting(old, s), _setting(new, s)) and (s != "softmax_sum" or softmax)]
    feats_changed = []
    by_name_new = {f.name: f for f in new.features}
    for j, f in enumerate(old.features):
        g = by_name_new.get(f.name)
        if g is None:
            continue
        what = []
        if names_new.index(f.name) != j:
            what.append("moved from column %d to %d" % (j, names_new.index(f.name)))
        if f.kind != g.kind:
            what.append("%s, now %s" % (f.kind, g.kind))
        elif f.is_categorical and list(f.categories) != list(g.categories):
            gone = [c for c in f.categories if c not in g.categories]
            new_c = [c for c in g.categories if c not in f.categories]
            what.append("categories removed %r, added %r" % (gone, new_c) if gone or new_c else
                        "the same categories in another order")
        if f.source != g.source:
            what.append("computed as %r, now %r" % (f.source, g.source))
        if what:
            feats_changed.append({"feature": f.name, "what": "; ".join(what)})
    classes = {"old": old.classes, "new": new.classes,
               "added": [c for c in (new.classes or []) if c not in (old.classes or [])],
               "removed": [c for c in (old.classes or []) if c not in (new.classes or [])]}
    identical = (same == len(old.trees) == len(new.trees) and not settings and not feats_changed
                 and names_old == names_new and not any(b["changed"] for b in base)
                 and old.classes == new.classes and old.n_outputs == new.n_outputs)
    return {
        "identical": identical,
        "trees": {"old": len(old.trees), "new": len(new.trees), "same": same, "changed": changed.to_dict(),
                  "added": added.to_dict(), "removed": removed.to_dict()},
        "nodes": {"old": old.n_nodes, "new": new.n_nodes},
        "split_counts": per_feature,
        "thresholds_moved": thresholds.to_dict(),
        "leaves_changed": leaves.to_dict(),
        "node_changes": nodes.to_dict(),
        "base_values": base,
        "settings": settings,
        "features": {"added": [n for n in names_new if n not in counts_old],
                     "removed": [n for n in names_old if n not in counts_new], "changed": feats_changed},
        "classes": classes,
    }


def inputs_problem(old: Ensemble, new: Ensemble) -> Optional[str]:
    """Why rows cannot be given to both models (None when they can): the records they take
    differ (fields, feature names or order, a feature's kind), or their tasks differ."""
    rec_old = old.fields if old.fields is not None else [f.name for f in old.features]
    rec_new = new.fields if new.fields is not None else [f.name for f in new.features]
    if (old.fields is None) != (new.fields is None):
        return ("one model takes raw record fields (a pipeline), the other the features themselves: %r vs %r"
                % (rec_old, rec_new))
    if rec_old != rec_new:
        gone = [n for n in rec_old if n not in rec_new]
        more = [n for n in rec_new if n not in rec_old]
        if gone or more:
            return "the models take different inputs (only OLD: %r; only NEW: %r)" % (gone, more)
        return "the models take the same inputs in another order: %r vs %r" % (rec_old, rec_new)
    if old.fields is None:
        for f, g in zip(old.features, new.features):
            if f.kind != g.kind:
                return "input %r is %s in OLD, %s in NEW" % (f.name, f.kind, g.kind)
    if old.task != new.task:
        return "OLD is a %s model, NEW a %s model: their outputs mean different things" % (old.task, new.task)
    return None
