"""``boxwood verify --report-html``: the verification result as one self-contained HTML page.

:func:`verify_page` turns a :class:`~.report.VerifyResult` into a :class:`boxwood.pages.Page`:
the verdict and the summary line first, then per artefact the checks table (as in the
terminal) and where the failures are, then matplotlib figures drawn only from what the
result holds (docs/reports.md explains how to read each one):

* probe coverage per feature (once per run: the rows are the same for every artefact);
* per artefact: the largest difference in ulps per output and evaluator; the certified bound
  against the largest observed difference per output; label flips per evaluator (the rows
  listed in a table); the memory footprint against common board memory sizes (:data:`BOARDS`).

matplotlib is optional: :func:`boxwood.pages.pyplot` raises ``pages.MissingPlotting`` with the
install hint when it is missing.
"""
from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple

from .. import pages
from .report import ArtefactReport, VerifyResult
from .report import checks_table as report_checks_table

KB = 1024
MB = 1024 * 1024

# Common boards: (board, chip, RAM bytes, flash bytes or None). The numbers are the chip's
# SRAM and its on-chip flash (or the flash chip on the board), from memory of each vendor's
# datasheet: check them before relying on them. What a program may use is less (the
# firmware, MicroPython's own heap limit, the stack).
BOARDS: List[Tuple[str, str, int, Optional[int]]] = [
    ("Arduino Uno", "ATmega328P", 2 * KB, 32 * KB),
    ("STM32 \"Blue Pill\"", "STM32F103C8", 20 * KB, 64 * KB),
    ("BBC micro:bit v2", "nRF52833", 128 * KB, 512 * KB),
    ("Nucleo-F411RE", "STM32F411RE (Cortex-M4)", 128 * KB, 512 * KB),
    ("nRF52840 DK", "nRF52840", 256 * KB, 1 * MB),
    ("Raspberry Pi Pico", "RP2040", 264 * KB, 2 * MB),
    ("ESP32 DevKitC", "ESP32 (WROOM-32 module)", 520 * KB, 4 * MB),
    ("Raspberry Pi Pico 2", "RP2350", 520 * KB, 4 * MB),
    ("Raspberry Pi Zero 2 W", "RP3A0", 512 * MB, None),
]
BOARD_SOURCE = ("Board sizes: the chip's SRAM and its on-chip flash (or the board's flash chip), from memory of "
                "the vendor's datasheet; check before relying on them. A program gets less than the whole RAM "
                "(firmware, MicroPython's heap limit, the stack). The Raspberry Pi Zero 2 W stores programs on "
                "its microSD card (no flash size).")
# Bytes per element of the C target's const tables on a 32-bit microcontroller.
C_TYPE_BYTES = {"double": 8, "int8_t": 1, "uint8_t": 1, "int16_t": 2, "uint16_t": 2, "int32_t": 4, "uint32_t": 4}
POINTER_BYTES = 4
MAX_FEATURES_SHOWN = 40
MAX_DETAILS = 20

PASS_COLOUR, FAIL_COLOUR = "#2e7d32", "#c62828"
EVALUATOR_COLOURS = ["#1f77b4", "#ff7f0e", "#2ca02c", "#9467bd", "#8c564b", "#e377c2", "#17becf"]


