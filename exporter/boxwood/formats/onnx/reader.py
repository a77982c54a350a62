"""Read an ONNX graph whose core is a tree-ensemble operator into the hub.

Accepted graphs (docs/onnx.md, "Reading ONNX files"): one graph input ``[N, F]`` of
float or double; exactly one ai.onnx.ml tree operator -- ``TreeEnsemble`` (opset 5),
``TreeEnsembleRegressor`` or ``TreeEnsembleClassifier`` (opsets 1 and 3); between
the input and the operator only ``Cast``, ``Identity``, an ``Add`` of a constant
(category-code offsets) and boxwood's "unknown code becomes NaN" ``Where`` step; after
it only the output-shaping and post-transform ops listed in ``OUTPUT_OPS``. Anything
else is refused with an error that names the node.

What the graph says, the reader takes from the graph: the trees (every node mode is
mapped onto the hub's ``x <= t`` rule exactly), the precision the trees compare in
(float32 when the values reaching the trees are float32), base values, the
post-transform (the operator's ``post_transform`` attribute or the ``Sigmoid`` /
``Softmax`` / ``Exp`` ops after it), class labels and the binary decision rule. What
it cannot say (feature names, category lists, missing-value policy, provenance and
the source model's reference rows) comes from boxwood's metadata when present, and is
cross-checked against the graph.

Tree node numbering in the hub is canonical: depth first, the branch taken when
``x <= t`` first. scikit-learn numbers its trees that way, so boxwood's own files
read back to the very same trees (tests/test_onnx.py checks JSON -> ONNX -> hub ->
JSON).

Loading and graph walking are in :mod:`.parse`; the evaluators that run a file are in
:mod:`.evaluators`.
"""
from __future__ import annotations

import math
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from ...ir import LEAF, Ensemble, Feature, ModelError, Tree
from .guards import as_text, check_flags, check_input_mask, check_reached, claimed_targets, meta_list, meta_reference
from .parse import (MAX_FEATURES, MAX_TARGETS, ML_DOMAIN, OUTPUT_OPS, TREE_OPS, Graph, InputPath, OnnxReadError,
                    load, metadata, node_label, onnx_module, target_steps_of)


# ----------------------------------------------------------------------------- the tree operator
class _GenericTree:
    """One tree in neutral form: node id -> leaf weights {target: value} or a split."""

    def __init__(self, root: Any):
        self.root = root
        self.splits: Dict[Any, Tuple[str, int, Any, Any, Any, bool]] = {}  # mode, feature, value, true, false, nan_true
        self.leaves: Dict[Any, Dict[int, float]] = {}


def _tensor_or_list(attrs: Dict[str, Any], name: str) -> Optional[np.ndarray]:
    onnx = onnx_module()
    if name + "_as_tensor" in attrs:
        return np.asarray(onnx.numpy_helper.to_array(attrs[name + "_as_tensor"]), dtype=np.float64).ravel()
    if name in attrs:
        v = attrs[name]
        if isinstance(v, onnx.TensorProto):
            return np.asarray(onnx.numpy_helper.to_array(v), dtype=np.float64).ravel()
        return np.asarray(list(v), dtype=np.float64)
    return None


_V5_MODES = {0: "BRANCH_LEQ", 1: "BRANCH_LT", 2: "BRANCH_GTE", 3: "BRANCH_GT", 4: "BRANCH_EQ", 5: "BRANCH_NEQ",
             6: "BRANCH_MEMBER"}


