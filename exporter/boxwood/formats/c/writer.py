"""Write an Ensemble as C99 sources: ``NAME.c`` (tables and scoring code) and ``NAME.h`` (the
interface), side by side. The text comes from :mod:`boxwood_runtime.csource`, run on the
ensemble as the device loader validates it (the same code builds the native batch engine)."""
from __future__ import annotations

import re
from pathlib import Path
from typing import Optional, Tuple, Union

from boxwood_runtime import scorer
from boxwood_runtime.csource import CTargetError, generate, prefix_from

from ...ir import Ensemble
from ..json.writer import to_bytes as json_bytes
from ..registry import FormatError


def header_path(path: Union[str, Path]) -> Path:
    """The header written beside ``NAME.c``."""
    return Path(path).with_suffix(".h")


def to_texts(ensemble: Ensemble, prefix: str) -> Tuple[str, str]:
    """(C source, header) for ``ensemble``; FormatError when C cannot carry it."""
    model = scorer.load(json_bytes(ensemble), self_check=False)
    try:
        return generate(model, prefix)
    except CTargetError as exc:
        raise FormatError("cannot write C: %s" % exc)


def write(ensemble: Ensemble, path: Union[str, Path], c_prefix: Optional[str] = None) -> int:
    """Write ``path`` (NAME.c) and NAME.h (each atomically); return the bytes written.
    ``c_prefix``: the C identifier prefix (default: the file stem made an identifier)."""
    path = Path(path)
    if not re.match(r"^[A-Za-z0-9_.+-]+$", path.stem):
        raise FormatError("the C file's name %r has characters an #include line cannot carry safely; "
                          "use letters, digits, '_', '-', '.' or '+'" % path.name)
    try:
        prefix = prefix_from(path.stem, c_prefix)
    except CTargetError as exc:
        raise FormatError(str(exc))
    c_text, h_text = to_texts(ensemble, prefix)
    if prefix != path.stem:  # the source includes "PREFIX.h": keep the header's name and the include in step
        c_text = c_text.replace('#include "%s.h"' % prefix, '#include "%s.h"' % path.stem, 1)
    total = 0
    for target, text in ((header_path(path), h_text), (path, c_text)):
        data = text.encode("utf-8")
        tmp = target.with_name(target.name + ".partial")
        tmp.write_bytes(data)
        tmp.replace(target)
        total += len(data)
    return total
