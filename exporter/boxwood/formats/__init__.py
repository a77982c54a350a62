"""Artefact formats: one package per format (``json``, ``onnx``), each with its writer, its
reader back into the hub, its evaluators, its post-write check and its ``describe``.

Everything outside this package reaches a format through the registry
(:mod:`.registry`): ``for_output(path, name)`` to write, ``for_file(path)`` and
``open_artefact(path)`` to read. A format never imports scikit-learn, the verifier or the
CLI. Adding a target is one package here plus one line below (DEVELOPERS.md, "How to add
a target").
"""
from .registry import (FORMATS, Artefact, DamagedArtefact, Format, FormatError, MissingDependency, by_name,
                       for_file, for_output, open_artefact, register, unregister)
from . import c, json, onnx  # noqa: E402,F401  (each registers itself)

__all__ = ["FORMATS", "Artefact", "DamagedArtefact", "Format", "FormatError", "MissingDependency", "by_name", "for_file",
           "for_output", "open_artefact", "register", "unregister"]
