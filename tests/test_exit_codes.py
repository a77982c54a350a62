"""The exit-code table (README.md, "Exit codes") and the one-line error messages, each row
tried as a new user would. Models: scikit-learn's diabetes data set (sklearn.datasets,
shipped with scikit-learn); expected numbers come from scikit-learn's own predict."""
import io
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import joblib
import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_diabetes
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.impute import SimpleImputer
from sklearn.pipeline import make_pipeline

from boxwood.cli import main
from boxwood_runtime.scorer import artefact_bytes

ROOT = Path(__file__).resolve().parents[1]
PY2 = shutil.which("python2.7") and os.environ.get("PYENV_VERSION") and shutil.which("python2.7")
PY2_PATHS = [p for p in ("/root/.pyenv/versions/2.7.18/bin/python", "/usr/bin/python2.7") if os.path.exists(p)]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("codes")
    X, y = load_diabetes(return_X_y=True)
    X = X[:, :4]
    model = make_pipeline(SimpleImputer(), HistGradientBoostingRegressor(max_iter=5, random_state=0)).fit(X, y)
    joblib.dump(model, tmp / "m.joblib")
    assert main(["export", str(tmp / "m.joblib"), "-o", str(tmp / "m.json")]) == 0
    (tmp / "data.csv").write_text("x0,x1,x2,x3\n0.1,0.2,0.3,0.4\n")
    (tmp / "data.jsonl").write_text('{"x0": 1}\n{"x0": 2}\n')
    return tmp, model


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "Traceback" not in err
    return code, out, err


def test_bad_input_rows_exit_2_with_a_clear_line(files, capsys):
    tmp, _ = files
    import zipfile

    with zipfile.ZipFile(tmp / "b.zip", "w") as zf:
        zf.writestr("b/model.json", (tmp / "m.json").read_bytes())
    assert main(["export", str(tmp / "m.joblib"), "-o", str(tmp / "m.onnx")]) == 0
    capsys.readouterr()
    cases = [
        (["score", tmp / "absent.json", tmp / "data.csv"], "artefact file '%s' not found" % (tmp / "absent.json")),
        (["score", tmp, tmp / "data.csv"], "is a folder"),
        (["inspect", tmp], "is a folder"),
        (["score", tmp / "b.zip", tmp / "data.csv"], "is a zip archive; expected a boxwood JSON artefact"),
        (["score", tmp / "m.onnx", tmp / "data.csv"], "is an ONNX file; expected a boxwood JSON artefact"),
        (["score", tmp / "m.joblib", tmp / "data.csv"], "is a joblib or pickle model file"),
        (["export", tmp / "data.csv", "-o", tmp / "x.json"], "this is a data file (CSV text), not a model"),
        (["export", tmp / "data.jsonl", "-o", tmp / "x.json"], "this is a data file (JSON Lines), not a model"),
        (["export", tmp / "m.joblib", "-o", tmp / "nodir" / "x.json"], "the folder"),
        (["export", tmp / "m.joblib", "-o", tmp], "is a folder"),
        (["inspect", tmp / "data.csv"], "expected a boxwood JSON artefact (.json), an ONNX tree-ensemble file (.onnx) or a boxwood C file"),
        (["inspect", tmp / "m.onnx", "--csv-header"], "score takes"),
        (["score", tmp / "m.json", tmp / "m.onnx"], "is an ONNX file; expected CSV with a header row or JSON Lines"),
        (["score", tmp / "m.json", tmp / "m.joblib"], "is a joblib or pickle model file; expected CSV"),
        (["score", tmp / "m.json", tmp / "m.json"], "is a boxwood JSON artefact; expected CSV"),
        (["score", tmp / "m.json", tmp], "input %r is a folder" % str(tmp)),
        (["score", tmp / "m.json", tmp / "absent.csv"], "input file %r not found" % str(tmp / "absent.csv")),
    ]
    for argv, needle in cases:
        code, _, err = run(argv, capsys)
        assert code == 2, (argv, err)
        assert err.startswith("boxwood: error: ") and needle in err and err.count("\n") == 1, (argv, err)
        assert ".partial" not in err
    assert not (tmp / "x.json").exists()


