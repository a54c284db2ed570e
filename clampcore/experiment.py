"""The experiment file: read, validate, fill in defaults, write back.

An experiment is TOML with sections ``[loop]``, ``[cell]``, ``[amplifier]``,
``[session]``, ``[subject]``, ``[electrode]`` and one ``[[element]]`` table per
virtual element (see ``clampcore.schema`` for every field). Anything that makes
no sense is refused here, with an error naming the element, the field and the
value, so that nothing can fail later inside the running loop.

Public names: ``Experiment``, ``ExperimentError``, ``load_experiment``,
``validate_element``, ``read_experiment_text``, ``model_warnings``.
"""

from __future__ import annotations

import copy
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from clampcore.elements import KINDS, SPECS
from clampcore.schema import COMMON_FIELDS, SECTION_FIELDS, check_value

RESERVED_NAMES = ("cell", "poisson", "train")
# ISO 8601 durations (P21D, P3M, P1Y2M, PT12H; a range's start "P21D/" as NWB allows).
_ISO_DURATION = re.compile(
    r"P(?=\d|T)(\d+Y)?(\d+M)?(\d+W)?(\d+D)?(T(?=\d)(\d+H)?(\d+M)?(\d+(\.\d+)?S)?)?(/.*)?"
)


class ExperimentError(ValueError):
    """An experiment that cannot run: says where (element or section), field and value."""

    def __init__(self, where: str, field: str | None, value: Any, reason: str) -> None:
        self.where, self.field, self.value, self.reason = where, field, value, reason
        what = f"{where}, field '{field}' = {value!r}" if field else f"{where}"
        super().__init__(f"{what}: {reason}")


@dataclass
class Experiment:
    """A validated experiment with every default filled in."""

    loop: dict[str, Any]
    cell: dict[str, Any]
    amplifier: dict[str, Any]
    session: dict[str, Any]
    subject: dict[str, Any]
    electrode: dict[str, Any]
    elements: list[dict[str, Any]]
    amplifier_given: bool = False
    text: str = field(default="", compare=False)  # the source text: not part of equality
    path: Path | None = field(default=None, compare=False)

    @property
    def dt_ms(self) -> float:
        return 1000.0 / self.loop["rate_hz"]

    def element(self, name: str) -> dict[str, Any]:
        for el in self.elements:
            if el["name"] == name:
                return el
        raise KeyError(name)

    def to_dict(self) -> dict[str, Any]:
        """The experiment as a plain dict of the file's shape (loads back to an equal one)."""
        out: dict[str, Any] = {
            "loop": dict(self.loop),
            "cell": dict(self.cell),
        }
        if self.amplifier_given:
            out["amplifier"] = dict(self.amplifier)
        for name in ("session", "subject", "electrode"):
            given = {k: v for k, v in getattr(self, name).items() if v not in ("", None)}
            if given:
                out[name] = given
        out["element"] = [dict(el) for el in self.elements]
        return copy.deepcopy(out)

    def to_toml(self) -> str:
        """TOML text of ``to_dict()``."""
        return _dump_toml(self.to_dict())


def load_experiment(source: str | Path | dict[str, Any] | Experiment) -> Experiment:
    """Read an experiment from a path, TOML text, or a dict of the file's shape."""
    if isinstance(source, Experiment):
        return source
    path: Path | None = None
    if isinstance(source, dict):
        raw = copy.deepcopy(source)
        exp = _validate(raw)  # first: a wrong type must be an ExperimentError, not a TypeError
        exp.text = _dump_toml(raw)
        return exp
    else:
        if isinstance(source, Path) or (
            isinstance(source, str)
            and "\n" not in source
            and (source.endswith(".toml") or (source.strip() and Path(source).is_file()))
        ):
            path = Path(source)
            text = read_experiment_text(path)
        else:
            text = str(source).removeprefix("\ufeff")
        where = f"experiment file {str(path)!r}" if path else "experiment text"
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ExperimentError(where, None, None, f"not valid TOML: {exc}") from exc
        if not raw:
            raise ExperimentError(where, None, None, EMPTY_REASON)
    exp = _validate(raw)
    exp.text, exp.path = text, path
    return exp


