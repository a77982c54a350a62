"""Write the boxwood JSON artefact (format version 2; 3 when it uses a feature that needs
it, see :func:`needs_format_3`, so artefacts without one stay byte for byte as before).

The layout is documented by schemas/tree-ensemble.schema.json and the page
docs/artefact-format.md. The file is the canonical JSON of the document (keys
sorted, no spaces) preceded by its sha256 digest, so the same ensemble always gives
the same bytes, and floats are written with Python's shortest round-trip repr, so
they read back to the same bits. Infinite thresholds are written as the strings
"inf" and "-inf" (JSON has no infinity).
"""
from __future__ import annotations

import functools
import hashlib
import math
import struct
from pathlib import Path
from typing import Any, Dict, Iterator, List, Union

import numpy as np
from boxwood_runtime.scorer import _DIGEST_PREFIX, FORMAT_NAME, artefact_bytes, canonical_bytes, json_float_15

from ...contract import OutputContract
from ...ir import FORMAT_3_STEPS, Ensemble

FORMAT_VERSION = 2  # what every artefact without a format-3 feature is written as
FORMAT_VERSION_3 = 3


def needs_format_3(ensemble: Ensemble) -> bool:
    """True when ``ensemble`` uses something format version 2 cannot carry (then the
    artefact says 3, and older scorers refuse it with their "format_version ... is not one
    this scorer reads" message); False keeps version 2 and the bytes of every older
    artefact. Today: calibration (``outputs.calibration``), target steps
    (``outputs.target_steps``) and the preprocessing steps "lookup" (one-hot and target
    encoding) and "arithmetic" (affine scalers)."""
    return (ensemble.calibration is not None or bool(ensemble.target_steps)
            or any(st.get("op") in FORMAT_3_STEPS for f in ensemble.features if f.source is not None
                   for st in f.source["steps"]))


def format_version(ensemble: Ensemble) -> int:
    return FORMAT_VERSION_3 if needs_format_3(ensemble) else FORMAT_VERSION


def _target_step(step: Dict[str, Any]) -> Dict[str, Any]:
    out: Dict[str, Any] = {"op": step["op"]}
    if "values" in step:
        out["values"] = [number(v) for v in step["values"]]
    return out


def _calibration(cal: Dict[str, Any]) -> Dict[str, Any]:
    """``Ensemble.calibration`` as JSON (numbers as :func:`number` writes them)."""
    folds = []
    for fold in cal["folds"]:
        cals = []
        for c in fold["calibrators"]:
            if c["method"] == "isotonic":
                cals.append({"method": "isotonic", "x": [number(v) for v in c["x"]], "y": [number(v) for v in c["y"]]})
            else:
                cals.append({"method": "sigmoid", "a": number(c["a"]), "b": number(c["b"])})
        folds.append({"post_transform_params": {k: number(v) for k, v in sorted(fold["post_transform_params"].items())},
                      "calibrators": cals})
    return {"response": cal["response"], "normalisation": cal["normalisation"], "folds": folds}


def text_reading() -> Dict[str, Any]:
    return dict(_text_reading())


@functools.lru_cache(maxsize=None)
def _text_reading() -> Dict[str, Any]:
    """How the workstation reads text, taken from the pandas in use (not typed here).

    ``text_reader`` names it. ``missing_tokens``: the cells ``pandas.read_csv`` reads as NaN by default (its
    ``STR_NA_VALUES``), compared with the cell exactly as written (no trimming: pandas
    keeps " south " and " NA " as they are). ``null_text``: what ``pandas.read_json(...,
    lines=True)`` makes of a JSON null in a column of strings ("nan" from pandas 3 on,
    "none" before), found by asking pandas. ``json_numbers``: "15_decimals" when
    ``pandas.read_json`` reads numbers as its default ujson parser does (see
    ``scorer.json_float_15``), "exact" when correctly rounded. Both are checked against pandas itself.
    """
    import io

    import pandas as pd

    try:
        from pandas._libs.parsers import STR_NA_VALUES
    except ImportError:  # older layouts re-export it from the reader module
        from pandas.io.parsers.readers import STR_NA_VALUES  # type: ignore
    tokens = sorted(str(t) for t in STR_NA_VALUES)
    probe = "c\n" + "\n".join('"%s"' % t for t in tokens) + "\n"
    read = pd.read_csv(io.StringIO(probe), keep_default_na=True)["c"]
    if len(read) != len(tokens) or not read.isna().all():
        raise RuntimeError("pandas %s does not read its own STR_NA_VALUES as missing" % pd.__version__)
    col = pd.read_json(io.StringIO('{"c":"x"}\n{"c":null}\n'), lines=True)["c"]
    null = col.iloc[1]
    null_text = "none" if null is None else "nan"
    if null_text == "nan" and not (isinstance(null, float) and math.isnan(null)):
        raise RuntimeError("pandas %s reads a JSON null in a string column as %r" % (pd.__version__, null))
    # JSON numbers: pandas' default reader keeps 15 fraction digits (ujson); later ones may not
    probes = ["0.12345678901234567", "-0.045472477940023646", "123.456789012345678e-3", "2.5E+10", "0.1"]
    got = pd.read_json(io.StringIO("".join('{"c":%s}\n' % p for p in probes)), lines=True)["c"].tolist()
    numbers = None
    for name, parse in (("exact", float), ("15_decimals", json_float_15)):
        if all(struct.pack("<d", float(g)) == struct.pack("<d", parse(p)) for g, p in zip(got, probes)):
            numbers = name
            break
    if numbers is None:
        raise RuntimeError("pandas %s reads JSON numbers in a way boxwood does not know" % pd.__version__)
    return {"missing_tokens": tokens, "null_text": null_text, "json_numbers": numbers,
            "text_reader": "pandas %s" % pd.__version__}