def verify_page(result: VerifyResult) -> pages.Page:
    """The HTML page of ``result`` (raises ``pages.MissingPlotting`` without matplotlib)."""
    plt = pages.pyplot()
    page = pages.Page("boxwood verify: %s" % result.model.get("label"),
                      "%s; %s" % (_model_line(result.model), _rows_line(result.rows)))
    page.verdict(result.passed and result.error is None, result.summary(width=10 ** 6).splitlines()[0])
    if result.error is not None:
        page.paragraph("The run stopped on bad input (exit code %s): %s"
                       % (result.error.get("exit_code", 2), result.error["message"]))
    tol = result.tolerances
    page.paragraph("Tolerances: raw abs %s, rel %s; transformed abs %s, rel %s. A difference passes when "
                   "|artefact - source| <= max(abs, rel |source|)." % (
                       _g(tol["raw"]["abs"]), _g(tol["raw"]["rel"]), _g(tol["transformed"]["abs"]),
                       _g(tol["transformed"]["rel"])), small=True)
    for note in result.notes:
        page.paragraph("Note: " + note, small=True)
    for a in result.artefacts:
        page.heading("%s (%s)" % (Path(a.path).name, a.format or "artefact"))
        if a.digest:
            page.paragraph("digest %s" % a.digest, small=True)
        header, rows = checks_table(a)
        page.table(header, rows)
        where = failure_rows(a)
        if where:
            page.heading("Where the failures are", 3)
            page.table(["check", "evaluator", "detail"], where)
    if result.error is not None or not any(a.evaluators for a in result.artefacts):
        page.heading("Plots")
        page.paragraph("No plots: nothing was compared (%s)." % (
            "the run stopped on bad input" if result.error is not None else "no artefact could be opened"))
        return page
    page.heading("Probe coverage")
    page.figure(coverage_figure(plt, result.coverage),
                "Probe coverage per feature. Left: generated rows that target the feature (specials: missing, "
                "categories, extremes; split probes: rows built to reach a split of the feature with values at and "
                "next to its threshold). Right: the feature's splits in the source model and how many of them a "
                "probe row was built to reach. Data and random rows target no single feature and are not counted.")
    for a in result.artefacts:
        if not a.evaluators:
            continue
        name = Path(a.path).name
        page.heading("Plots: %s" % name)
        page.figure(ulps_figure(plt, a),
                    "%s: the largest difference in ulps (units in the last place, float64) over all compared rows, per "
                    "output and evaluator; left the exact values (raw scores), right the transformed outputs. Only "
                    "the maximum per output is kept by the verifier; 0 means every row agreed bit for bit. "
                    "Symmetric log scale." % name)
        page.figure(bound_figure(plt, a),
                    "%s: the certified bound (bars, proven for every input) against the largest observed "
                    "|artefact - source| on the compared rows (dots), per output and evaluator, log scale. A zero "
                    "is drawn on the line marked 0 (a zero bound: proven bit-identical); an infinite bound at the "
                    "top, marked inf. A dot above its bar would mean the bound failed (the 'bound holds' check)."
                    % name)
        page.figure(flips_figure(plt, a, result.model.get("task")),
                    "%s: label flips per evaluator on the compared rows (rows where the artefact's label differs "
                    "from the source's), and for a binary model the raw-score crossings of its decision rule."
                    % name)
        flipped = flip_rows(a)
        if flipped:
            page.table(["evaluator", "row (where it comes from): source label, artefact label"], flipped)
        foot = footprint(a)
        page.figure(memory_figure(plt, foot),
                    "%s: the model's memory need (%s) against common board memory sizes, log scale. %s"
                    % (name, foot["what"], BOARD_SOURCE))
    page.heading("Board memory sizes")
    page.paragraph(BOARD_SOURCE, small=True)
    page.table(["board", "chip", "RAM", "flash"],
               [[b, c, _size(r), _size(f) if f else "microSD card"] for b, c, r, f in BOARDS])
    return page


# ----------------------------------------------------------------------------- tables
def checks_table(a: ArtefactReport) -> Tuple[List[str], List[List[Any]]]:
    """The terminal summary's checks table (report.checks_table); an artefact that was not
    opened has no evaluator, and its checks show under "artefact"."""
    header, rows = report_checks_table(a)
    if not a.evaluators:
        header = [header[0], "artefact", header[-1]]
    return header, rows


def failure_rows(a: ArtefactReport) -> List[List[str]]:
    out: List[List[str]] = []
    for c in a.all_checks:
        if c.status != "fail":
            continue
        details = c.details or [c.summary]
        for d in details[:MAX_DETAILS]:
            out.append([c.name, c.evaluator or "artefact", d])
        if len(details) > MAX_DETAILS:
            out.append([c.name, c.evaluator or "artefact",
                        "... and %d more (the JSON report lists them all)" % (len(details) - MAX_DETAILS)])
    return out


def flip_rows(a: ArtefactReport) -> List[List[str]]:
    out = []
    for e in a.evaluators:
        for c in e.checks:
            if c.name == "empirical: decisions" and c.status == "fail":
                out += [[e.name, d] for d in c.details[:MAX_DETAILS]]
    return out


