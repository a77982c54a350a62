"""Scale-out on Dask (boxwood.scale, `score --dask`, `verify --dask`): many partitions with bad
rows give, row for row and bit for bit, what one process gives on each file.

One two-worker LocalCluster for the module (worker processes, one thread each); the
command-line runs join it by its scheduler address, as `--dask tcp://...` does."""
from __future__ import annotations

import io
import json
import math
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("dask.dataframe")
distributed = pytest.importorskip("distributed")
pytest.importorskip("pyarrow")

import joblib  # noqa: E402
import pandas as pd  # noqa: E402

import boxwood_runtime  # noqa: E402
import zoo  # noqa: E402
from boxwood_runtime.stream import score_stream  # noqa: E402
from boxwood import scale  # noqa: E402
from boxwood.cli import main  # noqa: E402
from test_verify import document, write  # noqa: E402

PIPE = "pipe_hgbr_encoded"
NAN = "hgbc_nan"


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0")
    c = distributed.Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="module")
def tmp(tmp_path_factory):
    return tmp_path_factory.mktemp("scale")


def artefact(tmp, name):
    path = tmp / (name + ".json")
    if not path.exists():
        path.write_bytes(zoo.exported(name)[2])
    return path


def pipe_frame(n, start, seed):
    """Rows of the pipeline case with ids, text fields and planted missing values."""
    case = zoo.fitted(PIPE)
    frame = case.X.iloc[start:start + n].copy().reset_index(drop=True)
    rng = np.random.default_rng(seed)
    frame.loc[rng.random(n) < 0.15, "bmi"] = np.nan
    frame.loc[rng.random(n) < 0.15, "sex"] = np.nan  # missing as pandas reads it from a file
    frame.insert(0, "id", ["r%d" % (start + i) for i in range(n)])
    return frame


def one_process(art, path, raw=True):
    out = Path(str(path) + ".one")
    code = main(["score", str(art), str(path), "-o", str(out)] + (["--raw-scores"] if raw else []))
    assert code in (0, 2)
    return out.read_text(encoding="utf-8")


def csv_lines(text):
    return text.splitlines()


@pytest.fixture(scope="module")
def csv_files(tmp):
    """6 CSV files of the pipeline case; bad rows (a word in a number, a short row, a long row)
    in files 0, 3 and 5; an unseen category (scored: the pipeline encodes it as unknown) in 2 and 3."""
    folder = tmp / "csv"
    folder.mkdir()
    good = []
    for k in range(6):
        frame = pipe_frame(40 + 7 * k, 60 * k, k)
        if k in (2, 3):
            frame.loc[8, "bmi_band"] = "b_unseen"  # encoded as unknown by the pipeline: scored
        lines = frame.to_csv(index=False, lineterminator="\n").splitlines()
        bad = []
        if k in (0, 3):
            cells = lines[5].split(",")
            cells[3] = "warm"  # bmi
            lines[5] = ",".join(cells)
            bad.append(4)
        if k == 5:
            lines[12] = ",".join(lines[12].split(",")[:6])  # too few cells
            lines[20] = lines[20] + ",extra"  # too many cells
            bad += [11, 19]
        good.append(frame.drop(index=bad))
        (folder / ("day%02d.csv" % k)).write_text("\n".join(lines) + "\n", encoding="utf-8")
    return folder, good


@pytest.fixture(scope="module")
def jsonl_files(tmp):
    """3 JSON Lines files of the NaN classifier; bad lines (malformed JSON, an absent field, a
    word in a number) in files 0 and 2."""
    folder = tmp / "jsonl"
    folder.mkdir()
    case = zoo.fitted(NAN)
    good = []
    for k in range(3):
        rows = case.rows[100 * k:100 * k + 50 + 10 * k]
        lines, keep = [], []
        for i, r in enumerate(rows):
            obj = {"id": 1000 * k + i}
            obj.update(("x%d" % j, v) for j, v in enumerate(r))
            if k == 0 and i == 4:
                lines.append('{"id": 4, "x0": 1.5,')
                continue
            if k == 2 and i == 7:
                del obj["x3"]
            elif k == 2 and i == 20:
                obj["x1"] = "warm"
            else:
                keep.append(r)
            lines.append(json.dumps(obj))
        good.append(keep)
        (folder / ("part%d.jsonl" % k)).write_text("\n".join(lines) + "\n", encoding="utf-8")
    return folder, good


def concat(folder, ext):
    return [p.read_text(encoding="utf-8") for p in sorted(Path(folder).glob("part-*" + ext))]


