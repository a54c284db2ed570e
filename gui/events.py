"""Events found in a run's ring rows, for markers on the traces and lines in the Log.

``EventScanner.scan`` reads consecutive ring rows (sample counter, flags, board
status and each element's current) and returns what happened in them:

=============  ===============================================================
kind           when
=============  ===============================================================
``hold``       the zero-current control starts holding 0 pA (``FLAG_ZEROED``)
``release``    it stops (the label gives how long it held)
``watchdog``   the board reports its watchdog tripped (``STATUS_WATCHDOG``)
``lost``       sample counters skipped: frames lost on the way to the host
``limit``      the command was clipped to ±max_current_pA (``FLAG_LIMITED``)
``fault``      a bad or non-finite V made the loop inject 0 pA
``param``      a live change applied by the loop (made by the window, not here)
=============  ===============================================================

Conditions that last (watchdog, limit, fault, lost frames) are reported once per
episode: an episode ends after ``EPISODE_GAP_S`` without the condition, and its
end comes back as the same kind with ``ended=True`` and a summary (how many
samples; for the limit, by how much the elements asked beyond it).

Public names: ``TraceEvent``, ``EventScanner``, ``EVENT_COLOURS``, ``EPISODE_GAP_S``.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from clampcore.firmware_protocol.codec import STATUS_WATCHDOG

from clampcore.hostloop import FLAG_ZEROED
from clampcore.step import FAULT_BAD_V, FAULT_NONFINITE, FLAG_LIMITED

# Episodes closer than this are one: a limit hit on every spike of a 20 Hz train is one
# episode, not 20 markers a second (a marker a person can still read; common practice).
EPISODE_GAP_S = 0.5

# Marker colours by kind (on the dark plot background).
EVENT_COLOURS = {
    "param": "#5fb3ff",
    "hold": "#ff5a5a",
    "release": "#7fe07f",
    "watchdog": "#ff5a5a",
    "lost": "#e27fff",
    "limit": "#ffb347",
    "fault": "#ff5a5a",
}


@dataclass(frozen=True)
class TraceEvent:
    """Something that happened at ``sample`` (a ring row number: time = sample / rate)."""

    sample: int
    kind: str
    label: str  # a few words for the marker
    text: str  # a sentence for the Log
    ended: bool = False  # the end of an episode (Log only, no marker)
    amount: float = 0.0  # an ended limit episode: the most asked beyond the limit, pA


class _Episode:
    def __init__(self, sample: int) -> None:
        self.first = sample
        self.last = sample
        self.count = 0
        self.worst = 0.0


class EventScanner:
    """Finds events in consecutive blocks of ring rows of one run."""

    def __init__(self, rate_hz: float) -> None:
        self.rate_hz = float(rate_hz)
        self.gap_samples = max(1, round(EPISODE_GAP_S * self.rate_hz))
        self._held_since: int | None = None
        self._last_counter: float | None = None
        self._episodes: dict[str, _Episode] = {}

    def scan(
        self,
        first_row: int,
        counter: np.ndarray,
        flags: np.ndarray,
        status: np.ndarray,
        asked_pA: np.ndarray | None = None,
        limit_pA: float = np.inf,
    ) -> list[TraceEvent]:
        """Events in rows ``first_row ..`` (one entry per row in each array).

        ``asked_pA``: what the elements asked for at each row (the sum of their
        currents, before the limit); with ``limit_pA`` it says by how much a
        limited command was clipped.
        """
        out: list[TraceEvent] = []
        flags = flags.astype(np.int64)
        status = status.astype(np.int64)
        n = flags.size
        if n == 0:
            return out
        rows = first_row + np.arange(n)
        # Holds: each edge of FLAG_ZEROED.
        held = (flags & FLAG_ZEROED) != 0
        before = np.concatenate([[self._held_since is not None], held[:-1]])
        for k in np.flatnonzero(held != before):
            s = int(rows[k])
            if held[k]:
                self._held_since = s
                out.append(TraceEvent(s, "hold", "0 pA", f"{self._t(s)} held at 0 pA"))
            else:
                since = self._held_since if self._held_since is not None else s
                dur = (s - since) / self.rate_hz
                out.append(
                    TraceEvent(
                        s,
                        "release",
                        "released",
                        f"{self._t(s)} released to the elements after {dur:.3f} s at 0 pA",
                    )
                )
                self._held_since = None
        # Lost frames: a jump in the board's sample counter.
        prev = self._last_counter if self._last_counter is not None else counter[0] - 1
        steps = np.diff(np.concatenate([[prev], counter]))
        lost = np.where(steps > 1, steps - 1, 0)
        self._last_counter = float(counter[-1])
        over = np.zeros(n)
        if asked_pA is not None and np.isfinite(limit_pA):
            over = np.maximum(np.abs(asked_pA) - limit_pA, 0.0)
        conditions = {
            "watchdog": ((status & STATUS_WATCHDOG) != 0, None),
            "fault": ((flags & (FAULT_BAD_V | FAULT_NONFINITE)) != 0, None),
            "limit": ((flags & FLAG_LIMITED) != 0, over),
            "lost": (lost > 0, lost),
        }
        for kind, (mask, amount) in conditions.items():
            out += self._episodes_of(kind, rows, mask, amount)
        # Episodes that have been quiet long enough are over.
        newest = int(rows[-1])
        for kind, ep in list(self._episodes.items()):
            if newest - ep.last >= self.gap_samples:
                out.append(self._end(kind, ep))
        out.sort(key=lambda e: (e.sample, e.ended))
        return out

    def open_amount(self, kind: str) -> float:
        """The episode of ``kind`` still going on: its most beyond the limit (0 if none)."""
        ep = self._episodes.get(kind)
        return ep.worst if ep is not None else 0.0

    def finish(self) -> list[TraceEvent]:
        """The ends of episodes still open when the run stops."""
        return [self._end(kind, ep) for kind, ep in list(self._episodes.items())]

    def _episodes_of(
        self, kind: str, rows: np.ndarray, mask: np.ndarray, amount: np.ndarray | None
    ) -> list[TraceEvent]:
        out: list[TraceEvent] = []
        hits = np.flatnonzero(mask)
        if hits.size == 0:
            return out
        samples = rows[hits]
        # Groups of hits with less than a gap between them; the first may go on an
        # episode already open.
        breaks = (np.flatnonzero(np.diff(samples) >= self.gap_samples) + 1).tolist()
        bounds = [0, *breaks, samples.size]
        ep = self._episodes.get(kind)
        for g, (a, b) in enumerate(itertools.pairwise(bounds)):
            if not (g == 0 and ep is not None and samples[0] - ep.last < self.gap_samples):
                if ep is not None:
                    out.append(self._end(kind, ep))
                ep = _Episode(int(samples[a]))
                self._episodes[kind] = ep
                out.append(self._start(kind, ep))
            ep.last = int(samples[b - 1])
            if kind == "lost":
                ep.count += int(amount[hits[a:b]].sum())
            else:
                ep.count += b - a
                if amount is not None:
                    ep.worst = max(ep.worst, float(amount[hits[a:b]].max()))
        return out

    def _start(self, kind: str, ep: _Episode) -> TraceEvent:
        s = ep.first
        words = {
            "watchdog": ("watchdog", "the board's watchdog tripped (fault output)"),
            "fault": ("fault", "bad V: the loop injects 0 pA"),
            "limit": ("limit", "the command reached the current limit and was clipped"),
            "lost": ("lost frames", "frames lost on the way to the host"),
        }[kind]
        return TraceEvent(s, kind, words[0], f"{self._t(s)} {words[1]}")

    def _end(self, kind: str, ep: _Episode) -> TraceEvent:
        del self._episodes[kind]
        span = f"{self._t(ep.first)}–{ep.last / self.rate_hz:.3f} s"
        if kind == "lost":
            what = f"{ep.count} samples lost"
        elif kind == "limit":
            what = f"{ep.count} samples clipped, up to {ep.worst:.0f} pA beyond the limit"
        else:
            what = f"{ep.count} samples"
        text = f"{kind} episode {span}: {what}"
        return TraceEvent(ep.last, kind, "", text, ended=True, amount=ep.worst)

    def _t(self, sample: int) -> str:
        return f"t = {sample / self.rate_hz:.3f} s:"
