"""Virtual elements: one module per kind, each with its ``SPEC`` and its compiled kernels.

Every element is one row of a program's ``params`` and ``state`` arrays. Columns
``P_ENABLED`` and ``P_TARGET`` are common to all kinds; each kind's ``SPEC``
(``clampcore.elements.spec.ElementSpec``) names its own columns after them, and its
module turns those names into the ``P_*``/``S_*`` constants its kernels use.

Every module of this package that defines a ``SPEC`` is registered when the package is
imported, in the order of the kinds' codes. ``SPECS`` holds every registered kind by
name, in the order the loader lists them; ``KINDS`` and ``CONDUCTANCE_KINDS`` are views
of it, read each time they are used, so a kind registered later (``register``) appears
everywhere at once.

Public names: ``SPECS``, ``register``, ``unregister``, ``KINDS``, ``CONDUCTANCE_KINDS``,
``KindNames``, the ``KIND_*`` codes, ``P_ENABLED``, ``P_TARGET``, ``N_PARAMS``,
``N_STATE``, ``TARGET_CELL``.
"""

from __future__ import annotations

import importlib
import pkgutil
from collections.abc import Callable, Iterator, Sequence
from typing import overload

from clampcore.elements import current, leak, neuron, noise, synapse, threshold_reset
from clampcore.elements.spec import (
    N_PARAMS,
    N_STATE,
    P_ENABLED,
    P_TARGET,
    TARGET_CELL,
    ElementSpec,
)

__all__ = [
    "CONDUCTANCE_KINDS",
    "KINDS",
    "N_PARAMS",
    "N_STATE",
    "P_ENABLED",
    "P_TARGET",
    "SPECS",
    "TARGET_CELL",
    "KindNames",
    "register",
    "unregister",
]

SPECS: dict[str, ElementSpec] = {}


def register(spec: ElementSpec) -> ElementSpec:
    """Add an element kind; refuses a name or a code already taken."""
    if spec.kind in SPECS:
        raise ValueError(f"element kind {spec.kind!r} is already registered")
    taken = {s.code: s.kind for s in SPECS.values()}
    if spec.code in taken:
        raise ValueError(
            f"element kind {spec.kind!r}: code {spec.code} is already {taken[spec.code]!r}'s"
        )
    SPECS[spec.kind] = spec
    return spec


def unregister(kind: str) -> None:
    """Remove a registered kind (for tests that register one of their own)."""
    del SPECS[kind]


class KindNames(Sequence[str]):
    """The names of the registered kinds whose spec passes ``where``, as they are now."""

    def __init__(self, where: Callable[[ElementSpec], bool] = lambda spec: True) -> None:
        self._where = where

    def _names(self) -> list[str]:
        return [kind for kind, spec in SPECS.items() if self._where(spec)]

    @overload
    def __getitem__(self, index: int) -> str: ...
    @overload
    def __getitem__(self, index: slice) -> Sequence[str]: ...
    def __getitem__(self, index: int | slice) -> str | Sequence[str]:
        return self._names()[index]

    def __len__(self) -> int:
        return len(self._names())

    def __iter__(self) -> Iterator[str]:
        return iter(self._names())

    def __contains__(self, kind: object) -> bool:
        return kind in self._names()  # any object: an unhashable one is simply not a kind

    def __repr__(self) -> str:
        return f"KindNames({self._names()!r})"


def _discover() -> list[ElementSpec]:
    """The ``SPEC`` of every module of this package that has one, in the order of the codes."""
    specs = []
    for info in pkgutil.iter_modules(__path__):
        spec = getattr(importlib.import_module(f"{__name__}.{info.name}"), "SPEC", None)
        if isinstance(spec, ElementSpec):
            specs.append(spec)
    return sorted(specs, key=lambda spec: spec.code)


for _spec in _discover():
    register(_spec)

KINDS = KindNames()
# Kinds with a conductance (recorded as g_nS/<name>; a current waveform and a neuron have none).
CONDUCTANCE_KINDS = KindNames(lambda spec: spec.conductance)

# The codes step.py dispatches on (compile-time constants of its kernels); a new kind's
# module defines its own (``KIND_<KIND> = SPEC.code``) for step.py to import.
KIND_LEAK = leak.SPEC.code
KIND_THRESHOLD_RESET = threshold_reset.SPEC.code
KIND_SYNAPSE = synapse.SPEC.code
KIND_NOISE = noise.SPEC.code
KIND_NEURON = neuron.SPEC.code
KIND_CURRENT = current.SPEC.code
