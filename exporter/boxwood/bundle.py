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

The manifest guards against damage and mix-ups (a copy cut short, a file from another
bundle, a scorer of another version); it is not a signature against a deliberate
attacker who can rewrite both a file and the manifest.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
import zipfile
from pathlib import Path
from typing import Any, Dict, Optional, Union

from . import __version__

BUNDLE_FORMAT = "boxwood.bundle"
BUNDLE_FORMAT_VERSION = 1
ARTEFACT = "model.json"
MANIFEST = "manifest.json"
README = "README.txt"
ENTRY = "box.py"
RUNTIME_FILES = ("scorer.py", "stream.py", ENTRY)  # copied as they are from boxwood_runtime
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
- manifest.json detects damaged, truncated, missing or mixed-up files. It is not a
  signature: protect the folder from deliberate tampering by other means.
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
                reference_rows: int = 6) -> Dict[str, Any]:
    """Make the bundle folder ``out_dir`` (which must not exist, or be empty) from
    ``source`` (artefact or model file); with ``zip_file`` also ``<out_dir>.zip``.
    Returns the manifest. The folder appears complete or not at all (built beside it,
    then renamed)."""
    import boxwood_runtime

    out = _free_folder(out_dir)
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
        _publish(work, out)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    if zip_file:
        write_zip(out)
    return manifest


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