def number(v: float) -> Union[float, str]:
    """A float as JSON can carry it: itself, or "inf"/"-inf"."""
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    if math.isnan(v):
        raise ValueError("NaN cannot be written into an artefact")
    return float(v)


def _cell(v: Any) -> Any:
    if isinstance(v, float):
        return None if math.isnan(v) else number(v)
    return v


def _step(step: Dict[str, Any]) -> Dict[str, Any]:
    """A preprocessing step as JSON: NaN (the encoder's NaN outputs) written as null."""
    out = {k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in step.items()}
    if out["op"] == "impute":
        out.setdefault("replaces", "nan")  # scikit-learn's default missing_values
    return out


def _tree(t: Any) -> Dict[str, Any]:
    tree: Dict[str, Any] = {
        "output": t.output,
        "feature": list(t.feature),
        "threshold": [number(v) for v in t.threshold],
        "left": list(t.left),
        "right": list(t.right),
        "missing_left": [bool(m) for m in t.missing_left],
        "value": [number(v) for v in t.value],
    }
    cats = {str(i): list(c) for i, c in enumerate(t.left_categories) if c is not None}
    if cats:
        tree["left_categories"] = cats
    return tree


def to_document(ensemble: Ensemble) -> Dict[str, Any]:
    """The artefact body (everything but the digest) for ``ensemble``."""
    ensemble.check()
    return _document(ensemble, [_tree(t) for t in ensemble.trees])


def _document(ensemble: Ensemble, trees: List[Dict[str, Any]]) -> Dict[str, Any]:
    features = []
    for f in ensemble.features:
        entry: Dict[str, Any] = {"name": f.name, "kind": f.kind}
        if f.is_categorical:
            entry["categories"] = list(f.categories)
        if f.source is not None:
            entry["source"] = {"field": f.source["field"], "steps": [_step(st) for st in f.source["steps"]]}
        features.append(entry)
    inputs: Dict[str, Any] = {
        "features": features,
        "compare_precision": ensemble.compare_precision,
        "missing_values": ensemble.missing_values,
        "accepts_infinity": ensemble.accepts_infinity,
    }
    inputs.update(text_reading())
    if ensemble.fields is None:
        # a model fitted on an array has no DataFrame reader behind it: JSON numbers exact
        # (as json.loads reads them); a pipeline's raw fields are read as pandas reads them
        inputs["json_numbers"] = "exact"
    if ensemble.fields is not None:
        inputs["fields"] = list(ensemble.fields)
    outputs: Dict[str, Any] = {
        "post_transform": ensemble.post_transform,
        "names": list(ensemble.output_names) or ["output_%d" % i for i in range(ensemble.n_outputs)],
    }
    if ensemble.classes is not None:
        outputs["classes"] = list(ensemble.classes)
    if ensemble.binary_rule is not None:
        outputs["binary_rule"] = ensemble.binary_rule
    if ensemble.post_transform in ("softmax", "samme"):
        outputs["softmax_sum"] = ensemble.softmax_sum
    if ensemble.post_transform_params:
        outputs["post_transform_params"] = {k: number(v) for k, v in sorted(ensemble.post_transform_params.items())}
    if ensemble.calibration is not None:
        outputs["calibration"] = _calibration(ensemble.calibration)
    if ensemble.target_steps:
        outputs["target_steps"] = [_target_step(st) for st in ensemble.target_steps]
    doc: Dict[str, Any] = {
        "format": FORMAT_NAME,
        "format_version": format_version(ensemble),
        "task": ensemble.task,
        "inputs": inputs,
        "outputs": outputs,
        "ensemble": {
            "combine": ensemble.combine,
            "base_values": [number(v) for v in ensemble.base_values],
            "trees": trees,
        },
        "provenance": _provenance(ensemble.provenance),
    }
    ref = ensemble.reference
    if ref is not None:
        doc["self_check"] = {
            "rows": [[_cell(v) for v in row] for row in ref.rows],
            "raw": [[number(v) for v in r] for r in ref.raw],
            "transformed": [[number(v) for v in r] for r in ref.transformed],
        }
        doc["self_check"].update(_check_outputs(ensemble))
    return doc


