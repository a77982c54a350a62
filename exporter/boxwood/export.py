"""The export pipeline: fitted model -> Ensemble (+ self-check rows) -> artefact file."""
from __future__ import annotations

import pickle
from pathlib import Path
from typing import Any, Optional, Union

from .ir import Ensemble, Reference
from .readers import read_model
from .source import SourceModel, probe_rows

PICKLE_WARNING = ("Loading a pickle or joblib file runs code stored in it: only load model "
                  "files that you or someone you trust made.")


def load_model_file(path: Union[str, Path]) -> Any:
    """Load a fitted estimator saved with joblib or pickle. This RUNS CODE from the file
    (see PICKLE_WARNING): use it only on trusted files."""
    path = Path(path)
    try:
        import joblib

        return joblib.load(path)
    except (pickle.UnpicklingError, KeyError, ValueError, EOFError, IndexError):
        with path.open("rb") as fh:
            return pickle.load(fh)


def build(model: Any, reference_rows: int = 6) -> Ensemble:
    """Read ``model`` into an Ensemble and attach reference rows scored by the model itself."""
    ensemble = read_model(model)
    source = SourceModel(model, ensemble)
    rows = probe_rows(ensemble, reference_rows)
    raw = source.raw(rows)
    transformed = source.transformed(rows)
    ensemble.reference = Reference(
        rows=rows,
        raw=[[float(v) for v in r] for r in raw],
        transformed=[[float(v) for v in r] for r in transformed],
    )
    return ensemble


def export(model: Any, path: Union[str, Path], fmt: Optional[str] = None, reference_rows: int = 6,
           **writer_options: Any) -> Ensemble:
    """Export a fitted model to ``path``; the format follows the extension unless ``fmt`` says.

    ``writer_options`` go to the writer (ONNX: ``input_type``, ``legacy``; docs/onnx.md)."""
    from .writers import WRITERS

    ext = ("." + fmt.lstrip(".")) if fmt else Path(path).suffix.lower()
    if ext not in WRITERS:
        raise ValueError("unknown artefact format %r; known: %s" % (ext, ", ".join(sorted(WRITERS))))
    ensemble = build(model, reference_rows)
    WRITERS[ext](ensemble, path, **writer_options)
    return ensemble
