"""The verification result and its three renderings: terminal summary, JSON report, JUnit XML.

The JSON report is described by schemas/verify-report.schema.json (draft 2020-12).
JUnit XML: one <testsuite> per artefact and evaluator, one <testcase> per check; a failed
check is a <failure>, a check that does not apply is <skipped>.
"""
from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional, Tuple, Union

REPORT_NAME = "boxwood.verify-report"
REPORT_VERSION = 1
STATUSES = ("pass", "fail", "skip")


@dataclass
class Check:
    """One check of one artefact (``evaluator`` None: about the artefact file itself)."""

    name: str
    artefact: str
    evaluator: Optional[str]
    status: str
    summary: str
    details: List[str] = field(default_factory=list)
    seconds: float = 0.0

    def to_dict(self) -> Dict[str, Any]:
        return {"name": self.name, "artefact": self.artefact, "evaluator": self.evaluator,
                "status": self.status, "summary": self.summary, "details": list(self.details),
                "seconds": round(self.seconds, 6)}


@dataclass
class EvaluatorReport:
    name: str
    properties: Dict[str, Any]
    structure: Dict[str, Any]
    bound: Dict[str, Any]
    empirical: Dict[str, Any]
    checks: List[Check]

    @property
    def passed(self) -> bool:
        return all(c.status != "fail" for c in self.checks)

    def to_dict(self) -> Dict[str, Any]:
        return {"name": self.name, "verdict": "pass" if self.passed else "fail",
                "properties": self.properties, "structure": self.structure, "bound": self.bound,
                "empirical": self.empirical, "checks": [c.to_dict() for c in self.checks]}


@dataclass
class ArtefactReport:
    path: str
    format: str
    digest: Optional[str]
    self_check: Optional[Dict[str, Any]]
    checks: List[Check]  # about the file itself
    evaluators: List[EvaluatorReport]
    notes: List[str] = field(default_factory=list)

    @property
    def all_checks(self) -> List[Check]:
        return list(self.checks) + [c for e in self.evaluators for c in e.checks]

    @property
    def passed(self) -> bool:
        return all(c.status != "fail" for c in self.all_checks)

    def to_dict(self) -> Dict[str, Any]:
        return {"path": self.path, "format": self.format, "digest": self.digest,
                "verdict": "pass" if self.passed else "fail", "self_check": self.self_check,
                "notes": list(self.notes),
                "checks": [c.to_dict() for c in self.checks],
                "evaluators": [e.to_dict() for e in self.evaluators]}