# ----------------------------------------------------------------------------- figures
def coverage_figure(plt: Any, coverage: Optional[Dict[str, Any]]) -> Any:
    if not coverage or not coverage.get("features"):
        return _message_figure(plt, "probe coverage: no probe rows were made")
    names = list(coverage["features"])
    special, split = coverage["rows"]["special"], coverage["rows"]["split"]
    splits, probed = coverage["splits"], coverage["splits_probed"]
    idx = list(range(len(names)))
    title_extra = ""
    if len(idx) > MAX_FEATURES_SHOWN:
        idx = sorted(idx, key=lambda j: (-splits[j], -split[j], j))[:MAX_FEATURES_SHOWN]
        title_extra = " (the %d features with most splits of %d)" % (MAX_FEATURES_SHOWN, len(names))
    idx = idx[::-1]  # first feature at the top
    y = list(range(len(idx)))
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, max(2.6, 0.26 * len(idx) + 1.3)), sharey=True)
    s1 = [special[j] for j in idx]
    s2 = [split[j] for j in idx]
    ax1.barh(y, s1, color="#90a4ae", label="specials")
    ax1.barh(y, s2, left=s1, color="#1f77b4", label="split probes")
    ax1.set_yticks(y)
    ax1.set_yticklabels([_short(names[j]) for j in idx], fontsize=8)
    ax1.set_xlabel("probe rows targeting the feature")
    ax1.set_title("rows per feature" + title_extra, fontsize=10)
    ax1.legend(fontsize=8, loc="lower right")
    h = 0.4
    ax2.barh([v + h / 2 for v in y], [splits[j] for j in idx], height=h, color="#cfd8dc", label="splits in the source")
    ax2.barh([v - h / 2 for v in y], [probed[j] for j in idx], height=h, color=PASS_COLOUR,
             label="splits a probe was built to reach")
    for v, j in zip(y, idx):
        if splits[j] and probed[j] < splits[j]:
            ax2.text(splits[j], v, " %d not probed" % (splits[j] - probed[j]), va="center", fontsize=7,
                     color=FAIL_COLOUR)
    ax2.set_xlabel("split nodes")
    ax2.set_title("splits per feature: %d of %d probed" % (sum(probed), sum(splits)), fontsize=10)
    ax2.legend(fontsize=8, loc="lower right")
    fig.tight_layout()
    return fig


def ulps_figure(plt: Any, a: ArtefactReport) -> Any:
    fig, axes = plt.subplots(1, 2, figsize=(11, 3.6))
    for ax, kind in zip(axes, ("raw", "transformed")):
        names = _output_names(a, kind)
        n_ev = len(a.evaluators)
        width = 0.8 / max(n_ev, 1)
        top = 0
        for k, e in enumerate(a.evaluators):
            vals = [float(m.get("max_ulp") or 0) for m in e.empirical.get(kind, [])]
            xs = [i - 0.4 + width * (k + 0.5) for i in range(len(vals))]
            ax.bar(xs, vals, width=width, color=_colour(k), label=e.name)
            for x, v in zip(xs, vals):
                ax.text(x, v, "%.3g" % v, ha="center", va="bottom", fontsize=7)
            top = max([top] + vals)
        ax.set_yscale("symlog", linthresh=1)
        ax.set_ylim(0, max(10, top * 4))
        decades = int(math.ceil(math.log10(max(10, top * 4))))
        step = max(1, int(math.ceil(decades / 6)))
        ax.set_yticks([0] + [10.0 ** d for d in range(0, decades + 1, step)])
        ax.set_xlim(-0.6, max(len(names), 1) - 0.4)
        ax.set_xticks(range(len(names)))
        ax.set_xticklabels([_short(n) for n in names], rotation=45 if len(names) > 6 else 0, fontsize=8)
        ax.set_xlabel("output")
        ax.set_ylabel("largest difference (ulps)")
        ax.set_title("exact values (raw)" if kind == "raw" else "transformed outputs", fontsize=10)
        if not names:
            ax.text(0.5, 0.5, "no outputs", ha="center", transform=ax.transAxes)
    axes[0].legend(fontsize=8, loc="upper left")
    fig.tight_layout()
    return fig


