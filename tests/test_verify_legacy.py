"""A float32 ONNX graph (ai.onnx.ml opset 3) states its own raw-score error bound in its metadata
(boxwood.raw_error_bound, derived from Higham's recursive-summation bound: N. J. Higham,
"Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM 2002, eq. (4.4)). verify holds
such a file to the bound it states instead of the default zero tolerance for raw scores: it
passes when the certified bound and every observed difference are within the stated bound, and
fails when the stated bound is smaller than what the graph really does (a planted fault)."""
from __future__ import annotations

import json

import pytest

import zoo
from boxwood.export import export
from boxwood.verify import verify

onnx = pytest.importorskip("onnx")
pytest.importorskip("onnxruntime")


def _legacy(tmp_path, name):
    case = zoo.fitted(name)
    path = tmp_path / ("%s.onnx" % name)
    result = export(case.model, path, legacy=True)
    assert result.ok, result.check
    return case, path


def _restate(path, out, factor):
    model = onnx.load(str(path))
    for p in model.metadata_props:
        if p.key == "boxwood.raw_error_bound":
            p.value = json.dumps([b * factor for b in json.loads(p.value)])
    onnx.save(model, str(out))
    return out


@pytest.mark.parametrize("name", ["hgbr_squared_error", "gbc_binary", "hgbc_multiclass_nan"])
def test_a_float32_graph_is_verified_against_the_bound_it_states(tmp_path, name):
    case, path = _legacy(tmp_path, name)
    result = verify(case.model, str(path), probes=600)
    assert result.passed, result.summary()
    raw = result.check("bound: raw")
    assert "held to the raw error bound the file states" in raw.summary
    ev = result.artefacts[0].evaluators[0]
    assert ev.properties["tolerance"].startswith("the raw error bound the file states")
    # the default run (no stated bound) would demand bit-identical raw scores
    assert result.check("empirical: raw").status == "pass"


def test_a_stated_bound_smaller_than_the_truth_fails(tmp_path):
    """Planted fault: the file claims a bound 10**6 times smaller than boxwood wrote."""
    case, path = _legacy(tmp_path, "hgbr_squared_error")
    lying = _restate(path, tmp_path / "lying.onnx", 1e-6)
    result = verify(case.model, str(lying), probes=600)
    assert not result.passed
    assert result.check("bound: raw").status == "fail"
    assert "exceeds the bound the file states" in "\n".join(result.check("bound: raw").details)


def test_given_tolerances_take_precedence_over_the_stated_bound(tmp_path):
    case, path = _legacy(tmp_path, "hgbr_squared_error")
    strict = verify(case.model, str(path), probes=300, abs_tol=0.0, rel_tol=0.0)
    assert strict.check("bound: raw").status == "fail"  # float32 sums are not bit-identical
    assert "tolerance" not in strict.artefacts[0].evaluators[0].properties
