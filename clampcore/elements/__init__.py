"""Virtual elements: one module of compiled kernels per kind.

Every element is one row of a program's ``params`` and ``state`` arrays.
Columns ``P_ENABLED`` and ``P_TARGET`` are common to all kinds; each module
names its own columns after them and lists its numeric fields in ``COLUMNS``
(field name -> params column), which is what a running loop may change.

Public names: ``KIND_CODES``, ``COLUMNS``, ``P_ENABLED``, ``P_TARGET``,
``N_PARAMS``, ``N_STATE``, ``TARGET_CELL``.
"""

from __future__ import annotations

from clampcore.elements import current, leak, neuron, noise, synapse, threshold_reset

P_ENABLED = 0  # 1.0 = on, 0.0 = off
P_TARGET = 1  # -1 = the recorded cell, else the row of a neuron element
TARGET_CELL = -1
N_PARAMS = 24  # columns of params: the widest kind (synapse) uses 21
N_STATE = 12  # columns of state: the widest kind uses 8

KIND_LEAK = 0
KIND_THRESHOLD_RESET = 1
KIND_SYNAPSE = 2
KIND_NOISE = 3
KIND_NEURON = 4
KIND_CURRENT = 5

KIND_CODES = {
    "leak": KIND_LEAK,
    "threshold_reset": KIND_THRESHOLD_RESET,
    "synapse": KIND_SYNAPSE,
    "noise": KIND_NOISE,
    "neuron": KIND_NEURON,
    "current": KIND_CURRENT,
}

COLUMNS = {
    "leak": leak.COLUMNS,
    "threshold_reset": threshold_reset.COLUMNS,
    "synapse": synapse.COLUMNS,
    "noise": noise.COLUMNS,
    "neuron": neuron.COLUMNS,
    "current": current.COLUMNS,
}
