"""A field of an experiment file and the rules its values must satisfy.

``Field`` describes one field (unit in the name, default, rule, whether it may change
while the loop runs, when it applies); ``check_value`` says why a value breaks its
rule; ``field_applies`` whether a field matters given the other values. The
sections' tables (``clampcore.schema``) and every element kind's spec
(``clampcore.elements``) are made of these.

Public names: ``Field``, ``only``, ``check_value``, ``field_applies``, ``NUMBER_RULES``.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Any

# Rules whose values are numbers (stored as floats in a program's arrays).
NUMBER_RULES = ("real", "positive", "nonnegative", "fraction")


@dataclass(frozen=True)
class Field:
    """One field of a section or element: ``rule`` is checked by ``check_value``.

    Rules: ``real`` (any finite number), ``positive`` (> 0, may be inf where
    ``allow_inf``), ``nonnegative`` (>= 0), ``fraction`` (0 < x <= 1), ``int``
    (whole number >= 0), ``choice`` (one of ``choices``), ``bool``, ``text``,
    ``times`` (list of times >= 0, ascending), ``ref`` (a name: resolved by the
    loader).
    """

    name: str
    default: Any
    rule: str = "real"
    live: bool = True
    choices: tuple[str, ...] = ()
    allow_inf: bool = False
    doc: str = ""
    # Which fields apply: the field matters only when every (other field, values) pair
    # holds (see ``only``). Empty: it always applies.
    when: tuple[tuple[str, tuple[str, ...]], ...] = ()


def only(other: str, *values: str) -> tuple[tuple[str, tuple[str, ...]], ...]:
    """``Field.when``: the field applies only while field ``other`` is one of ``values``."""
    return ((other, values),)


def field_applies(field: Field, values: dict[str, Any]) -> bool:
    """Whether ``field`` matters given the other ``values`` of its section or element."""
    return all(str(values.get(other, "")) in allowed for other, allowed in field.when)


def check_value(field: Field, value: Any) -> str | None:
    """Why ``value`` does not satisfy ``field``'s rule, or None when it does."""
    rule = field.rule
    if rule in NUMBER_RULES:
        if isinstance(value, bool) or not isinstance(value, int | float):
            return "must be a number"
        if math.isnan(value):
            return "must be a number, not NaN"
        if math.isinf(value) and not (field.allow_inf and value > 0):
            return "must be finite"
        if rule == "positive" and not value > 0:
            return "must be greater than 0"
        if rule == "nonnegative" and not value >= 0:
            return "must be 0 or more"
        if rule == "fraction" and not 0 < value <= 1:
            return "must be in (0, 1]"
        return None
    if rule == "int":
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            return "must be a whole number, 0 or more"
        return None
    if rule == "choice":
        return None if value in field.choices else f"must be one of {', '.join(field.choices)}"
    if rule == "bool":
        return None if isinstance(value, bool) else "must be true or false"
    if rule in ("text", "ref"):
        return None if isinstance(value, str) else "must be text"
    if rule == "times":
        if not isinstance(value, list) or any(
            isinstance(t, bool) or not isinstance(t, int | float) or not t >= 0 for t in value
        ):
            return "must be a list of times >= 0"
        if any(b < a for a, b in itertools.pairwise(value)):
            return "must be in ascending order"
        if any(math.isinf(t) for t in value):
            return "must be finite"
        return None
    raise AssertionError(f"unknown rule {rule!r}")
