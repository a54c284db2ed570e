"""Events on the traces (issue 15): markers, Log lines, and hold periods in the NWB.

References: ring rows built here by hand, with the bits the loop writes
(clampcore.step FLAG_LIMITED / FAULT_*, clampcore.hostloop FLAG_ZEROED, the board's
STATUS_WATCHDOG from PROTOCOL.md) and the expected events counted by hand; on the
simulated rig, faults made to happen from outside the window (the loop process
stopped with SIGSTOP for longer than the board's watchdog; frames dropped by the
rig) and the recorded per-sample flags of the NWB file.
"""

from __future__ import annotations

import os
import signal
import time

import numpy as np
import pytest

pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")

from clampcore.firmware_protocol.codec import STATUS_WATCHDOG
from clampcore.gui.events import EPISODE_GAP_S, EventScanner
from guikit import LEAK_EXPERIMENT, RATE_HZ, make_window, start, stop, wait_samples, written

from clampcore.hostloop import FLAG_ZEROED
from clampcore.step import FAULT_BAD_V, FLAG_LIMITED

pytestmark = pytest.mark.gui


def _rows(n: int):
    counter = np.arange(1000, 1000 + n, dtype=float)
    return counter, np.zeros(n), np.zeros(n), np.zeros(n)


def test_scanner_finds_each_event_kind_once_per_episode():
    rate = 1000.0
    gap = round(EPISODE_GAP_S * rate)
    n = 5000
    counter, flags, status, asked = _rows(n)
    flags[100:300] = FLAG_ZEROED  # one hold: rows 100..299
    status[1000:1040] = STATUS_WATCHDOG  # one watchdog trip
    counter[2000:] += 3  # 3 frames lost before row 2000
    counter[2400:] += 1  # 1 more within the gap: the same episode
    flags[3000:3010] = FLAG_LIMITED  # a limit episode...
    flags[3100:3105] = FLAG_LIMITED  # ...continued within the gap
    flags[3000 + 10 + gap + 500] = FLAG_LIMITED  # a second one after a quiet gap
    asked[3000:3010] = 2150.0  # 150 pA beyond a 2000 pA limit
    asked[3100:3105] = -2400.0  # 400 pA beyond, the other sign
    flags[4500] = FAULT_BAD_V
    scanner = EventScanner(rate)
    events = []
    for a in range(0, n, 777):  # in blocks, as the window reads the ring
        b = min(n, a + 777)
        events += scanner.scan(
            a, counter[a:b], flags[a:b], status[a:b], asked[a:b], limit_pA=2000.0
        )
    events += scanner.finish()
    starts = [(e.sample, e.kind) for e in events if not e.ended]
    assert starts == [
        (100, "hold"),
        (300, "release"),
        (1000, "watchdog"),
        (2000, "lost"),
        (3000, "limit"),
        (3000 + 10 + gap + 500, "limit"),
        (4500, "fault"),
    ]
    ends = {(e.kind, e.sample): e for e in events if e.ended}
    assert "40 samples" in ends[("watchdog", 1039)].text
    assert "4 samples lost" in ends[("lost", 2400)].text
    first_limit = ends[("limit", 3104)]
    assert "15 samples clipped" in first_limit.text and first_limit.amount == 400.0
    release = next(e for e in events if e.kind == "release")
    assert "0.200 s" in release.text  # 200 rows at 1 kHz


def _hold(window, on: bool) -> None:
    window.set_zero_current(on)


def test_each_event_is_a_marker_and_a_log_line_and_holds_reach_the_nwb(qtbot, tmp_path):
    window = make_window(
        qtbot, tmp_path, LEAK_EXPERIMENT, clock="wall", rig_faults={"drop_tx": 0.0005}
    )
    start(qtbot, window, min_samples=int(0.3 * RATE_HZ))
    ed = window.editor
    assert ed.enter_text("extra_leak", "g_nS", "6") is None  # a parameter change
    wait_samples(qtbot, window, 2000)
    held_from = written(window)
    _hold(window, True)
    wait_samples(qtbot, window, 3000)
    _hold(window, False)
    held_to = written(window)
    # The elements ask for more than the limit: -100 nS x (-70 mV - 0 mV) = 7000 pA > 2000.
    assert ed.enter_text("extra_leak", "e_mV", "0") is None
    assert ed.enter_text("extra_leak", "g_nS", "100") is None
    wait_samples(qtbot, window, 4000)
    # The loop stops answering for 150 ms: the board's 20 ms watchdog trips.
    pid = window.engine.loop_pid
    os.kill(pid, signal.SIGSTOP)
    time.sleep(0.15)
    os.kill(pid, signal.SIGCONT)
    wait_samples(qtbot, window, int(0.3 * RATE_HZ))
    qtbot.waitUntil(lambda: window.engine.status()["watchdog"] > 0, timeout=10_000)
    qtbot.wait(200)
    rec = stop(qtbot, window)

    labels = [label for _t, label in window.traces.markers()]
    for expected in ("g_nS 6", "0 pA", "released", "e_mV 0", "g_nS 100", "limit", "watchdog",
                     "lost frames"):  # fmt: skip
        assert expected in labels, (expected, labels)
    log = window.log.toPlainText()
    for words in ("held at 0 pA", "released to the elements", "current limit", "watchdog tripped",
                  "frames lost", "applied extra_leak.g_nS = 6"):  # fmt: skip
        assert words in log, words
    assert "samples clipped, up to" in log  # the limit episode's size and overshoot
    # The hold in the NWB: one row of events/zero_hold_events, exactly the flagged samples.
    holds = [e for e in rec["events"] if e["kind"] == "zero_hold"]
    assert len(holds) == 1
    flags = rec["columns"]["flags"].astype(np.int64)
    held = np.flatnonzero(flags & FLAG_ZEROED)
    first = rec["first_sample"]
    assert holds[0]["sample"] - first == held[0] and holds[0]["end_sample"] - first == held[-1] + 1
    assert held.size == held[-1] - held[0] + 1  # one unbroken stretch
    assert held_from <= held[0] and held[-1] < held_to  # where the window held it
    assert holds[0]["duration_s"] == pytest.approx(held.size / RATE_HZ)
