"""ONNX (docs/onnx.md): ``exact`` writes the ai.onnx.ml opset-5 graph that computes the
source's bits, ``legacy`` the float32 opset-3 graph for older runtimes (both built from the
pieces in ``build``; ``writer`` picks one); ``parse`` opens a file safely and walks its
graph, ``reader`` reads any tree-ensemble graph back into the hub, ``evaluators`` run it
(onnxruntime in one thread, onnx.reference), ``check`` holds the post-write check,
``describe`` and ``open``.

The ``onnx`` package is imported only when a file is written or read; onnxruntime only
when one is run."""
from ..registry import Format, register
from . import check, reader, writer


def sniff(head: bytes) -> bool:
    """An ONNX model starts with field 1 (``ir_version``, tag byte 0x08); pickle and joblib
    files start with 0x80 or a compression header, JSON with ``{``."""
    return head[:1] == b"\x08"


FORMAT = register(Format(
    name="onnx", extensions=(".onnx",), title="ONNX tree-ensemble graph",
    sniff=sniff, write=writer.write, write_options=("input_type", "legacy"), read=reader.read_onnx,
    open=check.open_artefact, check=check.check_onnx, describe=check.describe_onnx,
    check_ready=check.require_runtime))
