"""``boxwood diff --report-html``: one self-contained page (boxwood.pages.Page): the verdict,
split counts per feature (OLD vs NEW), a histogram of output changes, the rows that change
most and the structural changes."""
from __future__ import annotations

from pathlib import Path
from typing import Union

import numpy as np

from ..pages import Page, pyplot
from .report import DiffResult

SHOWN = 40


def page(result: DiffResult) -> Page:
    plt = pyplot()
    s, b = result.structure, result.behaviour
    p = Page("boxwood diff", "OLD %s  vs  NEW %s" % (result.old["path"] or result.old["description"],
                                                     result.new["path"] or result.new["description"]))
    p.verdict(True if result.verdict == "identical" else (None if result.verdict == "incomparable" else False),
              result.headline())
    p.paragraph("Proof: " + result.proof["how"])
    p.table(["", "OLD", "NEW"], [
        ("read from", result.old["description"], result.new["description"]),
        ("task", result.old["task"], result.new["task"]),
        ("trees", result.old["trees"], result.new["trees"]),
        ("nodes", result.old["nodes"], result.new["nodes"]),
        ("features", result.old["features"], result.new["features"]),
        ("classes", _txt(result.old["classes"]), _txt(result.new["classes"]))])

    p.heading("Splits per feature")
    counts = s["split_counts"]
    fig, ax = plt.subplots(figsize=(max(6.0, 0.28 * len(counts) + 2), 3.6))
    x = np.arange(len(counts))
    ax.bar(x - 0.2, [c["old"] or 0 for c in counts], 0.4, label="OLD", color="#7a8b99")
    ax.bar(x + 0.2, [c["new"] or 0 for c in counts], 0.4, label="NEW", color="#d9822b")
    ax.set_xticks(x)
    ax.set_xticklabels([c["feature"] for c in counts], rotation=70, fontsize=7)
    ax.set_ylabel("split nodes")
    ax.legend()
    p.figure(fig, "How many split nodes test each feature, across all trees, in OLD and NEW.")

    if b is not None:
        p.heading("Behaviour on %d rows" % b["rows"]["total"])
        r = b["rows"]
        p.paragraph("%d data rows, %d special probes, %d split probes (every split of either model: its threshold "
                    "and neighbouring floats, missing where routed), %d random rows. %d rows change%s." % (
                        r["data"], r["special"], r["split"], r["random"], b["rows_changed"],
                        "" if b["labels_changed"] is None else "; %d change label" % b["labels_changed"]))
        p.table(["value", "changed", "compared", "min |change|", "median", "p90", "p99", "max"],
                [(o["name"], o["changed"], o["compared"], o["min"], o["median"], o["p90"], o["p99"], o["max"])
                 for o in b["outputs"]])
        shown = {k: v for k, v in result.deltas.items() if not k.startswith("raw ") and len(v)}
        if shown:
            fig, ax = plt.subplots(figsize=(7, 3.4))
            every = np.concatenate(list(shown.values()))
            pos = every[every > 0]
            if len(pos):
                lo, hi = np.log10(pos.min()), np.log10(pos.max())
                bins = np.logspace(lo, hi if hi > lo else lo + 1, 40)
                for name, v in list(shown.items())[:8]:
                    ax.hist(v[v > 0], bins=bins, alpha=0.55, label=name)
                ax.set_xscale("log")
            ax.set_xlabel("|NEW - OLD| on rows where the output changed")
            ax.set_ylabel("rows")
            ax.legend(fontsize=7)
            p.figure(fig, "Distribution of output changes on the probe and data rows (changed rows only).")
        else:
            p.paragraph("No output changed on any row.")
        if b["most_changed"]:
            p.heading("Rows that change most", 3)
            p.table(["row", "origin", "old label", "new label", "max |change|", "old outputs", "new outputs",
                     "values"],
                    [(m["row"], m["origin"], _txt(m["old_label"]), _txt(m["new_label"]),
                      m["refused"] or m["max_abs_change"], _txt(m["old_outputs"]), _txt(m["new_outputs"]),
                      _txt(m["values"])) for m in b["most_changed"]])

    p.heading("Structural changes")
    t = s["trees"]
    p.paragraph("%d trees in OLD, %d in NEW: %d same, %d changed, %d added, %d removed; %d thresholds moved, %d "
                "leaves changed, %d other node changes." % (
                    t["old"], t["new"], t["same"], t["changed"]["count"], t["added"]["count"], t["removed"]["count"],
                    s["thresholds_moved"]["count"], s["leaves_changed"]["count"], s["node_changes"]["count"]))
    rows = []
    for i in s["thresholds_moved"]["items"][:SHOWN]:
        rows.append(("threshold moved", "tree %d node %d" % (i["tree"], i["node"]), i["feature"], i["old"], i["new"]))
    for i in s["leaves_changed"]["items"][:SHOWN]:
        rows.append(("leaf changed", "tree %d node %d" % (i["tree"], i["node"]), "", i["old"], i["new"]))
    for i in s["node_changes"]["items"][:SHOWN]:
        rows.append(("node changed", "tree %d node %d" % (i["tree"], i["node"]), i["what"], "", ""))
    for i in t["added"]["items"][:SHOWN]:
        rows.append(("tree added", "NEW tree %d" % i["tree"], "output %d, %d nodes" % (i["output"], i["nodes"]), "", ""))
    for i in t["removed"]["items"][:SHOWN]:
        rows.append(("tree removed", "OLD tree %d" % i["tree"], "output %d, %d nodes" % (i["output"], i["nodes"]), "", ""))
    for i in s["base_values"]:
        if i["changed"]:
            rows.append(("base value", i["output"], "", i["old"], i["new"]))
    for i in s["settings"]:
        rows.append(("setting", i["name"], "", _txt(i["old"]), _txt(i["new"])))
    for i in s["features"]["changed"]:
        rows.append(("feature changed", i["feature"], i["what"], "", ""))
    for name in s["features"]["added"]:
        rows.append(("feature added", name, "", "", ""))
    for name in s["features"]["removed"]:
        rows.append(("feature removed", name, "", "", ""))
    if rows:
        p.table(["change", "where", "detail", "OLD", "NEW"], rows)
        p.paragraph("Lists are cut at %d entries per kind; the JSON report (--json) keeps up to 500 each." % SHOWN,
                    small=True)
    else:
        p.paragraph("None: the ensembles are the same bit for bit." if s["identical"] else
                    "No tree differs; see the settings above.")
    for n in result.notes:
        p.paragraph("Note: " + n, small=True)
    return p


def _txt(v: object) -> str:
    if v is None:
        return ""
    if isinstance(v, list):
        text = ", ".join(_txt(x) if not isinstance(x, float) else "%.6g" % x for x in v)
        return text if len(text) < 300 else text[:300] + " ..."
    return str(v)


def write_page(result: DiffResult, path: Union[str, Path]) -> int:
    """Write the page; return its size in bytes."""
    return page(result).write(path)
