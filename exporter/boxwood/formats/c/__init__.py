"""The C99 target (docs/c-target.md): ``NAME.c`` and ``NAME.h``, portable, freestanding-friendly C
that computes the source model's bits. ``writer`` writes them (the text comes from
``boxwood_runtime.csource``, which also builds the native batch engine), ``reader`` parses the
tables back into the hub and checks the scoring code byte for byte, ``evaluators`` compile and
run the file, ``check`` holds the post-write check, ``describe`` and ``open``, and ``board``
builds and runs it on an emulated Cortex-M4."""
from ..registry import Format, register
from . import check, reader, writer

FORMAT = register(Format(
    name="c", extensions=(".c",), title="C99 source and header",
    sniff=check.sniff, write=writer.write, write_options=("c_prefix",), read=reader.read_c,
    open=check.open_artefact, check=check.check, describe=check.describe))
