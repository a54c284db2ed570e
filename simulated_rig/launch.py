"""Start the simulated rig in a child process, for tests, benchmarks and ``--port sim``.

    with start_rig("examples/imposed_lif.toml", clock="lockstep", log=tmp / "rig.log") as rig:
        ser = serial.Serial(rig.path)   # the pseudo-terminal the rig serves
        ...
    # leaving the block sends SIGTERM and waits

The child is ``python -m simulated_rig``; its standard input is a pipe held by
this process, so the rig also ends if this process dies.

Public names: ``start_rig``, ``RigProcess``, ``RigStartError``.
"""

from __future__ import annotations

import os
import select
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from types import TracebackType

# Starting includes importing numba and loading (or, the first time, compiling) the
# compiled path: allow for a first compile on a slow machine (measured ~30 s here).
_START_TIMEOUT_S = 180.0
_STOP_TIMEOUT_S = 10.0


class RigStartError(RuntimeError):
    """The rig did not start (its standard error is in the message)."""


class RigProcess:
    """A running ``python -m simulated_rig`` child: ``.path`` is its device path."""

    def __init__(self, proc: subprocess.Popen[bytes], path: str, stderr_file: object) -> None:
        self.proc = proc
        self.path = path
        self._stderr_file = stderr_file

    @property
    def pid(self) -> int:
        return self.proc.pid

    def alive(self) -> bool:
        return self.proc.poll() is None

    def stop(self, timeout_s: float = _STOP_TIMEOUT_S) -> int:
        """SIGTERM, wait (SIGKILL after ``timeout_s``); returns the exit code."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self._close()
        return int(self.proc.returncode)

    def kill(self) -> int:
        """SIGKILL (a crash: nothing is flushed by the rig); returns the exit code."""
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        self._close()
        return int(self.proc.returncode)

    def stderr_text(self) -> str:
        """What the rig wrote to standard error so far."""
        f = self._stderr_file
        f.flush()  # type: ignore[attr-defined]
        f.seek(0)  # type: ignore[attr-defined]
        return f.read().decode(errors="replace")  # type: ignore[attr-defined]

    def _close(self) -> None:
        for stream in (self.proc.stdin, self.proc.stdout):
            if stream is not None and not stream.closed:
                stream.close()

    def __enter__(self) -> RigProcess:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()


def start_rig(
    experiment_path: str | os.PathLike[str] | None = None,
    clock: str = "lockstep",
    rate_hz: int | None = None,
    log: str | os.PathLike[str] | None = None,
    seed: int = 0,
    *,
    corrupt_rx: float = 0.0,
    drop_rx: float = 0.0,
    corrupt_tx: float = 0.0,
    drop_tx: float = 0.0,
    stall_ms: int = 0,
    stall_at: int = 0,
    lockstep_patience_s: float | None = None,
    wake_us: int | None = None,
    realtime_priority: int | None = None,
    link: str | None = None,
    env: dict[str, str] | None = None,
    timeout_s: float = _START_TIMEOUT_S,
) -> RigProcess:
    """Start ``python -m simulated_rig`` and return once it has printed its device path.

    ``rate_hz`` is the highest rate the rig accepts (default 50 kHz); the rate itself
    comes from the host's CONFIGURE.  The fault options, ``lockstep_patience_s``,
    ``wake_us``, ``realtime_priority`` and ``link`` are those of the command line
    (``--lockstep-patience``, ``--wake-us``, ``--realtime``, ``--link``; None: its default).
    Raises ``RigStartError`` with the rig's error output if it exits or stays silent.
    """
    cmd = [sys.executable, "-m", "clampcore.simulated_rig"]
    if experiment_path is not None:
        cmd.append(os.fspath(experiment_path))
    cmd += ["--clock", clock, "--seed", str(seed)]
    if rate_hz is not None:
        cmd += ["--rate", str(rate_hz)]
    if log is not None:
        cmd += ["--log", os.fspath(log)]
    if lockstep_patience_s is not None:
        cmd += ["--lockstep-patience", repr(float(lockstep_patience_s))]
    if wake_us is not None:
        cmd += ["--wake-us", str(wake_us)]
    if realtime_priority is not None:
        cmd += ["--realtime", str(realtime_priority)]
    if link is not None:
        cmd += ["--link", link]
    for name, value in (
        ("--corrupt-rx", corrupt_rx),
        ("--drop-rx", drop_rx),
        ("--corrupt-tx", corrupt_tx),
        ("--drop-tx", drop_tx),
        ("--stall-ms", stall_ms),
        ("--stall-at", stall_at),
    ):
        if value:
            cmd += [name, repr(value)]
    stderr_file = tempfile.TemporaryFile()  # noqa: SIM115 (lives as long as the child)
    root = str(Path(__file__).resolve().parent.parent)
    child_env = dict(os.environ if env is None else env)
    child_env["PYTHONPATH"] = root + os.pathsep + child_env.get("PYTHONPATH", "")
    proc = subprocess.Popen(
        cmd,
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=stderr_file,
        env=child_env,
        # Its own session: a Ctrl-C at the terminal reaches the host, which stops the run
        # (0 pA, STOP) and then the rig; the rig must not vanish first. It still ends with
        # its parent, when its standard input closes.
        start_new_session=True,
    )
    rig = RigProcess(proc, "", stderr_file)
    assert proc.stdout is not None
    line = b""
    deadline = time.monotonic() + timeout_s
    while not line.endswith(b"\n"):
        left = deadline - time.monotonic()
        if proc.poll() is not None or left <= 0:
            rig.kill()
            why = "exited" if left > 0 else f"printed no device path within {timeout_s:g} s"
            raise RigStartError(f"simulated rig {why}: {' '.join(cmd)}\n{rig.stderr_text()}")
        ready, _, _ = select.select([proc.stdout], [], [], min(left, 0.5))
        if ready:
            byte = os.read(proc.stdout.fileno(), 1)
            if not byte:
                continue  # EOF: the poll above sees the exit
            line += byte
    rig.path = line.decode().strip()
    return rig