def _trees_v5(node: Any, a: Dict[str, Any]) -> Tuple[List[_GenericTree], int]:
    where = node_label(node)
    need = ("nodes_featureids", "nodes_modes", "nodes_truenodeids", "nodes_falsenodeids", "nodes_trueleafs",
            "nodes_falseleafs", "leaf_targetids", "leaf_weights", "tree_roots", "n_targets")
    missing = [k for k in need if k not in a]
    if missing:
        raise OnnxReadError("%s lacks the attributes %s" % (where, ", ".join(missing)))
    feats = list(a["nodes_featureids"])
    modes = [int(m) for m in _tensor_or_list(a, "nodes_modes")]
    splits = _tensor_or_list(a, "nodes_splits")
    if splits is None:
        splits = np.zeros(len(feats))
    tids, fids = list(a["nodes_truenodeids"]), list(a["nodes_falsenodeids"])
    tleaf, fleaf = list(a["nodes_trueleafs"]), list(a["nodes_falseleafs"])
    miss = list(a.get("nodes_missing_value_tracks_true", [0] * len(feats)))
    weights = _tensor_or_list(a, "leaf_weights")
    targets = list(a["leaf_targetids"])
    n = len(feats)
    if not all(len(x) == n for x in (modes, splits, tids, fids, tleaf, fleaf, miss)) or len(weights) != len(targets):
        raise OnnxReadError("%s: its node or leaf attributes have unequal lengths" % where)
    check_flags(where, "nodes_missing_value_tracks_true", miss)
    check_flags(where, "nodes_trueleafs", tleaf)
    check_flags(where, "nodes_falseleafs", fleaf)
    n_targets = claimed_targets(where, a, len(set(int(t) for t in targets)), 0)
    members = _tensor_or_list(a, "membership_values")
    sets: Dict[int, List[float]] = {}
    if any(m == 6 for m in modes):
        if members is None:
            raise OnnxReadError("%s has BRANCH_MEMBER nodes but no membership_values" % where)
        groups, current = [], []
        for v in members:
            if math.isnan(v):
                groups.append(current)
                current = []
            else:
                current.append(float(v))
        if current:
            groups.append(current)
        member_nodes = [i for i, m in enumerate(modes) if m == 6]
        if len(groups) != len(member_nodes):
            raise OnnxReadError("%s: %d membership sets for %d BRANCH_MEMBER nodes"
                                % (where, len(groups), len(member_nodes)))
        sets = dict(zip(member_nodes, groups))
    trees = []
    reached: set = set()
    for root in a["tree_roots"]:
        if not 0 <= root < n:
            raise OnnxReadError("%s: tree root %d out of range" % (where, root))
        g = _GenericTree(("n", root))
        if tleaf[root] and fleaf[root] and tids[root] == fids[root]:  # a tree that is one leaf
            g.root = ("l", tids[root])
            reached.add(("n", root))
        stack = [g.root]
        seen = set()
        while stack:
            key = stack.pop()
            if key in seen:
                raise OnnxReadError("%s: tree rooted at node %d reaches %s %d twice (not a tree)"
                                    % (where, root, "leaf" if key[0] == "l" else "node", key[1]))
            seen.add(key)
            kind, i = key
            if kind == "l":
                if not 0 <= i < len(weights):
                    raise OnnxReadError("%s: leaf %d out of range" % (where, i))
                g.leaves[key] = {int(targets[i]): float(weights[i])}
                continue
            if not 0 <= i < n:
                raise OnnxReadError("%s: node %d out of range" % (where, i))
            mode = _V5_MODES.get(modes[i])
            if mode is None:
                raise OnnxReadError("%s: node %d has the unknown mode %d" % (where, i, modes[i]))
            value = sets.get(i) if mode == "BRANCH_MEMBER" else float(splits[i])
            t = ("l" if tleaf[i] else "n", tids[i])
            f = ("l" if fleaf[i] else "n", fids[i])
            g.splits[key] = (mode, int(feats[i]), value, t, f, bool(miss[i]))
            stack.extend((f, t))
        trees.append(g)
        reached |= seen
    check_reached(where, [("n", i) for i in range(n)] + [("l", i) for i in range(len(weights))], reached)
    return trees, n_targets


