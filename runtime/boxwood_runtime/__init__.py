"""boxwood device side: score boxwood artefacts with nothing but the Python standard library.

The scoring core is the single module :mod:`boxwood_runtime.scorer`; it can be copied
alone onto a box. :mod:`boxwood_runtime.stream` scores CSV or JSON Lines streams and
:mod:`boxwood_runtime.batch` (needs numpy, imported only when asked for) scores many
rows at once.
"""
from .scorer import (
    FORMAT_NAME,
    FORMAT_VERSIONS,
    SCORER_VERSION,
    ArtefactError,
    Model,
    RecordError,
    load,
)

__version__ = SCORER_VERSION
__all__ = ["load", "Model", "ArtefactError", "RecordError", "FORMAT_NAME", "FORMAT_VERSIONS",
           "SCORER_VERSION", "__version__"]
