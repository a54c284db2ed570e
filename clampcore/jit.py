"""The one decorator for per-sample kernels.

``kernel`` is ``numba.njit(cache=True, nogil=True)`` without numba's reference
counting (``_nrt=False``). Per-sample kernels never allocate, so they do not
need it, and it is what a call costs: on these machines every array argument
costs an atomic increment and decrement per call, 15 ns for a three-argument
kernel and ~140 ns for an empty ``step`` with its eleven arrays, against under
1 ns without (measured here with bench/bench_engine.py's loop). ``_nrt`` is an
option of numba's CPU target (numba 0.60-0.68); a kernel that allocated would
fail to compile with it, so misuse cannot pass silently.

Under ``NUMBA_DISABLE_JIT=1`` the kernels are the same functions as plain Python.

Public names: ``kernel``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar

from numba import njit

F = TypeVar("F", bound=Callable[..., Any])


def kernel(fn: F) -> F:
    """Compile ``fn`` as a per-sample kernel (cached, no GIL, no reference counting).

    Should a numba release drop the ``_nrt`` option, the kernel still compiles, with
    reference counting (slower, same results).
    """
    try:
        return njit(cache=True, nogil=True, _nrt=False)(fn)  # type: ignore[return-value]
    except (KeyError, TypeError, ValueError):  # numba refuses an option it does not know
        return njit(cache=True, nogil=True)(fn)  # type: ignore[return-value]
