"""Equivalence checker: prove that an exported artefact computes what its source model computes.

    from boxwood.verify import verify, assert_equivalent
    result = verify(fitted_model, ["model.json"], data="holdout.csv")
    print(result.summary()); result.write_json("verify.json"); result.write_junit("verify.xml")
    assert_equivalent(fitted_model, "model.json")        # in pytest: raises with the summary

Command line: ``boxwood verify MODEL ARTEFACT... [--data FILE] [--abs-tol A] [--rel-tol R]
[--report-json F] [--junit F]``; exit 0 pass, 1 parity failure, 2 bad usage or input.

Architecture (each module has one job):

* :mod:`boxwood.numerics` (shared with the float32 ONNX writer) - exact floating-point
  facts: the float64 end ``B`` of a float32-compared split's left set, next
  representable values, input domains, ulp distances, gamma_n.
* :mod:`.structure` - the structural proof: the source's and the artefact's
  :class:`~boxwood.ir.Ensemble` paired tree by tree (aligned on identical trees, so a
  dropped tree is found where it was dropped) and node by node; every difference with its
  location; per output a certified bound on |raw difference| over ALL inputs.
* :mod:`.bounds` - that bound carried through the post-transform (with its derivation),
  and the default tolerances per output kind.
* :mod:`.probes` - rows for the empirical check: the user's data, then specials (NaN,
  categories, unseen categories, extremes), split probes that reach each node with values
  on both sides of its boundary, random rows; bounded by ``probes``.
* :mod:`.empirical` - per output: max abs / rel error, max ulps, rows over tolerance,
  label flips and raw-score crossings.
* :mod:`.checks` - one function per check (self-check, structure, bounds, empirical,
  decisions, bound holds) and the per-evaluator report.
* :mod:`.report` - :class:`VerifyResult` and its terminal summary, JSON report
  (schemas/verify-report.schema.json) and JUnit XML.
* :mod:`.core` - ``verify`` and ``assert_equivalent``: load, open, make rows, run.

Artefacts are opened through the format registry (:mod:`boxwood.formats`); evaluators
follow the contract in :mod:`boxwood.contract`; the source model is
:class:`boxwood.sources.model.SourceEvaluator`. A new format registered with
``boxwood.formats.register(Format(..., open=...))`` is verified with no change here: the
structural proof and the bound take each evaluator's precisions and summation into account.
"""
from ..contract import Evaluator, Outputs
from ..formats import Artefact, open_artefact
from ..sources.model import SourceEvaluator
from .core import assert_equivalent, verify
from .probes import DEFAULT_PROBE_ROWS
from .report import Check, VerifyResult

__all__ = ["verify", "assert_equivalent", "VerifyResult", "Check", "Evaluator", "Outputs", "Artefact",
           "open_artefact", "SourceEvaluator", "DEFAULT_PROBE_ROWS"]
