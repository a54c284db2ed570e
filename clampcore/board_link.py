"""The control side of a board connection: open, handshake, configure, start, stop.

Everything here is plain Python and happens outside the per-sample path: the
loop process opens the port with pyserial, asks for the board's capabilities,
configures and starts it, hands the file descriptor to the compiled loop, and
afterwards commands 0 pA and stops the board.

Every failure below the engine becomes a ``BoardError`` that says what went
wrong and where.

Public names: ``BoardLink``, ``BoardError``, ``list_ports``, ``board_converters``.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import time
from typing import Any

import numpy as np
import serial
from serial.tools import list_ports as _list_ports

from clampcore.calibration import Converter
from clampcore.firmware_protocol import boardlaw, codec, lawmsg

_CONTROL_SEQ_START = 0x8000  # control frames count from here; commands use their own numbers
_REPLY_TIMEOUT_S = 2.0  # a board answers a control message within a few ms; 2 s is generous


class BoardError(RuntimeError):
    """A board or port problem, with the port and the step that failed."""

    def __init__(self, port: str, what: str, detail: str) -> None:
        super().__init__(f"{port}: {what}: {detail}")
        self.port, self.what, self.detail = port, what, detail


def list_ports() -> list[dict[str, Any]]:
    """Serial ports with their USB identity (vendor:product, serial number, description)."""
    out = []
    for p in sorted(_list_ports.comports(), key=lambda p: p.device):
        usb = f"{p.vid:04x}:{p.pid:04x}" if p.vid is not None and p.pid is not None else ""
        out.append(
            {
                "device": p.device,
                "usb_id": usb,
                "serial_number": p.serial_number or "",
                "manufacturer": p.manufacturer or "",
                "description": p.description or "",
            }
        )
    return out


def board_converters(hello: codec.Hello) -> tuple[Converter, Converter]:
    """The board's ADC and DAC as ``Converter``s (ranges reported in µV)."""
    # Divide (exact for whole volts) rather than multiply by 1e-6 (inexact in binary).
    adc = Converter(hello.adc_bits, hello.adc_min_uV / 1e6, hello.adc_max_uV / 1e6)
    dac = Converter(hello.dac_bits, hello.dac_min_uV / 1e6, hello.dac_max_uV / 1e6)
    return adc, dac


