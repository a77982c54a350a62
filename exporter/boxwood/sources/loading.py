"""Loading the user's fitted model from a joblib or pickle file: the only place boxwood unpickles."""
from __future__ import annotations

import pickle
import sys
from pathlib import Path
from typing import Any, Union

PICKLE_WARNING = ("Loading a pickle or joblib file runs code stored in it: only load model "
                  "files that you or someone you trust made.")


# File names that say "data": a file named so is never unpickled, whatever its first bytes.
DATA_SUFFIXES = {".json": "JSON", ".onnx": "ONNX", ".jsonl": "JSON Lines", ".ndjson": "JSON Lines", ".csv": "CSV",
                 ".tsv": "TSV", ".txt": "text", ".c": "C source", ".h": "C source", ".zip": "zip"}


class ModelFileError(ValueError):
    """The file cannot be loaded as a fitted model (the message names the file and the cause)."""


def refuse_data_name(path: Union[str, Path]) -> None:
    """ModelFileError when ``path``'s name says a data format (.json, .onnx, ...): the name and
    the content must agree, so a pickle named model.json is refused, never unpickled."""
    said = DATA_SUFFIXES.get(Path(path).suffix.lower())
    if said is not None:
        raise ModelFileError("refusing to unpickle %r: its name says %s but its content is not %s (a pickle or "
                             "joblib file?); boxwood never runs a file named as data. If you made it and trust it, "
                             "rename it to .joblib or .pkl" % (str(path), said, said))


def load_model_file(path: Union[str, Path]) -> Any:
    """Load a fitted estimator saved with joblib or pickle. This RUNS CODE from the file
    (see PICKLE_WARNING, written to stderr on every load): use it only on trusted files. A
    file whose name says a data format (DATA_SUFFIXES) is refused, never unpickled.

    Raises FileNotFoundError when there is no such file and :class:`ModelFileError` when
    its name says data or it cannot be unpickled (whatever the unpickler raised is named in the message)."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError("model file %r not found (or not a file)" % str(path))
    refuse_data_name(path)
    sys.stderr.write("boxwood: warning: loading %s: %s\n" % (path, PICKLE_WARNING))
    try:
        import joblib

        try:
            return joblib.load(path)
        except (pickle.UnpicklingError, KeyError, ValueError, EOFError, IndexError):
            with path.open("rb") as fh:
                return pickle.load(fh)
    except MemoryError:
        raise
    except Exception as exc:  # unpickling can raise anything: it is the user's file
        raise ModelFileError("cannot load %r as a joblib or pickle file: %s: %s"
                             % (str(path), type(exc).__name__, exc))
