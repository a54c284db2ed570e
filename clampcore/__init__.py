"""clampcore: dynamic clamp on a generic serial DAQ board.

Public names: ``simulate``, ``load_experiment``, ``Experiment``,
``ExperimentError``, ``Recording``, ``build_program``. They are imported on
first use, so that low-level modules (``clampcore.jit``, ``clampcore.rng``) can
be imported by the model cells without pulling in the whole engine.
"""

from __future__ import annotations

import importlib
from pathlib import Path
from typing import Any

# In a checkout the folders gui/, simulated_rig/ and firmware_protocol/ sit beside this
# package's folder; they are its subpackages clampcore.gui, clampcore.simulated_rig and
# clampcore.firmware_protocol (pyproject.toml's package-dir installs them under clampcore the
# same way), so the checkout's parent folder is searched for them too.
_CHECKOUT = Path(__file__).resolve().parent.parent
if (_CHECKOUT / "pyproject.toml").is_file() and (_CHECKOUT / "simulated_rig").is_dir():
    __path__.append(str(_CHECKOUT))

_WHERE = {
    "Experiment": "clampcore.experiment",
    "ExperimentError": "clampcore.experiment",
    "load_experiment": "clampcore.experiment",
    "build_program": "clampcore.program",
    "Recording": "clampcore.offline",
    "simulate": "clampcore.offline",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        return getattr(importlib.import_module(_WHERE[name]), name)
    raise AttributeError(f"module 'clampcore' has no attribute {name!r}")
