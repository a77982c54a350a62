"""Write an :class:`~boxwood.ir.Ensemble` as a float32 ONNX graph for older runtimes.

ai.onnx.ml opset 3 ``TreeEnsembleRegressor`` with the plain float attributes
(``nodes_values``, ``target_weights``, ``base_values``: protobuf ``float``, i.e. float32),
which every runtime that knows the tree operators reads; ai.onnx opset 13 for the
post-transform ops. The graph takes **float32 input only**. Classifiers use the
regressor operator too (one target per raw output) followed by the same standard ops
as the exact graph: the classifier operator's binary-case conventions (how two labels
and one score are laid out, which label wins at 0) differ between runtimes, the
regressor's sum does not.

What is exact and what is not (docs/onnx.md, "The legacy float32 graph"):

* **Decisions are exact for every float32 input.** Each float64 threshold ``t`` is
  written as ``t32 = the largest float32 <= t`` (:func:`boxwood.numerics.float32_floor`), so for
  every float32 ``x``: ``x <= t32`` exactly when ``x <= t`` (there is no float32
  strictly between ``t32`` and ``t``). That is the source's decision whether it
  compares float32 inputs (classic trees) or float64 inputs (a float32 value is a
  float64 value). NaN follows ``nodes_missing_value_tracks_true`` as in the exact graph.
* **Categorical splits** become chains of ``BRANCH_EQ`` nodes on code + 1 (opset 3 has
  no set membership): one node per code of the smaller side of the split, each
  leading to its own copy of that side's subtree; the other side follows the last
  node's false branch once. Codes that are not known become NaN before the trees, as
  in the exact graph. The copies make the graph bigger, never the decisions different.
* **Leaves, base values and the sum are float32**: each leaf is rounded to the nearest
  float32 and the runtime adds them in float32 (onnxruntime accumulates in the
  attribute type; onnx.reference in the input type). :func:`raw_error_bound` bounds
  the resulting raw-score error per output; it is written to the metadata key
  ``boxwood.raw_error_bound`` and checked by the tests.
"""
from __future__ import annotations

import json
import math
from typing import Any, Dict, List

import numpy as np

from ...ir import LEAF, Ensemble, ModelError
from ... import numerics
from .build import (
    CODE_OFFSET,
    INPUT_NAME,
    META_ERROR_BOUND,
    RAW_NAME,
    TREE_NODE_NAME,
    GraphKit,
    _doc,
    _onnx,
    add_outputs,
    assemble,
    finish_mean,
    metadata,
    prepare_input,
    refuse_unsupported,
)

LEGACY_OPSET = 13
LEGACY_ML_OPSET = 3
# Categorical chains copy subtrees; refuse graphs that would grow past this many nodes.
MAX_LEGACY_NODES = 1 << 22
U32 = numerics.UNIT_ROUNDOFF["float32"]
U64 = numerics.UNIT_ROUNDOFF["float64"]


def raw_error_bound(ensemble: Ensemble) -> List[float]:
    """Per output, a bound on |legacy graph's raw score - the source's float64 raw score|.

    Leaves and base values are rounded to float32 (relative error <= u = 2^-24 each) and
    added one by one in float32; recursive summation of n terms errs by at most
    gamma_(n-1) * sum |terms| with gamma_k = k u / (1 - k u) (N. J. Higham, "Accuracy
    and Stability of Numerical Algorithms", 2nd ed., SIAM 2002, eq. (4.4)); the
    source's own float64 sum errs by at most the same with u = 2^-53. ``sum |terms|``
    is bounded over all inputs by |base| + the largest |leaf| of each tree. A mean of
    trees adds the rounding of one division and one addition. Subnormal results add
    at most 2^-149 per operation."""
    k = ensemble.n_outputs
    biggest = [0.0] * k
    count = [0] * k
    for t in ensemble.trees:
        m = max(abs(t.value[i]) for i in range(t.n_nodes) if t.feature[i] == LEAF)
        biggest[t.output] += m
        count[t.output] += 1
    bounds = []
    for j in range(k):
        base = abs(ensemble.base_values[j])
        n = count[j] + 1
        if ensemble.combine == "sum":
            a = base + biggest[j]
            err = (U32 + float(numerics.gamma(n - 1, U32)) * (1 + U32) + float(numerics.gamma(n - 1, U64))) * a
        else:
            c = max(count[j], 1)
            mean = biggest[j] / c
            err = ((U32 + float(numerics.gamma(n - 1, U32)) * (1 + U32) + float(numerics.gamma(n - 1, U64))) * biggest[j] / c
                   + 2 * U32 * (base + mean) * (1 + U32) + U32 * base)
        err += (n + 2) * 2.0 ** -149
        bounds.append(err * (1 + 2.0 ** -20))  # room for the rounding of this computation
    return bounds


def _leaf32(v: float) -> float:
    with np.errstate(over="ignore"):
        out = float(np.float32(v))
    if math.isinf(out):
        raise ModelError("a leaf or base value (%r) is outside the float32 range of the legacy graph" % v)
    return out