def bound_figure(plt: Any, a: ArtefactReport) -> Any:
    fig, axes = plt.subplots(1, 2, figsize=(11, 3.8))
    for ax, kind, bkey in ((axes[0], "raw", "exact_values"), (axes[1], "transformed", "transformed")):
        names = _output_names(a, kind)
        series = []  # (evaluator index, output index, bound, observed)
        for k, e in enumerate(a.evaluators):
            bnds = e.bound.get(bkey, [])
            obs = e.empirical.get(kind, [])
            for j in range(len(names)):
                b = float(bnds[j]["abs"]) if j < len(bnds) else math.nan
                o = float(obs[j]["max_abs_error"]) if j < len(obs) else math.nan
                series.append((k, j, b, o))
        finite = [v for _, _, b, o in series for v in (b, o) if v > 0 and math.isfinite(v)]
        lo = min(finite) / 100 if finite else 1e-20
        hi = max(finite) * 100 if finite else 1.0
        n_ev = max(len(a.evaluators), 1)
        width = 0.8 / n_ev
        for k, j, b, o in series:
            x = j - 0.4 + width * (k + 0.5)
            shown_b = hi if math.isinf(b) else (lo if b == 0 else b)
            ax.bar(x, shown_b - lo, bottom=lo, width=width * 0.9, color=_colour(k), alpha=0.35,
                   label="bound, %s" % a.evaluators[k].name if j == 0 else None)
            if b == 0:
                ax.plot([x - width * 0.45, x + width * 0.45], [lo, lo], color=_colour(k), linewidth=3)
            if math.isinf(b):
                ax.text(x, hi, "inf", ha="center", va="bottom", fontsize=7)
            if not math.isnan(o):
                shown_o = lo if o == 0 else (hi if math.isinf(o) else o)
                broken = o > b
                ax.plot([x], [shown_o], marker="o", markersize=6, linestyle="none",
                        color=FAIL_COLOUR if broken else "#212121", markerfacecolor="white" if o == 0 else None,
                        label=("observed" if (k, j) == (0, 0) else None))
        ax.set_yscale("log")
        ax.set_ylim(lo / 3, hi * 3)
        ax.set_xlim(-0.6, max(len(names), 1) - 0.4)
        ax.axhline(lo, color="#9e9e9e", linewidth=0.8, linestyle="--")
        ax.text(1.0, lo, " 0", transform=ax.get_yaxis_transform(), va="center", fontsize=8, color="#616161")
        ax.set_xticks(range(len(names)))
        ax.set_xticklabels([_short(n) for n in names], rotation=45 if len(names) > 6 else 0, fontsize=8)
        ax.set_xlabel("output")
        ax.set_ylabel("|artefact - source|")
        ax.set_title("exact values (raw)" if kind == "raw" else "transformed outputs", fontsize=10)
    axes[0].legend(fontsize=7, loc="upper left")
    fig.tight_layout()
    return fig


def flips_figure(plt: Any, a: ArtefactReport, task: Optional[str]) -> Any:
    decisions = [e.empirical.get("decisions") for e in a.evaluators]
    if all(d is None for d in decisions):
        why = "regression: no decisions to compare" if task == "regression" else "no decisions compared"
        return _message_figure(plt, "label flips: " + why)
    fig, ax = plt.subplots(figsize=(11, 2.2 + 0.3 * len(a.evaluators)))
    names = [e.name for e in a.evaluators]
    flips = [int(d["flips"]) if d else 0 for d in decisions]
    y = list(range(len(names)))[::-1]
    has_cross = any(d and "crossings" in d for d in decisions)
    h = 0.38 if has_cross else 0.6
    ax.barh([v + (h / 2 if has_cross else 0) for v in y], flips, height=h,
            color=[FAIL_COLOUR if f else PASS_COLOUR for f in flips], label="label flips")
    if has_cross:
        cross = [int(d.get("crossings", 0)) if d else 0 for d in decisions]
        ax.barh([v - h / 2 for v in y], cross, height=h, color="#ffb300", label="raw-score crossings")
    for k, (v, f) in enumerate(zip(y, flips)):
        rows = int(a.evaluators[k].empirical.get("rows", 0))
        ax.text(max(f, 0), v + (h / 2 if has_cross else 0), " %d flips in %d rows" % (f, rows), va="center",
                fontsize=8)
    ax.set_yticks(y)
    ax.set_yticklabels(names, fontsize=8)
    ax.set_xlim(0, max(flips + [1]) * 1.6)
    ax.set_xlabel("rows")
    ax.set_title("decision flips per evaluator", fontsize=10)
    ax.legend(fontsize=8, loc="lower right")
    fig.tight_layout()
    return fig


