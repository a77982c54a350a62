"""boxwood: export fitted tree ensembles to a documented artefact, score it anywhere, prove parity.

Workstation side. The device side is the separate package ``boxwood_runtime``.
"""
__version__ = "0.1.0"
