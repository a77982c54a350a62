"""Every zoo model's C target built for a Cortex-M4 with hard float (the project's own startup
file and linker script, newlib's semihosting) and run under QEMU (``-M mps2-an386``): the raw
values bit for bit, and the predictions within 4 ulps, of scikit-learn's own numbers.

Outside references: the fitted scikit-learn models of tests/zoo.py (data sets shipped with
scikit-learn, sources named there) on their reference rows and a sample of threshold probes
(one float step either side of the split thresholds, missing values, every category;
tests/test_conformance.py builds them); arm-none-eabi-gcc and newlib's libm (doubles in
software on this single-precision FPU; exp and pow within a few ulps of glibc's and numpy's,
the common allowance).
"""
from __future__ import annotations

import os

import numpy as np
import pytest

import zoo
from boxwood.formats.c import board
from boxwood.formats.c import reader as c_reader
from boxwood.formats.c import writer as c_writer
from boxwood.formats.c.evaluators import CInputs
from boxwood.numerics import ulp_distance
from boxwood.sources.model import SourceEvaluator
from test_conformance import probe_rows

C_CASES = [n for n in zoo.ALL_CASES if n not in zoo.PIPELINE_CASES + zoo.C_REFUSED]  # calibration included
PROBES = 60  # threshold probes per model, besides the reference rows
ULPS = 4


@pytest.fixture(scope="module")
def toolchain():
    reason = board.unavailable_reason()
    if reason:
        if os.environ.get("CI"):
            pytest.fail("CI must run the Cortex-M4 tests, but: %s" % reason)
        pytest.skip(reason)


@pytest.mark.parametrize("name", C_CASES)
def test_zoo_model_on_an_emulated_cortex_m4(name, toolchain, tmp_path):
    case, ensemble, _ = zoo.exported(name)
    c_writer.write(ensemble, tmp_path / "m.c")
    back = c_reader.read_c(tmp_path / "m.c")
    probes = probe_rows(case, ensemble)
    step = max(1, (len(probes) - len(case.rows)) // PROBES)
    rows = list(ensemble.reference.rows) + probes[len(case.rows)::step][:PROBES] + case.rows[:10]
    want = SourceEvaluator(case.model, ensemble).evaluate(rows)
    # the C inputs: NaN for missing, a text category as its position (as the header says)
    x = CInputs(back).matrix(rows)
    n_exact = want.raw.shape[1]
    run = board.run_selftest(tmp_path / "m4", "m", [tmp_path / "m.c"], x.tolist(), n_exact, want.transformed.shape[1])
    assert all(rc == 0 for rc, _, _ in run.results)
    raw = np.array([r for _, r, _ in run.results])
    out = np.array([o for _, _, o in run.results])
    bad = np.flatnonzero(np.any(raw != want.raw, axis=1))
    assert bad.size == 0, "row %d: Cortex-M4 %r, scikit-learn %r" % (bad[0], raw[bad[0]], want.raw[bad[0]])
    assert int(ulp_distance(out, want.transformed).max()) <= ULPS
    assert run.footprint["flash"] > 0 and run.footprint["ram"] > 0

