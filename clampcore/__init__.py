"""clampcore: dynamic clamp on a generic serial DAQ board.

Public names: ``simulate``, ``load_experiment``, ``Experiment``,
``ExperimentError``, ``Recording``, ``build_program``.
"""

from clampcore.experiment import Experiment, ExperimentError, load_experiment
from clampcore.program import build_program
from clampcore.simulate import Recording, simulate

__all__ = [
    "Experiment",
    "ExperimentError",
    "Recording",
    "build_program",
    "load_experiment",
    "simulate",
]