def _trees_v3(node: Any, a: Dict[str, Any]) -> Tuple[List[_GenericTree], int, List[float]]:
    where = node_label(node)
    classifier = node.op_type == "TreeEnsembleClassifier"
    pre = "class" if classifier else "target"
    need = ("nodes_treeids", "nodes_nodeids", "nodes_featureids", "nodes_modes", "nodes_truenodeids",
            "nodes_falsenodeids", pre + "_treeids", pre + "_nodeids", pre + "_ids")
    missing = [k for k in need if k not in a]
    if missing:
        raise OnnxReadError("%s lacks the attributes %s" % (where, ", ".join(missing)))
    tree_ids, node_ids = list(a["nodes_treeids"]), list(a["nodes_nodeids"])
    feats = list(a["nodes_featureids"])
    modes = [as_text(m, where, "nodes_modes") for m in a["nodes_modes"]]
    values = _tensor_or_list(a, "nodes_values")
    if values is None:
        values = np.zeros(len(feats))
    tids, fids = list(a["nodes_truenodeids"]), list(a["nodes_falsenodeids"])
    miss = list(a.get("nodes_missing_value_tracks_true", [0] * len(feats)))
    n = len(tree_ids)
    if not all(len(x) == n for x in (node_ids, feats, modes, values, tids, fids, miss)):
        raise OnnxReadError("%s: its node attributes have unequal lengths" % where)
    check_flags(where, "nodes_missing_value_tracks_true", miss)
    index = {}
    order: List[int] = []
    for i, (t, nid) in enumerate(zip(tree_ids, node_ids)):
        if (t, nid) in index:
            raise OnnxReadError("%s: tree %d lists node %d twice" % (where, t, nid))
        index[(t, nid)] = i
        if t not in order:
            order.append(t)
    w = _tensor_or_list(a, pre + "_weights")
    w_tree, w_node, w_id = list(a[pre + "_treeids"]), list(a[pre + "_nodeids"]), list(a[pre + "_ids"])
    if w is None or not len(w) == len(w_tree) == len(w_node) == len(w_id):
        raise OnnxReadError("%s: its %s_* attributes have unequal lengths" % (where, pre))
    leaf_weights: Dict[Tuple[int, int], Dict[int, float]] = {}
    for t, nid, k, v in zip(w_tree, w_node, w_id, w):
        entry = leaf_weights.setdefault((t, nid), {})
        if int(k) in entry:
            raise OnnxReadError("%s: leaf %d of tree %d has two weights for target %d" % (where, nid, t, k))
        entry[int(k)] = float(v)
    trees = []
    reached: set = set()
    for t in order:
        root = min(i for i, tt in enumerate(tree_ids) if tt == t)
        g = _GenericTree(("n", node_ids[root]))
        stack, seen = [node_ids[root]], set()
        while stack:
            nid = stack.pop()
            if nid in seen:
                raise OnnxReadError("%s: tree %d reaches node %d twice (not a tree)" % (where, t, nid))
            seen.add(nid)
            i = index.get((t, nid))
            if i is None:
                raise OnnxReadError("%s: tree %d refers to node %d, which it does not list" % (where, t, nid))
            if modes[i] == "LEAF":
                g.leaves[("n", nid)] = leaf_weights.get((t, nid), {})
                continue
            if modes[i] not in _V5_MODES.values():
                raise OnnxReadError("%s: tree %d node %d has the unknown mode %r" % (where, t, nid, modes[i]))
            g.splits[("n", nid)] = (modes[i], int(feats[i]), float(values[i]), ("n", tids[i]), ("n", fids[i]),
                                    bool(miss[i]))
            stack.extend((fids[i], tids[i]))
        trees.append(g)
        reached.update((t, nid) for nid in seen)
    check_reached(where, list(index), reached)
    for key in leaf_weights:  # a weight on a split, or on a node no tree lists, would be dropped
        i = index.get(key)
        if i is None or modes[i] != "LEAF":
            raise OnnxReadError("%s: %s weights name tree %d node %d, which is not one of its leaves"
                                % (where, pre, key[0], key[1]))
    base = _tensor_or_list(a, "base_values")
    if classifier:
        labels = a.get("classlabels_int64s") or a.get("classlabels_strings")
        n_targets = len(labels) if labels else 0
        if n_targets > MAX_TARGETS:
            raise OnnxReadError("%s lists %d class labels, more than %d" % (where, n_targets, MAX_TARGETS))
        used = {k for d in leaf_weights.values() for k in d}
        if labels is not None and len(labels) == 2 and used <= {0, 1} and len(used) <= 1:
            n_targets = 1
    else:
        n_targets = claimed_targets(where, a, len(set(int(k) for k in w_id)), len(base) if base is not None else 0)
    return trees, n_targets, [float(b) for b in base] if base is not None else []


# ----------------------------------------------------------------------------- into the hub
def _before(t: float) -> float:
    return float(np.nextafter(t, -np.inf))