def memory_figure(plt: Any, foot: Dict[str, Any]) -> Any:
    fig, axes = plt.subplots(1, 2, figsize=(11, 3.6), sharey=True)
    labels = ["%s (%s)" % (b, c.split(" ")[0]) for b, c, _, _ in BOARDS][::-1]
    y = list(range(len(BOARDS)))
    for ax, what, sizes, need in ((axes[0], "RAM", [r for _, _, r, _ in BOARDS], foot.get("ram")),
                                  (axes[1], "flash", [f for _, _, _, f in BOARDS], foot.get("flash"))):
        vals = sizes[::-1]
        colours = ["#cfd8dc" if v is None else (FAIL_COLOUR if need is not None and need > v else "#90caf9")
                   for v in vals]
        ax.barh(y, [v or 0 for v in vals], color=colours)
        for v, s in zip(y, vals):
            ax.text(s or KB / 2, v, " " + (_size(s) if s else "none (microSD)"), va="center", fontsize=7)
        ax.set_xscale("log")
        ax.set_xlim(KB / 2, 4096 * MB)
        if need is not None:
            ax.axvline(max(need, 1), color="#212121", linewidth=2)
            ax.text(max(need, 1), len(y) - 0.4, " model: %s" % _size(need), fontsize=8, va="bottom")
            ax.set_title("%s: %s" % (what, foot.get(what.lower() + "_what", "")), fontsize=9)
        else:
            ax.set_title("%s: the model's need is not known" % what, fontsize=9)
        ax.set_xlabel("bytes (log scale)")
    axes[0].set_yticks(y)
    axes[0].set_yticklabels(labels, fontsize=8)
    fig.suptitle(foot["what"], fontsize=9)
    fig.tight_layout()
    return fig


def _message_figure(plt: Any, text: str) -> Any:
    fig, ax = plt.subplots(figsize=(11, 1.2))
    ax.axis("off")
    ax.text(0.5, 0.5, text, ha="center", va="center", fontsize=11)
    return fig


# ----------------------------------------------------------------------------- footprint
def footprint(a: ArtefactReport) -> Dict[str, Any]:
    """What the artefact needs on a device, when known: ``ram``/``flash`` in bytes (None when
    not known), ``what`` (where the numbers come from) and per kind ``ram_what``/``flash_what``.

    * a bundle's ``manifest.json`` next to the file that lists it with the file's SHA-256: a
      python bundle's measured MicroPython heap (``peak_bytes``) and the artefact's size; a C
      bundle's measured Cortex-M4 model object (``arm-none-eabi-size``: flash, RAM);
    * otherwise, for a C file: an estimate from its const tables (element counts times the
      element size on a 32-bit microcontroller, strings and 4-byte pointers included; the
      scoring code is not counted), RAM not known (the tables are const: flash);
    * otherwise not known.
    """
    path = Path(a.path)
    manifest = _manifest_for(path)
    if manifest is not None:
        foot = manifest.get("footprint") or {}
        mp = foot.get("micropython")
        if isinstance(mp, dict) and mp.get("measured"):
            return {"ram": int(mp["peak_bytes"]), "flash": int(foot.get("artefact_bytes") or path.stat().st_size),
                    "what": "measured: the bundle manifest's MicroPython heap (module + model + one record, %s) and "
                            "the artefact file's size" % (mp.get("micropython") or "MicroPython"),
                    "ram_what": "MicroPython heap (bundle manifest)", "flash_what": "artefact file"}
        cm = foot.get("cortex_m4")
        if isinstance(cm, dict) and cm.get("measured"):
            m = cm["model"]
            return {"ram": int(m["ram"]), "flash": int(m["flash"]),
                    "what": "measured: the bundle manifest's Cortex-M4 model object (arm-none-eabi-size of %s)"
                            % m.get("file", "the model's object"),
                    "ram_what": "model object data + bss (stack on top)", "flash_what": "model object text + data"}
    if "C99" in (a.format or "") or path.suffix == ".c":
        est = c_tables_bytes(path)
        if est is not None:
            return {"ram": None, "flash": est,
                    "what": "estimated from the C file's const tables (element counts x sizes on a 32-bit "
                            "microcontroller; scoring code not counted; RAM need not known: make a C bundle to "
                            "measure it)", "flash_what": "const tables (estimate)"}
    return {"ram": None, "flash": None,
            "what": "not known: no bundle manifest next to this file (boxwood bundle measures the MicroPython "
                    "heap or the Cortex-M4 build)"}


