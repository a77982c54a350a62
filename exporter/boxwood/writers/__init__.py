"""Back ends: each writer turns an :class:`~boxwood.ir.Ensemble` into one artefact format.

A writer never imports scikit-learn. To add a target, add a module here with a
``write(ensemble, path)`` function and register its file extension in ``WRITERS``.
"""
from . import json_artefact, onnx_writer

# onnx_writer.write also takes input_type="float64"|"float32" and legacy=True (see docs/onnx.md).
WRITERS = {".json": json_artefact.write, ".onnx": onnx_writer.write}
