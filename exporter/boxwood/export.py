"""The export pipeline, used by the library, ``boxwood export`` and ``boxwood bundle`` alike:

    source (a fitted model, a joblib/pickle file, or an artefact file read as data)
      -> Ensemble with reference rows scored by the source
      -> the format's writer
      -> the format's own check of the written file

Loading a pickle or joblib file runs code stored in it (``PICKLE_WARNING``); an artefact
file (ONNX, JSON) is read as data and never executed.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Optional, Tuple, Union

from . import formats
from .ir import Ensemble, Reference
from .reference_rows import probe_rows
from .sources import PICKLE_WARNING, load_model_file, read_model
from .sources.model import SourceModel

__all__ = ["build", "export", "read_source", "ExportResult", "PICKLE_WARNING"]


@dataclass
class ExportResult:
    """What :func:`export` wrote: the ensemble, the file, its format and size, and the
    format's check of the written file as (ok, message)."""

    ensemble: Ensemble
    path: str
    format: str
    bytes: int
    check: Tuple[bool, str]
    source: str  # what was exported, for messages
    source_format: Optional[str] = None  # the format name when the source was an artefact file

    @property
    def ok(self) -> bool:
        return bool(self.check[0])


def build(model: Any, reference_rows: int = 6) -> Ensemble:
    """Read ``model`` into an Ensemble and attach reference rows scored by the model itself."""
    ensemble = read_model(model)
    source = SourceModel(model, ensemble)
    rows = probe_rows(ensemble, reference_rows)
    ensemble.reference = Reference(
        rows=rows,
        raw=[[float(v) for v in r] for r in source.raw(rows)],
        transformed=[[float(v) for v in r] for r in source.transformed(rows)],
    )
    return ensemble


def read_source(source: Any, reference_rows: int = 6) -> Tuple[Ensemble, str, Optional[str]]:
    """(Ensemble with reference rows, a short description of the source, the name of the
    artefact format it was read from or None) for ``source``:

    * a fitted estimator (the object itself);
    * a path to a file that a registered format claims by its extension or recognises by
      its content (an ONNX graph, a boxwood JSON artefact): read as data by that format's reader; a file without the
      source model's reference rows gets rows scored by its own trees;
    * any other path: a joblib or pickle file, loaded (this RUNS CODE: trusted files only).
    """
    if not isinstance(source, (str, Path)):
        ensemble = build(source, reference_rows)
        return ensemble, ensemble.provenance.get("estimator") or type(source).__name__, None
    path = Path(source)
    if path.is_dir():
        raise IsADirectoryError("model file %r is a folder, not a file" % str(path))
    if not path.is_file():
        raise FileNotFoundError("model file %r not found" % str(path))
    fmt = formats.registry.by_extension(path) or formats.registry.sniff(path)
    if fmt is not None and fmt.read is not None:  # an artefact file: data, never unpickled
        from .formats.json.device import attach_own_reference

        ensemble = fmt.read(path)
        if ensemble.reference is None:
            attach_own_reference(ensemble, reference_rows)
        return ensemble, "%s file %s (%s)" % (fmt.name.upper(), path, ensemble.provenance.get("estimator")), fmt.name
    ensemble = build(load_model_file(path), reference_rows)
    return ensemble, ensemble.provenance.get("estimator") or path.name, None


def export(source: Any, path: Union[str, Path], fmt: Optional[str] = None, reference_rows: int = 6,
           check: bool = True, **writer_options: Any) -> ExportResult:
    """Export ``source`` (see :func:`read_source`) to ``path`` and check the written file.

    The format is ``fmt`` (a name such as "json" or "onnx") or follows the extension.
    ``writer_options`` go to the writer (ONNX: ``input_type``, ``legacy``; docs/onnx.md);
    an option the format does not take is an error. ``check=False`` skips the post-write
    check (the result then says so). When the check needs a package that is not installed,
    :class:`boxwood.formats.MissingDependency` is raised before anything is written."""
    target = formats.for_output(path, fmt)
    write = target.needs("write")
    unknown = sorted(set(writer_options) - set(target.write_options))
    if unknown:
        raise formats.FormatError("the %s format takes no option %s (it takes: %s)" % (
            target.name, ", ".join(unknown), ", ".join(target.write_options) or "none"))
    if check and target.check is not None and target.check_ready is not None:
        target.check_ready()  # MissingDependency before anything is written: never an unchecked file
    ensemble, described, source_format = read_source(source, reference_rows)
    size = write(ensemble, path, **writer_options)
    result = (True, "not run (check=False)")
    if check and target.check is not None:
        result = target.check(Path(path), ensemble)
    return ExportResult(ensemble, str(path), target.name, size, result, described, source_format)
