"""Big forests: memory of export and load measured against the artefact's size (issue 13).

Goals: the device loader peaks at <= 4x the file's size, the JSON writer at <= 3x. The
default test uses a forest of about 200,000 nodes (100 unlimited-depth trees); the
1,000,000-node check is marked ``slow`` (run it with ``python -m pytest -m slow``;
benchmarks/bench_scale.py runs it too). Memory is measured with tracemalloc, as ratios;
nothing here is timed.
"""
import os
import tracemalloc

import pytest

import boxwood_runtime
from boxwood.export import export, read_source
from boxwood.formats.json import writer

LOAD_RATIO = 4.0
EXPORT_RATIO = 3.0


def _forest(rows, trees=100):
    from sklearn.datasets import make_friedman1
    from sklearn.ensemble import RandomForestRegressor

    X, y = make_friedman1(n_samples=rows, n_features=10, random_state=0)
    return RandomForestRegressor(n_estimators=trees, random_state=0).fit(X, y)


def _peak(fn):
    """(result, peak traced bytes above what was traced when fn started)."""
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        out = fn()
        return out, tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()


def _ratios(tmp_path, rows):
    model = _forest(rows)
    writer.text_reading()  # pandas' probe, cached: not part of what is measured
    ensemble, _, _ = read_source(model, 6)
    path = tmp_path / "forest.json"
    size, write_peak = _peak(lambda: writer.write(ensemble, path))
    assert size == os.path.getsize(path)
    del ensemble
    loaded, load_peak = _peak(lambda: boxwood_runtime.load(str(path)))
    assert loaded.n_nodes == sum(e.tree_.node_count for e in model.estimators_)
    assert loaded.predict([[0.5] * 10]) == model.predict([[0.5] * 10]).tolist()
    return model, path, size, write_peak / size, load_peak / size


def _check(tmp_path, rows, min_nodes):
    model, path, size, write_ratio, load_ratio = _ratios(tmp_path, rows)
    assert sum(e.tree_.node_count for e in model.estimators_) >= min_nodes
    assert write_ratio <= EXPORT_RATIO, "writing took %.2fx the artefact's %d bytes" % (write_ratio, size)
    assert load_ratio <= LOAD_RATIO, "loading took %.2fx the artefact's %d bytes" % (load_ratio, size)


def test_big_forest_memory_ratios(tmp_path):
    _check(tmp_path, rows=1600, min_nodes=150_000)


@pytest.mark.slow
def test_million_node_forest_memory_ratios(tmp_path):
    _check(tmp_path, rows=8000, min_nodes=1_000_000)


@pytest.mark.xfail(strict=False, reason=(
    "export() as a whole peaks near 5.5x: the hub Ensemble it builds (ir.Tree's Python lists, "
    "~2.9x the file) is still alive while the post-write check loads the file (~2.6x); the "
    "writer itself stays near 0.15x. Fixing it needs a packed ir.Tree or a check after the "
    "Ensemble is dropped (export.py / ir.py)"))
def test_whole_export_memory_ratio(tmp_path):
    model = _forest(1600)
    writer.text_reading()
    path = tmp_path / "forest.json"
    _, peak = _peak(lambda: export(model, path))
    assert peak / os.path.getsize(path) <= EXPORT_RATIO
