"""The artefact is deterministic and lossless: same model, same bytes; file -> hub ->
file gives the same bytes; every float reads back to the same bits."""
from __future__ import annotations

import json
import pickle
import struct

import pytest

from boxwood.export import build
from boxwood.formats.json.reader import from_document, read_file
from boxwood.formats.json.writer import to_bytes

import zoo


@pytest.mark.parametrize("name", ["gbc_multiclass", "hgbr_categorical_nan", "hgbc_nan", "gbr_quantile"])
def test_same_model_same_bytes(name):
    case, _, data = zoo.exported(name)
    again = to_bytes(build(case.model))
    # A copy of the model made by pickling (as a user saves and reloads it) exports
    # to the same bytes too: nothing in the artefact depends on object identity or time.
    clone = pickle.loads(pickle.dumps(case.model))
    assert to_bytes(build(clone)) == again == data


@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_file_to_hub_to_file_is_identical(name):
    _, ensemble, data = zoo.exported(name)
    back = read_file(data)
    assert to_bytes(back) == data
    assert back.trees == ensemble.trees
    assert back.base_values == ensemble.base_values


def test_floats_keep_their_bits():
    _, ensemble, data = zoo.exported("hgbr_absolute_error")
    doc = json.loads(data)
    written = [v for t in doc["ensemble"]["trees"] for v in t["threshold"] + t["value"] if not isinstance(v, str)]
    original = [v for t in ensemble.trees for v in t.threshold + t.value]
    bits = lambda xs: [struct.pack("<d", x) for x in xs]  # noqa: E731
    assert bits(written) == bits([v for v in original if v not in (float("inf"), float("-inf"))])


def test_infinite_thresholds_survive():
    """Histogram trees split "every value left, missing right" with threshold +inf when
    missingness itself predicts the target; JSON has no infinity, so the writer spells
    it "inf" and the reader restores it, and the device routes exactly as scikit-learn."""
    import numpy as np
    from sklearn.datasets import load_diabetes
    from sklearn.ensemble import HistGradientBoostingRegressor

    import boxwood_runtime
    from boxwood.sources.model import SourceModel

    X, y = load_diabetes(return_X_y=True)  # Efron et al. 2004, shipped with scikit-learn
    X = X.copy()
    X[y > np.median(y), 0] = np.nan  # missing 'age' marks the upper half of the targets
    model = HistGradientBoostingRegressor(max_iter=5, random_state=0).fit(X, y)
    ensemble = build(model)
    assert any(t == float("inf") for tree in ensemble.trees for t in tree.threshold)
    data = to_bytes(ensemble)
    doc = json.loads(data)
    assert any("inf" in tree["threshold"] for tree in doc["ensemble"]["trees"])
    assert from_document(doc).trees == ensemble.trees
    rows = [[None if v != v else float(v) for v in r] for r in X]
    device = boxwood_runtime.load(data)
    assert np.array_equal(np.array(device.decision_function(rows)),
                          SourceModel(model, ensemble).raw(rows).ravel())
