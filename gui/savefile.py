"""Saving an edited experiment as TOML that keeps the user's file as it was written.

``experiment_toml(experiment, original)`` edits the original file's text in place
(with tomlkit, which keeps comments, order and layout): keys the file had are
updated (or dropped when their section or element is gone), new values are added
only where they differ from the schema's default, elements are matched by name,
and new ones are appended. Without an original, only the values that differ from
the defaults are written (always each element's kind and name, and the
[amplifier] section when the experiment gives one: a run on a real board needs
its calibration spelled out).

Public names: ``experiment_toml``, ``non_default``.
"""

from __future__ import annotations

from typing import Any

import tomlkit

from clampcore.experiment import Experiment
from clampcore.schema import COMMON_FIELDS, ELEMENT_FIELDS, SECTION_FIELDS


def non_default(experiment: Experiment) -> dict[str, Any]:
    """``experiment.to_dict()`` without the values equal to their default."""
    full = experiment.to_dict()
    out: dict[str, Any] = {}
    for section, values in full.items():
        if section == "element":
            continue
        defaults = {f.name: f.default for f in SECTION_FIELDS[section]}
        kept = {k: v for k, v in values.items() if k not in defaults or v != defaults[k]}
        if kept or section == "amplifier":
            out[section] = kept
    elements = []
    for el in full["element"]:
        fields = (*COMMON_FIELDS, *ELEMENT_FIELDS[el["kind"]])
        defaults = {f.name: f.default for f in fields}
        elements.append({k: v for k, v in el.items() if k not in defaults or v != defaults[k]})
    out["element"] = elements
    return out


def _update(table: Any, wanted: dict[str, Any], full: dict[str, Any]) -> None:
    """Keys the table had take their new value (or go); new non-default keys are added."""
    for key in list(table.keys()):
        if key not in full:
            del table[key]
        elif table[key] != full[key]:
            table[key] = full[key]
    for key, value in wanted.items():
        if key not in table:
            table[key] = value


def experiment_toml(experiment: Experiment, original: str | None = None) -> str:
    """TOML text of ``experiment``, written into ``original`` when given (see module doc)."""
    wanted = non_default(experiment)
    full = experiment.to_dict()
    doc = tomlkit.parse(original) if original else tomlkit.document()
    for section in SECTION_FIELDS:
        values = wanted.get(section)
        if section in doc:
            _update(doc[section], values or {}, full.get(section, {}))
        elif values is not None:
            doc[section] = tomlkit.table()
            _update(doc[section], values, full.get(section, {}))
    old = {t.get("name"): t for t in doc.get("element", [])}
    elements = tomlkit.aot()
    for el, el_wanted in zip(full["element"], wanted["element"], strict=True):
        table = old.get(el["name"])
        if table is None or table.get("kind") != el["kind"]:
            table = tomlkit.table()
        _update(table, el_wanted, el)
        elements.append(table)
    if "element" in doc:
        del doc["element"]
    if len(elements):
        doc["element"] = elements
    return tomlkit.dumps(doc)
