"""``boxwood bundle``: one folder to copy onto a box, able to check itself there.

A bundle folder holds:

* ``model.json`` - the artefact (as exported: canonical bytes, own sha256 digest);
* ``scorer.py`` - the device scoring core, copied as is from ``boxwood_runtime``;
* ``stream.py`` - CSV / JSON Lines streaming, copied as is (it imports ``scorer``);
* ``box.py`` - the entry script: ``check``, ``score``, ``info``, ``--version``;
* ``README.txt`` - how to run it on the box, which Python, and the cautions;
* ``manifest.json`` - the sha256 and size of every other file, the scorer version, the
  artefact's format version and digest, and the footprint (artefact size, trees, nodes,
  deepest path, and the scorer's heap under MicroPython when it could be measured).
  Its layout is schemas/bundle-manifest.schema.json.

The bundle is deterministic: the same artefact and the same boxwood give the same
bytes (no dates; ``--zip`` writes fixed timestamps), so a bundle can be compared with
another by its manifest.

``make_c_bundle`` (``boxwood bundle --target c``) makes a folder for a microcontroller project
instead: the model as C99 source, an example that checks the reference rows, the Cortex-M4
board files and a Makefile (see "the C target" below); its manifest has ``"target": "c"``.

The manifest guards against damage and mix-ups (a copy cut short, a file from another
bundle, a scorer of another version); alone it is not a signature against a deliberate
attacker who can rewrite both a file and the manifest. ``sign`` (``boxwood bundle --sign
KEY``) adds ``manifest.sig``, an Ed25519 signature of the manifest's bytes that a box
trusting the public key checks (boxwood.signing, docs/bundle-signing.md).
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import tempfile
import textwrap
import zipfile
from pathlib import Path
from typing import Any, Dict, List, Optional, Union

from . import __version__, signing

BUNDLE_FORMAT = "boxwood.bundle"
BUNDLE_FORMAT_VERSION = 1
ARTEFACT = "model.json"
MANIFEST = "manifest.json"
README = "README.txt"
ENTRY = "box.py"
RUNTIME_FILES = ("scorer.py", "stream.py", "signature.py", ENTRY)  # copied as they are from boxwood_runtime
FOOTPRINT_CHOICES = ("auto", "require", "skip")
_ZIP_TIME = (1980, 1, 1, 0, 0, 0)


class BundleError(ValueError):
    """The bundle cannot be made (bad source, folder in the way, measurement required but impossible)."""


class BundleCheckFailed(BundleError):
    """The artefact to bundle fails its self-check (the command line exits 1 for it, as for any failed check)."""


def runtime_dir() -> Path:
    import boxwood_runtime

    return Path(boxwood_runtime.__file__).resolve().parent


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 16), b""):
            h.update(chunk)
    return h.hexdigest()


def artefact_from(source: Union[str, Path], reference_rows: int = 6) -> bytes:
    """The artefact bytes for ``source``: a boxwood JSON artefact (used as it is, after the
    device loader verified it), or anything :func:`boxwood.export.export` reads (a joblib or
    pickle model file, whose loading runs code stored in it; an ONNX file, read as data),
    exported here to a JSON artefact and checked."""
    import boxwood_runtime

    from . import formats
    from .export import export

    path = Path(source)
    if path.is_dir():
        raise BundleError("%s is a folder; give an artefact or a model file" % source)
    if not path.is_file():
        raise BundleError("%s not found (or not a file)" % source)
    if formats.registry.sniff(path) is formats.by_name("json"):
        data = path.read_bytes()
        model = boxwood_runtime.load(data, self_check=False)  # digest, structure: never bundle a bad artefact
        ok, message = model.self_check()
        if not ok:
            raise BundleCheckFailed("%s fails its self-check: %s" % (source, message))
        return data
    with tempfile.TemporaryDirectory() as tmp:
        result = export(path, Path(tmp) / ARTEFACT, reference_rows=reference_rows)
        if not result.ok:
            raise BundleCheckFailed("the exported artefact fails its self-check: %s" % result.check[1])
        return (Path(tmp) / ARTEFACT).read_bytes()


def footprint(data: bytes, measure: str = "auto", port: Optional[Union[str, Path]] = None) -> Dict[str, Any]:
    """Artefact size, trees, nodes, deepest path, and (``measure`` auto/require/skip) the
    scorer's heap under MicroPython for one record (boxwood.micropython.measure_footprint)."""
    import boxwood_runtime

    from . import micropython

    if measure not in FOOTPRINT_CHOICES:
        raise BundleError("measure must be one of %s" % ", ".join(FOOTPRINT_CHOICES))
    model = boxwood_runtime.load(data, self_check=False)
    out: Dict[str, Any] = {"artefact_bytes": len(data), "trees": model.n_trees, "nodes": model.n_nodes,
                           "max_depth": model.max_depth}
    if measure == "skip":
        out["micropython"] = {"measured": False, "why": "skipped (--micropython-footprint skip)"}
        return out
    reason = micropython.unavailable_reason(port)
    if reason:
        if measure == "require":
            raise BundleError("cannot measure the MicroPython footprint: " + reason)
        out["micropython"] = {"measured": False, "why": reason}
        return out
    record = model.doc["self_check"]["rows"][0]
    try:
        measured = micropython.measure_footprint(data, record, port=port,
                                                 scorer_source=(runtime_dir() / "scorer.py").read_bytes())
    except (RuntimeError, OSError, ValueError) as exc:
        if measure == "require":
            raise BundleError(str(exc))
        out["micropython"] = {"measured": False, "why": str(exc)}
        return out
    out["micropython"] = dict(measured=True, **measured)
    return out


