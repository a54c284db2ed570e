#!/usr/bin/env python3
"""Set up the project's environments and run its two everyday jobs.

    python3 tasks.py demo     # install, then run an example on the simulated rig
    python3 tasks.py test     # install, then lint and run every test
    python3 tasks.py mutants  # install, then apply each deliberate bug of tests/mutants.py
                              # and run the tests that must catch it (slow; not CI)

Only the standard library is used here, so this works on a fresh machine that
has Python 3.11+ and a C compiler.  Two virtual environments are made beside
this file: ``.venv`` (the project with its gui and test extras) and
``.venv-reference`` (the same plus brian2, which currently needs numpy < 2.4 and
so cannot share the main environment).  Installs are skipped when the
project's ``pyproject.toml`` has not changed since the last successful install.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent
MAIN_ENV = ROOT / ".venv"
REFERENCE_ENV = ROOT / ".venv-reference"


def _python(env: Path) -> Path:
    return env / "bin" / "python"


def _run(cmd: list[str | os.PathLike[str]], **kwargs: object) -> None:
    print("+", " ".join(str(c) for c in cmd), flush=True)
    subprocess.run([str(c) for c in cmd], check=True, cwd=ROOT, **kwargs)  # type: ignore[call-overload]


def _ensure_env(env: Path, extras: str) -> None:
    """Create ``env`` and install the project with ``extras`` unless it is current."""
    stamp = env / ".clampcore-installed"
    digest = hashlib.sha256((ROOT / "pyproject.toml").read_bytes() + extras.encode()).hexdigest()
    if stamp.exists() and stamp.read_text() == digest:
        return
    if not _python(env).exists():
        _run([sys.executable, "-m", "venv", env])
    _run([_python(env), "-m", "pip", "install", "--quiet", "--upgrade", "pip"])
    _run([_python(env), "-m", "pip", "install", "--quiet", "-e", f".[{extras}]"])
    stamp.write_text(digest)


def _env_vars(env: Path) -> dict[str, str]:
    out = dict(os.environ)
    out["NUMBA_CACHE_DIR"] = str(env / "numba-cache")
    out["QT_QPA_PLATFORM"] = "offscreen"
    out["PATH"] = f"{env / 'bin'}{os.pathsep}{out.get('PATH', '')}"
    return out


def demo() -> None:
    _ensure_env(MAIN_ENV, "gui,demo")
    _run(
        [_python(MAIN_ENV), "-m", "clampcore", "demo"],
        env=_env_vars(MAIN_ENV),
    )


def test() -> None:
    _ensure_env(MAIN_ENV, "gui,test")
    env = _env_vars(MAIN_ENV)
    if os.environ.get("CI"):
        # The numba cache does not notice edits in other modules: CI starts clean.
        subprocess.run(["rm", "-rf", env["NUMBA_CACHE_DIR"]], check=True)
    _run([_python(MAIN_ENV), "-m", "ruff", "check", "."], env=env)
    _run([_python(MAIN_ENV), "-m", "ruff", "format", "--check", "."], env=env)
    _run([_python(MAIN_ENV), "-m", "pytest", "-q", "-m", "not reference"], env=env)
    # The brian2 cross-checks run in their own environment (numpy < 2.4 there).
    _ensure_env(REFERENCE_ENV, "test,reference")
    ref_env = _env_vars(REFERENCE_ENV)
    if os.environ.get("CI"):
        subprocess.run(["rm", "-rf", ref_env["NUMBA_CACHE_DIR"]], check=True)
    ref_env["CLAMPCORE_REQUIRE_BRIAN2"] = "1"  # a missing brian2 fails instead of skipping
    # pytest-qt (from the test extra) refuses to load without PySide6, which this env lacks.
    _run(
        [_python(REFERENCE_ENV), "-m", "pytest", "-q", "-p", "no:pytest-qt", "-m", "reference"],
        env=ref_env,
    )


def mutants(extra: list[str]) -> None:
    """Mutation check of the safety paths (tests/mutants.py; options after the job name)."""
    _ensure_env(MAIN_ENV, "gui,test")
    _ensure_env(REFERENCE_ENV, "test,reference")  # one mutant is caught by the brian2 tests
    env = _env_vars(MAIN_ENV)
    env.pop("NUMBA_CACHE_DIR")  # the runner gives every mutant a fresh cache of its own
    reference = ["--reference-python", str(_python(REFERENCE_ENV))]
    _run([_python(MAIN_ENV), ROOT / "tests" / "mutants.py", *reference, *extra], env=env)


def main() -> None:
    jobs = {"demo": demo, "test": test, "mutants": mutants}
    if len(sys.argv) < 2 or sys.argv[1] not in jobs or (sys.argv[1] != "mutants" and sys.argv[2:]):
        sys.exit(f"usage: python3 {Path(__file__).name} {{{'|'.join(jobs)}}}")
    try:
        if sys.argv[1] == "mutants":
            mutants(sys.argv[2:])
        else:
            jobs[sys.argv[1]]()
    except subprocess.CalledProcessError as exc:
        sys.exit(exc.returncode or 1)


if __name__ == "__main__":
    main()