@dataclass
class VerifyResult:
    """What ``boxwood.verify.verify`` returns: the verdict and everything behind it."""

    model: Dict[str, Any]
    artefacts: List[ArtefactReport]
    rows: Dict[str, Any]
    tolerances: Dict[str, Any]
    settings: Dict[str, Any]
    notes: List[str] = field(default_factory=list)
    seconds: float = 0.0
    # Set when the run met bad input (an unreadable model, artefact or data file): the
    # message and the exit code the command line returns (2). The report still lists every
    # artefact, a bad one as a failing check with its reason.
    error: Optional[Dict[str, Any]] = None
    # Probe coverage per feature (core._coverage), for the HTML report only (not in the JSON
    # report); None when no rows were made (a run that stopped on bad input).
    coverage: Optional[Dict[str, Any]] = None

    @classmethod
    def bad_input(cls, model_label: str, model_path: Optional[str], artefact_paths: List[str], message: str,
                  settings: Dict[str, Any]) -> "VerifyResult":
        """The result of a run that stopped on bad input before anything was compared: every
        artefact gets a failing ``input`` check with the reason, so that CI shows it."""
        unknown = "not computed: the run stopped on bad input"
        checks = [ArtefactReport(p, "not opened", None, None,
                                 [Check("input", p, None, "fail", "bad input: " + message, [message])], [])
                  for p in artefact_paths]
        return cls(
            model={"label": model_label, "path": model_path, "estimator": None, "task": None, "trees": None,
                   "nodes": None, "outputs": None, "post_transform": None, "compare_precision": None,
                   "classes": None},
            artefacts=checks,
            rows={"total": 0, "data": 0, "special": 0, "split": 0, "random": 0},
            tolerances={k: {"abs": 0.0, "rel": 0.0, "origin": "default", "why": unknown}
                        for k in ("raw", "transformed")},
            settings=settings, notes=[message], error={"message": message, "exit_code": 2})

    @property
    def checks(self) -> List[Check]:
        return [c for a in self.artefacts for c in a.all_checks]

    @property
    def passed(self) -> bool:
        return all(a.passed for a in self.artefacts)

    @property
    def verdict(self) -> str:
        return "pass" if self.passed else "fail"

    def failures(self) -> List[Check]:
        return [c for c in self.checks if c.status == "fail"]

    def check(self, name: str, evaluator: Optional[str] = None, artefact: Optional[str] = None) -> Check:
        """The first check called ``name`` (optionally of one evaluator / artefact)."""
        for c in self.checks:
            if c.name == name and (evaluator is None or c.evaluator == evaluator) \
                    and (artefact is None or c.artefact == artefact):
                return c
        raise KeyError("no check %r%s" % (name, "" if evaluator is None else " for %r" % evaluator))

    # -- terminal ------------------------------------------------------------------
    def summary(self, width: Optional[int] = None) -> str:
        """The terminal summary: the verdict on the first line, then per artefact a table of
        checks (rows) by evaluators (columns), then where the failures are."""
        if width is None:
            import shutil

            width = max(80, min(160, shutil.get_terminal_size((120, 24)).columns))
        checks = self.checks
        n_fail = sum(c.status == "fail" for c in checks)
        names = ", ".join(Path(a.path).name for a in self.artefacts)
        head = ("PASS" if self.passed else "FAIL") + ": %s vs %s" % (self.model.get("label"), names)
        if self.passed:
            exact = all(o.get("exact") for a in self.artefacts for e in a.evaluators
                        for o in e.bound.get("outputs", []))
            total = self.rows.get("total", 0)
            head += " - %s; %s" % (
                "raw scores proven bit-identical for every input" if exact else "proven within tolerance for every input",
                "%d rows agree" % total if total else "no rows compared (give --data or probes)")
        elif self.error is not None:
            head += " - bad input: %s" % self.error["message"]
        else:
            head += " - %d of %d checks failed" % (n_fail, len(checks))
        lines = [head]
        for a in self.artefacts:
            evs = [e.name for e in a.evaluators]
            header, rows = checks_table(a)
            table = [header] + rows
            w = [max(len(r[i]) for r in table) for i in range(len(evs) + 1)]
            lines.append("")
            lines.append("%s (%s%s)" % (Path(a.path).name, a.format or "artefact",
                                        ", %s" % a.digest[:19] + "..." if a.digest else ""))
            for r in table:
                text = "  ".join(r[i].ljust(w[i]) for i in range(len(w))) + "  " + r[-1]
                lines.append(text if len(text) <= width else text[:width - 3] + "...")
        failed = [c for c in checks if c.status == "fail"]
        if failed:
            lines.append("")
            lines.append("where:")
            seen: Dict[Any, List[str]] = {}
            order2 = []
            for c in failed:
                shown = c.details[:4]
                if len(c.details) > 4:  # the table's count and this list must agree
                    shown = shown + ["... and %d more (the JSON report lists them all)" % (len(c.details) - 4)]
                for d in shown:
                    key = (c.artefact, c.name, d)
                    if key not in seen:
                        seen[key] = []
                        order2.append(key)
                    seen[key].append(c.evaluator or "artefact")
            for key in order2[:14]:
                art, name, d = key
                lines.append("  %s [%s] %s: %s" % (name, ", ".join(seen[key]), Path(art).name, d))
            if len(order2) > 14:
                lines.append("  ... and %d more (the JSON report lists every location)" % (len(order2) - 14))
        tol = self.tolerances
        lines.append("")
        lines.append("tolerances: raw abs %s rel %s; transformed abs %s rel %s (the JSON report says why)" % (
            _g(tol["raw"]["abs"]), _g(tol["raw"]["rel"]), _g(tol["transformed"]["abs"]), _g(tol["transformed"]["rel"])))
        return "\n".join(lines)

    # -- JSON ----------------------------------------------------------------------
    def to_dict(self) -> Dict[str, Any]:
        """The JSON report as a dict (infinities as the string "inf", NaN as null)."""
        from .. import __version__

        doc = {
            "report": REPORT_NAME,
            "report_version": REPORT_VERSION,
            "boxwood_version": __version__,
            "verdict": self.verdict,
            "model": self.model,
            "tolerances": self.tolerances,
            "rows": self.rows,
            "settings": self.settings,
            "notes": list(self.notes),
            "seconds": round(self.seconds, 6),
            "checks": [c.to_dict() for c in self.checks],
            "artefacts": [a.to_dict() for a in self.artefacts],
        }
        if self.error is not None:
            doc["error"] = dict(self.error)
        return _jsonable(doc)

    def to_json(self, indent: Optional[int] = 2) -> str:
        return json.dumps(self.to_dict(), indent=indent, allow_nan=False, ensure_ascii=False)

    def write_json(self, path: Union[str, Path]) -> None:
        _write(path, self.to_json() + "\n")

    # -- JUnit ---------------------------------------------------------------------
    def to_junit(self) -> str:
        """JUnit XML: <testsuites> with one <testsuite> per artefact x evaluator."""
        root = ET.Element("testsuites", name="boxwood verify")
        totals = {"tests": 0, "failures": 0, "skipped": 0}
        total_time = 0.0
        for a in self.artefacts:
            groups: Dict[str, List[Check]] = {}
            for c in a.all_checks:
                groups.setdefault(c.evaluator or "artefact", []).append(c)
            for ev, checks in groups.items():
                suite = ET.SubElement(root, "testsuite", name="%s :: %s" % (Path(a.path).name, ev))
                n_fail = n_skip = 0
                t_suite = 0.0
                for c in checks:
                    case = ET.SubElement(suite, "testcase", classname="boxwood.verify.%s.%s" % (
                        _ident(Path(a.path).name), _ident(ev)), name=c.name, time="%.6f" % c.seconds)
                    t_suite += c.seconds
                    if c.status == "fail":
                        n_fail += 1
                        f = ET.SubElement(case, "failure", message=c.summary, type="parity")
                        f.text = "\n".join(c.details) or c.summary
                    elif c.status == "skip":
                        n_skip += 1
                        ET.SubElement(case, "skipped", message=c.summary)
                    else:
                        out = ET.SubElement(case, "system-out")
                        out.text = "\n".join([c.summary] + c.details)
                suite.set("tests", str(len(checks)))
                suite.set("failures", str(n_fail))
                suite.set("errors", "0")
                suite.set("skipped", str(n_skip))
                suite.set("time", "%.6f" % t_suite)
                totals["tests"] += len(checks)
                totals["failures"] += n_fail
                totals["skipped"] += n_skip
                total_time += t_suite
        root.set("tests", str(totals["tests"]))
        root.set("failures", str(totals["failures"]))
        root.set("errors", "0")
        root.set("skipped", str(totals["skipped"]))
        root.set("time", "%.6f" % total_time)
        return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"

    def write_junit(self, path: Union[str, Path]) -> None:
        _write(path, self.to_junit())


