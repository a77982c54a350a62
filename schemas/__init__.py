"""JSON Schemas of the files boxwood writes (installed as the package boxwood.schemas)."""
