"""The simulated rig: the C board core with a model cell on a pseudo-terminal.

Modules: ``cells`` (model cells), ``board`` (the simulated board around the C core),
``ccore`` (builds, loads and binds the C core), ``groundtruth`` (its log), ``launch``
(start it as a child process), ``cli`` (its command line).

Public names: ``start_rig``, ``RigProcess`` (from ``launch``).
"""

from clampcore.simulated_rig.launch import RigProcess, start_rig

__all__ = ["RigProcess", "start_rig"]
