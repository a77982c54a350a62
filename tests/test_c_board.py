"""The Cortex-M4 board harness (boxwood.formats.c.board): C built for a Cortex-M4 and run
under QEMU's mps2-an386 gives the bits Python computes.

The model here is a toy written by hand to the generated C API (docs/c-target.md): one tree
with two splits, a missing value going left at the first split and right at the second,
an error code for infinite inputs, and a logistic prediction. Python computes the same
numbers: the raw value is one IEEE 754 double addition, so it must match bit for bit; the
prediction goes through exp, where newlib's and the host's C library may round differently,
so it must match within 4 ulps.

Outside reference: IEEE 754-2008 binary64 (round to nearest even for + and /), and
CPython's float, which uses those doubles (float.hex and struct round-trip exactly).

Without arm-none-eabi-gcc, arm-none-eabi-size and qemu-system-arm (installed by .ci/run)
the board tests skip locally and fail under CI (CI set).
"""
from __future__ import annotations

import math
import os
import shutil
import struct
import subprocess
import time

import pytest

from boxwood.formats.c import board

MODEL_H = """\
#ifndef TOY_H
#define TOY_H
#define TOY_N_FEATURES 2
#define TOY_N_OUTPUTS 1
#define TOY_N_PREDICTIONS 2
int toy_raw(const double *x, double *raw);
int toy_predict(const double *x, double *out);
#endif
"""

MODEL_C = """\
#include <stdint.h>
#include <math.h>
#include <float.h>
#include "toy.h"

static const double leaf[3] = { -0x1.4p+0, 0x1.8p-1, 0x1.999999999999ap-3 };

int toy_raw(const double *x, double *raw)
{
    double a = x[0], b = x[1], v;
    if (isinf(a) || isinf(b)) return 2;
    if (isnan(a) || a <= 0x1p-1) {          /* x0 <= 0.5; missing goes left */
        if (!(b < 0x1.2p+1)) v = leaf[1];   /* x1 < 2.25; missing goes right */
        else v = leaf[0];
    } else {
        v = leaf[2];
    }
    raw[0] = 0x1.999999999999ap-4 + v;      /* base score 0.1 */
    return 0;
}

int toy_predict(const double *x, double *out)
{
    double raw[TOY_N_OUTPUTS];
    int rc = toy_raw(x, raw);
    if (rc != 0) return rc;
    out[1] = 1.0 / (1.0 + exp(-raw[0]));
    out[0] = 1.0 - out[1];
    return 0;
}
"""

NAN, INF = float("nan"), float("inf")
ROWS = [
    [0.25, 1.0], [0.5, 2.25], [0.5, 2.2499999999999996], [0.5000000000000001, 0.0],
    [NAN, NAN], [NAN, 1.0], [7.0, NAN], [-0.0, -0.0], [5e-324, -5e-324],
    [1e308, -1e308], [-INF, 0.0], [0.0, INF], [2.0, 1.0],
]


def toy(x):
    """(rc, raw, out) as the C computes them."""
    a, b = x
    if math.isinf(a) or math.isinf(b):
        return 2, [0.0], [0.0, 0.0]
    if math.isnan(a) or a <= 0.5:
        v = 0.75 if not (b < 2.25) else -1.25
    else:
        v = 0.2
    raw = 0.1 + v
    p = 1.0 / (1.0 + math.exp(-raw))
    return 0, [raw], [1.0 - p, p]


def bits(v):
    return struct.unpack("<q", struct.pack("<d", v))[0]


def ulps(a, b):
    """Distance in units in the last place between two finite doubles of the same sign."""
    return abs(bits(a) - bits(b))


def assert_matches_python(results, rows=ROWS):
    assert len(results) == len(rows)
    for row, (rc, raw, out) in zip(rows, results):
        want_rc, want_raw, want_out = toy(row)
        assert rc == want_rc, row
        assert [bits(v) for v in raw] == [bits(v) for v in want_raw], (row, raw, want_raw)
        assert len(out) == len(want_out)
        for got, want in zip(out, want_out):
            assert ulps(got, want) <= 4, (row, got.hex(), want.hex())