def _to_ir_trees(generic: List[_GenericTree], n_targets: int, path: InputPath, where: str,
                 n_features: int) -> Tuple[List[Tree], Dict[int, int]]:
    """Neutral trees -> hub trees (one per target a tree feeds), and the largest category
    code seen per categorical feature."""
    kinds: Dict[int, str] = {}
    max_code: Dict[int, int] = {}
    out: List[Tree] = []

    def mark(feature: int, kind: str, key: Any) -> None:
        if not 0 <= feature < n_features:
            raise OnnxReadError("%s: node %s splits on feature %d, but the input has %d columns"
                                % (where, key[1], feature, n_features))
        if kinds.setdefault(feature, kind) != kind:
            raise OnnxReadError("%s: feature %d is split both by value and by category (node %s)"
                                % (where, feature, key[1]))

    def codes_of(values: Sequence[float], feature: int, key: Any) -> Tuple[int, ...]:
        offset = path.offset(feature)
        codes = set()
        for v in values:
            c = v - offset
            if c < 0 and offset > 0:
                continue  # below every shifted code: matches no input (boxwood's empty-set marker)
            if c != int(c) or c < 0:
                raise OnnxReadError("%s: node %s tests category value %r, which is not a code 0, 1, 2, ..."
                                    % (where, key[1], v))
            codes.add(int(c))
        if codes:
            max_code[feature] = max(max_code.get(feature, -1), max(codes))
        return tuple(sorted(codes))

    for g in generic:
        feature, threshold, left, right, missing, leaf_of, cats = [], [], [], [], [], [], []
        index: Dict[Any, int] = {}
        stack = [g.root]
        while stack:  # depth first, the "x <= t" branch first
            key = stack.pop()
            index[key] = len(feature)
            if key in g.leaves:
                feature.append(LEAF)
                threshold.append(0.0)
                left.append(LEAF)
                right.append(LEAF)
                missing.append(False)
                leaf_of.append(key)
                cats.append(None)
                continue
            mode, f, value, t, fa, nan_true = g.splits[key]
            if mode in ("BRANCH_LEQ", "BRANCH_LT", "BRANCH_GTE", "BRANCH_GT"):
                mark(f, "numeric", key)
                if mode in ("BRANCH_LT", "BRANCH_GTE"):
                    if value == -math.inf:
                        raise OnnxReadError("%s: node %s compares with %s -inf, which boxwood cannot state as "
                                            "x <= t" % (where, key[1], mode))
                    value = _before(value)
                if math.isnan(value):
                    raise OnnxReadError("%s: node %s has a NaN threshold" % (where, key[1]))
                first, second, nan_left = (t, fa, nan_true) if mode in ("BRANCH_LEQ", "BRANCH_LT") \
                    else (fa, t, not nan_true)
                threshold.append(float(value))
                cats.append(None)
            else:
                mark(f, "categorical", key)
                members = value if mode == "BRANCH_MEMBER" else [value]
                first, second, nan_left = (t, fa, nan_true) if mode != "BRANCH_NEQ" else (fa, t, not nan_true)
                threshold.append(0.0)
                cats.append(codes_of(members, f, key))
            feature.append(f)
            missing.append(bool(nan_left))
            leaf_of.append(None)
            left.append((first,))
            right.append((second,))
            stack.append(second)
            stack.append(first)
        left = [index[c[0]] if isinstance(c, tuple) else c for c in left]
        right = [index[c[0]] if isinstance(c, tuple) else c for c in right]
        used = sorted({k for key in leaf_of if key is not None for k in g.leaves[key]})
        for k in used or [0]:
            if not 0 <= k < n_targets:
                raise OnnxReadError("%s: a leaf adds to target %d, but there are %d targets" % (where, k, n_targets))
            value = [g.leaves[key].get(k, 0.0) if key is not None else 0.0 for key in leaf_of]
            out.append(Tree(k, list(feature), list(threshold), list(left), list(right), list(missing), value,
                            list(cats)))
    return out, {f: max_code.get(f, 0) for f, kind in kinds.items() if kind == "categorical"}


def classes_from(values: Any) -> List[Any]:
    out = []
    for v in np.asarray(values).ravel():
        if isinstance(v, bytes):
            v = as_text(v, "the class labels", "a label")
        elif hasattr(v, "item"):
            v = v.item()
        out.append(v)
    return out