def _status(status: str) -> str:
    return {"pass": "ok", "fail": "FAIL", "skip": "skip"}.get(status, status)


def _ident(text: str) -> str:
    return "".join(ch if ch.isalnum() else "_" for ch in text)


def _g(x: float) -> str:
    return "%.3g" % x if x else "0"


def _jsonable(x: Any) -> Any:
    if isinstance(x, float):
        if math.isnan(x):
            return None
        if math.isinf(x):
            return "inf" if x > 0 else "-inf"
        return x
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if hasattr(x, "item") and not isinstance(x, (str, bytes)):
        return _jsonable(x.item())
    return x


def _write(path: Union[str, Path], text: str) -> None:
    path = Path(path)
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)


def checks_table(a: "ArtefactReport") -> Tuple[List[str], List[List[Any]]]:
    """(header, rows) of an artefact's checks: rows = checks, columns = evaluators
    (artefact-level checks in the first evaluator's column), then the detail of the first
    failing evaluator, else the first one's. The terminal summary and the HTML page show it."""
    evs = [e.name for e in a.evaluators]
    rows: List[List[Any]] = []
    for c in a.checks:
        rows.append([c.name, _status(c.status)] + ["" for _ in evs[1:]] + [c.summary])
    order: List[str] = []
    for e in a.evaluators:
        for c in e.checks:
            if c.name not in order:
                order.append(c.name)
    for name in order:
        per = [next((c for c in e.checks if c.name == name), None) for e in a.evaluators]
        shown = next((c for c in per if c is not None and c.status == "fail"),
                     next((c for c in per if c is not None), None))
        rows.append([name] + [_status(c.status) if c is not None else "-" for c in per]
                    + [shown.summary if shown is not None else ""])
    return ["check"] + evs + ["detail"], rows