@pytest.fixture(scope="module")
def tools():
    reason = board.unavailable_reason()
    if reason:
        if os.environ.get("CI"):
            pytest.fail("the Cortex-M4 toolchain is required in CI: " + reason)
        pytest.skip(reason)
    return board.toolchain()


@pytest.fixture(scope="module")
def model_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("toy")
    (d / "toy.h").write_text(MODEL_H)
    (d / "toy.c").write_text(MODEL_C)
    return d


@pytest.fixture(scope="module")
def selftest(tools, model_dir, tmp_path_factory):
    return board.run_selftest(tmp_path_factory.mktemp("m4"), "toy", [model_dir / "toy.c"], ROWS, 1, 2)


# ---- without the toolchain ------------------------------------------------------------------

def test_c_double_literals_are_exact():
    for v in (0.1, -0.0, 5e-324, 1.7976931348623157e308, -2.5):
        assert float.fromhex(board.c_double(v)) == v and math.copysign(1, float.fromhex(board.c_double(v))) == math.copysign(1, v)
    assert (board.c_double(NAN), board.c_double(INF), board.c_double(-INF)) == ("NAN", "INFINITY", "-INFINITY")


def test_selftest_main_refuses_bad_input():
    with pytest.raises(ValueError):
        board.selftest_main_c("2bad", [[1.0]], 1, 1)
    with pytest.raises(ValueError):
        board.selftest_main_c("toy", [[1.0], [1.0, 2.0]], 1, 1)


def test_parse_reads_bits_and_refuses_truncated_output():
    text = "row 0 rc 0 raw 3fb999999999999a out 0000000000000000 8000000000000000\nrow 1 rc 3 raw %s out %s %s\ndone 2\n" % (
        "7ff8000000000000", "fff0000000000000", "0000000000000001")
    (rc0, raw0, out0), (rc1, raw1, out1) = board.parse_selftest_output("qemu noise\n" + text)
    assert (rc0, raw0, [bits(v) for v in out0]) == (0, [0.1], [0, bits(-0.0)])
    assert rc1 == 3 and math.isnan(raw1[0]) and out1 == [-INF, 5e-324]
    for cut in (text[:-7], text[:40], "row 0 rc 0 raw 3fb9 out\ndone 1\n", "done 3\n" + text[:-7] + "\n"):
        with pytest.raises(board.BoardError):
            board.parse_selftest_output(cut)
    with pytest.raises(board.BoardError, match="truncated"):
        board.parse_selftest_output(text.replace("done 2", "done 3"))


def test_makefile_recipes_use_tabs():
    mk = board.makefile("toy")
    recipes = [ln for ln in mk.splitlines() if ln.startswith((" ", "\t"))]
    assert recipes and all(ln.startswith("\t") for ln in recipes)
    for target in ("all:", "host:", "qemu:", "clean:"):
        assert any(ln.startswith(target) for ln in mk.splitlines()), target


# ---- on the board ---------------------------------------------------------------------------

def test_m4_results_match_python_bit_for_bit(selftest):
    assert_matches_python(selftest.results)
    assert selftest.seconds < 30


def test_footprint_is_positive(selftest, model_dir):
    fp = selftest.footprint
    assert all(isinstance(fp[k], int) and fp[k] > 0 for k in ("text", "data", "bss"))
    assert fp["flash"] == fp["text"] + fp["data"] and fp["ram"] == fp["data"] + fp["bss"]
    own = board.footprint(selftest.elf.parent / "toy.o")
    assert 0 < own["text"] < fp["text"]


def test_the_elf_is_hard_float_cortex_m4(selftest):
    readelf = shutil.which("arm-none-eabi-readelf")
    if readelf is None:
        pytest.skip("arm-none-eabi-readelf is not on PATH")
    attrs = subprocess.run([readelf, "-A", str(selftest.elf)], capture_output=True, text=True).stdout
    assert "Tag_CPU_name: \"Cortex-M4\"" in attrs or "Tag_CPU_arch: v7E-M" in attrs
    assert "Tag_ABI_VFP_args: VFP registers" in attrs