def outputs_of(graph: Graph, tree: Any, attrs: Dict[str, Any]) -> Dict[str, Any]:
    """Post-transform, task, classes, binary rule and raw-score adjustments after the tree."""
    where = node_label(tree)
    info: Dict[str, Any] = {"post": None, "classes": None, "binary_rule": None, "divide": None, "add": None}
    tree_post = attrs.get("post_transform", "NONE" if tree.op_type != "TreeEnsemble" else 0)
    if isinstance(tree_post, bytes):
        tree_post = as_text(tree_post, where, "post_transform")
    tree_post = {0: "NONE", 1: "SOFTMAX", 2: "LOGISTIC", 3: "SOFTMAX_ZERO", 4: "PROBIT"}.get(tree_post, tree_post)
    if tree_post not in ("NONE", "LOGISTIC", "SOFTMAX"):
        raise OnnxReadError("%s applies post_transform %s, which boxwood does not support" % (where, tree_post))
    if tree.op_type == "TreeEnsemble" and attrs.get("aggregate_function", 1) != 1:
        raise OnnxReadError("%s aggregates with function %r; boxwood reads SUM" % (where, attrs["aggregate_function"]))
    if tree.op_type != "TreeEnsemble":
        agg = attrs.get("aggregate_function", b"SUM")
        agg = as_text(agg, where, "aggregate_function") if isinstance(agg, bytes) else agg
        if agg not in ("SUM", "AVERAGE"):
            raise OnnxReadError("%s aggregates with %s; boxwood reads SUM and AVERAGE" % (where, agg))
        info["average"] = agg == "AVERAGE"
    down = graph.downstream(list(tree.output))
    for n in down:
        if n.op_type not in OUTPUT_OPS or n.domain not in ("", "ai.onnx", ML_DOMAIN) or \
                (n.domain == ML_DOMAIN and n.op_type != "ZipMap"):
            raise OnnxReadError("%s after the tree operator is not supported (allowed there: %s)"
                                % (node_label(n), ", ".join(OUTPUT_OPS)))
    # raw = tree output, then (ours, combine "mean") Div by constant tree counts, then Add base
    raw = tree.output[0] if tree.op_type != "TreeEnsembleClassifier" else None
    # (a tree output that is itself a graph output is the raw score: boxwood's samme and
    # isolation graphs divide it afterwards, which is not a mean of trees)
    if raw is not None and tree_post == "NONE" and raw not in graph.outputs:
        for step in ("Div", "Add"):
            users = graph.consumers.get(raw, [])
            arith = [u for u in users if u.op_type == step]
            if len(arith) == 1 and len(users) == 1:
                u = arith[0]
                other = u.input[1] if u.input[0] == raw else u.input[0]
                c = graph.const(other)
                if c is None or (step == "Div" and u.input[0] != raw):
                    raise OnnxReadError("%s must %s a constant" % (node_label(u), step.lower()))
                info["divide" if step == "Div" else "add"] = np.asarray(c, dtype=np.float64).ravel()
                raw = u.output[0]
    info["raw"] = raw
    steps, step_nodes = target_steps_of(graph, raw) if raw is not None else ([], set())
    info["target_steps"] = steps
    transforms = {"Exp": "exp", "Sigmoid": "logistic", "Softmax": "softmax"}
    found = set()
    for n in down:
        if n.op_type in transforms and id(n) not in step_nodes:
            kind = transforms[n.op_type]
            src = graph.producer.get(n.input[0])
            if kind == "exp" and src is not None and src.op_type == "Neg":
                # 1 / (1 + Exp(Neg(x))): the logistic written out (boxwood's exact graphs)
                kind = "logistic"
                src = graph.producer.get(src.input[0])
            if kind == "logistic" and src is not None and src.op_type == "Mul":
                factors = [graph.const(i) for i in src.input if graph.const(i) is not None]
                if len(factors) == 1 and np.asarray(factors[0]).size == 1 and float(np.asarray(factors[0]).ravel()[0]) == 2.0:
                    kind = "logistic_double"
                else:
                    raise OnnxReadError("%s scales the raw score before the logistic by something other than 2"
                                        % node_label(src))
            found.add(kind)
    if tree_post != "NONE":
        if found:
            raise OnnxReadError("%s applies %s and the graph applies %s after it; boxwood reads one post-transform"
                                % (where, tree_post, ", ".join(sorted(found))))
        found.add({"LOGISTIC": "logistic", "SOFTMAX": "softmax"}[tree_post])
    special = _special_transform(graph, raw, down) if raw is not None else None
    if special is not None and tree_post != "NONE":  # the operator's own transform, then more after it
        raise OnnxReadError("%s applies post_transform %s and the graph then applies %s's arithmetic; boxwood "
                            "reads one post-transform" % (where, tree_post, special[0]))
    if special is not None:
        kind, params = special
        if kind == "samme":
            found.discard("softmax")  # the probabilities' softmax belongs to samme
        if found:
            raise OnnxReadError("the graph applies %s and %s after %s; boxwood reads one post-transform"
                                % (kind, ", ".join(sorted(found)), where))
        found.add(kind)
        info["params"] = params
    if len(found) > 1:
        raise OnnxReadError("the graph applies several post-transforms (%s) after %s" % (", ".join(sorted(found)), where))
    info["post"] = found.pop() if found else "identity"
    # classes and the binary rule
    if tree.op_type == "TreeEnsembleClassifier":
        labels = attrs.get("classlabels_int64s") or attrs.get("classlabels_strings")
        if not labels:
            raise OnnxReadError("%s lists no class labels" % where)
        info["classes"] = classes_from(labels)
        info["binary_rule"] = "raw_gt_0"
    else:
        for n in down:
            if n.op_type == "Gather" and graph.const(n.input[0]) is not None and n.output[0] in graph.outputs:
                info["classes"] = classes_from(graph.const(n.input[0]))
            if n.op_type in ("Greater", "GreaterOrEqual") and raw in n.input:
                c = graph.const(n.input[1])
                if c is None or np.asarray(c).size != 1 or float(np.asarray(c).ravel()[0]) != 0.0:
                    raise OnnxReadError("%s must compare the raw score with the constant 0" % node_label(n))
                info["binary_rule"] = "raw_gt_0" if n.op_type == "Greater" else "raw_ge_0"
    return info


