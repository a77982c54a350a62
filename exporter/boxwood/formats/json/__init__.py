"""The boxwood JSON artefact (format version 1; schemas/tree-ensemble.schema.json): the format
the device scorer runs. ``writer`` writes it, ``reader`` maps a file the device loader has
verified back onto the hub, ``evaluators`` run it (device scorer, numpy batch), ``check``
holds the post-write check, ``describe`` and ``open``; ``device`` runs an in-memory
Ensemble through the device scorer for the other formats."""
from ..registry import Format, register
from . import check, reader, writer

FORMAT = register(Format(
    name="json", extensions=(".json",), title="boxwood JSON artefact",
    sniff=check.sniff, write=writer.write, read=reader.read_file, open=check.open_artefact,
    check=check.check, describe=check.describe))