def readme_text(model: Any, foot: Dict[str, Any]) -> str:
    """The device README for a loaded model and its footprint."""
    mpy = foot.get("micropython", {})
    if mpy.get("measured"):
        memory = ("Memory (MicroPython %s heap, measured when the bundle was made): scoring one\n"
                  "record needs at most %d bytes once loaded (the model holds %d of them);\n"
                  "loading needs between %d and %d bytes. See manifest.json,\n"
                  "footprint.micropython.how, for how these were measured."
                  % (mpy["micropython"], mpy["peak_bytes"], mpy["model_bytes"], mpy["load_live_bytes"],
                     mpy["load_peak_bytes"]))
    else:
        memory = "Memory: not measured under MicroPython when this bundle was made (%s)." % mpy.get("why")
    outputs = ("classes " + ", ".join(str(c) for c in model.classes)) if model.classes else \
        "outputs " + ", ".join(str(n) for n in model.output_names)
    return """boxwood bundle: {task} model, {n_features} inputs, {outputs}
{trees} trees, {nodes} nodes, deepest path {depth} splits, artefact {size} bytes.

Copy this whole folder onto the box. Nothing needs installing: the box needs only
Python - CPython 3.8 or newer, or MicroPython 1.2x built with double-precision floats.

  python3 box.py check          exit 0: every file matches manifest.json, the artefact's
                                digest is right, and it reproduces its reference rows
                                exit 1: the first thing that is wrong, on one line
  python3 box.py score readings.csv -o scored.csv
  python3 box.py score < readings.jsonl > scored.jsonl
                                CSV with a header row, or JSON Lines; one output row per
                                input row, in order; a row that cannot be scored becomes
                                an error row naming the row and the field (exit 2)
  python3 box.py info           what the model is, its input fields (kind and
                                preprocessing steps), its footprint
  python3 box.py info --csv-header     a CSV header line for score
  python3 box.py info --example-jsonl  one JSON Lines record score accepts
  python3 box.py --version      versions of box.py, the scorer and this Python

Exit codes (every command):
  0  success
  1  a check failed: something inside this folder is wrong (a file missing,
     changed or cut short, a damaged manifest or artefact, another scorer
     version, a failed self-check); score and info refuse to run then
  2  bad usage or bad input: an unknown command or option, a --bundle folder or
     an input file that is not there, a score run with error rows, Python 2

On MicroPython: micropython box.py check (score takes JSON Lines only there).
Run `check` after every copy and after every update, before the model is used.
Input names: {inputs}.

{memory}

Cautions
- The outputs are advisory. Where they drive equipment (compressors, heaters,
  valves, alarms), keep the equipment's own protections and controls in charge.
- Safety functions need their own engineering, sensors and validation under the
  standards and local codes that apply to the installation; this model is not one.
- Test a retrained model on the target hardware before it is put in service, and
  keep a safe fallback for when the scorer refuses a record or the bundle.
- manifest.json detects damaged, truncated, missing, extra or mixed-up files. Alone
  it is not a signature. If this bundle holds manifest.sig, install the maker's
  public key outside this folder (/etc/boxwood/trusted.pub, or pass
  --trust FILE): check then requires a valid Ed25519 signature of manifest.json.
  Against someone who can write this folder, run a box.py installed elsewhere:
  python3 /opt/boxwood/box.py --bundle THIS_FOLDER check --trust FILE.
- Keep only the listed files in this folder (an extra file fails check).
""".format(task=model.task, n_features=model.n_features, outputs=outputs, trees=model.n_trees,
           nodes=model.n_nodes, depth=model.max_depth, size=foot["artefact_bytes"],
           inputs=", ".join(getattr(model, "input_names", model.feature_names)), memory=memory)