def test_csv_partitions_give_what_one_process_gives_bit_for_bit(tmp, client, csv_files):
    folder, good = csv_files
    art = artefact(tmp, PIPE)
    out = tmp / "csv-out"
    code = main(["score", str(art), str(folder / "day*.csv"), "--dask", client.scheduler.address,
                 "-o", str(out), "--raw-scores"])
    assert code == 2  # error rows, as one process
    files = sorted(folder.glob("day*.csv"))
    outputs = concat(out, ".csv")
    assert len(outputs) == len(files) == 6
    n_errors = 0
    for path, text in zip(files, outputs):
        expected = one_process(art, path)
        assert text == expected  # header, ids, outputs, error rows, in order, byte for byte
        rows = csv_lines(text)[1:]
        assert len(rows) == len(path.read_text().splitlines()) - 1  # rows in = rows out
        n_errors += sum(1 for r in rows if not r.endswith(","))
    assert n_errors == 4  # two words in numbers, a short row, a long row
    # the raw scores are scikit-learn's on the good rows
    model = zoo.fitted(PIPE).model
    for frame, text in zip(good, outputs):
        scored = pd.read_csv(pd.io.common.StringIO(text), dtype=str, keep_default_na=False)
        ok = scored[scored["error"] == ""]
        assert list(ok["id"]) == list(frame["id"])
        as_read = pd.read_csv(pd.io.common.StringIO(frame.to_csv(index=False)))  # as pandas reads the file
        expected = model.predict(as_read.drop(columns="id"))
        assert [float(v) for v in ok["raw_0"]] == [float(v) for v in expected]
        assert all(float(a).hex() == float(b).hex() for a, b in zip(ok["raw_0"], expected))


def test_jsonl_partitions_give_what_one_process_gives_bit_for_bit(tmp, client, jsonl_files):
    folder, good = jsonl_files
    art = artefact(tmp, NAN)
    out = tmp / "jsonl-out"
    code = main(["score", str(art), str(folder / "*.jsonl"), "--dask", client.scheduler.address,
                 "-o", str(out), "--raw-scores"])
    assert code == 2
    files = sorted(folder.glob("*.jsonl"))
    outputs = concat(out, ".jsonl")
    assert len(outputs) == len(files) == 3
    errors = []
    for path, text in zip(files, outputs):
        assert text == one_process(art, path)
        rows = [json.loads(line) for line in text.splitlines()]
        assert len(rows) == len(path.read_text().splitlines())  # rows in = rows out
        errors += [(path.name, r["error"].split(":")[0]) for r in rows if r["error"]]
    assert errors == [("part0.jsonl", "row 5 (line 5)"), ("part2.jsonl", "row 8 (line 8), field 'x3'"),
                      ("part2.jsonl", "row 21 (line 21), field 'x1'")]
    model = zoo.fitted(NAN).model
    for keep, text in zip(good, outputs):
        ok = [json.loads(line) for line in text.splitlines()]
        ok = [r for r in ok if r["error"] is None]
        X = np.array([[np.nan if v is None else v for v in r] for r in keep], dtype=float)
        expected = model.decision_function(X)
        assert [r["raw_0"] for r in ok] == [float(v) for v in expected]
        assert all(math.copysign(1, r["raw_0"]) == math.copysign(1, v) for r, v in zip(ok, expected))


def test_parquet_partitions_read_typed_values(tmp, client):
    """Parquet's typed values are read as JSON values are: the output equals one process on the
    same rows written as JSON Lines with exactly read numbers, and scikit-learn on the file."""
    folder = tmp / "parquet"
    folder.mkdir()
    art = artefact(tmp, PIPE)
    frames = [pipe_frame(30, 300, 7), pipe_frame(25, 330, 8)]
    frames[1].loc[3, "sex"] = "other"  # the pipeline encodes an unseen category as unknown
    for k, frame in enumerate(frames):
        frame.to_parquet(folder / ("f%d.parquet" % k))
        with open(folder / ("f%d.jsonl.ref" % k), "w") as fh:
            for rec in frame.to_dict("records"):
                fh.write(json.dumps({k2: (None if isinstance(v, float) and v != v else v) for k2, v in rec.items()})
                         + "\n")
    out = tmp / "parquet-out"
    summary = scale.score_files(art, str(folder / "*.parquet"), str(out), client=client, raw_scores=True)
    assert summary == scale.Summary(55, 55, 0, 2, 2, None)
    device = boxwood_runtime.load(art.read_bytes())
    device.json_float = float  # the reference lines hold repr floats: read them exactly, as Parquet holds them
    model = zoo.fitted(PIPE).model
    for k, text in enumerate(concat(out, ".jsonl")):
        ref = io.StringIO()
        with open(folder / ("f%d.jsonl.ref" % k)) as fh:
            score_stream(device, fh, ref, raw_scores=True)
        assert text == ref.getvalue()
        rows = [json.loads(line) for line in text.splitlines()]
        expected = model.predict(pd.read_parquet(folder / ("f%d.parquet" % k)).drop(columns="id"))
        assert [float(r["raw_0"]).hex() for r in rows] == [float(v).hex() for v in expected]