@pytest.mark.skipif(os.geteuid() == 0, reason="root can write anywhere")
def test_unwritable_output_names_the_users_path(files, capsys, tmp_path):
    tmp, _ = files
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    code, _, err = run(["export", tmp / "m.joblib", "-o", locked / "x.json"], capsys)
    assert code == 2 and str(locked / "x.json") in err and ".partial" not in err


def test_unwritable_output_under_a_read_only_place(files, capsys):
    # /proc refuses new files even for root (Linux); the message names the user's path.
    tmp, _ = files
    if not os.path.isdir("/proc/self"):
        pytest.skip("no /proc")
    code, _, err = run(["export", tmp / "m.joblib", "-o", "/proc/x.json"], capsys)
    assert code == 2 and "cannot write output '/proc/x.json'" in err and ".partial" not in err


def test_damaged_artefact_and_failed_self_check_exit_1_everywhere(files, capsys, tmp_path):
    tmp, _ = files
    data = (tmp / "m.json").read_bytes()
    cut = tmp_path / "cut.json"
    cut.write_bytes(data[: len(data) // 2])
    doc = json.loads(data)
    del doc["boxwood_digest"]
    doc["self_check"]["raw"][0][0] = float(np.nextafter(doc["self_check"]["raw"][0][0], np.inf))
    wrong = tmp_path / "wrong.json"
    wrong.write_bytes(artefact_bytes(doc))
    for path, needle in ((cut, "damaged"), (wrong, "self-check")):
        for argv in (["inspect", path], ["score", path, tmp / "data.csv", "-o", tmp_path / "o.csv"],
                     ["bundle", path, "-o", tmp_path / "bun", "--micropython-footprint", "skip"],
                     ["inspect", path, "--csv-header"]):
            code, out, err = run(argv, capsys)
            assert code == 1, (argv, err)
            assert needle in (err + out), (argv, err)
        assert not (tmp_path / "bun").exists() and not (tmp_path / "o.csv").exists()


HIDE_ORT = r"""
import sys
class Refuse:
    def find_spec(self, name, path=None, target=None):
        if name == "onnxruntime" or name.startswith("onnxruntime."):
            raise ModuleNotFoundError("No module named %r (hidden by the test)" % name, name=name)
        return None
sys.meta_path.insert(0, Refuse())
from boxwood.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_missing_onnxruntime_exits_2_with_the_install_hint(files, tmp_path):
    tmp, _ = files
    wrapper = tmp_path / "no_ort.py"
    wrapper.write_text(HIDE_ORT)
    shutil.copy(tmp / "m.onnx", tmp_path / "m.onnx") if (tmp / "m.onnx").exists() else \
        subprocess.run([sys.executable, "-m", "boxwood", "export", str(tmp / "m.joblib"), "-o",
                        str(tmp_path / "m.onnx")], check=True, capture_output=True)
    for argv in (["inspect", tmp_path / "m.onnx"], ["export", tmp / "m.joblib", "-o", tmp_path / "new.onnx"]):
        proc = subprocess.run([sys.executable, str(wrapper)] + [str(a) for a in argv], capture_output=True,
                              text=True)
        assert proc.returncode == 2, proc.stderr
        assert 'pip install "boxwood[onnx]"' in proc.stderr and "Traceback" not in proc.stderr
        assert "ok" not in proc.stdout
    assert not (tmp_path / "new.onnx").exists()
    # verify: exit 2 with the hint, and the reports it was asked for still exist and say why
    report, junit = tmp_path / "v.json", tmp_path / "v.xml"
    proc = subprocess.run([sys.executable, str(wrapper), "verify", str(tmp / "m.joblib"), str(tmp_path / "m.onnx"),
                           "--probes", "50", "--report-json", str(report), "--junit", str(junit)],
                          capture_output=True, text=True)
    assert proc.returncode == 2, proc.stderr
    assert 'pip install "boxwood[onnx]"' in proc.stderr and "Traceback" not in proc.stderr
    doc = json.loads(report.read_text())
    assert doc["error"]["exit_code"] == 2 and 'boxwood[onnx]' in doc["error"]["message"]
    assert "boxwood[onnx]" in junit.read_text()
    # planted fault for the wrapper itself: without the hiding finder the same call passes
    proc = subprocess.run([sys.executable, "-m", "boxwood", "inspect", str(tmp_path / "m.onnx")],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr


def _score(artefact, text, tmp_path, name):
    src = tmp_path / name
    src.write_text(text)
    out = tmp_path / (name + ".out")
    assert main(["score", str(artefact), str(src), "-o", str(out)]) == 0
    return out.read_text()


def test_csv_header_and_example_jsonl_are_accepted_by_score(files, capsys, tmp_path):
    tmp, model = files
    code, header, _ = run(["inspect", tmp / "m.json", "--csv-header"], capsys)
    assert code == 0 and header.strip() == "x0,x1,x2,x3"
    code, example, _ = run(["inspect", tmp / "m.json", "--example-jsonl"], capsys)
    record = json.loads(example)
    assert code == 0 and list(record) == ["x0", "x1", "x2", "x3"]
    # scikit-learn's own prediction on the workstation's reading of the same text (pandas: the
    # artefact of a pipeline reads JSON numbers as pandas.read_json's default parser does)
    want = model.predict(pd.read_json(io.StringIO(example), lines=True)[list(record)].to_numpy())[0]
    out = _score(tmp / "m.json", example, tmp_path, "ex.jsonl")
    assert json.loads(out)["prediction"] == want if "prediction" in json.loads(out) else \
        float([v for k, v in json.loads(out).items() if k not in ("error", "id")][0]) == want
    row = ",".join(repr(float(record[k])) for k in record)
    out = _score(tmp / "m.json", header + row + "\n", tmp_path, "ex.csv")
    want = model.predict(pd.read_csv(io.StringIO(header + row + "\n")).to_numpy())[0]
    assert float(out.splitlines()[1].split(",")[0]) == want
    code, text, _ = run(["inspect", tmp / "m.json"], capsys)
    assert "x0" in text and "impute" in text and "-> feature x0" in text


def test_box_py_exit_codes_and_info(files, tmp_path):
    tmp, model = files
    bun = tmp_path / "bun"
    assert main(["bundle", str(tmp / "m.json"), "-o", str(bun), "--micropython-footprint", "skip"]) == 0
    box = [sys.executable, "-I", "-S", str(bun / "box.py")]

    def call(*args):
        return subprocess.run(box + list(args), capture_output=True, text=True)

    assert call("check").returncode == 0
    header = call("info", "--csv-header")
    example = call("info", "--example-jsonl")
    assert header.returncode == 0 and header.stdout.strip() == "x0,x1,x2,x3"
    # the device agrees with `boxwood inspect --example-jsonl`
    assert json.loads(example.stdout) == json.loads(subprocess.run(
        [sys.executable, "-m", "boxwood", "inspect", str(tmp / "m.json"), "--example-jsonl"],
        capture_output=True, text=True).stdout)
    info = call("info")
    assert "impute" in info.stdout and "-> feature x3" in info.stdout
    proc = subprocess.run(box + ["score"], input=example.stdout, capture_output=True, text=True)
    assert proc.returncode == 0 and proc.stdout.strip(), proc.stderr
    assert call("--bundle", str(tmp_path / "nowhere"), "check").returncode == 2
    assert call("frobnicate").returncode == 2
    assert call("score", str(tmp_path / "absent.csv")).returncode == 2
    (bun / "stream.py").write_text("# changed\n")
    assert call("check").returncode == 1
    assert call("info").returncode == 1


def test_box_py_refuses_python_2_clearly(files, tmp_path):
    import importlib.util

    spec = importlib.util.spec_from_file_location("box_under_test", ROOT / "runtime/boxwood_runtime/box.py")
    box = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(box)
    assert box.main(["check"], version_info=(2, 7, 18)) == 2
    assert "needs Python 3" in box.python_problem((2, 7, 18)) and box.python_problem((3, 8, 0)) is None
    if not PY2_PATHS:
        pytest.skip("no Python 2 here: the guard's logic is tested above only")
    # a real Python 2.7: the file parses and the guard prints its line
    bun = tmp_path / "bun"
    assert main(["bundle", str(files[0] / "m.json"), "-o", str(bun), "--micropython-footprint", "skip"]) == 0
    proc = subprocess.run([PY2_PATHS[0], str(bun / "box.py"), "check"], capture_output=True, text=True)
    assert proc.returncode == 2 and "needs Python 3" in proc.stderr, proc.stderr
