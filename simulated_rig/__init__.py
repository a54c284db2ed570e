"""The simulated rig: a board emulator with a model cell on a pseudo-terminal.

Modules: ``cells`` (model cells), ``board`` (the emulator), ``groundtruth`` (its
log), ``launch`` (start it as a child process), ``cli`` (its command line).

Public names: ``start_rig``, ``RigProcess`` (from ``launch``).
"""

from simulated_rig.launch import RigProcess, start_rig

__all__ = ["RigProcess", "start_rig"]
