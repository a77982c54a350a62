"""Scale-out on Dask (boxwood.scale, `score --dask`, `verify --dask`): many partitions with bad
rows give, row for row and bit for bit, what one process gives on each file.

One two-worker LocalCluster for the module (worker processes, one thread each); the
command-line runs join it by its scheduler address, as `--dask tcp://...` does."""
from __future__ import annotations

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

import zoo  # noqa: E402
from boxwood import scale  # noqa: E402
from boxwood.cli import main  # noqa: E402
from test_verify import document, write  # noqa: E402

PIPE = "pipe_hgbr_encoded"
NAN = "hgbc_nan"


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None)
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
    frame.loc[rng.random(n) < 0.15, "sex"] = None
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
