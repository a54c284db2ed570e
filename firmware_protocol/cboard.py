"""Build and start the C parts of the protocol from Python (tests, benchmarks, the rig).

Public names:

* ``C_SOURCE_DIR`` - where ``ccb.h``, ``ccb_core.c`` and ``ports/`` live.
* ``STRICT_FLAGS`` - the warning flags every C file must pass.
* ``LAW_FLAGS`` - the extra flag ``ccb_law.c`` needs (no fused multiply-add).
* ``CompilerMissingError`` - raised when no C compiler is found.
* ``find_c_compiler() -> str | None`` - ``$CC``, ``cc``, ``gcc`` or ``clang``.
* ``sanitizers_work(tmpdir) -> bool`` - whether ASan/UBSan binaries build and run here.
* ``BUILD_VARIANTS`` - the compile-time options (``-D...``) of ccb.h a board may choose.
* ``build_core_library(tmpdir, defines=()) -> Path`` - shared library of the core plus the in-memory
  port (``ports/memory_port.c``) for ctypes (see ``firmware_protocol.cbinding``).
* ``build_law_library(tmpdir, opt="-O2", extra=()) -> Path`` - shared library of the board's
  per-sample arithmetic (``ccb_law.c``) for ctypes (see ``firmware_protocol.claw``).
* ``build_rig_library(out) -> Path`` - the core, the in-memory port and ``ports/rig_port.c``
  for the simulated rig (``simulated_rig.ccore`` caches it); ``rig_library_sources()``,
  ``RIG_FLAGS``.
* ``build_fuzz_binary(tmpdir, sanitize) -> Path`` - the C fuzz driver (``ports/fuzz_main.c``).
* ``build_pty_board(tmpdir, defines=()) -> Path`` - the pseudo-terminal board
  (``ports/pty_board.c``).
* ``PtyBoard`` / ``start_pty_board(binary, *options) -> PtyBoard`` - run it; the
  object gives the slave path and stops the process (also as a context manager).
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
from pathlib import Path

C_SOURCE_DIR = Path(__file__).resolve().parent / "c"
STRICT_FLAGS = ("-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic")
_OPT = ("-O2",)
# ccb_law.c rounds once per operation, as the host's numba mirror does: a fused
# multiply-add would round once where the mirror rounds twice (PROTOCOL.md §10.3).
LAW_FLAGS = ("-ffp-contract=off",)
_LIBS = ("-lm",)  # floorf


class CompilerMissingError(RuntimeError):
    """No C compiler on this machine."""


def find_c_compiler() -> str | None:
    """Path of a C compiler: $CC if set, else cc, gcc or clang on PATH; None if none."""
    env_cc = os.environ.get("CC")
    candidates = [env_cc] if env_cc else []
    candidates += ["cc", "gcc", "clang"]
    for name in candidates:
        found = shutil.which(name)
        if found:
            return found
    return None


def _compile(args: list[str], what: str) -> None:
    cc = find_c_compiler()
    if cc is None:
        raise CompilerMissingError(
            f"building {what} needs a C compiler and none was found "
            "(tried $CC, cc, gcc, clang: install one, e.g. gcc, or set CC)"
        )
    proc = subprocess.run([cc, *args], capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        raise RuntimeError(f"compiling {what} failed:\n{' '.join(args)}\n{proc.stderr}")


def _core_sources() -> list[str]:
    return [str(C_SOURCE_DIR / "ccb_core.c"), str(C_SOURCE_DIR / "ccb_law.c")]


# The build variants a board may choose (ccb.h): the default, the CRC bit by bit instead
# of with a table, small receive and channel buffers, law mode left out (a board that only
# converts), the smallest law mode, and law mode with 8 samples to a SAMPLES frame.
BUILD_VARIANTS: dict[str, tuple[str, ...]] = {
    "default": (),
    "crc-bitwise": ("-DCCB_CRC_BITWISE",),
    "small-buffers": ("-DCCB_RX_MAX_PAYLOAD=64", "-DCCB_MAX_INPUTS=4"),
    "no-law": ("-DCCB_LAW_QUEUE=0",),
    "small-law": ("-DCCB_LAW_QUEUE=8", "-DCCB_BLOCK_POINTS=2"),
    "batched": ("-DCCB_SAMPLES_PER_FRAME=8",),
}


def _suffix(defines: tuple[str, ...]) -> str:
    return "".join(d.replace("-D", "_").replace("=", "") for d in defines)


def build_core_library(tmpdir: str | os.PathLike[str], defines: tuple[str, ...] = ()) -> Path:
    """Compile the core and the in-memory port into ``tmpdir/libccb_mem*.so`` (with
    ``defines``, e.g. a ``BUILD_VARIANTS`` entry such as ``("-DCCB_LAW_QUEUE=16",)``)."""
    out = Path(tmpdir) / f"libccb_mem{_suffix(defines)}.so"
    srcs = [*_core_sources(), str(C_SOURCE_DIR / "ports" / "memory_port.c")]
    flags = [*STRICT_FLAGS, *LAW_FLAGS, *_OPT, *defines]
    args = [*flags, "-fPIC", "-shared", *srcs, "-o", str(out), *_LIBS]
    _compile(args, "libccb_mem")
    return out


def rig_library_sources() -> list[Path]:
    """Every file the rig's library is built from (its cache key hashes them)."""
    ports = C_SOURCE_DIR / "ports"
    names = ("memory_port.h", "memory_port.c", "rig_port.h", "rig_port.c")
    return [C_SOURCE_DIR / "ccb.h", C_SOURCE_DIR / "ccb_law.h", *map(Path, _core_sources())] + [
        ports / n for n in names
    ]


