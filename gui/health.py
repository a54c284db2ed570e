"""Loop health: the timing of the running loop and the alarms that need a human.

``HealthPanel`` shows the figures of ``clampcore.health.loop_health`` (the latency
histogram in samples and µs, turnaround percentiles, late and missing commands,
bad frames, watchdog trips, faults and clipped samples); ``AlarmBanner`` is the band across the
window that appears when a fault, a watchdog trip or the current limit is hit
and stays until acknowledged.

Public names: ``HealthPanel``, ``AlarmBanner``, ``Alarm``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from clampcore.shared import LAT_BINS, TURN_BIN_US

_WITHIN_2_WARN = 0.9  # see HealthPanel.update_from


@dataclass
class Alarm:
    """Counters that raise the banner, as last acknowledged."""

    faults: int = 0
    watchdog: int = 0
    limited: int = 0


class AlarmBanner(QtWidgets.QFrame):
    """A red (fault) or amber (current limit) band that stays until acknowledged."""

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("alarm")
        layout = QtWidgets.QHBoxLayout(self)
        layout.setContentsMargins(12, 6, 12, 6)
        self.label = QtWidgets.QLabel()
        self.label.setWordWrap(True)
        font = self.label.font()
        font.setPointSize(font.pointSize() + 3)
        font.setBold(True)
        self.label.setFont(font)
        layout.addWidget(self.label, 1)
        self.ack = QtWidgets.QPushButton("Acknowledge")
        self.ack.clicked.connect(self.acknowledge)
        layout.addWidget(self.ack)
        self.level = ""  # "", "limit" or "fault"
        self.seen = Alarm()
        self._latest = Alarm()
        self.hide()

    def reset(self) -> None:
        """A new run: forget the old counters."""
        self.seen = Alarm()
        self._latest = Alarm()
        self.level = ""
        self.hide()

    def update_from(
        self, health: dict[str, Any], limit_episodes: int = 0, beyond_pA: float = 0.0
    ) -> None:
        """Raise (or escalate) the banner when a counter has grown since acknowledged.

        ``limit_episodes`` and ``beyond_pA`` (how often the limit was reached and the
        most the elements asked beyond it) say how often and by how much.
        """
        latest = Alarm(health["faults"], health["watchdog"], health["limited"])
        self._latest = latest
        new_faults = latest.faults - self.seen.faults
        new_watchdog = latest.watchdog - self.seen.watchdog
        new_limited = latest.limited - self.seen.limited
        parts = []
        if new_faults > 0:
            parts.append(f"FAULT: {new_faults} samples injected 0 pA (bad or non-finite V)")
        if new_watchdog > 0:
            parts.append(f"WATCHDOG: the board held its fault output for {new_watchdog} samples")
        if new_limited > 0:
            share = latest.limited / max(health["samples"], 1)
            often = f" in {limit_episodes} episodes" if limit_episodes > 1 else ""
            much = f", asked up to {beyond_pA:.0f} pA beyond it" if beyond_pA > 0 else ""
            parts.append(
                f"CURRENT LIMIT: {new_limited:,} samples clipped to ±max_current_pA "
                f"({share:.1%} of the run{often}{much})"
            )
        if not parts:
            return
        level = "fault" if (new_faults > 0 or new_watchdog > 0) else "limit"
        self.show_message(level, "   ·   ".join(parts))

    def show_message(self, level: str, text: str) -> None:
        """Show ``text``; ``level`` "fault" (red) or "limit" (amber)."""
        if level != self.level:  # restyling is costly: only when the level changes
            colour = "#b00020" if level == "fault" else "#c77700"
            self.setStyleSheet(
                f"QFrame#alarm {{ background: {colour}; }} QLabel {{ color: white; }}"
            )
        self.level = level
        if text != self.label.text():
            self.label.setText(text)
        if not self.isVisible():
            self.show()

    def acknowledge(self) -> None:
        self.seen = Alarm(self._latest.faults, self._latest.watchdog, self._latest.limited)
        self.level = ""
        self.hide()


class HealthPanel(QtWidgets.QWidget):
    """Histograms and counters of the loop's timing."""

    _ROWS = (
        ("samples", "samples taken"),
        ("latency", "command latency p50 / p99"),
        ("latency_us", "   the same in µs"),
        ("within_2", "commands within 2 samples"),
        ("turnaround", "host turnaround p50 / p99"),
        ("late", "late commands (flagged by the board)"),
        ("missing", "missing samples (lost frames)"),
        ("unanswered", "samples left unanswered (superseded)"),
        ("bad_frames", "bad frames"),
        ("watchdog", "watchdog trips (samples)"),
        ("faults", "faults (samples at 0 pA)"),
        ("limited", "samples at the current limit"),
        ("zeroed", "samples held at 0 pA"),
    )

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.rate_hz = 20000.0
        layout = QtWidgets.QVBoxLayout(self)
        grid = QtWidgets.QGridLayout()
        self.values: dict[str, QtWidgets.QLabel] = {}
        for r, (key, text) in enumerate(self._ROWS):
            name = QtWidgets.QLabel(text)
            name.setWordWrap(True)  # a narrow panel wraps the names, not the figures
            grid.addWidget(name, r, 0)
            value = QtWidgets.QLabel("–")
            value.setAlignment(QtCore.Qt.AlignmentFlag.AlignRight)
            value.setObjectName(f"health:{key}")
            grid.addWidget(value, r, 1)
            self.values[key] = value
        layout.addLayout(grid)

        self.plots = pg.GraphicsLayoutWidget()
        self.plots.setBackground("#111418")
        self.plots.setMinimumHeight(160)  # two small histograms: the window fits 1280x720
        self.p_lat = self.plots.addPlot(row=0, col=0)
        self.p_lat.setLabel("left", "% of commands")
        self.p_lat.setLabel("bottom", "command latency", units="samples")
        self.p_lat.showAxis("top")
        self.p_lat.setLabel("top", "µs")
        self.p_lat.setMouseEnabled(x=False, y=False)
        self.p_lat.setMenuEnabled(False)
        self.p_lat.hideButtons()
        self.lat_bars = pg.BarGraphItem(
            x=np.arange(LAT_BINS), height=np.zeros(LAT_BINS), width=0.8, brush="#5fb3ff"
        )
        self.p_lat.addItem(self.lat_bars)
        self.p_lat.setXRange(-0.6, LAT_BINS - 0.4, padding=0)
        self.p_lat.setYRange(0, 100, padding=0)
        # The last bin holds that many samples or more (clampcore.shared.LAT_BINS).
        ticks = [(k, str(k)) for k in range(0, LAT_BINS - 1, 5)] + [
            (LAT_BINS - 1, f"≥{LAT_BINS - 1}")
        ]
        self.p_lat.getAxis("bottom").setTicks([ticks])

        self.p_turn = self.plots.addPlot(row=1, col=0)
        self.p_turn.setLabel("left", "% of commands")
        self.p_turn.setLabel("bottom", "host turnaround (µs)")
        self.p_turn.setMouseEnabled(x=False, y=False)
        self.p_turn.setMenuEnabled(False)
        self.p_turn.hideButtons()
        self.p_turn.setLogMode(x=False, y=False)
        self.turn_curve = self.p_turn.plot(
            stepMode="center", fillLevel=0, brush="#ffb34788", pen=pg.mkPen("#ffb347")
        )
        layout.addWidget(self.plots, 1)
        self.set_rate(self.rate_hz)

    def set_rate(self, rate_hz: float) -> None:
        """The top axis of the latency plot reads µs at this sampling rate."""
        self.rate_hz = float(rate_hz)
        self.p_lat.getAxis("top").setScale(1e6 / self.rate_hz)
        self.p_lat.setLabel("top", f"µs (1 sample = {1e6 / self.rate_hz:g} µs)")

    def update_from(self, h: dict[str, Any]) -> None:
        """Show the figures of ``loop_health``."""
        v = self.values
        v["samples"].setText(f"{h['samples']:,}")
        top = LAT_BINS - 1  # the last bin: that many samples or more

        def lat(samples: float, us: float) -> tuple[str, str]:
            more = "≥" if samples >= top else ""
            return f"{more}{samples:.0f}", f"{more}{us:.0f}"

        s50, u50 = lat(h["latency_p50_samples"], h["latency_p50_us"])
        s99, u99 = lat(h["latency_p99_samples"], h["latency_p99_us"])
        v["latency"].setText(f"{s50} / {s99} samples")
        v["latency_us"].setText(f"{u50} / {u99} µs")
        v["within_2"].setText(f"{h['within_2_samples']:.2%}")
        # Fewer than 9 in 10 commands within 2 samples: the clamp is not keeping up, shown
        # in red (a warning level of our own, common practice for a closed loop's delay).
        slow = h["samples"] > 0 and h["within_2_samples"] < _WITHIN_2_WARN
        if v["within_2"].property("bad") != slow:
            v["within_2"].setProperty("bad", slow)
            v["within_2"].setStyleSheet("color: #ff5a5a; font-weight: bold;" if slow else "")
        v["turnaround"].setText(f"{h['turnaround_p50_us']:.0f} / {h['turnaround_p99_us']:.0f} µs")
        for key in ("late", "missing", "unanswered", "bad_frames", "watchdog", "faults",
                    "limited", "zeroed"):  # fmt: skip
            v[key].setText(f"{h[key]:,}")
            bad = h[key] > 0 and key in ("watchdog", "faults", "limited")
            if v[key].property("bad") != bad:  # restyling is costly: only on a change
                v[key].setProperty("bad", bad)
                v[key].setStyleSheet("color: #ff5a5a; font-weight: bold;" if bad else "")
        lat = h["latency_hist"]
        total = lat.sum()
        self.lat_bars.setOpts(height=100.0 * lat / total if total else np.zeros_like(lat))
        turn = h["turnaround_hist"]
        total = turn.sum()
        if total:
            last = min(int(np.flatnonzero(turn)[-1]) + 2, turn.size)
            edges = np.arange(last + 1) * TURN_BIN_US
            self.turn_curve.setData(edges, 100.0 * turn[:last] / total)
