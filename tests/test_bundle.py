"""``boxwood bundle`` and the bundle's entry script box.py, on CPython and MicroPython.

Outside references: scikit-learn's own predict / predict_proba and fitted tree
attributes (node counts, depths) of the zoo models (tests/zoo.py names the data sets);
SHA-256 from Python's hashlib (FIPS 180-4) for the manifest; CPython's results for the
MicroPython runs (the WebAssembly port from npm, see tests/test_micropython.py); the
peak resident size the Linux kernel reports for the scoring process (getrusage).
A check is trusted once it catches planted faults: a changed byte, a missing or cut
file, a wrong leaf with a valid digest, a future format version, another scorer version.
"""
from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import joblib
import pytest

import zoo
from boxwood import micropython as mp
from boxwood.bundle import write_manifest
from boxwood.cli import main
from boxwood_runtime.scorer import artefact_bytes
from test_stream import check_against_sklearn, csv_text, ids_for, jsonl_text, parse_csv, parse_jsonl

FILES = ["README.txt", "box.py", "manifest.json", "model.json", "scorer.py", "stream.py"]
CASE = "hgbr_categorical_nan"  # string categories, NaN routed per node


def _bundle(tmp, source, name="bundle", *extra):
    out = tmp / name
    assert main(["bundle", str(source), "-o", str(out), "--micropython-footprint", "skip"] + list(extra)) == 0
    return out


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    """A bundle made from a joblib file (export on the way) by the CLI, and the case."""
    tmp = tmp_path_factory.mktemp("bundle")
    case = zoo.fitted(CASE)
    model_file = tmp / "model.joblib"
    joblib.dump(case.model, model_file)
    return case, _bundle(tmp, model_file)


def box(folder, *args, stdin=None, cwd=None):
    """Run the bundle's box.py with CPython in isolated mode (-I -S: no site-packages,
    no user path, no PYTHON* variables), from a folder that holds nothing else."""
    env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin")}
    return subprocess.run([sys.executable, "-I", "-S", str(Path(folder) / "box.py")] + list(args),
                          input=stdin, capture_output=True, text=True, env=env, timeout=300,
                          cwd=str(cwd or Path(folder).parent))


def copy_of(folder, tmp_path):
    target = tmp_path / "copy"
    shutil.copytree(folder, target)
    return target


