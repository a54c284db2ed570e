"""The window's loop-stability line: how much virtual conductance the loop keeps stable.

One line above the tabs shows the largest stable total virtual conductance of the
experiment (``clampcore.stability``: the same bound ``clampcore check`` prints, no
second formula) and the total the experiment feeds back, green below half of the
bound, amber above half, red beyond it or when the membrane's total conductance is
not positive (static limit). The window refuses Start, and a live change that adds
to a total beyond the bound, with the reason, unless the line's **override** box is
ticked; an override is kept in the recording's metadata under ``stability`` as
``--override-stability`` keeps it (``override`` true), a live one with the change
that made it (``live_overrides``).

The delay (``loop_delay``): in law mode the board's own ADC-to-DAC step; in current
mode the link latency — before a run the command line's default for the port (the
simulated rig 1 sample, hardware ``HARDWARE_DELAY_SAMPLES``), during a run the
loop's measured median latency.

Public names: ``StabilityLine``, ``loop_delay``, ``pushes_beyond``, ``meta_with_override``,
``OVERRIDE_HINT``, ``MIN_MEASURED_COMMANDS``.
"""

from __future__ import annotations

import copy
import math
from typing import Any

from PySide6 import QtWidgets

from clampcore import stability
from clampcore.experiment import Experiment
from clampcore.stability import StabilityReport

# The measured latency replaces the assumed one once this many commands were answered:
# a median over 0.1 s at 10 kHz (an arbitrary small count; the median of the latency
# histogram is stable long before that on any link measured, README: Benchmarks).
MIN_MEASURED_COMMANDS = 1000
OVERRIDE_HINT = "the 'override' box of the stability line"

_STYLES = {
    "ok": "color: #1f7a3a;",
    "warn": "color: #1a1a1a; background: #ffb347; padding: 2px 4px;",
    "beyond": "color: white; background: #b00020; padding: 2px 4px; font-weight: bold;",
    "unknown": "color: #8a6d1f;",
}


def loop_delay(
    experiment: Experiment, port: str, mode: str | None = None, health: dict | None = None
) -> tuple[int, str]:
    """The loop delay D in samples the guard uses, and where it comes from.

    ``mode``: the run's mode when it overrides the experiment's ``[loop] mode``;
    ``health``: ``clampcore.health.loop_health`` of the running loop (current mode: its
    median latency is the link's delay).
    """
    if mode is not None and mode != experiment.loop.get("mode"):
        experiment = copy.copy(experiment)
        experiment.loop = {**experiment.loop, "mode": mode}
    delay = stability.default_delay_samples(experiment, port)
    if experiment.loop.get("mode") == "law":
        return delay, "the board's own step (law mode)"
    if health is not None and float(health["latency_hist"].sum()) >= MIN_MEASURED_COMMANDS:
        p50 = health["latency_p50_samples"]
        if math.isfinite(p50):
            return max(1, int(p50)), "the link's measured median latency"
    if port == "sim":
        return delay, "the simulated rig's link"
    return delay, "assumed for a hardware link until a run measures it"


def pushes_beyond(before: StabilityReport, after: StabilityReport) -> bool:
    """Whether a change leaves the loop unstable and adds to what makes it so."""
    if after.ok:
        return False
    if before.ok:
        return True
    return (
        after.g_virtual_max_nS > before.g_virtual_max_nS
        or after.g_virtual_min_nS < before.g_virtual_min_nS
    )


class StabilityLine(QtWidgets.QFrame):
    """The bound, the experiment's total, its state, and the override box."""

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("stability")
        row = QtWidgets.QHBoxLayout(self)
        row.setContentsMargins(2, 0, 2, 0)
        self.label = QtWidgets.QLabel()
        self.label.setObjectName("stability:text")
        self.label.setWordWrap(True)  # a narrow column: more lines, never a wider window
        row.addWidget(self.label, 1)
        self.override_box = QtWidgets.QCheckBox("override")
        self.override_box.setToolTip(
            "allow Start, and live changes, beyond the largest stable virtual conductance "
            "(as --override-stability on the command line); each override is logged in the "
            "recording's metadata ('stability')"
        )
        row.addWidget(self.override_box)
        self.report: StabilityReport | None = None
        self.delay_from = ""
        self.level = ""  # "ok", "warn", "beyond" or "unknown"

    def show_report(self, report: StabilityReport, delay_from: str) -> None:
        """Show ``report`` (``delay_from``: where its delay comes from)."""
        self.report, self.delay_from = report, delay_from
        share = report.g_virtual_max_nS / report.g_stable_max_nS
        plural = "" if report.delay_samples == 1 else "s"
        text = (
            f"Stable up to {report.g_stable_max_nS:.4g} nS of virtual conductance; "
            f"this experiment: {report.g_virtual_max_nS:.4g} nS ({share:.0%}); "
            f"delay {report.delay_samples} sample{plural}"
        )
        if not report.static_ok:
            level, text = "beyond", text + " · UNSTABLE: total conductance ≤ 0, V runs away"
        elif not report.dynamic_ok:
            level, text = "beyond", text + " · UNSTABLE: beyond the stable limit"
        elif report.warn:
            level, text = "warn", text + " · above half of it: expect ringing"
        else:
            level = "ok"
        if report.override:
            text += " · OVERRIDDEN (logged in the recording)"
        self.label.setText(text)
        self.label.setToolTip("\n".join([*report.lines(), f"delay: {delay_from}"]))
        self._set_level(level)

    def show_problem(self, why: str) -> None:
        """The experiment cannot be assessed (e.g. a field being edited): say why."""
        self.report = None
        self.label.setText(f"Loop stability: not known ({why})")
        self.label.setToolTip(why)
        self._set_level("unknown")

    def _set_level(self, level: str) -> None:
        if level != self.level:
            self.level = level
            self.label.setStyleSheet(_STYLES[level])

    def text(self) -> str:
        return self.label.text()


def meta_with_override(report: StabilityReport, change: dict[str, Any], old: dict) -> dict:
    """The recording's ``stability`` record after a live override (``old``: the record so
    far): the report of the state allowed, with every live override in order."""
    meta = report.as_meta()
    meta["live_overrides"] = [*old.get("live_overrides", []), change]
    return meta