class BoardLink:
    """A serial connection to a board speaking PROTOCOL.md."""

    def __init__(self, port: str) -> None:
        self.port = port
        try:
            if "://" in port:
                self.serial = serial.serial_for_url(port, timeout=0.05, write_timeout=1.0)
            else:
                # The baud rate is ignored by USB CDC boards and pseudo-terminals; 2 Mbaud
                # covers 20 kHz x ~22-byte frames for a real UART (common practice).
                # exclusive: pyserial takes an flock(2) on POSIX, so a second run (or any
                # program that asks for the lock) cannot open the port while this one holds
                # it; Windows opens COM ports exclusively by itself.
                self.serial = serial.Serial(
                    port,
                    baudrate=2_000_000,
                    timeout=0.05,
                    write_timeout=1.0,
                    exclusive=True if os.name == "posix" else None,
                )
        except (serial.SerialException, OSError, ValueError) as exc:
            if "exclusively lock" in str(exc):
                raise BoardError(
                    port,
                    "cannot open the port",
                    "another program holds it (a second clampcore run?); stop that one first",
                ) from exc
            raise BoardError(port, "cannot open the port", str(exc)) from exc
        self._seq = _CONTROL_SEQ_START
        self._pending = b""
        self.hello: codec.Hello | None = None
        # A lone delimiter ends any partial frame a previous host left in the board's
        # decoder (PROTOCOL.md: empty frames are ignored), so our first frame arrives whole.
        self._write(b"\x00")

    # ------------------------------------------------------------------ raw file descriptor
    def blocking_fd(self) -> int | None:
        """The port's descriptor in blocking mode (None for URL ports without one)."""
        try:
            fd = self.serial.fileno()
        except (AttributeError, NotImplementedError, serial.SerialException):
            return None
        # pyserial opens with O_NONBLOCK (DEVELOPERS.md, Figures): clear it for blocking reads.
        flags = fcntl.fcntl(fd, fcntl.F_GETFL)
        fcntl.fcntl(fd, fcntl.F_SETFL, flags & ~os.O_NONBLOCK)
        return fd

    # ------------------------------------------------------------------ messages
    def send(self, message: Any, seq: int | None = None) -> int:
        """Send a protocol message, or a ``(msg_type, body)`` pair of protocol v2 (§10)."""
        if seq is None:
            seq = self._seq
            self._seq = _CONTROL_SEQ_START + ((self._seq + 1 - _CONTROL_SEQ_START) % 0x7FFF)
        if isinstance(message, tuple):
            msg_type, body = message
            self._write(lawmsg.frame_bytes(msg_type, seq, body), f"message 0x{msg_type:02X}")
        else:
            self._write(codec.encode_message(message, seq), type(message).__name__)
        return seq

    def _write(self, data: bytes, what: str = "a delimiter") -> None:
        try:
            self.serial.write(data)
            self.serial.flush()
        except (serial.SerialException, OSError) as exc:
            raise BoardError(self.port, f"sending {what}", str(exc)) from exc

    def _frames(self, deadline: float):
        while time.monotonic() < deadline:
            while b"\x00" in self._pending:
                wire, self._pending = self._pending.split(b"\x00", 1)
                if not wire:
                    continue
                try:
                    yield codec.decode_message(wire)
                except codec.VersionError as exc:  # a HELLO of another version (§9)
                    raise BoardError(self.port, "unsupported board", str(exc)) from None
                except codec.FrameError:
                    continue  # dropped, like the loop's decoder does
            try:
                data = self.serial.read(max(1, self.serial.in_waiting))
            except (serial.SerialException, OSError) as exc:
                raise BoardError(self.port, "reading", str(exc)) from exc
            self._pending += data

    def request(
        self, message: Any, reply_type: type, timeout_s: float = _REPLY_TIMEOUT_S, tries: int = 1
    ) -> Any:
        """Send a control message and wait for its reply (samples in between are skipped).

        ``tries`` > 1 resends after ``timeout_s / tries``: only for questions (GET_HELLO,
        GET_STATUS), whose reply a running board may drop while its output is backed up.
        """
        for _ in range(tries):
            seq = self.send(message)
            for _reply_seq, reply in self._frames(time.monotonic() + timeout_s / tries):
                if isinstance(reply, reply_type):
                    if isinstance(reply, codec.Status) and reply.ack_seq != seq:
                        continue  # an unsolicited report or an older reply
                    return reply
        raise BoardError(
            self.port,
            f"no {reply_type.__name__} reply to {type(message).__name__}",
            f"nothing within {timeout_s:g} s (is a board running clampcore's protocol there?)",
        )

    def handshake(self) -> codec.Hello:
        """Ask for HELLO; refuses (``BoardError``) a board of another protocol version."""
        self.serial.reset_input_buffer()
        self.hello = self.request(codec.GetHello(), codec.Hello, tries=4)
        return self.hello

    def configure(self, rate_hz: int, watchdog_us: int, fault_counts: int) -> codec.Status:
        reply = self.request(
            codec.Configure(rate_hz, 1, watchdog_us, (fault_counts,)), codec.Status
        )
        if reply.result != codec.RESULT_OK:
            raise BoardError(self.port, "configure refused", f"board result code {reply.result}")
        return reply

    def start(self) -> codec.Status:
        reply = self.request(codec.Start(), codec.Status)
        if reply.result != codec.RESULT_OK:
            raise BoardError(self.port, "start refused", f"board result code {reply.result}")
        return reply

    def command_now(self, seq: int, answers_counter: int, dac_counts: int) -> None:
        """Send one COMMAND at once."""
        self.send(codec.Command(answers_counter % 2**32, (dac_counts,)), seq=seq % 0x10000)

    def law_setup(self, rules: bytes, tables: list[bytes]) -> None:
        """Give a law-evaluating board (HELLO's law capability) its rules and Mg block
        table (PROTOCOL.md §10); ``BoardError`` when it refuses or does not answer."""
        for what, msg_type, body in [
            ("board rules", lawmsg.MSG_BOARD_RULES, rules),
            *(("block table", lawmsg.MSG_BLOCK_TABLE, b) for b in tables),
        ]:
            reply = self.request((msg_type, body), codec.Status)
            if reply.result != codec.RESULT_OK:
                raise BoardError(self.port, f"{what} refused", f"board result code {reply.result}")

    def zero_now(self, confirm_s: float = 0.2) -> bool:
        """Ask a law-evaluating board for 0 pA at once, ahead of any queued law, and wait
        (at most ``confirm_s``) for a sample that shows it applied; True when one did."""
        self.send((lawmsg.MSG_ZERO, lawmsg.ZERO_ON))
        fields = np.zeros(lawmsg.N_FIELDS, dtype=np.int64)
        adc, dac, flags = (np.zeros(lawmsg.MAX_SAMPLES, dtype=np.int64) for _ in range(3))
        deadline = time.monotonic() + confirm_s
        while time.monotonic() < deadline:
            try:
                data = self.serial.read(max(1, self.serial.in_waiting))
            except (serial.SerialException, OSError) as exc:
                raise BoardError(self.port, "reading", str(exc)) from exc
            self._pending += data
            while b"\x00" in self._pending:
                wire, self._pending = self._pending.split(b"\x00", 1)
                try:
                    payload = np.frombuffer(codec.decode_wire(wire), dtype=np.uint8)
                except codec.FrameError:
                    continue
                n = lawmsg.decode_samples(payload, payload.size, fields, adc, dac, flags)
                if n > 0 and np.any(flags[:n] & boardlaw.BF_FLAG_ZERO):
                    return True
        return False

    def command_after(
        self, seq: int, last_counter: int, dac_counts: int, timeout_s: float
    ) -> int | None:
        """Command ``dac_counts`` (0 pA before stopping) so that the board applies it.

        A board applies a COMMAND only if it answers a sample already sent and newer than
        the one the command in force answers (PROTOCOL.md §5.2), so repeating the last
        answered counter would be rejected. This reads the samples that arrived after
        ``last_counter`` (the newest the loop answered; -1 for none) and answers the newest
        of them, then waits up to ``timeout_s`` for a sample that shows it in force. Returns
        the counter answered, or None when no newer sample came within ``timeout_s``: then
        no COMMAND could be applied and only STOP's fault value (0 pA) brings the output to
        zero.
        """
        newest = None
        for _seq, msg in self._frames(time.monotonic() + timeout_s):
            if isinstance(msg, codec.Sample) and (
                last_counter < 0 or 0 < (msg.counter - last_counter) % 2**32 < 2**31
            ):
                newest = msg.counter  # RFC 1982 serial-number order, as the board's
            if newest is not None and b"\x00" not in self._pending and not self.serial.in_waiting:
                break  # nothing more has arrived: this is the newest sample
        if newest is None:
            return None
        self.command_now(seq, newest, dac_counts)
        # Wait (as long again at most) for a sample taken with it in force, so that a STOP
        # sent next cannot overtake it at the board.
        with contextlib.suppress(BoardError):
            for _seq, msg in self._frames(time.monotonic() + timeout_s):
                if isinstance(msg, codec.Sample) and msg.cmd_seq == seq % 0x10000:
                    break
        return newest

    def take_unread(self) -> bytes:
        """Bytes read while waiting for a reply but not yet used (e.g. the first sample)."""
        data, self._pending = self._pending, b""
        return data

    def stop(self) -> codec.Status | None:
        """Stop the board; returns its final status, or None if it did not answer."""
        try:
            return self.request(codec.Stop(), codec.Status, timeout_s=1.0)
        except BoardError:
            return None

    def status(self) -> codec.Status | None:
        try:
            return self.request(codec.GetStatus(), codec.Status, timeout_s=2.0, tries=4)
        except BoardError:
            return None

    def close(self) -> None:
        with contextlib.suppress(serial.SerialException, OSError):
            self.serial.close()
