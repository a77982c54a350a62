"""The scoring core under MicroPython gives the same bits as under CPython.

MicroPython runs for real: the official WebAssembly port from the npm registry
(``@micropython/micropython-webassembly-pyscript``, pinned in tests/micropython/package.json
and installed by .ci/run into tests/micropython/node_modules), run by node through
exporter/boxwood/micropython_run.mjs. The port cannot read host files, so each run
carries scorer.py, the artefact and the rows into the port's in-memory file system.

Outside reference: CPython running the very same program (tests/micropython/score_rows.py)
on the same files; for the platform facts, CPython's correctly rounded float() (Python
documentation, "Floating Point Arithmetic: Issues and Limitations": repr and float
round-trip exactly) and IEEE 754-2008 binary64 bit patterns.

Two ports are exercised: 1.27.0 (current; its float parser is correctly rounded) and
1.23.0, whose parser is not (it misreads, e.g., 1e23), so the scorer must switch to its
exact parser there; a planted-fault check shows the switch is needed.

Without node or the ports these tests skip locally, and fail under CI (CI=true).
"""
from __future__ import annotations

import json
import os
import struct
import subprocess
import sys
from pathlib import Path

import pytest

import zoo
from boxwood import micropython as mp

HERE = Path(__file__).resolve().parent
PORTS = HERE / "micropython" / "node_modules"
CURRENT = PORTS / "@micropython" / "micropython-webassembly-pyscript"
OLD = PORTS / "micropython-1.23"
PROGRAM = (HERE / "micropython" / "score_rows.py").read_text()
SCORER = mp.SCORER.read_bytes()
DATA_ROWS = 40
PROBES = 260


def _need(port):
    reason = mp.unavailable_reason(port)
    if reason:
        if os.environ.get("CI"):
            pytest.fail("MicroPython is required in CI: " + reason)
        pytest.skip(reason)


def _bits_text(v):
    return "\x00" + struct.pack("<d", v).hex()


def _transport(rows):
    return [[_bits_text(v) if isinstance(v, float) else v for v in r] for r in rows]


