"""Loading the user's fitted model from a joblib or pickle file: the only place boxwood unpickles."""
from __future__ import annotations

import pickle
from pathlib import Path
from typing import Any, Union

PICKLE_WARNING = ("Loading a pickle or joblib file runs code stored in it: only load model "
                  "files that you or someone you trust made.")


class ModelFileError(ValueError):
    """The file cannot be loaded as a fitted model (the message names the file and the cause)."""


def load_model_file(path: Union[str, Path]) -> Any:
    """Load a fitted estimator saved with joblib or pickle. This RUNS CODE from the file
    (see PICKLE_WARNING): use it only on trusted files.

    Raises FileNotFoundError when there is no such file and :class:`ModelFileError` when
    it cannot be unpickled (whatever the unpickler raised is named in the message)."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError("model file %r not found (or not a file)" % str(path))
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