EMPTY_REASON = (
    "is empty: an experiment needs at least a [loop] section (rate_hz, max_current_pA) and, "
    "to run on a board, [amplifier] (vm_mV_per_V, command_pA_per_V) and one [[element]] "
    "per virtual element (see examples/)"
)


def read_experiment_text(path: Path) -> str:
    """The text of an experiment file (UTF-8, a byte-order mark allowed), or an
    ``ExperimentError`` naming the file: missing, a folder, unreadable, not text."""
    where = f"experiment file {str(path)!r}"
    if not path.exists():
        raise ExperimentError(where, None, None, "no such file")
    if not path.is_file():
        raise ExperimentError(where, None, None, "is not a file")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ExperimentError(where, None, None, f"cannot be read: {exc.strerror or exc}") from exc
    if b"\x00" in data:
        raise ExperimentError(where, None, None, "is not a text file (it holds NUL bytes)")
    try:
        return data.decode("utf-8-sig")  # TOML is UTF-8; editors on Windows may add a BOM
    except UnicodeDecodeError as exc:
        raise ExperimentError(
            where,
            None,
            None,
            f"is not UTF-8 text (byte {exc.start} is 0x{data[exc.start]:02x}); save it as UTF-8",
        ) from exc


def _validate(raw: dict[str, Any]) -> Experiment:
    allowed = {*SECTION_FIELDS, "element"}
    for key in raw:
        if key not in allowed:
            raise ExperimentError(
                f"section [{key}]",
                None,
                None,
                f"unknown section; known: {', '.join(sorted(allowed))}",
            )
    sections = {name: _section(name, raw.get(name, {})) for name in SECTION_FIELDS}
    loop = sections["loop"]
    dt_ms = 1000.0 / loop["rate_hz"]
    elements_raw = raw.get("element", [])
    if not isinstance(elements_raw, list):
        raise ExperimentError("[[element]]", None, None, "must be an array of tables")
    elements: list[dict[str, Any]] = []
    names: set[str] = set()
    for index, el in enumerate(elements_raw):
        checked = validate_element(el, index, dt_ms)
        if checked["name"] in names:
            raise ExperimentError(_where(el, index), "name", checked["name"], "used twice")
        names.add(checked["name"])
        elements.append(checked)
    neurons = {el["name"] for el in elements if el["kind"] == "neuron"}
    for index, el in enumerate(elements):
        check_refs = SPECS[el["kind"]].check_refs
        problem = check_refs(el, neurons) if check_refs else None
        if problem:
            field_name, reason = problem
            raise ExperimentError(_where(el, index), field_name, el[field_name], reason)
    return Experiment(
        loop=loop,
        cell=sections["cell"],
        amplifier=sections["amplifier"],
        session=sections["session"],
        subject=sections["subject"],
        electrode=sections["electrode"],
        elements=elements,
        amplifier_given="amplifier" in raw,
    )


def _section(name: str, raw: Any) -> dict[str, Any]:
    where = f"section [{name}]"
    if not isinstance(raw, dict):
        raise ExperimentError(where, None, None, "must be a table")
    fields = {f.name: f for f in SECTION_FIELDS[name]}
    for key in raw:
        if key not in fields:
            raise ExperimentError(
                where, key, raw[key], f"unknown field; known: {', '.join(fields)}"
            )
    out = {}
    for f in fields.values():
        value = _coerce(f, raw.get(f.name, f.default))
        reason = check_value(f, value)
        if reason:
            raise ExperimentError(where, f.name, value, reason)
        out[f.name] = value
    if name == "subject" and out["age"] and not _ISO_DURATION.fullmatch(out["age"]):
        raise ExperimentError(
            where, "age", out["age"], "must be an ISO 8601 duration as NWB asks, e.g. P21D or P3M"
        )
    if name == "loop" and out["rate_hz"] > 100_000:
        # A serial board cannot carry more than ~100k frames/s (USB full speed, 12 Mbit/s).
        raise ExperimentError(where, "rate_hz", out["rate_hz"], "must be at most 100000")
    return out