def _check_outputs(ensemble: Ensemble) -> Dict[str, Any]:
    """What the self-check compares beyond raw scores and outputs (schema: self_check): the
    input names the rows are in order of, the decision values and the labels, formed from the
    source model's exact values through the workstation's output contract. They bind the fields
    whose change leaves the raw scores alone: feature/field names, class labels, offsets."""
    ref = ensemble.reference
    contract = OutputContract(ensemble)
    out: Dict[str, Any] = {"inputs": list(ensemble.fields) if ensemble.fields is not None
                           else [f.name for f in ensemble.features]}
    if ensemble.calibration is not None:
        # CalibratedClassifierCV has no decision_function; predict is the class of the largest
        # probability (the first of equal maxima), from the reference probabilities
        probs = np.asarray(ref.transformed, dtype=np.float64).reshape(len(ref.raw), -1)
        out["labels"] = [ensemble.classes[int(i)] for i in np.argmax(probs, axis=1)]
        return out
    if contract.post_transform == "samme":  # the stored exact values are already decision values
        raw = None
        decision = np.asarray(ref.raw, dtype=np.float64)
    else:
        raw = np.asarray(ref.raw, dtype=np.float64)
        decision = contract.decision_values(raw)
    out["decision"] = [[number(float(v)) for v in r] for r in decision.reshape(len(ref.raw), -1)]
    if ensemble.task != "regression":
        if raw is None:  # AdaBoost: the label follows from the decision values
            index = (decision[:, 0] > 0.0).astype(int) if decision.shape[1] == 1 else np.argmax(decision, axis=1)
        else:
            index = contract.label_index(raw)
        out["labels"] = [ensemble.classes[int(i)] for i in index]
    return out


def _provenance(p: Dict[str, Any]) -> Dict[str, Any]:
    """Provenance with the three parts the schema requires, for hand-built ensembles too."""
    from ... import __version__

    versions = dict(p.get("versions") or {})
    versions.setdefault("boxwood", __version__)
    return {"estimator": p.get("estimator", "unknown"), "parameters": dict(p.get("parameters") or {}),
            "versions": versions}


def to_bytes(ensemble: Ensemble) -> bytes:
    """The complete artefact file: digest line first, then the canonical body."""
    return artefact_bytes(to_document(ensemble))


_TREES_MARK = "boxwood-trees-\u2603"  # stands in for the trees while the rest is serialised


def _chunks(ensemble: Ensemble) -> Iterator[bytes]:
    """The canonical body (``canonical_bytes(to_document(ensemble))``) in pieces: the
    document without its trees, then each tree serialised on its own, so a big forest is
    never held as one document or one string. The pieces join to exactly the canonical bytes
    (sorted keys, "," and ":" separators, so a list is its items' JSON joined by ",")."""
    ensemble.check()
    doc = _document(ensemble, [])
    doc["ensemble"]["trees"] = _TREES_MARK
    head = canonical_bytes(doc)
    mark = canonical_bytes(_TREES_MARK)
    if head.count(mark) != 1:  # the mark's text appears elsewhere: serialise in one piece
        yield canonical_bytes(_document(ensemble, [_tree(t) for t in ensemble.trees]))
        return
    before, after = head.split(mark)
    yield before + b"["
    for i, t in enumerate(ensemble.trees):
        yield (b"," if i else b"") + canonical_bytes(_tree(t))
    yield b"]" + after


def write(ensemble: Ensemble, path: Union[str, Path]) -> int:
    """Write the artefact to ``path`` (atomically: a temporary file, then rename); return its size.

    The body is written tree by tree while it is hashed; the digest, which comes first in the
    file, is written into its place at the end (the bytes equal ``to_bytes(ensemble)``)."""
    path = Path(path)
    tmp = path.with_name(path.name + ".partial")
    digest = hashlib.sha256()
    try:
        size = _write_to(ensemble, tmp, digest)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    tmp.replace(path)
    return size


def _write_to(ensemble: Ensemble, tmp: Path, digest: Any) -> int:
    with open(tmp, "wb") as fh:
        fh.write(_DIGEST_PREFIX + b"0" * 64 + b'",')
        first = True
        for chunk in _chunks(ensemble):
            digest.update(chunk)
            fh.write(chunk[1:] if first else chunk)  # the body's "{" follows the digest's ","
            first = False
        fh.write(b"\n")
        size = fh.tell()
        fh.seek(len(_DIGEST_PREFIX))
        fh.write(digest.hexdigest().encode("ascii"))
    return size