# Only rig_port.h's CCB_RIG_API functions leave the library: another build of the core in
# the same process (a test's libccb_mem) then cannot bind to this one's symbols or it to them.
RIG_FLAGS = (*STRICT_FLAGS, *LAW_FLAGS, *_OPT, "-fPIC", "-shared", "-fvisibility=hidden")


def build_rig_library(out: str | os.PathLike[str]) -> Path:
    """Compile the core, the in-memory port and the rig's entry points
    (``ports/rig_port.c``) into the shared library ``out``."""
    srcs = [str(p) for p in rig_library_sources() if p.suffix == ".c"]
    _compile([*RIG_FLAGS, *srcs, "-o", str(out), *_LIBS], "the simulated rig's board core")
    return Path(out)


def build_law_library(
    tmpdir: str | os.PathLike[str], opt: str = "-O2", extra: tuple[str, ...] = ()
) -> Path:
    """Compile ``ccb_law.c`` into a shared library in ``tmpdir`` and return its path.

    ``opt`` is the optimisation level (-O0, -O2, -Os ...), ``extra`` more flags (e.g.
    ``-march=native``, which offers fused multiply-add where the machine has it).
    """
    out = Path(tmpdir) / f"libccb_law{opt}{''.join(extra)}.so"
    src = str(C_SOURCE_DIR / "ccb_law.c")
    args = [*STRICT_FLAGS, opt, *extra, *LAW_FLAGS, "-fPIC", "-shared", src, "-o", str(out)]
    args += _LIBS
    _compile(args, "libccb_law")
    return out


_SANITIZE = ("-fsanitize=address,undefined", "-fno-sanitize-recover=all", "-g")


def sanitizers_work(tmpdir: str | os.PathLike[str]) -> bool:
    """True when this compiler builds and runs an AddressSanitizer/UBSan program here."""
    src = Path(tmpdir) / "asan_probe.c"
    exe = Path(tmpdir) / "asan_probe"
    src.write_text("int main(void) { return 0; }\n")
    try:
        _compile([*_SANITIZE, str(src), "-o", str(exe)], "asan probe")
    except (RuntimeError, CompilerMissingError):
        return False
    env = dict(os.environ, ASAN_OPTIONS="detect_leaks=0")
    return subprocess.run([str(exe)], env=env, check=False).returncode == 0


def build_fuzz_binary(tmpdir: str | os.PathLike[str], sanitize: bool) -> Path:
    """Compile ``ports/fuzz_main.c`` with the core (and ASan/UBSan when ``sanitize``)."""
    out = Path(tmpdir) / ("ccb_fuzz_asan" if sanitize else "ccb_fuzz")
    srcs = [
        *_core_sources(),
        str(C_SOURCE_DIR / "ports" / "memory_port.c"),
        str(C_SOURCE_DIR / "ports" / "fuzz_main.c"),
    ]
    extra = _SANITIZE if sanitize else ()
    _compile([*STRICT_FLAGS, *LAW_FLAGS, *_OPT, *extra, *srcs, "-o", str(out), *_LIBS], "ccb_fuzz")
    return out


def build_pty_board(tmpdir: str | os.PathLike[str], defines: tuple[str, ...] = ()) -> Path:
    """Compile the pseudo-terminal board (``ports/pty_board.c``) to ``tmpdir/pty_board*``.

    ``defines``: build options for the core, e.g. ``BUILD_VARIANTS["no-law"]`` (a board
    without law mode, which ignores the law messages as a version-1 board does).
    """
    out = Path(tmpdir) / f"pty_board{_suffix(defines)}"
    srcs = [*_core_sources(), str(C_SOURCE_DIR / "ports" / "pty_board.c")]
    flags = [*STRICT_FLAGS, *LAW_FLAGS, *_OPT, *defines]
    _compile([*flags, *srcs, "-o", str(out), *_LIBS], "pty_board")
    return out


class PtyBoard:
    """A running ``pty_board`` process; ``slave_path`` is the serial port to open."""

    def __init__(self, proc: subprocess.Popen[bytes], slave_path: str) -> None:
        self.proc = proc
        self.slave_path = slave_path

    def stop(self, timeout_s: float = 5.0) -> int:
        """SIGTERM, wait, and return the exit code (kills after timeout_s)."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        for stream in (self.proc.stdin, self.proc.stdout):
            if stream is not None:
                stream.close()
        return self.proc.returncode

    def __enter__(self) -> PtyBoard:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


def start_pty_board(binary: str | os.PathLike[str], *options: str) -> PtyBoard:
    """Start the pty board with command-line ``options`` and read its slave path.

    stdin is a pipe: the board also stops when it closes (see ``pty_board --help``).
    """
    proc = subprocess.Popen(
        [str(binary), *options],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
    )
    assert proc.stdout is not None
    line = proc.stdout.readline().decode("ascii", "replace").strip()
    if not line.startswith("/"):
        proc.kill()
        proc.wait()
        raise RuntimeError(f"pty_board did not print a slave path (got {line!r})")
    return PtyBoard(proc, line)