def test_broken_c_raises_board_error_with_the_compiler_message(tools, model_dir, tmp_path):
    bad = tmp_path / "bad.c"
    bad.write_text("int toy_raw(const double *x, double *raw) { return undeclared_thing; }\n")
    with pytest.raises(board.BoardError, match="undeclared_thing") as err:
        board.build_elf(tmp_path, [bad])
    assert "bad.c" in str(err.value)
    warn = tmp_path / "warn.c"  # warnings are errors for model sources
    warn.write_text("int main(void) { int unused; return 0; }\n")
    with pytest.raises(board.BoardError, match="unused"):
        board.build_elf(tmp_path, [warn])


def test_header_disagreeing_with_the_vectors_fails_to_build(tools, model_dir, tmp_path):
    with pytest.raises(board.BoardError, match="boxwood_check_n_outputs"):
        board.run_selftest(tmp_path, "toy", [model_dir / "toy.c"], ROWS, 2, 2)


def test_sizes_spelt_with_the_prefix_as_given(tools, tmp_path):
    """The header may spell its sizes toy_N_... instead of TOY_N_..."""
    (tmp_path / "toy.h").write_text(MODEL_H.replace("TOY_N_", "toy_N_"))
    (tmp_path / "toy.c").write_text(MODEL_C.replace("TOY_N_", "toy_N_"))
    assert_matches_python(board.run_selftest(tmp_path / "w", "toy", [tmp_path / "toy.c"], ROWS, 1, 2).results)
    with pytest.raises(board.BoardError, match="boxwood_check_n_features"):
        board.run_selftest(tmp_path / "w", "toy", [tmp_path / "toy.c"], [[1.0, 2.0, 3.0]], 1, 2)


def test_zero_rows_build_and_print_done(tools, model_dir, tmp_path):
    assert board.run_selftest(tmp_path, "toy", [model_dir / "toy.c"], [], 1, 2).results == []


def test_a_fault_ends_qemu_and_a_hang_is_killed(tools, tmp_path):
    fault = tmp_path / "fault.c"
    fault.write_text("int main(void) { return *(volatile int *)0xF0000000u; }\n")
    start = time.monotonic()
    with pytest.raises(board.BoardError, match="board: fault, exception 0x03"):  # HardFault
        board.run_qemu(board.build_elf(tmp_path, [fault], name="fault"), timeout=20)
    assert time.monotonic() - start < 10
    hang = tmp_path / "hang.c"
    hang.write_text("int main(void) { volatile int x = 0; for (;;) { x++; } }\n")
    elf = board.build_elf(tmp_path, [hang], name="hang")
    with pytest.raises(board.BoardError, match="killed"):
        board.run_qemu(elf, timeout=1.5)


def test_startup_enables_the_fpu(tools, model_dir, tmp_path, monkeypatch):
    """Planted fault: without the CPACR write, the first floating-point instruction faults."""
    line = "CPACR |= 0xFu << 20;"
    assert line in board.STARTUP_C
    monkeypatch.setattr(board, "STARTUP_C", board.STARTUP_C.replace(line, ""))
    with pytest.raises(board.BoardError, match="board: fault"):
        board.run_selftest(tmp_path, "toy", [model_dir / "toy.c"], ROWS[:1], 1, 2, timeout=20)


def test_makefile_host_and_qemu_targets(tools, model_dir, tmp_path):
    if shutil.which("make") is None or shutil.which("cc") is None:
        if os.environ.get("CI"):
            pytest.fail("make and cc are required in CI")
        pytest.skip("make or cc is not on PATH")
    for name in ("toy.c", "toy.h"):
        shutil.copy(model_dir / name, tmp_path / name)
    board.write_bundle(tmp_path, "toy", ROWS, 1, 2)
    outputs = {}
    for target in ("all", "host", "qemu"):
        proc = subprocess.run(["make", "-s", target], cwd=tmp_path, capture_output=True, text=True,
                              stdin=subprocess.DEVNULL, timeout=120)
        assert proc.returncode == 0, (target, proc.stderr)
        outputs[target] = proc.stdout
    assert "text" in outputs["all"] and (tmp_path / "toy.elf").is_file()
    assert_matches_python(board.parse_selftest_output(outputs["host"]))
    assert_matches_python(board.parse_selftest_output(outputs["qemu"]))
    subprocess.run(["make", "-s", "clean"], cwd=tmp_path, check=True, capture_output=True)
    assert not (tmp_path / "toy.elf").exists() and not (tmp_path / "toy-host").exists()