def c_tables_bytes(path: Path) -> Optional[int]:
    """Bytes of a boxwood C file's const tables on a 32-bit microcontroller (None if unreadable)."""
    from ..formats.c import reader

    try:
        _, _, tables, _ = reader.parse(path.read_text(encoding="utf-8"), str(path))
    except (OSError, ValueError, UnicodeError):
        return None
    total = 0
    for ctype, values in tables.values():
        if ctype == "char *const":
            total += len(values) * POINTER_BYTES + sum(len(str(v).encode("utf-8")) + 1 for v in values)
        else:
            total += len(values) * C_TYPE_BYTES.get(ctype, 8)
    return total


def _manifest_for(path: Path) -> Optional[Dict[str, Any]]:
    m = path.parent / "manifest.json"
    try:
        doc = json.loads(m.read_text(encoding="utf-8"))
        entry = doc["files"][path.name]
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
    except (OSError, ValueError, KeyError, TypeError, UnicodeError):
        return None
    return doc if isinstance(entry, dict) and entry.get("sha256") == digest else None


# ----------------------------------------------------------------------------- helpers
def _output_names(a: ArtefactReport, kind: str) -> List[str]:
    for e in a.evaluators:
        values = e.empirical.get(kind) or e.bound.get("exact_values" if kind == "raw" else "transformed") or []
        if values:
            return [str(v.get("name")) for v in values]
    return []


def _model_line(model: Dict[str, Any]) -> str:
    if not model.get("estimator"):
        return "model %s" % model.get("label")
    return "%s (%s), %s trees, %s nodes, %s output%s" % (
        model.get("estimator"), model.get("task"), model.get("trees"), model.get("nodes"), model.get("outputs"),
        "" if model.get("outputs") == 1 else "s")


def _rows_line(rows: Dict[str, Any]) -> str:
    return "%d rows compared (data %d, specials %d, split probes %d, random %d)" % (
        rows.get("total", 0), rows.get("data", 0), rows.get("special", 0), rows.get("split", 0), rows.get("random", 0))


def _colour(k: int) -> str:
    return EVALUATOR_COLOURS[k % len(EVALUATOR_COLOURS)]


def _short(name: Any, n: int = 22) -> str:
    s = str(name)
    return s if len(s) <= n else s[:n - 1] + "\u2026"


def _g(x: float) -> str:
    return "%.3g" % x if x else "0"


def _size(n: Optional[int]) -> str:
    if n is None:
        return "not known"
    if n >= MB:
        return "%g MB" % round(n / MB, 1)
    if n >= KB:
        return "%g KB" % round(n / KB, 1)
    return "%d B" % n


def figure_count(result: VerifyResult) -> int:
    """Images :func:`verify_page` draws: coverage once, then four per opened artefact."""
    if result.error is not None or not any(a.evaluators for a in result.artefacts):
        return 0
    return 1 + 4 * sum(1 for a in result.artefacts if a.evaluators)


__all__: Sequence[str] = ("verify_page", "footprint", "c_tables_bytes", "checks_table", "BOARDS", "BOARD_SOURCE",
                          "figure_count")
