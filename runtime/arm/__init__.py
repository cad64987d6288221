"""The arm: its model, URDF reading, transforms and kinematics.

Pure numpy: no I/O past the loaders, no clock. May import only ``runtime.errors`` and
``runtime.tomlsource`` from outside this folder.
"""