def test_score_dataframe_maps_partitions_lazily(tmp, client, csv_files):
    import dask.dataframe as dd

    folder, good = csv_files
    art = artefact(tmp, PIPE)
    frame = pd.concat(good, ignore_index=True)
    ddf = dd.from_pandas(frame, npartitions=5)
    scored = scale.score_dataframe(str(art), ddf, raw_scores=True)
    assert scored.npartitions == 5 and list(scored.columns) == ["id", "prediction", "raw_0", "error"]
    result = scored.compute()
    assert len(result) == len(frame) and list(result["id"]) == list(frame["id"])
    assert result["error"].isna().all()
    expected = zoo.fitted(PIPE).model.predict(frame.drop(columns="id"))
    assert [float(v).hex() for v in result["raw_0"]] == [float(v).hex() for v in expected]
    # CSV cell texts: the same numbers as reading the file on one process
    cells = dd.from_pandas(pd.read_csv(folder / "day01.csv", dtype=object, keep_default_na=False), npartitions=3)
    texts = scale.score_dataframe(art.read_bytes(), cells, raw_scores=True, reading="text").compute()
    one = pd.read_csv(pd.io.common.StringIO(one_process(art, folder / "day01.csv")), dtype=str,
                      keep_default_na=False)
    assert [repr(v) for v in texts["raw_0"]] == list(one["raw_0"])


def model_file(tmp, name):
    path = tmp / (name + ".joblib")
    if not path.exists():
        joblib.dump(zoo.fitted(name).model, path)
    return str(path)


def test_verify_dask_passes_on_good_data(tmp, client, csv_files, capsys):
    folder, good = csv_files
    clean = tmp / "clean-csv"
    clean.mkdir()
    for k, frame in enumerate(good):
        frame.to_csv(clean / ("d%d.csv" % k), index=False)
    args = ["verify", model_file(tmp, PIPE), str(artefact(tmp, PIPE)), "--dask", client.scheduler.address,
            "--probes", "50", "--quiet", "--data"]
    report = tmp / "report.json"
    assert main(args + [str(clean / "*.csv"), "--report-json", str(report)]) == 0
    done = json.loads(report.read_text())
    assert done["verdict"] == "pass" and done["rows"]["data"] == sum(len(f) for f in good)  # every file's rows
    # a bad row in the data is bad input (exit 2), named by its file and row
    capsys.readouterr()
    assert main(args + [str(folder / "day0[03].csv")]) == 2
    assert "day00.csv" in capsys.readouterr().err


def test_verify_dask_fails_on_a_planted_fault(tmp, client, jsonl_files):
    folder, good = jsonl_files
    clean = tmp / "clean-jsonl"
    clean.mkdir()
    for k, rows in enumerate(good):
        with open(clean / ("d%d.jsonl" % k), "w") as fh:
            for r in rows:
                fh.write(json.dumps({"x%d" % j: v for j, v in enumerate(r)}) + "\n")
    _, doc = document(NAN)
    tree = doc["ensemble"]["trees"][3]
    leaf = tree["feature"].index(-1)
    tree["value"][leaf] += 0.25
    bad = write(doc, tmp / "bad.json")
    args = ["verify", model_file(tmp, NAN), "--data", str(clean / "*.jsonl"), "--dask", client.scheduler.address,
            "--probes", "0", "--quiet"]
    assert main(args[:2] + [str(artefact(tmp, NAN))] + args[2:]) == 0
    assert main(args[:2] + [str(bad)] + args[2:]) == 1


def test_missing_dask_is_bad_usage_with_the_install_hint(tmp, monkeypatch, capsys, csv_files):
    def missing():
        raise scale.MissingScale("scoring on Dask needs dask[dataframe], distributed and pyarrow: "
                                 + scale.INSTALL_HINT)

    monkeypatch.setattr(scale, "require", missing)
    folder, _ = csv_files
    code = main(["score", str(artefact(tmp, PIPE)), str(folder / "*.csv"), "--dask", "local", "-o",
                 str(tmp / "never")])
    assert code == 2 and 'pip install "boxwood[scale]"' in capsys.readouterr().err
    assert not (tmp / "never").exists()


def test_usage_errors(tmp, capsys, csv_files):
    folder, _ = csv_files
    art = str(artefact(tmp, PIPE))
    assert main(["score", art, str(folder / "*.csv"), "--dask", "local"]) == 2  # no -o
    assert main(["score", art, str(tmp / "nothing-*.csv"), "--dask", "local", "-o", str(tmp / "o")]) == 2
    assert "no file matches" in capsys.readouterr().err
    used = tmp / "used"
    used.mkdir()
    (used / "part-00000-old.csv").write_text("id\n")
    assert main(["score", art, str(folder / "*.csv"), "--dask", "local", "-o", str(used)]) == 2
    assert "already holds part-* files" in capsys.readouterr().err


def test_dask_local_starts_and_stops_its_own_cluster(tmp, jsonl_files, capsys):
    folder, _ = jsonl_files
    art = artefact(tmp, NAN)
    out = tmp / "local-out"
    assert main(["score", str(art), str(folder / "*.jsonl"), "--dask", "local", "--workers", "2", "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert "scored 180 rows, 3 errors, 3 partitions, 3 files written" in err
    for path, text in zip(sorted(folder.glob("*.jsonl")), concat(out, ".jsonl")):
        assert text == one_process(art, path, raw=False)
