"""Shared test helpers.

``require_brian2()`` imports brian2 for the cross-checks marked ``reference``:
where brian2 is missing (or cannot be imported) the test is skipped with the
reason, unless ``CLAMPCORE_REQUIRE_BRIAN2=1`` is set (``tasks.py test`` sets it
in the reference environment), in which case the test fails instead.
The ``brian2`` fixture does the same for a test that takes it as an argument.
The ``in_thread`` fixture runs a function in a fresh thread and returns its result
(scheduling settings are per thread; the probe must not change the test's own).

The C and C++ tool chain is a prerequisite (README, Quick start), not an option: at the
start of every session ``pytest_sessionstart`` checks for a C compiler, AddressSanitizer
and UBSan working with it, a C++ compiler and ``nm``, and stops the run with a message
naming what to install when one is missing, instead of letting about a hundred tests skip.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import threading
from collections.abc import Callable
from types import ModuleType
from typing import Any

import pytest


def missing_prerequisites() -> list[str]:
    """What the C tests need and this machine lacks, each with what to install."""
    from clampcore.firmware_protocol.cboard import find_c_compiler, sanitizers_work

    missing = []
    if find_c_compiler() is None:
        missing.append(
            "a C compiler: install gcc or clang (Debian/Ubuntu: apt install gcc), or set CC"
        )
    else:
        with tempfile.TemporaryDirectory(prefix="clampcore-probe-") as tmp:
            if not sanitizers_work(tmp):
                missing.append(
                    "AddressSanitizer and UBSan for the C compiler (the C fuzz test runs under "
                    "them): install the compiler's runtime libraries (Debian/Ubuntu: apt install "
                    "gcc, which brings libasan and libubsan), or set CC to a compiler that has them"
                )
    if not any(shutil.which(c) for c in ("c++", "g++", "clang++")):
        missing.append("a C++ compiler (the header's C++ check): install g++ or clang++")
    if shutil.which("nm") is None:
        missing.append("nm (symbol checks of the C core): install binutils")
    return missing


def pytest_sessionstart(session: pytest.Session) -> None:
    missing = missing_prerequisites()
    if missing:
        pytest.exit(
            "clampcore's tests need tools this machine lacks:\n  - "
            + "\n  - ".join(missing)
            + "\n(README, Quick start: Python 3.11+ and a C compiler)",
            returncode=4,
        )


def require_brian2() -> ModuleType:
    """The brian2 module, or skip (fail under CLAMPCORE_REQUIRE_BRIAN2=1) when unusable."""
    try:
        import brian2
    except Exception as exc:  # ImportError, or brian2 failing on an unsupported numpy
        reason = (
            f"brian2 is not usable here ({type(exc).__name__}: {exc}); the reference "
            "cross-checks run in .venv-reference (python3 tasks.py test)"
        )
        if os.environ.get("CLAMPCORE_REQUIRE_BRIAN2") == "1":
            pytest.fail(f"CLAMPCORE_REQUIRE_BRIAN2=1 but {reason}", pytrace=False)
        pytest.skip(reason)
    return brian2


@pytest.fixture(scope="session")
def brian2() -> ModuleType:
    """brian2 set to its numpy code-generation target (no compiler needed)."""
    module = require_brian2()
    module.prefs.codegen.target = "numpy"
    return module


@pytest.fixture
def in_thread() -> Callable[[Callable[[], Any]], Any]:
    """Run ``fn()`` in a fresh thread that then ends; return what it returned."""

    def run(fn: Callable[[], Any]) -> Any:
        box: dict[str, Any] = {}
        thread = threading.Thread(target=lambda: box.setdefault("result", fn()))
        thread.start()
        thread.join()
        return box["result"]

    return run