def sample_rows(name):
    """A sample of the conformance rows: data rows, threshold probes (at, one float
    step below and above each threshold, float32 steps too for float32 models),
    NaN and category probes, taken evenly from test_conformance.probe_rows."""
    from test_conformance import probe_rows

    case, ensemble, data = zoo.exported(name)
    rows = probe_rows(case, ensemble)
    n_data = len(case.rows)
    probes = rows[n_data:]
    step = max(1, len(probes) // PROBES)
    return rows[:DATA_ROWS] + probes[::step] + probes[-20:]


def run_cpython(tmp_path, files, exact=None):
    box = tmp_path / "box"
    box.mkdir(exist_ok=True)
    for name, content in files.items():
        (box / name).write_bytes(content if isinstance(content, bytes) else content.encode())
    head = "BOX = %r\n" % str(box) + ("EXACT = %r\n" % exact if exact is not None else "")
    done = subprocess.run([sys.executable, "-I", "-S", "-c", head + PROGRAM], capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    return done.stdout.splitlines()


def run_micropython(port, files, exact=None):
    head = "BOX = '/box'\n" + ("EXACT = %r\n" % exact if exact is not None else "")
    done = mp.run(head + PROGRAM, {"/box/" + k: v for k, v in files.items()}, heapsize=16 << 20,
                  pystack=16384, port=port)
    assert done.returncode == 0, done.stderr
    return done.stdout.splitlines()


def compare(name, port, tmp_path, exact=None):
    case, ensemble, data = zoo.exported(name)
    rows = sample_rows(name)
    files = {"scorer.py": SCORER, "model.json": data, "rows.json": json.dumps(_transport(rows))}
    want = run_cpython(tmp_path, files)
    got = run_micropython(port, files, exact)
    return want, got, len(rows)


def _ulps(a_hex, b_hex):
    from boxwood_runtime.scorer import ulp_distance

    if a_hex == b_hex:
        return 0
    if "nan" in (a_hex, b_hex):
        return 1 << 62
    return ulp_distance(*(struct.unpack("<d", bytes.fromhex(h))[0] for h in (a_hex, b_hex)))


def _assert_same(want, got, n_rows):
    """Trees, raw scores and class labels: identical. Transformed outputs (exp, logistic,
    softmax, 2 ** x) and predictions made from them: within SELF_CHECK_ULPS, because
    MicroPython brings its own libm, whose exp may round differently from CPython's
    (glibc) in the last place. Returns the largest distance seen, in ulps."""
    from boxwood_runtime.scorer import SELF_CHECK_ULPS

    assert want[0] == "platform 1"  # CPython's parser is correctly rounded
    assert len(got) == len(want)
    assert sum(1 for line in want if line.startswith("row ")) == n_rows
    scored = sum(1 for line in want if line.startswith("row ") and " E " not in line)
    assert scored >= n_rows // 2  # most rows score (the rest are refusals, compared too)
    worst = 0
    for w, g in zip(want[1:], got[1:]):
        if not w.startswith("row ") or " E " in w:
            assert g == w
            continue
        w_raw, w_out, w_label = w.split(" | ")
        g_raw, g_out, g_label = g.split(" | ")
        assert g_raw == w_raw  # raw scores: bit for bit
        pairs = list(zip(w_out.split(), g_out.split()))
        w_label, g_label = json.loads(w_label), json.loads(g_label)
        if isinstance(w_label, list):
            pairs += list(zip(w_label, g_label))
        elif isinstance(w_label, str) and len(w_label) == 16 and not w_label.strip("0123456789abcdef"):
            pairs.append((w_label, g_label))  # a regressor's prediction: a float
        else:
            assert g_label == w_label  # labels: identical
        assert len(g_out.split()) == len(w_out.split())
        for a, b in pairs:
            worst = max(worst, _ulps(a, b))
    assert worst <= SELF_CHECK_ULPS
    return worst


# ----------------------------------------------------------------------------- platform
def test_port_is_micropython_1_2x_with_double_precision_floats():
    _need(CURRENT)
    code = ("import sys, struct\n"
            "print(sys.implementation.name, '.'.join(str(v) for v in sys.implementation.version[:3]))\n"
            "print(struct.pack('<d', 1.0 + 2.0 ** -52).hex(), struct.pack('<d', 0.1).hex())\n"
            "print(2.0 ** 53 + 1.0 == 2.0 ** 53, 2.0 ** 24 + 1.0 == 2.0 ** 24)\n")
    lines = mp.run(code, port=CURRENT).stdout.split("\n")
    name, version = lines[0].split()
    assert name == "micropython" and version.startswith("1.2")
    assert version == mp.port_version(CURRENT)
    # binary64 bit patterns (IEEE 754): 1 + 2**-52 is 0x3FF0000000000001, 0.1 is 0x3FB999999999999A.
    assert lines[1] == struct.pack("<d", 1.0 + 2.0 ** -52).hex() + " " + struct.pack("<d", 0.1).hex()
    # float64 cannot hold 2**53 + 1, but holds 2**24 + 1 (a float32 could not).
    assert lines[2] == "True False"


@pytest.mark.parametrize("port, trusted", [(CURRENT, "1"), (OLD, "0")], ids=["1.27", "1.23"])
def test_float_parser_probe_matches_cpython(port, trusted):
    """The scorer's probe strings, parsed by the port's json, against CPython's float()."""
    _need(port)
    from boxwood_runtime import scorer

    texts = [t for t, _ in scorer._PARSER_PROBES]
    code = ("import json, struct\n"
            "for v in json.loads(%r):\n"
            "    print(struct.pack('<d', v).hex())\n" % ("[" + ",".join(texts) + "]"))
    got = mp.run(code, port=port).stdout.split()
    want = [struct.pack("<d", float(t)).hex() for t in texts]
    assert [struct.pack("<Q", bits).hex() for _, bits in scorer._PARSER_PROBES] == want
    wrong = [t for t, g, w in zip(texts, got, want) if g != w]
    # 1.27 reads them all right; 1.23 gets several wrong (so the scorer must not trust it).
    assert (not wrong) == (trusted == "1"), wrong


# ----------------------------------------------------------------------------- the zoo
@pytest.mark.parametrize("name", zoo.ALL_CASES if hasattr(zoo, "ALL_CASES") else zoo.CASES)
def test_zoo_bit_for_bit_on_micropython(name, tmp_path):
    """Every threshold and leaf as built, then raw scores, transformed outputs and
    predictions of data rows and threshold/NaN/category probes: identical bits."""
    _need(CURRENT)
    want, got, n = compare(name, CURRENT, tmp_path)
    assert got[0] == "platform 1"
    worst = _assert_same(want, got, n)
    print("%s: transformed outputs within %d ulp of CPython" % (name, worst))


OLD_CASES = ["gbr_squared_error", "gbc_multiclass", "hgbc_categorical", "hgbr_nan", "hgbr_poisson",
             "pipe_hgbc_onehot_scaled", "pipe_gbr_target_encoded"]  # issue 15: lookup and arithmetic steps


@pytest.mark.parametrize("name", OLD_CASES)
def test_exact_parser_on_micropython_1_23(name, tmp_path):
    """On 1.23 the probe rejects the platform's parser, the exact one reads the artefact,
    and the results match CPython bit for bit."""
    _need(OLD)
    want, got, n = compare(name, OLD, tmp_path)
    assert got[0] == "platform 0"
    _assert_same(want, got, n)


def test_planted_fault_platform_parser_on_1_23_is_caught(tmp_path):
    """Planted fault: force 1.23 to use its own parser. Then some zoo artefact is either
    refused by its own self-check or holds thresholds/leaves whose bits differ from
    CPython's: the exact parser is needed, and the self-check is a last line of defence."""
    _need(OLD)
    refused, moved = [], 0
    for name in OLD_CASES:
        want, got, n = compare(name, OLD, tmp_path, exact=False)
        assert got[0] == "platform 0"
        if got[1].startswith("refused "):
            assert "self-check failed" in got[1]
            refused.append(name)
        else:
            moved += sum(1 for w, g in zip(want, got) if w.startswith("tree ") and w != g)
    assert refused or moved, "1.23's own parser read every zoo number right: the probe is too strict"


# ----------------------------------------------------------------------------- exact parser
def test_exact_float_matches_cpython_float():
    """scorer.exact_float against CPython's correctly rounded float() on the repr of
    random doubles of every exponent, decimal strings near halfway points, subnormals
    and overflow."""
    import random

    from boxwood_runtime.scorer import exact_float

    rnd = random.Random(7)
    texts = []
    for _ in range(4000):
        v = struct.unpack("<d", struct.pack("<Q", rnd.getrandbits(64)))[0]
        if v == v and abs(v) != float("inf"):
            texts.append(repr(v))
    for _ in range(2000):  # 17 to 25 random digits: often near a halfway point
        digits = "".join(rnd.choice("0123456789") for _ in range(rnd.randint(17, 25)))
        texts.append("%s.%se%d" % (digits[0], digits[1:], rnd.randint(-330, 310)))
    texts += ["0", "-0.0", "1e23", "2.4703282292062327e-324", "2.4703282292062328e-324", "1e-400",
              "1.7976931348623157e308", "1.7976931348623158e308", "1.8e308", "1e400", "-1e400",
              "9007199254740993", "9007199254740995", "0.1", "4.9406564584124654e-324",
              "2.2250738585072011e-308", "2.2250738585072014e-308", "1E+2", "0.000001e6"]
    for t in texts:
        assert struct.pack("<d", exact_float(t)) == struct.pack("<d", float(t)), t


def test_exact_json_parser_reads_every_zoo_artefact_as_json_does():
    """The exact JSON reader against CPython's json.loads on every zoo artefact (equal
    documents, floats compared by bits)."""
    from boxwood_runtime.scorer import _json_exact

    def same(a, b):
        if isinstance(a, float) or isinstance(b, float):
            return type(a) is type(b) and struct.pack("<d", a) == struct.pack("<d", b)
        if isinstance(a, dict):
            return isinstance(b, dict) and a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
        if isinstance(a, list):
            return isinstance(b, list) and len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
        return type(a) is type(b) and a == b

    for name in zoo.CASES[::3]:
        data = zoo.exported(name)[2]
        assert same(_json_exact(data), json.loads(data)), name
    text = b' {"a" : [1, -2.5e-3, "x\\"y\\\\", true, false, null, {}], "b\\u00e9": []} '
    assert same(_json_exact(text), json.loads(text))
    for bad in (b"[1,", b'{"a" 1}', b"[1] x", b'"abc', b"[nan]"):
        with pytest.raises((ValueError, IndexError)):
            _json_exact(bad)
