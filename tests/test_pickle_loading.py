"""Pickles: a warning on stderr at every load, and a pickle named as data is refused.

Outside reference: Python's pickle documentation ("Warning: The pickle module is not secure ...
it is possible to construct malicious pickle data which will execute arbitrary code during
unpickling"): the planted pickle below writes a marker file when unpickled, and it is shown to
do so when loaded under a model name (the checker of the checker) before the refusals are trusted.
"""
from __future__ import annotations

import pickle

import joblib
import pytest

from boxwood.cli import main
from boxwood.sources import PICKLE_WARNING, ModelFileError, load_model_file


class _Planted:
    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (open, (str(self.marker), "w"))  # runs at unpickling time


def planted(path, marker):
    with open(path, "wb") as fh:
        pickle.dump(_Planted(marker), fh)
    return path


def test_the_planted_pickle_runs_when_unpickled(tmp_path, capsys):
    marker = tmp_path / "ran"
    load_model_file(planted(tmp_path / "model.pkl", marker))
    assert marker.exists()
    assert PICKLE_WARNING in capsys.readouterr().err


@pytest.mark.parametrize("name", ["model.json", "model.onnx", "model.JSON", "rows.csv", "rows.jsonl"])
@pytest.mark.parametrize("command", ["bundle", "export", "verify", "diff"])
def test_a_pickle_named_as_data_is_refused(tmp_path, capsys, name, command):
    marker = tmp_path / "ran"
    path = str(planted(tmp_path / name, marker))
    argv = {"bundle": ["bundle", path, "-o", str(tmp_path / "out"), "--micropython-footprint", "skip"],
            "export": ["export", path, "-o", str(tmp_path / "out.json")],
            "verify": ["verify", path, str(tmp_path / "missing.json")],
            "diff": ["diff", path, path]}[command]
    assert main(argv) == 2
    assert not marker.exists()
    err = capsys.readouterr().err
    assert err.startswith("boxwood: error: ") and "Traceback" not in err


def test_refused_by_the_loader_itself(tmp_path):
    marker = tmp_path / "ran"
    with pytest.raises(ModelFileError, match="refusing to unpickle .*its name says ONNX"):
        load_model_file(planted(tmp_path / "model.onnx", marker))
    assert not marker.exists()


def test_warning_at_every_load(tmp_path, capsys):
    from sklearn.tree import DecisionTreeRegressor

    path = tmp_path / "tree.joblib"
    joblib.dump(DecisionTreeRegressor(max_depth=2).fit([[0.0], [1.0], [2.0]], [0.0, 1.0, 2.0]), path)
    for _ in range(2):
        load_model_file(path)
    err = capsys.readouterr().err
    assert err.count(PICKLE_WARNING) == 2 and err.count("boxwood: warning: loading %s" % path) == 2
    assert main(["export", str(path), "-o", str(tmp_path / "tree.json")]) == 0
    assert capsys.readouterr().err.count(PICKLE_WARNING) == 1
