"""The compiled loops load from numba's on-disk cache in a new process.

A run's loop process is new every time; compiling its kernels takes seconds, so the
engine relies on ``cache=True`` (``clampcore.jit.kernel``). Arrays travel in NamedTuple
bundles (``ProgramArrays``, ``LinkArrays``, ``LoopShared``, ...), whose types must be
picklable for the cache index. Two fresh processes call every entry point the engine,
the offline simulation and the link simulation use; the second must find each one in
the cache: numba's ``Dispatcher.stats`` counts the signatures it loaded
(``cache_hits``) and those it had to compile (``cache_misses``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

_CHILD = r"""
import json

import numpy as np

from clampcore import hostloop, lawloop, linksim, offline, step
from clampcore.calibration import DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, conversion_array
from clampcore.program import build_program
from clampcore.shared import CTRL_STOP, RingLayout, SharedRun

EXP = {
    "loop": {"rate_hz": 10000.0, "max_current_pA": 500.0},
    "element": [
        {"kind": "leak", "name": "extra", "g_nS": 4.0, "e_mV": -60.0},
        {"kind": "synapse", "name": "fb", "source": "cell", "delay_ms": 3.0, "g_max_nS": 1.0},
    ],
}
offline.simulate(EXP, 0.01, mode="current")  # closed_loop
linksim.run(EXP, 0.01, mode="law", lead_ms=1.0)  # link_loop
program = build_program(EXP)
step.step(-65.0, 0, program.arrays())
conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, program.experiment.amplifier)
shared = SharedRun.create(RingLayout.for_program(program))
try:
    shared.ctrl[CTRL_STOP] = 1  # every loop returns at once
    sh = shared.loop(np.zeros(0, dtype=np.int64))
    pa = program.arrays()
    link = hostloop.new_link(conv)
    hostloop.process_rx(0, link, pa, sh)
    hostloop.fd_loop(hostloop.PortRun(-1, 0.0, 0, 0), link, pa, sh)
    law = lawloop.new_law_link(5, False, len(program.names), 0, conv)
    lawloop.top_up_laws(law, 0, pa, sh)
    lawloop.process_rx_law(0, law, pa, sh)
    lawloop.law_fd_loop(hostloop.PortRun(-1, 0.0, 0, 0), law, pa, sh)
finally:
    shared.close()
kernels = {
    "step": step.step,
    "closed_loop": offline.closed_loop,
    "link_loop": linksim.link_loop,
    "process_rx": hostloop.process_rx,
    "fd_loop": hostloop.fd_loop,
    "top_up_laws": lawloop.top_up_laws,
    "process_rx_law": lawloop.process_rx_law,
    "law_fd_loop": lawloop.law_fd_loop,
}
print(json.dumps({
    name: [sum(k.stats.cache_hits.values()), sum(k.stats.cache_misses.values())]
    for name, k in kernels.items()
}))
"""


def _child_stats() -> dict[str, list[int]]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    cmd = [sys.executable, "-c", _CHILD]
    out = subprocess.check_output(cmd, cwd=ROOT, env=env, text=True, timeout=900)
    return json.loads(out.strip().splitlines()[-1])


@pytest.mark.skipif(
    os.environ.get("NUMBA_DISABLE_JIT") == "1", reason="nothing is compiled or cached"
)
def test_main_kernels_load_from_the_cache_in_a_new_process():
    first = _child_stats()  # compiles what the cache does not hold yet
    assert set(first) == {
        "step",
        "closed_loop",
        "link_loop",
        "process_rx",
        "fd_loop",
        "top_up_laws",
        "process_rx_law",
        "law_fd_loop",
    }
    second = _child_stats()
    for name, (hits, misses) in second.items():
        assert misses == 0, f"{name}: compiled again in a new process ({second})"
        assert hits >= 1, f"{name}: not loaded from the cache ({second})"