def _coerce(f: Any, value: Any) -> Any:
    """Integers are accepted where a real number is asked for."""
    if f.rule in ("real", "positive", "nonnegative", "fraction") and type(value) is int:
        return float(value)
    if f.rule == "times" and isinstance(value, list):
        return [float(t) if type(t) is int else t for t in value]
    return copy.deepcopy(value)


def _where(el: Any, index: int) -> str:
    name = el.get("name") if isinstance(el, dict) else None
    # A blank name identifies nothing: the element's place in the file does.
    named = isinstance(name, str) and name.strip()
    return f"element '{name}'" if named else f"element #{index + 1}"


def validate_element(el: Any, index: int, dt_ms: float) -> dict[str, Any]:
    """Check one ``[[element]]`` table and return it with every default filled in.

    Cross-element references (sources and targets naming neurons) are checked by
    the experiment loader, which sees all elements.
    """
    where = _where(el, index)
    if not isinstance(el, dict):
        raise ExperimentError(where, None, None, "must be a table")
    kind = el.get("kind")
    if kind not in KINDS:
        raise ExperimentError(where, "kind", kind, f"unknown kind; one of {', '.join(KINDS)}")
    name = el.get("name")
    if not isinstance(name, str) or not name.strip():
        raise ExperimentError(where, "name", name, "every element needs a name (text)")
    if name in RESERVED_NAMES or "/" in name:
        raise ExperimentError(where, "name", name, "reserved or contains '/'")
    spec = SPECS[kind]
    fields = {f.name: f for f in (*COMMON_FIELDS, *spec.fields)}
    out: dict[str, Any] = {"kind": kind, "name": name}
    for key in el:
        if key not in fields and key not in ("kind", "name"):
            raise ExperimentError(
                where, key, el[key], f"not a field of a {kind}; known: {', '.join(fields)}"
            )
    for f in fields.values():
        value = _coerce(f, el.get(f.name, f.default))
        reason = check_value(f, value)
        if reason:
            raise ExperimentError(where, f.name, value, reason)
        out[f.name] = value
    problem = spec.check(out, dt_ms) if spec.check else None
    if problem:
        field_name, reason = problem
        raise ExperimentError(where, field_name, out[field_name], reason)
    return out


# Above this mean count per sample (rate x dt) a Poisson input is visibly shaped by the
# sample grid: events coincide within a sample and the intervals are quantised (issue #11).
POISSON_EVENTS_PER_SAMPLE_WARN = 0.1


def model_warnings(experiment: Experiment) -> list[str]:
    """Things that load but may not do what was meant, one sentence each, naming the element."""
    out = []
    dt_s = 1.0 / experiment.loop["rate_hz"]
    for el in experiment.elements:
        if el["kind"] == "synapse" and el["source"] == "poisson":
            mean = el["rate_hz"] * dt_s
            if mean > POISSON_EVENTS_PER_SAMPLE_WARN:
                out.append(
                    f"element '{el['name']}', field 'rate_hz' = {el['rate_hz']:g}: "
                    f"{mean:.2g} events per sample on average (more than "
                    f"{POISSON_EVENTS_PER_SAMPLE_WARN:g}); at {experiment.loop['rate_hz']:g} Hz "
                    "the sample grid shapes this input (events share samples)"
                )
    return out


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        escaped = value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
        return f'"{escaped}"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {value!r} to TOML")


def _dump_toml(data: dict[str, Any]) -> str:
    """Write a dict of the experiment file's shape as TOML (tables and one array of tables)."""
    lines: list[str] = []
    for key, table in data.items():
        if key == "element":
            continue
        lines.append(f"[{key}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in table.items()]
        lines.append("")
    for el in data.get("element", []):
        lines.append("[[element]]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in el.items()]
        lines.append("")
    return "\n".join(lines)
