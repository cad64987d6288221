"""The arm: its model, loading (TOML, DH, URDF), transforms, kinematics (with its constant
chain terms), the model as plain data for the log, and its surroundings: the workcell, the
arm's capsules and the distances between them.

Pure numpy: no I/O past the loaders, no clock. May import only ``runtime.errors`` and
``runtime.tomlsource`` from outside this folder. The public surface is its modules.
"""

__all__ = ["cell", "chain_terms", "collision", "distance", "kinematics", "load", "model",
           "serial", "solids", "transforms", "urdf"]
