"""What every section and element kind of an experiment file may contain.

One table per section, and per element kind, lists its fields with unit (in the name),
default, the rule a value must satisfy, and whether it may change while the loop runs
(``live``). An element kind's table is its spec's (``clampcore/elements/<kind>.py``,
``SPEC.fields``): ``ELEMENT_FIELDS`` and ``KINDS`` read the registered specs. The
experiment loader and the window validate with these same tables, so a value the
window accepts is a value the loader accepts.

Each field also says when it applies (``Field.when``: which kinetics, source,
waveform or model it belongs to); ``field_applies`` answers it for given values.

Public names: ``Field``, ``ELEMENT_FIELDS``, ``SECTION_FIELDS``, ``KINDS``,
``check_value``, ``field_applies``.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from typing import Any

from clampcore.elements import KINDS, SPECS
from clampcore.fields import Field, check_value, field_applies, only

__all__ = [
    "COMMON_FIELDS",
    "ELEMENT_FIELDS",
    "KINDS",
    "SECTION_FIELDS",
    "Field",
    "check_value",
    "field_applies",
]


def _f(name: str, default: Any, rule: str = "real", **kw: Any) -> Field:
    return Field(name, default, rule, **kw)


# Fields every element has.
COMMON_FIELDS = (
    _f("enabled", True, "bool", doc="a disabled element passes no current and keeps its state"),
)


class _ElementFields(Mapping[str, tuple[Field, ...]]):
    """Kind -> its fields, read from the registered specs each time (see ``KINDS``)."""

    def __getitem__(self, kind: str) -> tuple[Field, ...]:
        return SPECS[kind].fields

    def __iter__(self) -> Iterator[str]:
        return iter(list(SPECS))

    def __len__(self) -> int:
        return len(SPECS)


ELEMENT_FIELDS: Mapping[str, tuple[Field, ...]] = _ElementFields()

SECTION_FIELDS: dict[str, tuple[Field, ...]] = {
    "loop": (
        _f("rate_hz", 20000.0, "positive", live=False),
        # Conservative default: enough to make most cortical cells fire (common practice).
        _f("max_current_pA", 500.0, "positive"),
        _f("spike_threshold_mV", -20.0),
        _f("spike_hysteresis_mV", 10.0, "positive"),
        # A measured |V| beyond this means a lost seal or a saturated amplifier: a living
        # membrane stays within about +-150 mV (common practice).
        _f("v_fault_mV", 200.0, "positive", live=False),
        _f("extra_delay_samples", 0, "int", live=False, doc="offline simulation only"),
        _f(
            "mode",
            "current",
            "choice",
            live=False,
            choices=("current", "law"),
            doc="current: the host computes each current from the newest V it has; law: the "
            "board evaluates the current law, sent ahead, at its own V (PROTOCOL.md §10)",
        ),
        # Law mode's look-ahead: a jitter buffer well above a USB link's 1-2 ms round trip
        # (full-speed USB's 1 ms frames both ways; common practice).
        _f(
            "lead_ms",
            10.0,
            "positive",
            live=False,
            doc="law mode: laws computed this far ahead",
            when=only("mode", "law"),
        ),
        # How long the board may hold the newest law past its own sample: short, because a
        # negative leak or a pure current is not self-limiting (PROTOCOL.md §10.3).
        _f(
            "lifetime_ms",
            2.0,
            "positive",
            live=False,
            doc="law mode: then 0 pA",
            when=only("mode", "law"),
        ),
    ),
    "cell": (
        _f("model", "passive", "choice", live=False, choices=("passive", "hh")),
        _f("capacitance_pF", 100.0, "positive", live=False),
        # Passive defaults: tau = C/gL = 20 ms, within the typical 10-50 ms (common practice).
        _f("leak_nS", 5.0, "positive", live=False, when=only("model", "passive")),
        _f("rest_mV", -70.0, live=False, when=only("model", "passive")),
        _f("electrode_MOhm", 0.0, "nonnegative", live=False),
        _f("noise_pA", 0.0, "nonnegative", live=False),
        _f("measurement_noise_mV", 0.0, "nonnegative", live=False),
        _f("seed", 0, "int", live=False),
        _f("substeps", 0, "int", live=False, doc="0 = choose automatically"),
        # Hodgkin & Huxley 1952 squid axon, modern convention (rest -65 mV).
        _f("gna_mS_per_cm2", 120.0, "nonnegative", live=False, when=only("model", "hh")),
        _f("gk_mS_per_cm2", 36.0, "nonnegative", live=False, when=only("model", "hh")),
        _f("gl_mS_per_cm2", 0.3, "nonnegative", live=False, when=only("model", "hh")),
        _f("ena_mV", 50.0, live=False, when=only("model", "hh")),
        _f("ek_mV", -77.0, live=False, when=only("model", "hh")),
        _f("el_mV", -54.4, live=False, when=only("model", "hh")),
        _f("cm_uF_per_cm2", 1.0, "positive", live=False, when=only("model", "hh")),
    ),
    "amplifier": (
        # Typical current-clamp amplifier: Vm output x10 (100 mV of membrane per V) and a
        # command input of 400 pA/V (common practice; check your own amplifier's manual).
        _f("vm_mV_per_V", 100.0, "positive", live=False),
        _f("vm_offset_mV", 0.0, live=False),
        _f("command_pA_per_V", 400.0, "positive", live=False),
        _f("command_offset_pA", 0.0, live=False),
        _f("liquid_junction_mV", 0.0, live=False, doc="subtracted from the measured V"),
    ),
    "session": (
        _f("description", "", "text", live=False),
        _f("experimenter", "", "text", live=False),
        _f("lab", "", "text", live=False),
        _f("institution", "", "text", live=False),
        _f("session_id", "", "text", live=False),
    ),
    "subject": (
        _f("subject_id", "", "text", live=False),
        _f("species", "", "text", live=False),
        _f("age", "", "text", live=False, doc="ISO 8601 duration, e.g. P21D (NWB)"),
        # NWB's Subject.sex: M, F, U (unknown) or O (other).
        _f("sex", "U", "choice", live=False, choices=("M", "F", "U", "O")),
        _f("description", "", "text", live=False),
    ),
    "electrode": (
        _f("description", "", "text", live=False),
        _f("location", "", "text", live=False),
        _f("resistance_MOhm", 0.0, "nonnegative", live=False),
    ),
}
