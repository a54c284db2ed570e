"""Loop health: the timing of the running loop and the alarms that need a human.

``loop_health`` turns the loop's shared counters (``clampcore.shared`` ``ST_*``)
into figures: the latency histogram in samples and µs, turnaround percentiles,
late and missing commands, bad frames, watchdog trips, faults and clipped
samples. ``HealthPanel`` shows them; ``AlarmBanner`` is the band across the
window that appears when a fault, a watchdog trip or the current limit is hit
and stays until acknowledged.

Public names: ``loop_health``, ``HealthPanel``, ``AlarmBanner``, ``Alarm``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from clampcore.shared import (
    LAT_BINS,
    ST_BAD_FRAMES,
    ST_COMMANDS,
    ST_FAULTS,
    ST_LAT_HIST,
    ST_LATE,
    ST_LIMITED,
    ST_MISSING,
    ST_SAMPLES,
    ST_TURN_HIST,
    ST_UNANSWERED,
    ST_WATCHDOG,
    ST_ZEROED,
    TURN_BIN_US,
)


def _percentile(hist: np.ndarray, q: float) -> float:
    """Bin index holding the q-th percentile of a histogram (NaN when empty)."""
    total = float(hist.sum())
    if total <= 0:
        return float("nan")
    return float(np.searchsorted(np.cumsum(hist), total * q / 100.0))


def loop_health(stats: np.ndarray, rate_hz: float) -> dict[str, Any]:
    """Health figures from a copy of the loop's ``stats`` array."""
    st = np.asarray(stats, dtype=np.float64)
    sample_us = 1e6 / rate_hz
    lat = st[ST_LAT_HIST : ST_LAT_HIST + LAT_BINS]
    turn = st[ST_TURN_HIST:]
    samples = int(st[ST_SAMPLES])
    answered = float(lat.sum())
    p50 = _percentile(lat, 50)
    p99 = _percentile(lat, 99)
    return {
        "samples": samples,
        "latency_hist": lat.copy(),
        "turnaround_hist": turn.copy(),
        "latency_p50_samples": p50,
        "latency_p99_samples": p99,
        "latency_p50_us": p50 * sample_us,
        "latency_p99_us": p99 * sample_us,
        "within_2_samples": float(lat[:3].sum() / answered) if answered else float("nan"),
        # Bin centres: a turnaround in bin k lies in [k, k+1) x TURN_BIN_US.
        "turnaround_p50_us": (_percentile(turn, 50) + 0.5) * TURN_BIN_US,
        "turnaround_p99_us": (_percentile(turn, 99) + 0.5) * TURN_BIN_US,
        "late": int(st[ST_LATE]),
        "missing": int(st[ST_MISSING]),
        "unanswered": int(st[ST_UNANSWERED]),
        "bad_frames": int(st[ST_BAD_FRAMES]),
        "watchdog": int(st[ST_WATCHDOG]),
        "faults": int(st[ST_FAULTS]),
        "limited": int(st[ST_LIMITED]),
        "zeroed": int(st[ST_ZEROED]),
        "commands": int(st[ST_COMMANDS]),
    }


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

    def update_from(self, health: dict[str, Any]) -> None:
        """Raise (or escalate) the banner when a counter has grown since acknowledged."""
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
            parts.append(f"CURRENT LIMIT: {new_limited} samples clipped to ±max_current_pA")
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
            grid.addWidget(QtWidgets.QLabel(text), r, 0)
            value = QtWidgets.QLabel("–")
            value.setAlignment(QtCore.Qt.AlignmentFlag.AlignRight)
            value.setObjectName(f"health:{key}")
            grid.addWidget(value, r, 1)
            self.values[key] = value
        layout.addLayout(grid)

        self.plots = pg.GraphicsLayoutWidget()
        self.plots.setBackground("#111418")
        self.plots.setMinimumHeight(320)
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
        v["latency"].setText(f"{s50} / {s99} samples ({u50} / {u99} µs)")
        v["within_2"].setText(f"{h['within_2_samples']:.2%}")
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
