"""The diff result: verdict and exit code, the JSON report (schemas/diff-report.schema.json)
and the terminal summary."""
from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any, Dict, List, Optional, Union

VERDICTS = {"identical": 0, "differs": 1, "no-difference-observed": 1, "incomparable": 2}


def _num(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, str):
        return v
    return "%.6g" % v


class DiffResult:
    """What :func:`boxwood.diff.diff` found. ``verdict`` is one of VERDICTS, ``exit_code`` its
    code; ``rows`` (verify.probes.Rows) are the rows both models scored, ``deltas`` the
    |change| per compared value column over the rows where it changed."""

    def __init__(self, old: dict, new: dict, structure: dict, proof: dict, behaviour: Optional[dict],
                 settings: dict, problem: Optional[str] = None, deltas: Optional[Dict[str, Any]] = None,
                 rows: Any = None):
        self.old, self.new = old, new
        self.structure = structure
        self.proof = proof
        self.behaviour = behaviour
        self.settings = settings
        self.problem = problem
        self.deltas = deltas or {}
        self.rows = rows
        self.notes: List[str] = []
        cls = structure["classes"]
        if cls["added"] or cls["removed"] or (cls["old"] != cls["new"] and behaviour is not None):
            self.notes.append("the classes differ (OLD %r, NEW %r): labels are compared as values and "
                              "per-class outputs only for the classes both models know" % (cls["old"], cls["new"]))
        if behaviour is not None and behaviour["not_compared"]:
            self.notes.append("not compared (only one model has them): " + ", ".join(behaviour["not_compared"]))
        if behaviour is not None:
            self.notes.append("both models are scored by the device scorer with unseen categories routed as "
                              "missing; probes follow verify's generator for each model's own input domain")
        if problem is not None:
            self.verdict = "incomparable"
        elif behaviour is not None and behaviour["rows_changed"]:
            self.verdict = "differs"
        elif proof["proven_identical"]:
            self.verdict = "identical"
        else:
            self.verdict = "no-difference-observed"

    @property
    def exit_code(self) -> int:
        return VERDICTS[self.verdict]

    def headline(self) -> str:
        b = self.behaviour
        if self.verdict == "incomparable":
            return "INCOMPARABLE: %s; no row can be given to both models" % self.problem
        n = b["rows"]["total"]
        if self.verdict == "identical":
            return "IDENTICAL: behaviour proven identical on every input (%s); %d rows scored, none changes" % (
                "bit-identical ensembles" if self.structure["identical"] else "structural proof", n)
        if self.verdict == "no-difference-observed":
            return ("NOT PROVEN: structure differs; no difference observed on %d probe and data rows "
                    "(not a proof: %s)" % (n, self.proof["how"][len("not proven: "):]))
        labels = "" if b["labels_changed"] is None else ", %d change label" % b["labels_changed"]
        return "DIFFERS: behaviour changes on %d of %d rows%s" % (b["rows_changed"], n, labels)

    # ------------------------------------------------------------------ JSON
    def to_json(self) -> Dict[str, Any]:
        from .. import __version__

        return _clean({
            "report": "boxwood.diff-report", "report_version": 1, "boxwood_version": __version__,
            "verdict": self.verdict, "exit_code": self.exit_code, "headline": self.headline(),
            "old": self.old, "new": self.new, "proof": self.proof, "structure": self.structure,
            "behaviour": self.behaviour, "problem": self.problem, "settings": self.settings, "notes": self.notes,
        })

    def write_json(self, path: Union[str, Path]) -> None:
        path = Path(path)
        tmp = path.with_name(path.name + ".partial")
        tmp.write_text(json.dumps(self.to_json(), indent=2, allow_nan=False) + "\n", encoding="utf-8")
        tmp.replace(path)

    # ------------------------------------------------------------------ text
    def summary(self, shown: int = 10) -> str:
        s, b = self.structure, self.behaviour
        out = ["boxwood diff: " + self.headline()]
        for tag, side in (("OLD", self.old), ("NEW", self.new)):
            out.append("  %s  %s: %s, %d trees, %d nodes" % (tag, side["path"] or side["description"],
                                                          side["description"], side["trees"], side["nodes"]))
        out.append("proof: " + self.proof["how"])
        t = s["trees"]
        out.append("structure: %d trees OLD, %d NEW: %d same, %d changed, %d added, %d removed; %d thresholds moved, "
                   "%d leaves changed, %d other node changes" % (
                       t["old"], t["new"], t["same"], t["changed"]["count"], t["added"]["count"],
                       t["removed"]["count"], s["thresholds_moved"]["count"], s["leaves_changed"]["count"],
                       s["node_changes"]["count"]))
        for item in s["thresholds_moved"]["items"][:shown]:
            out.append("  threshold  tree %d node %d %r: %r -> %r" % (item["tree"], item["node"], item["feature"],
                                                                     item["old"], item["new"]))
        for item in s["leaves_changed"]["items"][:shown]:
            out.append("  leaf       tree %d node %d: %r -> %r" % (item["tree"], item["node"], item["old"], item["new"]))
        for item in s["node_changes"]["items"][:shown]:
            out.append("  node       tree %d node %d: %s" % (item["tree"], item["node"], item["what"]))
        for item in s["trees"]["added"]["items"][:shown]:
            out.append("  added      NEW tree %d (output %d, %d nodes)" % (item["tree"], item["output"], item["nodes"]))
        for item in s["trees"]["removed"]["items"][:shown]:
            out.append("  removed    OLD tree %d (output %d, %d nodes)" % (item["tree"], item["output"], item["nodes"]))
        for item in s["base_values"]:
            if item["changed"]:
                out.append("  base value %s: %s -> %s" % (item["output"], _num(item["old"]), _num(item["new"])))
        for item in s["settings"]:
            out.append("  setting    %s: %r -> %r" % (item["name"], item["old"], item["new"]))
        f = s["features"]
        if f["added"] or f["removed"]:
            out.append("  features   added %s; removed %s" % (f["added"] or "none", f["removed"] or "none"))
        for item in f["changed"]:
            out.append("  feature    %r: %s" % (item["feature"], item["what"]))
        c = s["classes"]
        if c["added"] or c["removed"]:
            out.append("  classes    added %r; removed %r" % (c["added"], c["removed"]))
        moved = [x for x in s["split_counts"] if x["old"] != x["new"]]
        out.append("splits per feature (OLD -> NEW)%s:" % ("" if moved else ", unchanged"))
        for x in (moved or s["split_counts"])[:max(shown, 20)]:
            out.append("  %-30s %s -> %s" % (x["feature"], _num(x["old"]), _num(x["new"])))
        if b is not None:
            r = b["rows"]
            out.append("behaviour on %d rows (%d data, %d special, %d split probes, %d random): %d change%s%s%s" % (
                r["total"], r["data"], r["special"], r["split"], r["random"], b["rows_changed"],
                "" if b["labels_changed"] is None else ", %d labels change" % b["labels_changed"],
                ", %d refused by one model only" % b["refusals_changed"] if b["refusals_changed"] else "",
                "; refused by OLD %d, by NEW %d" % (r["refused_old"], r["refused_new"])
                if r["refused_old"] or r["refused_new"] else ""))
            for o in b["outputs"]:
                out.append("  %-34s changed %d/%d; |change| min %s, median %s, p90 %s, p99 %s, max %s" % (
                    o["name"], o["changed"], o["compared"], _num(o["min"]), _num(o["median"]), _num(o["p90"]),
                    _num(o["p99"]), _num(o["max"])))
            if b["most_changed"]:
                out.append("rows that change most:")
            for m in b["most_changed"][:shown]:
                what = m["refused"] or ("label %r -> %r, " % (m["old_label"], m["new_label"])
                                        if m["label_changed"] else "") + "max |change| %s" % _num(m["max_abs_change"])
                out.append("  row %d (%s): %s" % (m["row"], m["origin"], what))
        for n in self.notes:
            out.append("note: " + n)
        return "\n".join(out)


def _clean(v: Any) -> Any:
    """JSON-safe: infinities as "inf"/"-inf", NaN as null, tuples as lists."""
    if isinstance(v, dict):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if isinstance(v, float):
        if math.isnan(v):
            return None
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
    if hasattr(v, "item") and not isinstance(v, (str, bytes)):
        return _clean(v.item())
    return v