def _scalar(graph: Graph, node: Any, other_than: str) -> Optional[float]:
    """The scalar constant among ``node``'s inputs other than ``other_than``, or None."""
    for name in node.input:
        c = graph.const(name)
        if name != other_than and c is not None and np.asarray(c).size == 1:
            return float(np.asarray(c, dtype=np.float64).ravel()[0])
    return None


def _special_transform(graph: Graph, raw: str, down: List[Any]) -> Optional[Tuple[str, Dict[str, float]]]:
    """boxwood's isolation-forest and AdaBoost post-processing (docs/onnx.md):

    * isolation: ``Pow(2, Neg(Div(raw, denominator)))``, ``Neg``, ``Sub(score, offset)``;
    * samme: ``Div(raw, weight_total)`` feeding the decision, the probabilities' ``Softmax``.

    Returns (post_transform, parameters) or None when the graph does neither."""
    divs = [n for n in graph.consumers.get(raw, []) if n.op_type == "Div" and n.input[0] == raw]
    pows = [n for n in down if n.op_type == "Pow"]
    if pows:
        if len(divs) != 1 or len(pows) != 1:
            raise OnnxReadError("%s: boxwood reads a power after the trees only as an isolation forest's "
                                "score -(2 ** -(raw / denominator))" % node_label(pows[0]))
        power = pows[0]
        den = _scalar(graph, divs[0], raw)
        base = graph.const(power.input[0])
        subs = [n for n in down if n.op_type == "Sub"]
        offset = _scalar(graph, subs[0], subs[0].input[0]) if len(subs) == 1 else None
        if den is None or base is None or float(np.asarray(base).ravel()[0]) != 2.0 or offset is None:
            raise OnnxReadError("%s: an isolation forest's score needs Pow(2, -(raw / constant)) and one Sub of a "
                                "constant offset" % node_label(power))
        return "isolation", {"denominator": den, "offset": offset}
    if len(divs) == 1 and raw in graph.outputs and any(n.op_type == "Softmax" for n in down):
        total = _scalar(graph, divs[0], raw)
        if total is None:
            raise OnnxReadError("%s must divide the vote sums by a constant total weight" % node_label(divs[0]))
        return "samme", {"weight_total": total}
    return None


# What the reader's own checks may have missed: still an OnnxReadError (a FormatError), never a
# traceback. Its message starts with UNEXPECTED_CONTENT, which the fuzz campaign counts apart.
UNEXPECTED_CONTENT = "the ONNX file holds content the reader does not expect"
_UNEXPECTED = (TypeError, KeyError, IndexError, AttributeError, OverflowError, ZeroDivisionError, RecursionError,
               MemoryError, ValueError)


def read_onnx(source: Any) -> Ensemble:
    """Read an ONNX tree-ensemble graph (path, bytes or ModelProto) into an Ensemble. Every bad
    input ends in OnnxReadError with a one-line reason (docs/hardening.md, "ONNX files")."""
    try:
        return _read_onnx(source)
    except OnnxReadError:
        raise
    except _UNEXPECTED as exc:
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        raise OnnxReadError("%s: %s (%s)" % (UNEXPECTED_CONTENT, type(exc).__name__, text[:200]))


