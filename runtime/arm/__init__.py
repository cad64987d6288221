"""The arm: its model, loading (TOML, DH, URDF), transforms, kinematics (with its constant
chain terms) and the model as plain data for the log.

Pure numpy: no I/O past the loaders, no clock. May import only ``runtime.errors`` and
``runtime.tomlsource`` from outside this folder. The public surface is its modules.
"""

__all__ = ["chain_terms", "kinematics", "load", "model", "serial", "transforms", "urdf"]