# ----------------------------------------------------------------------------- making
def test_bundle_holds_the_files_and_a_true_manifest(made):
    case, folder = made
    assert sorted(p.name for p in folder.iterdir()) == FILES
    manifest = json.loads((folder / "manifest.json").read_text())
    from boxwood.schema import validate

    validate(manifest, "bundle-manifest")
    for name, entry in manifest["files"].items():  # hashlib's SHA-256 of the bytes on disk
        data = (folder / name).read_bytes()
        assert entry == {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
    runtime = Path(__file__).resolve().parents[1] / "runtime" / "boxwood_runtime"
    for name in ("scorer.py", "stream.py", "box.py"):  # copied as is
        assert (folder / name).read_bytes() == (runtime / name).read_bytes()
    doc = json.loads((folder / "model.json").read_bytes())
    assert manifest["artefact"]["digest"] == doc["boxwood_digest"]
    assert manifest["artefact"]["format_version"] == doc["format_version"] == 2
    # The footprint against scikit-learn's own fitted trees.
    predictors = [p for stage in case.model._predictors for p in stage]
    foot = manifest["footprint"]
    assert foot["trees"] == len(predictors)
    assert foot["nodes"] == sum(len(p.nodes) for p in predictors)
    assert foot["max_depth"] == max(int(p.nodes["depth"].max()) for p in predictors)
    assert foot["artefact_bytes"] == (folder / "model.json").stat().st_size
    assert foot["micropython"] == {"measured": False, "why": "skipped (--micropython-footprint skip)"}
    readme = (folder / "README.txt").read_text()
    for needed in ("python3 box.py check", "MicroPython", "advisory", "standards and local codes"):
        assert needed in readme


def test_bundle_refuses_a_used_folder_and_a_damaged_artefact(made, tmp_path, capsys):
    case, folder = made
    assert main(["bundle", str(folder / "model.json"), "-o", str(folder), "--micropython-footprint", "skip"]) == 2
    assert "not an empty folder" in capsys.readouterr().err
    bad = bytearray((folder / "model.json").read_bytes())
    bad[200] ^= 1
    (tmp_path / "bad.json").write_bytes(bytes(bad))
    # README "Exit codes": a damaged artefact is a failed check (1), as in inspect/score/box.py check
    assert main(["bundle", str(tmp_path / "bad.json"), "-o", str(tmp_path / "b"),
                 "--micropython-footprint", "skip"]) == 1
    assert "digest mismatch" in capsys.readouterr().err
    assert not (tmp_path / "b").exists()


def test_zip_is_deterministic_and_checks_after_unpacking(made, tmp_path):
    case, folder = made
    zips = []
    for name in ("one", "two"):
        out = _bundle(tmp_path / name, folder / "model.json", "b", "--zip")
        zips.append((out.parent / "b.zip").read_bytes())
    assert zips[0] == zips[1]
    with zipfile.ZipFile(io.BytesIO(zips[0])) as zf:
        assert sorted(zf.namelist()) == ["b/" + f for f in FILES]
        zf.extractall(tmp_path / "unpacked")
    done = box(tmp_path / "unpacked" / "b", "check")
    assert done.returncode == 0, done.stderr


# ----------------------------------------------------------------------------- on the box
def test_intact_bundle_checks_under_isolated_cpython(made, tmp_path):
    case, folder = made
    copy = copy_of(folder, tmp_path)
    done = box(copy, "check", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout.count("\n") == 1 and done.stdout.startswith("ok: 5 files match manifest.json")
    assert "reference rows reproduced" in done.stdout
    version = box(copy, "--version")
    assert version.returncode == 0
    assert "scorer 0.1.0, reads artefact format version 1" in version.stdout


def test_score_csv_and_jsonl_on_the_box_match_sklearn(made, tmp_path):
    case, folder = made
    copy = copy_of(folder, tmp_path)
    names = [f["name"] for f in json.loads((copy / "model.json").read_bytes())["inputs"]["features"]]
    n = len(case.rows)
    (tmp_path / "in.csv").write_text(csv_text(names, case.rows, ids_for(n)))
    done = box(copy, "score", str(tmp_path / "in.csv"), "-o", str(tmp_path / "out.csv"))
    assert done.returncode == 0, done.stderr
    from boxwood_runtime import load

    device = load(str(copy / "model.json"))
    rows = parse_csv((tmp_path / "out.csv").read_text())
    assert [r["id"] for r in rows] == ids_for(n)
    check_against_sklearn(device, case, rows, text=True)
    done = box(copy, "score", stdin=jsonl_text(names, case.rows, list(range(n))))
    assert done.returncode == 0, done.stderr
    check_against_sklearn(device, case, parse_jsonl(done.stdout), text=False)


def test_score_reports_bad_rows_and_exits_2(made, tmp_path):
    case, folder = made
    names = [f["name"] for f in json.loads((folder / "model.json").read_bytes())["inputs"]["features"]]
    lines = jsonl_text(names, case.rows[:3], ["a", "b", "c"]).splitlines()
    lines.insert(1, '{"id": "x", "age": ')
    done = box(folder, "score", stdin="\n".join(lines) + "\n")
    assert done.returncode == 2
    out = parse_jsonl(done.stdout)
    assert [r.get("id") for r in out] == ["a", None, "b", "c"]
    assert out[1]["error"].startswith("row 2 (line 2): not valid JSON")
    assert done.stderr.startswith("box.py: scored 4 rows, 1 errors (first: row 2 (line 2)")


def test_info_describes_the_model(made):
    case, folder = made
    done = box(folder, "info", "--json")
    assert done.returncode == 0, done.stderr
    info = json.loads(done.stdout)
    predictors = [p for stage in case.model._predictors for p in stage]
    assert info["model"]["n_trees"] == len(predictors)
    assert info["model"]["n_nodes"] == sum(len(p.nodes) for p in predictors)
    assert info["check"].startswith("ok: ")
    text = box(folder, "info")
    assert text.returncode == 0 and "memory     not measured under MicroPython" in text.stdout


def _flip(path, offset):
    data = bytearray(path.read_bytes())
    data[offset] ^= 0x20
    path.write_bytes(bytes(data))


def _future_format(folder):
    doc = json.loads((folder / "model.json").read_bytes())
    del doc["boxwood_digest"]
    doc["format_version"] = 4
    (folder / "model.json").write_bytes(artefact_bytes(doc))  # a valid digest for the new body
    write_manifest(folder)  # as if a newer boxwood made the bundle with this scorer.py


def _wrong_leaf(folder):
    doc = json.loads((folder / "model.json").read_bytes())
    del doc["boxwood_digest"]
    tree = doc["ensemble"]["trees"][0]
    tree["value"] = [v + 1.0 if f == -1 else v for f, v in zip(tree["feature"], tree["value"])]
    (folder / "model.json").write_bytes(artefact_bytes(doc))
    write_manifest(folder)


def _other_scorer_version(folder):
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["scorer_version"] = "9.9.9"
    (folder / "manifest.json").write_text(json.dumps(manifest))


TAMPER = {
    "artefact_byte": (lambda f: _flip(f / "model.json", 5000),
                      r"^model\.json: sha256 [0-9a-f]{64}, manifest\.json says [0-9a-f]{64} \(changed or damaged\)$"),
    "scorer_byte": (lambda f: _flip(f / "scorer.py", 3000),
                    r"^scorer\.py: sha256 [0-9a-f]{64}, manifest\.json says [0-9a-f]{64} \(changed or damaged\)$"),
    "missing_file": (lambda f: (f / "stream.py").unlink(),
                     r"^missing file: stream\.py \(listed in manifest\.json\)$"),
    "missing_scorer": (lambda f: (f / "scorer.py").unlink(),
                       r"^missing file: scorer\.py \(listed in manifest\.json\)$"),
    "cut_short": (lambda f: (f / "model.json").write_bytes((f / "model.json").read_bytes()[:-100]),
                  r"^model\.json has \d+ bytes, manifest\.json says \d+ \(changed, truncated or damaged\)$"),
    "no_manifest": (lambda f: (f / "manifest.json").unlink(), r"^missing file: manifest\.json"),
    "wrong_leaf_valid_digest": (_wrong_leaf, r"^model\.json: self-check failed: reference row \d+: raw scores"),
    "future_format": (_future_format, r"^model\.json: format_version 4 is not one this scorer \(0\.1\.0\) reads; "
                                      r"it reads 1, 2, 3$"),
    "other_scorer_version": (_other_scorer_version, r"^scorer\.py is version 0\.1\.0; the bundle was made for 9\.9\.9$"),
}


@pytest.mark.parametrize("fault", sorted(TAMPER))
def test_tampered_bundle_fails_check_with_the_reason(made, tmp_path, fault):
    import re

    case, folder = made
    copy = copy_of(folder, tmp_path)
    plant, reason = TAMPER[fault]
    plant(copy)
    done = box(copy, "check")
    assert done.returncode == 1
    assert done.stdout == ""
    assert done.stderr.count("\n") == 1 and done.stderr.startswith("box.py: check failed: ")
    assert re.search(reason, done.stderr[len("box.py: check failed: "):].rstrip("\n")), done.stderr
    scored = box(copy, "score", stdin="{}\n")  # score refuses too, with the same reason
    assert scored.returncode == 1 and scored.stderr == done.stderr and scored.stdout == ""


def test_bad_usage_exits_2(made):
    case, folder = made
    for args in ([], ["frobnicate"], ["check", "extra"], ["score", "--format", "xml"]):
        done = box(folder, *args)
        assert done.returncode == 2, (args, done.stderr)
        assert done.stderr.startswith("box.py: error: ")


# ----------------------------------------------------------------------------- MicroPython
def _need_micropython():
    reason = mp.unavailable_reason()
    if reason:
        if os.environ.get("CI"):
            pytest.fail("MicroPython is required in CI: " + reason)
        pytest.skip(reason)


def run_box_micropython(folder, *args):
    files = {"/box/" + p.name: p.read_bytes() for p in Path(folder).iterdir() if p.is_file()}
    code = ("import sys\nsys.path.insert(0, '/box')\nimport box\n"
            "raise SystemExit(box.main(%r))\n" % (list(args) + ["--bundle", "/box"]))
    return mp.run(code, files)


def test_check_and_score_on_micropython_agree_with_cpython(made, tmp_path):
    _need_micropython()
    case, folder = made
    done = run_box_micropython(folder, "check")
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("ok: 5 files match manifest.json") and "on MicroPython 1." in done.stdout
    names = [f["name"] for f in json.loads((folder / "model.json").read_bytes())["inputs"]["features"]]
    copy = copy_of(folder, tmp_path)
    text = jsonl_text(names, case.rows[:60], list(range(60))) + '{"id": 60, "age": "warm"}\n'
    (copy / "in.jsonl").write_text(text)
    mine = run_box_micropython(copy, "score", "/box/in.jsonl")
    cpython = box(copy, "score", str(copy / "in.jsonl"))
    assert mine.returncode == cpython.returncode == 2
    got, want = parse_jsonl(mine.stdout), parse_jsonl(cpython.stdout)
    assert len(got) == len(want) == 61
    for g, w in zip(got, want):  # the same numbers, read back to the same bits
        assert g["id"] == w["id"] and g["prediction"] == w["prediction"]
        assert (g["error"] is None) == (w["error"] is None)
    assert got[-1]["error"].startswith("row 61 (line 61), field ")
    csv_in = run_box_micropython(copy, "score", "/box/model.json", "--format", "csv")
    assert csv_in.returncode == 2 and "csv module" in csv_in.stderr


@pytest.mark.parametrize("fault", ["artefact_byte", "missing_scorer", "future_format"])
def test_tampered_bundle_fails_check_on_micropython(made, tmp_path, fault):
    _need_micropython()
    case, folder = made
    copy = copy_of(folder, tmp_path)
    TAMPER[fault][0](copy)
    done = run_box_micropython(copy, "check")
    assert done.returncode == 1
    assert done.stderr == box(copy, "check").stderr  # the same one-line reason as CPython


def test_bundle_measures_the_micropython_footprint(made, tmp_path, capsys):
    _need_micropython()
    case, folder = made
    out = tmp_path / "measured"
    assert main(["bundle", str(folder / "model.json"), "-o", str(out), "--micropython-footprint", "require"]) == 0
    capsys.readouterr()
    mpy = json.loads((out / "manifest.json").read_text())["footprint"]["micropython"]
    assert mpy["measured"] is True and mpy["micropython"] == mp.port_version()
    assert mpy["peak_bytes"] == mpy["module_bytes"] + mpy["model_bytes"] + mpy["record_bytes"]
    assert 0 < mpy["record_bytes"] < mpy["model_bytes"]
    assert mpy["model_bytes"] + mpy["module_bytes"] <= mpy["load_live_bytes"] <= mpy["load_peak_bytes"]
    # inspect shows the manifest's numbers for the artefact in the bundle.
    assert main(["inspect", str(out / "model.json")]) == 0
    shown = capsys.readouterr().out
    assert "MicroPython heap for one record %d bytes" % mpy["peak_bytes"] in shown
    assert "from %s" % (out / "manifest.json").resolve() in shown


# ----------------------------------------------------------------------------- streaming memory
_GENERATOR = r"""
import json, sys
n = int(sys.argv[1])
rows = json.load(open(sys.argv[2]))
names = json.load(open(sys.argv[3]))
out = sys.stdout
out.write("id," + ",".join(names) + "\n")
texts = [",".join(repr(v) for v in r) for r in rows]
bad_value = [",".join(repr(v) if j != 3 else "warm" for j, v in enumerate(r)) for r in rows]
for i in range(n):
    k = i % len(texts)
    if i % 100000 == 33333:
        out.write("%d,%s\n" % (i, texts[k].rsplit(",", 1)[0]))  # one cell short
    elif i % 100000 == 77777:
        out.write("%d,%s\n" % (i, bad_value[k]))  # not a number
    else:
        out.write("%d,%s\n" % (i, texts[k]))
"""
# Peak resident size of this process: VmHWM from /proc/self/status (Linux, proc(5)).
# Not getrusage: its ru_maxrss survives exec, so a child started from the big pytest
# process would report pytest's size.
_MEASURED = r"""
import sys
sys.path.insert(0, sys.argv[1])
import box
code = box.main(["score", "-", "-o", sys.argv[2], "--bundle", sys.argv[1]])
with open("/proc/self/status") as fh:
    hwm = [line.split()[1] for line in fh if line.startswith("VmHWM:")][0]
sys.stderr.write("peak_kib %s\n" % hwm)
sys.exit(code)
"""


@pytest.fixture(scope="module")
def small_bundle(tmp_path_factory):
    """A small classic model (10 trees of depth 2 on diabetes: Efron et al. 2004) so that
    a million rows score in well under a minute."""
    from sklearn.datasets import load_diabetes
    from sklearn.ensemble import GradientBoostingRegressor

    tmp = tmp_path_factory.mktemp("stream")
    X, y = load_diabetes(return_X_y=True)
    model = GradientBoostingRegressor(n_estimators=10, max_depth=2, random_state=0).fit(X, y)
    joblib.dump(model, tmp / "small.joblib")
    folder = _bundle(tmp, tmp / "small.joblib")
    names = [f["name"] for f in json.loads((folder / "model.json").read_bytes())["inputs"]["features"]]
    (tmp / "rows.json").write_text(json.dumps(X.tolist()))
    (tmp / "names.json").write_text(json.dumps(names))
    return tmp, folder, model, X


def _stream(small_bundle, n):
    """Pipe n generated CSV rows into box.py score (CPython -I -S); return (peak RSS in
    KiB of the scoring process, its stderr, the output path)."""
    tmp, folder, _, _ = small_bundle
    out = tmp / ("out_%d.csv" % n)
    env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin")}
    gen = subprocess.Popen([sys.executable, "-c", _GENERATOR, str(n), str(tmp / "rows.json"), str(tmp / "names.json")],
                           stdout=subprocess.PIPE, env=env)
    done = subprocess.run([sys.executable, "-I", "-S", "-c", _MEASURED, str(folder), str(out)], stdin=gen.stdout,
                          capture_output=True, text=True, env=env, timeout=900)
    gen.stdout.close()
    assert gen.wait() == 0
    lines = done.stderr.splitlines()
    assert done.returncode == 2, done.stderr  # the planted bad rows
    peak = int(lines[-1].split()[1])
    return peak, lines[0], out


def _verify_output(path, n, model, X):
    """Every input row has its output row, in order; the bad rows are error rows; a
    sample of the good rows equals scikit-learn's own predict on the same row."""
    want = model.predict(X)
    bad = {}
    with open(path, newline="") as fh:
        reader = csv.reader(fh)
        assert next(reader) == ["id", "prediction", "error"]
        count = 0
        for i, (ident, prediction, error) in enumerate(reader):
            assert ident == str(i)
            if error:
                bad[i] = error
            elif i % 997 == 0:
                assert float(prediction) == want[i % len(X)]
            count += 1
    assert count == n
    expected = sorted(i for i in range(n) if i % 100000 in (33333, 77777))
    assert sorted(bad) == expected
    for i, error in bad.items():
        if i % 100000 == 33333:
            assert error == "row %d (line %d): has 10 cells, the header has 11" % (i + 1, i + 2)
        else:
            assert error.startswith("row %d (line %d), field 'x3': expected a number, got 'warm'" % (i + 1, i + 2))
    return len(bad)


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="needs Linux /proc for VmHWM")
def test_a_million_rows_stream_in_bounded_memory(small_bundle):
    """Peak resident size of the scoring process for 1,000,000 rows against 100,000:
    a scorer that kept anything per row (1 KB a row would be 900 MB more) would grow;
    a streaming one stays within a few MB (allocator noise)."""
    tmp, folder, model, X = small_bundle
    peak_small, summary_small, out_small = _stream(small_bundle, 100000)
    assert summary_small.startswith("box.py: scored 100000 rows, 2 errors (first: row 33334 (line 33335)")
    assert _verify_output(out_small, 100000, model, X) == 2
    peak_big, summary_big, out_big = _stream(small_bundle, 1000000)
    assert summary_big.startswith("box.py: scored 1000000 rows, 20 errors (first: row 33334 (line 33335)")
    assert _verify_output(out_big, 1000000, model, X) == 20
    print("peak RSS: 100k rows %d KiB, 1M rows %d KiB" % (peak_small, peak_big))
    assert peak_big <= peak_small + 4096, (peak_small, peak_big)