def write_manifest(folder: Union[str, Path], foot: Optional[Dict[str, Any]] = None) -> Dict[str, Any]:
    """Write ``folder``/manifest.json for the files now in the folder (the artefact, the
    runtime files, the README) and return it. ``foot`` defaults to the footprint of the
    manifest already there, if any."""
    folder = Path(folder)
    doc = json.loads((folder / ARTEFACT).read_bytes())
    old = folder / MANIFEST
    if foot is None and old.is_file():
        foot = json.loads(old.read_bytes()).get("footprint")
    import boxwood_runtime

    names = [n for n in (ARTEFACT,) + RUNTIME_FILES + (README,) if (folder / n).is_file()]
    manifest = {
        "bundle_format": BUNDLE_FORMAT,
        "bundle_format_version": BUNDLE_FORMAT_VERSION,
        "made_by": "boxwood %s" % __version__,
        "scorer_version": boxwood_runtime.SCORER_VERSION,
        "entry": ENTRY,
        "artefact": {"file": ARTEFACT, "format": doc.get("format"), "format_version": doc.get("format_version"),
                     "digest": doc.get("boxwood_digest")},
        "files": {n: {"bytes": (folder / n).stat().st_size, "sha256": _sha256(folder / n)} for n in names},
        "footprint": foot or {},
        "python": {"cpython": "3.8 or newer",
                   "micropython": "1.2x with double-precision floats (check, info; score with JSON Lines)"},
    }
    (folder / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return manifest


def make_bundle(source: Union[str, Path], out_dir: Union[str, Path], zip_file: bool = False,
                measure: str = "auto", port: Optional[Union[str, Path]] = None,
                reference_rows: int = 6, sign: Optional[Union[str, Path]] = None) -> Dict[str, Any]:
    """Make the bundle folder ``out_dir`` (which must not exist, or be empty) from
    ``source`` (artefact or model file); with ``zip_file`` also ``<out_dir>.zip``; with
    ``sign`` (an Ed25519 private key file, boxwood.signing) also manifest.sig. Returns the
    manifest. The folder appears complete or not at all (built beside it, then renamed)."""
    import boxwood_runtime

    out = _free_folder(out_dir)
    key = _signing_key(sign)
    data = artefact_from(source, reference_rows=reference_rows)
    foot = footprint(data, measure=measure, port=port)
    model = boxwood_runtime.load(data)
    work = _work_folder(out)
    try:
        (work / ARTEFACT).write_bytes(data)
        for name in RUNTIME_FILES:
            shutil.copyfile(runtime_dir() / name, work / name)
        (work / README).write_text(readme_text(model, foot), encoding="utf-8")
        manifest = write_manifest(work, foot)
        if key is not None:
            signing.sign_folder(work, key)
        _publish(work, out)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    if zip_file:
        write_zip(out)
    return manifest


def _signing_key(sign: Optional[Union[str, Path]]) -> Any:
    """The private key to sign with (read before any work, so a bad key fails fast), or None."""
    return None if sign is None else signing.load_private_key(sign)


def _free_folder(out_dir: Union[str, Path]) -> Path:
    """``out_dir`` as a Path; BundleError unless it is new or an empty folder."""
    out = Path(out_dir)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise BundleError("%s exists and is not an empty folder; choose a new folder" % out)
    return out


def _work_folder(out: Path) -> Path:
    """A private folder beside ``out`` to build the bundle in."""
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        return Path(tempfile.mkdtemp(prefix="." + out.name + ".", dir=str(out.parent)))
    except OSError as exc:  # name the user's folder, not our temporary one
        raise BundleError("cannot write the bundle folder %s: %s" % (out, exc.strerror or exc))


def _publish(work: Path, out: Path) -> None:
    """Give ``work`` the usual permissions and rename it to ``out`` (complete or not at all)."""
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(work, 0o777 & ~mask)  # mkdtemp made it private
    if out.exists():
        out.rmdir()
    os.replace(work, out)


def write_zip(folder: Union[str, Path]) -> Path:
    """``<folder>.zip`` holding the folder's files under the folder's name, with fixed
    timestamps and sorted names (the same folder gives the same zip bytes)."""
    folder = Path(folder)
    target = folder.with_name(folder.name + ".zip")
    tmp = target.with_name(target.name + ".partial")
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for path in sorted(p for p in folder.iterdir() if p.is_file()):
            info = zipfile.ZipInfo("%s/%s" % (folder.name, path.name), date_time=_ZIP_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            zf.writestr(info, path.read_bytes())
    os.replace(tmp, target)
    return target


# ------------------------------------------------------------------------------------ the C target
# ``boxwood bundle MODEL --target c``: a folder for a microcontroller project. It holds NAME.c and
# NAME.h (the C target), main.c (runs the reference rows and checks them: PASS or FAIL), startup.c
# and link.ld (the Cortex-M4 board of boxwood.formats.c.board), a Makefile (all, host, qemu, clean),
# README.txt and manifest.json (target "c": every file's sha256 and size, the versions, the digest
# of the artefact the C was generated from, and the Cortex-M4 footprint from arm-none-eabi-size).

C_PREFIX = "model"
C_EXAMPLE = "main.c"
C_RESERVED = ("main", "startup")  # prefixes whose NAME.c would be a board file
C_BOARD = "QEMU mps2-an386: Cortex-M4 with the single-precision FPU (FPv4-SP)"
C_HOW = ("arm-none-eabi-size -B of the model's own object (NAME.c compiled alone, before linking: "
         "every function of the C target) and of the linked example program (NAME.c, main.c with "
         "the reference rows, startup.c, newlib-nano with semihosting and its printf), built with "
         "the flags in cflags; flash = text + data, ram = data + bss; the stack comes on top")
_MAX_SHOWN = 12  # categories or classes listed per line in the README


def c_rows(ensemble: Any) -> List[List[float]]:
    """The ensemble's reference rows as the C code takes them (formats.c.evaluators.CInputs):
    None as NaN, a text category as its position among the feature's categories."""
    from .formats.c.evaluators import CInputs

    return [[float(v) for v in row] for row in CInputs(ensemble).matrix(ensemble.reference.rows).tolist()]


def c_footprint(folder: Path, prefix: str) -> Dict[str, Any]:
    """Build ``folder``'s NAME.c and main.c for the Cortex-M4 in a temporary folder (as its
    Makefile does), measure both with arm-none-eabi-size and run the example under QEMU, which
    must print PASS (BundleCheckFailed otherwise). ``{"measured": False, "why": ...}`` when the
    toolchain is not here."""
    from .formats.c import board

    reason = board.unavailable_reason()
    if reason:
        return {"measured": False, "why": "not measured: " + reason}
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        for name in (prefix + ".c", prefix + ".h", C_EXAMPLE):
            shutil.copyfile(folder / name, work / name)
        try:
            elf = board.build_elf(work, [work / (prefix + ".c"), work / C_EXAMPLE], include_dirs=[work], name=prefix)
            model, program = board.footprint(work / (prefix + ".o")), board.footprint(elf)
            printed = board.run_qemu(elf, check=False)
            board.parse_selftest_output(printed)
        except board.BoardError as exc:
            raise BundleCheckFailed("the C bundle fails on the Cortex-M4: %s" % exc)
        verdict = printed.strip().splitlines()[-1]
        if not verdict.startswith("PASS"):
            raise BundleCheckFailed("the C bundle's example fails on the Cortex-M4 (QEMU %s):\n%s" % (
                board.MACHINE, "\n".join(ln for ln in printed.splitlines() if not ln.startswith("row "))))
        gcc = subprocess.run([str(board.toolchain().gcc), "--version"], stdin=subprocess.DEVNULL,  # type: ignore
                             capture_output=True, text=True).stdout.splitlines()
    return {"measured": True, "board": C_BOARD, "compiler": gcc[0] if gcc else "arm-none-eabi-gcc",
            "cflags": " ".join(board.CFLAGS), "model": dict(file=prefix + ".c", **model),
            "program": dict(file=prefix + ".elf", **program), "self_test": verdict, "how": C_HOW}


def _listed(values: List[Any], numbered: bool) -> str:
    shown = ["%d = %s" % (i, json.dumps(v)) if numbered else json.dumps(v) for i, v in enumerate(values[:_MAX_SHOWN])]
    return ", ".join(shown) + (", ... (%d in all)" % len(values) if len(values) > _MAX_SHOWN else "")


def c_inputs(ensemble: Any) -> List[str]:
    """One README line per C input x[j]: its name and what to put there."""
    if ensemble.fields is not None:  # a pipeline: raw fields, the steps run in C
        lines = []
        for j, field in enumerate(ensemble.fields):
            done = sorted({st["op"] + "d" for f in ensemble.features if f.source and f.source["field"] == field
                           for st in f.source["steps"]})  # "imputed", "encoded"
            lines.append("  x[%d]  %s  (a number%s)" % (j, field, "; %s in C" % " and ".join(done) if done else ""))
        return lines
    out = []
    for j, f in enumerate(ensemble.features):
        if not f.is_categorical:
            out.append("  x[%d]  %s  (a number)" % (j, f.name))
        elif any(isinstance(c, str) for c in f.categories):
            out.append("  x[%d]  %s  (categorical: the category's position among its categories: %s)"
                       % (j, f.name, _listed(list(f.categories), True)))
        else:
            out.append("  x[%d]  %s  (categorical: the category's value, one of %s)"
                       % (j, f.name, _listed(list(f.categories), False)))
    return out


def _sizes(entry: Dict[str, int]) -> str:
    return "flash %d bytes, RAM %d bytes (text %d, data %d, bss %d)" % (
        entry["flash"], entry["ram"], entry["text"], entry["data"], entry["bss"])


def c_readme_text(ensemble: Any, prefix: str, foot: Dict[str, Any], digest: str, n_raw: int, n_out: int) -> str:
    """The README of a C bundle."""
    from boxwood_runtime.csource import ERROR_CODES

    P, up, m4 = prefix, prefix.upper(), foot["cortex_m4"]
    n_rows = len(ensemble.reference.rows)
    if m4["measured"]:
        memory = ["Footprint on the Cortex-M4, measured with arm-none-eabi-size when the bundle was made",
                  "(%s;" % m4["compiler"], " %s):" % m4["cflags"],
                  "  the model alone (%s.c, all its functions):" % P, "      " + _sizes(m4["model"]),
                  "  the example program (%s.elf, with newlib's printf):" % P, "      " + _sizes(m4["program"]),
                  "The example, run then on the emulated board, printed:", "  " + m4["self_test"]]
    else:
        memory = ["Footprint on the Cortex-M4: %s." % m4["why"]]
    memory += ["The stack comes on top (the model keeps a few arrays of doubles per call on it); the",
               "model needs no heap (no malloc), no stdio and no recursion, and its tables are const",
               "(flash). The Cortex-M4's FPU is single precision: every double operation runs in",
               "software (the compiler's runtime library), which is slower than float and is what keeps",
               "the results bit for bit the source model's."]
    what = {"regression": "the predictions", "outlier_detection": "score_samples",
            "classification": "the positive class's probability" if n_out == 1 else "class probabilities"}
    if ensemble.post_transform == "identity":
        raw = "predict_proba" if ensemble.task == "classification" else "predict"
    else:
        raw = "decision_function" if ensemble.task == "classification" else \
            "scores before its %s output transform" % ensemble.post_transform
    api = ["  int %s_raw(const double *x, double *raw);" % P,
           "      %d raw score%s, bit for bit the source model's %s" % (n_raw, "" if n_raw == 1 else "s", raw),
           "  int %s_predict(const double *x, double *out);" % P,
           "      %d value%s: %s" % (n_out, "" if n_out == 1 else "s", what[ensemble.task])]
    if ensemble.classes:
        api += ["  int %s_label(const double *x, int *label);" % P,
                "      the predicted class, an index into %s_class_labels: %s"
                % (P, _listed(list(ensemble.classes), True))]
    api += ["  size_t %s_score_many(size_t n, const double *x, double *raw, double *out, int *label, int *status);" % P,
            "      n records at once (see %s.h)" % P,
            "Every function returns one of these codes (%s.h); on an error nothing is written:" % P]
    api += [textwrap.fill(text, 92, initial_indent="  %d %s_%s: " % (code, up, name), subsequent_indent="      ")
            for name, code, text in ERROR_CODES]
    return "\n".join([
        "boxwood bundle, C target: %s model, %d inputs, %s" % (
            ensemble.task.replace("_", " "), len(c_inputs(ensemble)),
            ("classes " + _listed(list(ensemble.classes), False)) if ensemble.classes
            else "outputs " + ", ".join(ensemble.output_names)),
        "%d trees, %d nodes, deepest path %d splits; generated by boxwood %s from the artefact" % (
            foot["trees"], foot["nodes"], foot["max_depth"], __version__),
        digest + ".",
        "",
        "Files",
        "  %s.c, %s.h  the model as portable C99 (tables and scoring code; do not edit: export again)" % (P, P),
        "  main.c        example: scores the model's %d reference rows, prints each result's bits and" % n_rows,
        "                compares them with what the source model computed (raw scores bit for bit,",
        "                predictions within 8 ulps); prints PASS (exit status 0) or FAIL (1)",
        "  startup.c, link.ld   startup code and linker script of the emulated Cortex-M4 board",
        "  Makefile      the builds below; manifest.json: sha256 and size of every file, the footprint",
        "",
        "Build",
        "  make          %s.elf for a Cortex-M4 with arm-none-eabi-gcc and newlib-nano, and its size" % P,
        "                (Debian packages: gcc-arm-none-eabi libnewlib-arm-none-eabi)",
        "  make host     main.c and %s.c with this computer's C compiler (cc), then runs it" % P,
        "  make qemu     runs %s.elf on QEMU's emulated Cortex-M4 (qemu-system-arm); output via semihosting" % P,
        "  make clean",
        "On your own board: add %s.c and %s.h to the project with your own startup code and linker" % (P, P),
        "script; compile as C99 without -ffast-math (the file refuses it), and run main.c's check there.",
        "",
        "API (%s.h)" % P,
    ] + api + [
        "",
        "Inputs: x holds %s_N_FEATURES doubles in this order (%s_input_names); NaN means missing." % (up, P),
    ] + c_inputs(ensemble) + [""] + memory + [
        "",
        "Cautions",
        "- The outputs are advisory. Where they drive equipment (compressors, heaters,",
        "  valves, alarms), keep the equipment's own protections and controls in charge.",
        "- Where a model drives equipment that can hurt someone, the safety functions need",
        "  their own engineering, sensors and validation under the applicable standards and",
        "  local codes; this code is not a safety function.",
        "- Test a retrained model on the target hardware (main.c must print PASS there) before",
        "  it is put in service, and keep a safe fallback for when a call returns an error code.",
        "- manifest.json detects damaged, truncated, missing or mixed-up files. It is not a",
        "  signature: protect the files from deliberate tampering by other means.",
        ""])


def write_c_manifest(folder: Path, prefix: str, doc: Dict[str, Any], foot: Dict[str, Any], ensemble: Any,
                     c_digest: str) -> Dict[str, Any]:
    """Write ``folder``/manifest.json of a C bundle (every file now in the folder) and return it."""
    from boxwood_runtime import SCORER_VERSION
    from boxwood_runtime.csource import C_TARGET_VERSION

    names = sorted(p.name for p in folder.iterdir() if p.is_file() and p.name != MANIFEST)
    ref = ensemble.reference
    manifest = {
        "bundle_format": BUNDLE_FORMAT,
        "bundle_format_version": BUNDLE_FORMAT_VERSION,
        "target": "c",
        "made_by": "boxwood %s" % __version__,
        "scorer_version": SCORER_VERSION,
        "entry": C_EXAMPLE,
        "artefact": {"format": doc.get("format"), "format_version": doc.get("format_version"),
                     "digest": doc.get("boxwood_digest")},
        "c": {"version": C_TARGET_VERSION, "prefix": prefix, "source": prefix + ".c", "header": prefix + ".h",
              "digest": c_digest, "inputs": list(ensemble.fields if ensemble.fields is not None
                                                 else [f.name for f in ensemble.features]),
              "n_outputs": len(ref.raw[0]), "n_predictions": len(ref.transformed[0]),
              "classes": None if ensemble.classes is None else list(ensemble.classes),
              "reference_rows": len(ref.rows)},
        "files": {n: {"bytes": (folder / n).stat().st_size, "sha256": _sha256(folder / n)} for n in names},
        "footprint": foot,
    }
    (folder / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return manifest


def make_c_bundle(source: Union[str, Path], out_dir: Union[str, Path], prefix: str = C_PREFIX,
                  zip_file: bool = False, reference_rows: int = 6,
                  sign: Optional[Union[str, Path]] = None) -> Dict[str, Any]:
    """Make the C bundle folder ``out_dir`` (new or empty) from ``source`` (artefact or model
    file); with ``zip_file`` also ``<out_dir>.zip``. Returns the manifest. Raises FormatError
    (a ValueError) when C cannot carry the model, BundleError for a bad prefix or folder, and
    BundleCheckFailed when the written C fails its check (read back, compiled on this computer,
    reference rows) or the example fails on the emulated Cortex-M4."""
    import boxwood_runtime
    from boxwood_runtime.csource import CTargetError, prefix_from
    from boxwood_runtime.scorer import SELF_CHECK_ULPS

    from .formats.c import board
    from .formats.c import check as c_check
    from .formats.c import writer as c_writer
    from .formats.json.reader import from_document

    out = _free_folder(out_dir)
    key = _signing_key(sign)
    try:
        prefix = prefix_from(prefix, prefix)
    except CTargetError as exc:
        raise BundleError(str(exc))
    if prefix in C_RESERVED:
        raise BundleError("the C prefix %r would overwrite the bundle's own %s.c; choose another" % (prefix, prefix))
    data = artefact_from(source, reference_rows=reference_rows)
    model = boxwood_runtime.load(data)
    ensemble = from_document(model.doc)
    ref = ensemble.reference
    foot: Dict[str, Any] = {"trees": model.n_trees, "nodes": model.n_nodes, "max_depth": model.max_depth}
    work = _work_folder(out)
    try:
        c_path = work / (prefix + ".c")
        c_writer.write(ensemble, c_path, c_prefix=prefix)  # FormatError (exit 2) names the feature or step
        ok, message = c_check.check(c_path, ensemble)
        if not ok:
            raise BundleCheckFailed("the C file fails its check: %s" % message)
        board.write_bundle(work, prefix, c_rows(ensemble), len(ref.raw[0]), len(ref.transformed[0]),
                           ref.raw, ref.transformed, SELF_CHECK_ULPS)
        foot["cortex_m4"] = c_footprint(work, prefix)
        (work / README).write_text(c_readme_text(ensemble, prefix, foot, model.doc["boxwood_digest"],
                                                 len(ref.raw[0]), len(ref.transformed[0])), encoding="utf-8")
        manifest = write_c_manifest(work, prefix, model.doc, foot, ensemble, c_check.digest(c_path))
        if key is not None:
            signing.sign_folder(work, key)
        _publish(work, out)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    if zip_file:
        write_zip(out)
    return manifest
