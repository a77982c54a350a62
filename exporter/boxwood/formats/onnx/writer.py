"""Write an Ensemble as an ONNX file: the exact graph (:mod:`.exact`) or the legacy float32
graph (:mod:`.legacy`)."""
from __future__ import annotations

from pathlib import Path
from typing import Optional, Union

from ...ir import Ensemble
from . import exact
from . import legacy as legacy_graph


def to_bytes(ensemble: Ensemble, input_type: Optional[str] = None, legacy: bool = False) -> bytes:
    """The serialized ONNX model. ``input_type``: "float64" (default) or "float32";
    ``legacy``: the float32 ai.onnx.ml opset-3 variant (float32 input only)."""
    if legacy:
        if input_type not in (None, "float32"):
            raise ValueError("the legacy (ai.onnx.ml opset 3) graph takes float32 input only, not %r"
                             % (input_type,))
        return legacy_graph.to_model(ensemble).SerializeToString()
    return exact.to_model(ensemble, input_type or "float64").SerializeToString()


def write(ensemble: Ensemble, path: Union[str, Path], input_type: Optional[str] = None,
          legacy: bool = False) -> int:
    """Write the ONNX file (atomically: a temporary file, then rename); return its size."""
    data = to_bytes(ensemble, input_type=input_type, legacy=legacy)
    path = Path(path)
    tmp = path.with_name(path.name + ".partial")
    tmp.write_bytes(data)
    tmp.replace(path)
    return len(data)
