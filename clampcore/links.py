"""Models of the serial links a board can sit behind, in the time of the board's samples.

A dynamic clamp's quality depends on when the host sees each sample and when what
it sends reaches the board. These models say both, for a run's whole schedule, so
that the same experiment can be compared over links (``clampcore.linksim``):

- ``direct``: a pseudo-terminal or a dedicated line: a fixed 10 µs each way (the
  order of this project's measured pseudo-terminal turnaround, README Benchmarks);
  the board sends every sample on its own.
- ``usb-fs``: full-speed USB (most cheap microcontrollers' native USB): the bus
  runs in 1 ms frames, so the host collects what the board has queued once per
  frame, and what the host sends reaches the board in the next frame; practical
  bulk throughput about 1 MB/s shared by both directions (USB 2.0 specification,
  from memory; common practice). The board sends its samples in 250 µs batches.
- ``usb-hs``: high-speed USB, 125 µs microframes, the same rules.
- ``bridge``: a UART behind a USB serial-bridge chip (full speed): the chip sends
  to the host when it holds a full 62-byte packet or when its latency timer
  (default 16 ms, settable down to 1 ms; common practice for a widespread family)
  expires, each packet at the next 1 ms frame; bytes cross the UART at baud/10
  bytes per second (8N1 framing: 10 bits a byte), both ways. The board batches 1 ms.

Each link may add a uniform random jitter (seeded) to every delivery, in order:
a link never reorders. Host stalls (the host computes nothing for ``stall_ms``, once
a second at a random phase) defer whatever the host would do during them.

Byte counts use protocol v2's message sizes (PROTOCOL.md §10): a batch of n
samples going up is 17 + 5n bytes on the wire, m laws going down 17 + 8m (16m with
a blocked law), at most 29 laws a message; a current-mode command is 13 bytes.

Public names: ``Link``, ``LINKS``, ``Schedule``, ``schedule``, ``up_bytes``, ``law_bytes``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

_US_PER_S = 1_000_000.0
_BITS_PER_UART_BYTE = 10  # start + 8 data + stop bits (8N1)
_BRIDGE_PACKET_BYTES = 62  # a full-speed bridge's 64-byte packet less its 2 status bytes
_UP_FIXED_BYTES = 17  # SAMPLES: type, seq, first, clock, status, count, CRC, COBS, 0x00
_UP_PER_SAMPLE = 5  # ADC count, DAC count, flags
_LAW_FIXED_BYTES = 17  # LAWS: type, seq, seen, first, count, blocked, CRC, COBS, 0x00
_LAWS_PER_MESSAGE = 29  # firmware_protocol.lawmsg.MAX_LAWS: the payload limit of one frame
_COMMAND_BYTES = 13  # a current-mode COMMAND on the wire


@dataclass(frozen=True)
class Link:
    """One link model (see the module docstring)."""

    name: str
    transit_us: float = 10.0  # fixed delay each way besides frames and UART
    frame_us: float = 0.0  # USB (micro)frame; 0: no frames
    batch_us: float = 0.0  # the board sends its samples in batches this long; 0: each alone
    timer_ms: float = 0.0  # serial bridge latency timer; 0: no bridge
    baud: int = 0  # serial bridge UART rate; 0: no UART
    ceiling_Bps: float = math.inf  # throughput ceiling (both directions together)
    jitter_us: float = 0.0


LINKS = {
    "ideal": Link("ideal", transit_us=0.0),
    "direct": Link("direct"),
    "usb-fs": Link("usb-fs", transit_us=0.0, frame_us=1000.0, batch_us=250.0, ceiling_Bps=1e6),
    "usb-hs": Link("usb-hs", transit_us=0.0, frame_us=125.0, batch_us=125.0, ceiling_Bps=40e6),
    "bridge": Link(
        "bridge",
        transit_us=0.0,
        frame_us=1000.0,
        batch_us=1000.0,
        timer_ms=16.0,
        baud=921_600,
        ceiling_Bps=92_160.0,
    ),
}


def up_bytes(n_samples: int) -> int:
    """Wire bytes of one SAMPLES batch of ``n_samples``."""
    return _UP_FIXED_BYTES + _UP_PER_SAMPLE * n_samples


def law_bytes(n_laws: int, blocked: bool) -> int:
    """Wire bytes of ``n_laws`` laws sent together (split into messages of 30 at most)."""
    if n_laws <= 0:
        return 0
    per_law = 16 if blocked else 8
    messages = -(-n_laws // _LAWS_PER_MESSAGE)
    return messages * _LAW_FIXED_BYTES + per_law * n_laws


class Schedule(NamedTuple):
    """When the host handles which samples, and when what it sends arrives.

    ``wake_newest[w]``: newest sample the host has at its w-th wake-up;
    ``wake_us[w]``: when; ``arrive_us[w]``: when what it sends then reaches the board.
    Sample k is taken at k·dt. Bytes are totals over the run.
    """

    wake_newest: np.ndarray
    wake_us: np.ndarray
    arrive_us: np.ndarray
    up_bytes: int
    down_bytes: int


def _fifo(times: np.ndarray) -> np.ndarray:
    return np.maximum.accumulate(times)


def _next_frame(t_us: np.ndarray, frame_us: float) -> np.ndarray:
    return (np.floor(t_us / frame_us) + 1.0) * frame_us


def _bridge_up(link: Link, ready_us: np.ndarray, nbytes: np.ndarray) -> np.ndarray:
    """When the host has each batch that crossed the UART into the bridge chip."""
    uart_B_per_us = link.baud / _BITS_PER_UART_BYTE / _US_PER_S
    out = np.empty_like(ready_us)
    uart_free = 0.0
    held = 0  # bytes in the chip
    last_packet = 0.0
    timer_us = link.timer_ms * 1000.0
    waiting: list[int] = []
    for b in range(ready_us.size):
        uart_free = max(uart_free, ready_us[b]) + nbytes[b] / uart_B_per_us
        # Before this batch's last byte is in, the timer may flush what is held.
        while waiting and last_packet + timer_us <= uart_free:
            sent = last_packet + timer_us
            for w in waiting:
                out[w] = sent
            waiting.clear()
            held = 0
            last_packet = sent
        held += int(nbytes[b])
        waiting.append(b)
        if held >= _BRIDGE_PACKET_BYTES:
            for w in waiting:
                out[w] = uart_free
            waiting.clear()
            held = 0
            last_packet = uart_free
    for w in waiting:  # the end of the run: the timer flushes the rest
        out[w] = max(last_packet + timer_us, uart_free)
    return _next_frame(out, link.frame_us)


def _stalled(times_us: np.ndarray, stalls: np.ndarray) -> np.ndarray:
    """``times_us`` moved to the end of any stall window (rows: start, end) they fall in."""
    out = times_us.copy()
    for start, end in stalls:
        inside = (out >= start) & (out < end)
        out[inside] = end
    return out


def stall_windows(duration_s: float, stall_ms: float, seed: int) -> np.ndarray:
    """One host stall of ``stall_ms`` a second, each at a random phase (seeded)."""
    if stall_ms <= 0:
        return np.zeros((0, 2))
    rng = np.random.default_rng(seed)
    seconds = math.ceil(duration_s)
    starts = np.arange(seconds) + rng.random(seconds)
    starts_us = starts * _US_PER_S
    return np.column_stack([starts_us, starts_us + stall_ms * 1000.0])


def schedule(
    link: Link,
    n_samples: int,
    rate_hz: float,
    lead_samples: int,
    law_mode: bool,
    blocked: bool = False,
    stall_ms: float = 0.0,
    seed: int = 0,
) -> Schedule:
    """The host's wake-ups over ``link`` for a run of ``n_samples`` (see ``Schedule``)."""
    rng = np.random.default_rng(seed + 7919)  # the link's own stream, apart from the cell's
    dt_us = _US_PER_S / rate_hz
    per_batch = max(1, round(link.batch_us / dt_us)) if link.batch_us > 0 else 1
    last = np.minimum(np.arange(per_batch - 1, n_samples + per_batch - 1, per_batch), n_samples - 1)
    n_batches = last.size
    sizes = np.diff(np.concatenate([[-1], last]))
    nbytes = up_bytes(1) + _UP_PER_SAMPLE * (sizes - 1)
    ready = last * dt_us + link.transit_us
    if link.baud > 0:
        got = _bridge_up(link, ready, nbytes)
    elif link.frame_us > 0:
        got = _next_frame(ready, link.frame_us)
    else:
        got = ready
    if link.jitter_us > 0:
        got = got + rng.uniform(0.0, link.jitter_us, n_batches)
    got = _fifo(got)
    stalls = stall_windows(n_samples / rate_hz, stall_ms, seed)
    wake = _fifo(_stalled(got, stalls))
    # One wake-up per distinct time: the newest batch then handled.
    keep = np.append(wake[1:] != wake[:-1], True)
    wake_us = wake[keep]
    wake_newest = last[keep].astype(np.int64)
    if law_mode:
        hi = wake_newest + lead_samples
        sent = np.diff(np.concatenate([[lead_samples], hi]))  # laws 0..lead went before START
        down = np.array([law_bytes(int(m), blocked) for m in sent])
        preload = law_bytes(lead_samples + 1, blocked)
    else:
        down = np.full(wake_us.size, _COMMAND_BYTES)
        preload = 0
    send = wake_us + link.transit_us
    if link.baud > 0:
        uart_B_per_us = link.baud / _BITS_PER_UART_BYTE / _US_PER_S
        arrive = _next_frame(send, link.frame_us)
        free = 0.0
        for w in range(arrive.size):  # the UART carries one message after another
            free = max(free, arrive[w]) + down[w] / uart_B_per_us
            arrive[w] = free
    elif link.frame_us > 0:
        arrive = _next_frame(send, link.frame_us)
    else:
        arrive = send
    if link.jitter_us > 0:
        arrive = arrive + rng.uniform(0.0, link.jitter_us, arrive.size)
    return Schedule(
        wake_newest=wake_newest,
        wake_us=wake_us,
        arrive_us=_fifo(arrive),
        up_bytes=int(nbytes.sum()),
        down_bytes=int(down.sum() + preload),
    )