def _tree_attributes(ensemble: Ensemble) -> Dict[str, Any]:
    treeids, nodeids, featureids, modes, values, trues, falses, missing = [], [], [], [], [], [], [], []
    t_tree, t_node, t_ids, t_weights = [], [], [], []
    for tid, tree in enumerate(ensemble.trees):
        first = len(treeids)

        def new(mode: str, feature: int = 0, value: float = 0.0, miss: int = 0) -> int:
            local = len(treeids) - first
            treeids.append(tid)
            nodeids.append(local)
            featureids.append(feature)
            modes.append(mode)
            values.append(value)
            trues.append(0)
            falses.append(0)
            missing.append(miss)
            if len(treeids) > MAX_LEGACY_NODES:
                raise ModelError("the legacy graph would have more than %d nodes (categorical splits are "
                                 "written as chains of copies); use the exact (opset 5) graph" % MAX_LEGACY_NODES)
            return local

        def link(parent: int, side: str, child: int) -> None:
            (trues if side == "true" else falses)[first + parent] = child

        stack = [(0, -1, "")]
        while stack:
            node, parent, side = stack.pop()
            if tree.feature[node] == LEAF:
                local = new("LEAF")
                t_tree.append(tid)
                t_node.append(local)
                t_ids.append(tree.output)
                t_weights.append(_leaf32(tree.value[node]))
            elif tree.left_categories[node] is None:
                local = new("BRANCH_LEQ", tree.feature[node], numerics.float32_floor(tree.threshold[node]),
                            1 if tree.missing_left[node] else 0)
                stack.append((tree.right[node], local, "false"))
                stack.append((tree.left[node], local, "true"))
            else:
                n_codes = len(ensemble.features[tree.feature[node]].categories)
                left = list(tree.left_categories[node])
                right = [c for c in range(n_codes) if c not in set(left)]
                if (left and len(left) <= len(right)) or not right:
                    codes, hit, miss, nan_hits = left, tree.left[node], tree.right[node], tree.missing_left[node]
                else:
                    codes, hit, miss, nan_hits = right, tree.right[node], tree.left[node], not tree.missing_left[node]
                local = None
                previous = None
                for i, code in enumerate(codes):
                    chain = new("BRANCH_EQ", tree.feature[node], float(code) + CODE_OFFSET,
                                1 if (nan_hits and i == 0) else 0)
                    if previous is not None:
                        link(previous, "false", chain)
                    else:
                        local = chain
                    stack.append((hit, chain, "true"))
                    previous = chain
                stack.append((miss, previous, "false"))
            if parent >= 0:
                link(parent, side, local)
    base = ensemble.base_values if ensemble.combine == "sum" else [0.0] * ensemble.n_outputs
    return dict(
        aggregate_function="SUM",
        post_transform="NONE",
        n_targets=ensemble.n_outputs,
        base_values=[_leaf32(b) for b in base],
        nodes_treeids=treeids,
        nodes_nodeids=nodeids,
        nodes_featureids=featureids,
        nodes_modes=modes,
        nodes_values=values,
        nodes_truenodeids=trues,
        nodes_falsenodeids=falses,
        nodes_missing_value_tracks_true=missing,
        target_treeids=t_tree,
        target_nodeids=t_node,
        target_ids=t_ids,
        target_weights=t_weights,
    )


def to_model(ensemble: Ensemble) -> Any:
    """The legacy ONNX ModelProto (float32 input, ai.onnx.ml opset 3) for ``ensemble``."""
    ensemble.check()
    refuse_unsupported(ensemble)
    if ensemble.post_transform in ("samme", "isolation"):
        # Their decision values are formed after the sum; in float32 they would not be the
        # source's and raw_error_bound says nothing about them.
        raise ModelError("the legacy float32 ONNX writer does not support post_transform %r (%s); write the "
                         "exact graph instead (ai.onnx.ml opset 5, float64 or float32 input: boxwood export "
                         "MODEL -o out.onnx [--input-type float32], without --legacy-float32)"
                         % (ensemble.post_transform, "AdaBoost" if ensemble.post_transform == "samme"
                            else "isolation forest"))
    onnx = _onnx()
    T = onnx.TensorProto
    kit = GraphKit(T.FLOAT)
    x = prepare_input(kit, ensemble, INPUT_NAME, T.FLOAT, round_to_float32=False)
    summed = RAW_NAME if ensemble.combine == "sum" else kit.name("tree_sum")
    kit.nodes.append(onnx.helper.make_node("TreeEnsembleRegressor", [x], [summed], name=TREE_NODE_NAME,
                                           domain="ai.onnx.ml", **_tree_attributes(ensemble)))
    if ensemble.combine != "sum":
        finish_mean(kit, ensemble, summed, RAW_NAME)
    outputs = add_outputs(kit, ensemble, RAW_NAME)
    bound = raw_error_bound(ensemble)
    meta = metadata(ensemble, 0, "float32", "legacy-float32", {META_ERROR_BOUND: json.dumps(bound)})
    return assemble(kit, ensemble, T.FLOAT, outputs, meta, {"": LEGACY_OPSET, "ai.onnx.ml": LEGACY_ML_OPSET},
                    _doc(ensemble) + " Legacy float32 graph: raw scores within boxwood.raw_error_bound "
                                     "of the source's.", ir_version=7)