def _read_onnx(source: Any) -> Ensemble:
    model = load(source)
    graph = Graph(model)
    trees = [n for n in graph.nodes if n.op_type in TREE_OPS and n.domain == ML_DOMAIN]
    if not trees:
        ops = ", ".join(node_label(n) for n in graph.nodes[:12]) + (", ..." if len(graph.nodes) > 12 else "")
        raise OnnxReadError("the graph has no tree-ensemble operator (ai.onnx.ml %s); its nodes: %s"
                            % (", ".join(TREE_OPS), ops))
    if len(trees) > 1:
        raise OnnxReadError("the graph has %d tree-ensemble operators (%s); boxwood reads graphs with one"
                            % (len(trees), ", ".join(node_label(n) for n in trees)))
    tree = trees[0]
    where = node_label(tree)
    path = InputPath(graph, tree)
    related = set(id(n) for n in graph.upstream(list(tree.input))) | set(id(n) for n in graph.downstream(list(tree.output)))
    related.add(id(tree))
    for n in graph.nodes:
        if id(n) not in related and not (n.op_type == "Constant" and n.domain in ("", "ai.onnx")):
            raise OnnxReadError("%s is not connected to the tree operator; boxwood reads graphs that only "
                                "prepare the input, run the trees and shape the outputs" % node_label(n))
    attrs = graph.attrs(tree)
    meta = metadata(model)
    semantics = meta.get("boxwood.semantics") if isinstance(meta.get("boxwood.semantics"), dict) else {}
    names = meta_list(meta, "boxwood.feature_names", (str,))
    if tree.op_type == "TreeEnsemble":
        generic, n_targets = _trees_v5(tree, attrs)
        op_base: List[float] = []
    else:
        generic, n_targets, op_base = _trees_v3(tree, attrs)
    n_features = path.n_features or (len(names) if isinstance(names, list) else None)
    if n_features is None:
        n_features = 1 + max([s[1] for g in generic for s in g.splits.values()] or [0])
    if not 0 < n_features <= MAX_FEATURES:  # before any list of that size is made
        raise OnnxReadError("the graph input has %d features; boxwood reads 1 to %d" % (n_features, MAX_FEATURES))
    info = outputs_of(graph, tree, attrs)
    ir_trees, max_code = _to_ir_trees(generic, max(n_targets, 1), path, where, n_features)

    # base values: the operator's, boxwood's leading single-leaf trees, an Add after the trees
    k = max(n_targets, 1)
    base = list(op_base) if op_base else [0.0] * k
    if len(base) != k:
        raise OnnxReadError("%s has %d base values for %d targets" % (where, len(base), k))
    leading = semantics.get("leading_base_trees", 0) or 0
    if not isinstance(leading, int) or isinstance(leading, bool) or leading < 0:
        raise OnnxReadError("metadata boxwood.semantics.leading_base_trees must be a count, not %r" % (leading,))
    if leading:
        if leading != k or len(ir_trees) < k:
            raise OnnxReadError("metadata boxwood.semantics says %d leading base-value trees; the graph has %d targets"
                                % (leading, k))
        for j in range(k):
            t = ir_trees[j]
            if t.n_nodes != 1 or t.output != j:
                raise OnnxReadError("%s: tree %d should hold the base value of output %d (boxwood metadata) but "
                                    "is not a single leaf for that output" % (where, j, j))
            base[j] = t.value[0]
        ir_trees = ir_trees[k:]
    combine = "sum"
    if info["divide"] is not None or info.get("average"):
        combine = "mean"
        counts = [sum(1 for t in ir_trees if t.output == j) for j in range(k)]
        if info["divide"] is not None:
            want = np.asarray([max(c, 1) for c in counts], dtype=np.float64)
            got = np.broadcast_to(info["divide"], want.shape) if info["divide"].size in (1, k) else None
            if got is None or not np.array_equal(got, want):
                raise OnnxReadError("the graph divides the tree sum by %r, not by the number of trees per output %r"
                                    % (info["divide"].tolist(), want.tolist()))
        elif any(c != len(generic) for c in counts):
            # AVERAGE divides every target's sum by the number of trees of the operator
            raise OnnxReadError("%s averages over all its trees, but not every tree adds to every target; "
                                "boxwood cannot state that as a mean per output" % where)
    if info["add"] is not None:
        add = np.broadcast_to(info["add"], (k,)) if info["add"].size in (1, k) else None
        if add is None:
            raise OnnxReadError("the base values added after %s do not match its %d targets" % (where, k))
        base = [float(b + a) for b, a in zip(base, add)]

    steps = info.get("target_steps") or []
    for st in steps:  # a constant given once for all outputs applies to each
        if "values" in st and len(st["values"]) == 1 and k > 1:
            st["values"] = st["values"] * k
    if semantics and semantics.get("target_steps", []) != steps and (steps or semantics.get("target_steps")):
        raise OnnxReadError("metadata boxwood.semantics says target_steps=%r but the graph does %r"
                            % (semantics.get("target_steps"), steps))

    # task, classes and the binary rule
    classes = info["classes"]
    task = "classification" if classes is not None else "regression"
    if info["post"] == "isolation":
        task = "outlier_detection"
        if classes != [-1, 1]:
            raise OnnxReadError("%s: an isolation forest graph labels rows -1 / 1, not %r" % (where, classes))
    binary_rule = None
    post = info["post"]
    if task == "classification" and k == 1:
        binary_rule = info["binary_rule"] or "raw_gt_0"
        if post == "identity":
            raise OnnxReadError("%s: a binary classifier with one raw score needs a logistic post-transform" % where)
    if semantics:
        for key, value in (("task", task), ("post_transform", post), ("binary_rule", binary_rule),
                           ("combine", combine)):
            stated = semantics.get(key)
            if stated is not None and stated != value:
                raise OnnxReadError("metadata boxwood.semantics says %s=%r but the graph does %r"
                                    % (key, stated, value))
        if semantics.get("classes") is not None and classes is not None and semantics["classes"] != classes:
            raise OnnxReadError("metadata boxwood.semantics lists classes %r but the graph's labels are %r"
                                % (semantics["classes"], classes))
        if semantics.get("classes") is not None:
            classes = semantics["classes"]  # keeps label types JSON can tell apart (e.g. 1 vs 1.0)

    # features
    if not isinstance(names, list) or len(names) != n_features:
        names = ["x%d" % i for i in range(n_features)]
    categories_meta = meta.get("boxwood.categories") if isinstance(meta.get("boxwood.categories"), dict) else {}
    features = []
    for i, name in enumerate(names):
        if i in max_code:
            cats = categories_meta.get(name)
            if isinstance(cats, list) and not all(isinstance(c, (str, int, float)) and not isinstance(c, bool)
                                                  for c in cats):
                raise OnnxReadError("metadata boxwood.categories[%r] must list numbers or strings" % name)
            if not isinstance(cats, list) or len(cats) <= max_code[i]:
                cats = list(range(max_code[i] + 1))
            features.append(Feature(str(name), "categorical", list(cats)))
        else:
            features.append(Feature(str(name)))

    compare = "float32" if path.float32 else "float64"
    exact_source = (semantics.get("variant") == "exact" and semantics.get("input_type") == "float64"
                    and semantics.get("compare_precision") == compare)
    provenance = meta.get("boxwood.provenance") if isinstance(meta.get("boxwood.provenance"), dict) else {}
    provenance = dict(provenance)
    estimator = provenance.get("estimator", meta.get("boxwood.source_estimator"))
    if estimator is not None and not isinstance(estimator, str):
        raise OnnxReadError("metadata boxwood.provenance.estimator must be text, not %s" % type(estimator).__name__)
    provenance["estimator"] = estimator or "onnx:%s" % tree.op_type
    pre = meta.get("boxwood.preprocessing")
    if isinstance(pre, dict) and pre.get("in_graph") is False:
        # a pipeline's tree part: the graph takes the preprocessed features; the ensemble read
        # here has no raw fields and no feature sources (they are not in the graph)
        provenance["preprocessing"] = ("not in the graph: its input is the preprocessed feature vector; "
                                       "metadata boxwood.preprocessing lists each feature's field and steps")
    provenance["onnx"] = {"producer": "%s %s" % (model.producer_name, model.producer_version),
                          "tree_operator": tree.op_type,
                          "opsets": {o.domain or "ai.onnx": o.version for o in model.opset_import}}
    output_names = semantics.get("output_names") if isinstance(semantics.get("output_names"), list) else None
    if not output_names or len(output_names) != k:
        output_names = ([str(c) for c in classes] if classes is not None and k == len(classes)
                        else [str(classes[1])] if classes is not None else
                        ["prediction"] if k == 1 else ["output_%d" % j for j in range(k)])
    missing_values = semantics.get("missing_values", "route") if exact_source else "route"
    ensemble = Ensemble(
        task=task,
        features=features,
        trees=ir_trees,
        base_values=[float(b) for b in base],
        post_transform=post,
        combine=combine,
        compare_precision=compare,
        missing_values=missing_values if missing_values in ("route", "reject") else "route",
        classes=classes,
        binary_rule=binary_rule,
        output_names=[str(o) for o in output_names],
        accepts_infinity=bool(semantics.get("accepts_infinity", True)) if exact_source else True,
        post_transform_params=dict(info.get("params") or {}),
        # how the source adds a softmax's exponentials (boxwood's metadata; a graph made
        # elsewhere does not say: its Softmax op adds in the runtime's own order)
        softmax_sum=semantics.get("softmax_sum") if semantics.get("softmax_sum") in ("sequential", "pairwise")
        else "sequential",
        target_steps=steps,
        provenance=provenance,
    )
    ref = meta.get("boxwood.reference")
    if exact_source and ref is not None:
        ensemble.reference = meta_reference(ref)
    check_input_mask(graph, path, ensemble.features, where)
    try:
        return ensemble.check()
    except ModelError as exc:
        raise OnnxReadError("%s does not make a valid tree ensemble: %s" % (where, exc))
