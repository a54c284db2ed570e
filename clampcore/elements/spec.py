"""One description per element kind: ``ElementSpec``.

Each kind's module (``clampcore/elements/<kind>.py``) exports one ``SPEC``: its fields
(unit in the name, default, rule, ``live``), the names of its parameter and state
columns, whether it has a conductance, how a program row is initialised, and the
checks that need more than one field. The schema, the experiment loader, the program
builder, the window's editor and the command line all read the registered specs
(``clampcore.elements.SPECS``); the per-sample dispatch in ``clampcore/step.py`` is
the one other place a kind appears.

Columns: every row of a program's ``params`` starts with ``P_ENABLED`` and
``P_TARGET``; a kind's ``params`` names follow from column ``N_COMMON_PARAMS`` on,
its ``state`` names from column 0. A column named after one of the kind's fields
is filled from it (a ``choice`` as the index of its value in ``choices``, a number
as a float); any other column is the kind's ``init`` to fill. Every spec is checked
to fit ``N_PARAMS``/``N_STATE`` when it is made: the compiled kernels index these
arrays without bounds checks.

Public names: ``ElementSpec``, ``RowContext``, ``Problem``, ``refractory_problem``,
``P_ENABLED``, ``P_TARGET``, ``TARGET_CELL``, ``N_COMMON_PARAMS``, ``N_PARAMS``,
``N_STATE``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from clampcore.fields import NUMBER_RULES, Field

P_ENABLED = 0  # 1.0 = on, 0.0 = off
P_TARGET = 1  # -1 = the recorded cell, else the row of a neuron element
TARGET_CELL = -1
N_COMMON_PARAMS = 2
# Columns of params and state: room above the widest kind (synapse: 18 params columns,
# 11 state columns); ``ElementSpec`` refuses a kind that does not fit.
N_PARAMS = 24
N_STATE = 12

# Names an element table uses besides its kind's fields.
_RESERVED_FIELDS = ("kind", "name", "enabled")
# Rules whose values a params column can hold (a choice as its index).
_COLUMN_RULES = (*NUMBER_RULES, "int", "bool", "choice")

# (field, reason) when an element breaks a rule that involves several fields; else None.
Problem = tuple[str, str] | None


@dataclass
class RowContext:
    """What ``ElementSpec.init`` may need besides its own element."""

    names: list[str]  # every element's name, by row
    trains: list[float]  # the program's spike-train times (a train source appends its own)
    dt_ms: float


@dataclass(frozen=True)
class ElementSpec:
    """Everything the project knows about one element kind, outside its kernels.

    ``code``: the kind's number in a program's ``kind`` array (what ``step`` dispatches
    on). ``conductance``: the element has a conductance (recorded as ``g_nS/<name>``).
    Hooks, each optional: ``init(p, s, el, ctx)`` fills the columns not named after a
    field; ``check(el, dt_ms)`` and ``check_refs(el, neuron_names)`` return a
    ``Problem`` (the loader raises it naming element, field and value);
    ``describe(el)`` adds to the command line's one-line summary; ``feedback_nS(el)``
    is the (smallest, largest) conductance the element feeds back onto the recorded
    cell, for the loop-stability bound (None: none).
    """

    kind: str
    code: int
    fields: tuple[Field, ...]
    params: tuple[str, ...] = ()
    state: tuple[str, ...] = ()
    conductance: bool = False
    init: Callable[[np.ndarray, np.ndarray, dict[str, Any], RowContext], None] | None = None
    check: Callable[[dict[str, Any], float], Problem] | None = None
    check_refs: Callable[[dict[str, Any], set[str]], Problem] | None = None
    describe: Callable[[dict[str, Any]], str] | None = None
    feedback_nS: Callable[[dict[str, Any]], tuple[float, float] | None] | None = None

    def __post_init__(self) -> None:
        def refuse(why: str) -> None:
            raise ValueError(f"element kind {self.kind!r}: {why}")

        if not self.kind.isidentifier():
            refuse("a kind's name is a lowercase word (letters, digits, _)")
        names = [f.name for f in self.fields]
        for group, listed in (("field", names), ("params column", self.params),
                              ("state column", self.state)):  # fmt: skip
            doubled = sorted({n for n in listed if list(listed).count(n) > 1})
            if doubled:
                refuse(f"{group} {', '.join(doubled)} named twice")
        if set(names) & set(_RESERVED_FIELDS):
            refuse(f"fields may not be named {', '.join(_RESERVED_FIELDS)}")
        if N_COMMON_PARAMS + len(self.params) > N_PARAMS:
            refuse(
                f"{len(self.params)} params columns after the {N_COMMON_PARAMS} common ones "
                f"do not fit N_PARAMS = {N_PARAMS}"
            )
        if len(self.state) > N_STATE:
            refuse(f"{len(self.state)} state columns do not fit N_STATE = {N_STATE}")
        fields = {f.name: f for f in self.fields}
        for col in self.params:
            if col in fields and fields[col].rule not in _COLUMN_RULES:
                refuse(f"column {col!r}: a {fields[col].rule} field cannot fill a column")
        for f in self.fields:
            if f.live and (f.name not in self.params or f.rule not in (*NUMBER_RULES, "bool")):
                refuse(f"live field {f.name!r} needs a params column and a number or bool rule")

    def param(self, name: str) -> int:
        """The params column named ``name``."""
        return N_COMMON_PARAMS + self.params.index(name)

    def state_col(self, name: str) -> int:
        """The state column named ``name``."""
        return self.state.index(name)

    def field(self, name: str) -> Field:
        """The field named ``name``."""
        return next(f for f in self.fields if f.name == name)

    def codes(self, name: str) -> dict[str, int]:
        """A choice field's values and the number each is stored as (its index)."""
        return {value: i for i, value in enumerate(self.field(name).choices)}

    @property
    def live_columns(self) -> dict[str, int]:
        """Field -> params column of every field a running loop may change (``enabled``
        aside: it is common to every kind, in ``P_ENABLED``)."""
        return {f.name: self.param(f.name) for f in self.fields if f.live}

    def fill_row(self, p: np.ndarray, s: np.ndarray, el: dict[str, Any], ctx: RowContext) -> None:
        """Write element ``el``'s own columns into its params row ``p`` and state row ``s``."""
        for f in self.fields:
            if f.name in self.params:
                value = el[f.name]
                p[self.param(f.name)] = f.choices.index(value) if f.rule == "choice" else value
        if self.init is not None:
            self.init(p, s, el, ctx)


def refractory_problem(el: dict[str, Any], dt_ms: float) -> Problem:
    """A refractory period shorter than one sample cannot be applied."""
    if el["refractory_ms"] < dt_ms * (1 - 1e-9):
        return "refractory_ms", f"shorter than one sample ({dt_ms:g} ms at this rate)"
    return None
