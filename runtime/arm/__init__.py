"""The arm: its model, loading (TOML, DH, URDF), transforms and kinematics.

Pure numpy: no I/O past the loaders, no clock. May import only ``runtime.errors`` and
``runtime.tomlsource`` from outside this folder. The public surface is its modules.
"""

__all__ = ["kinematics", "load", "model", "transforms", "urdf"]
