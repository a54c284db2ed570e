"""Deliberate bugs in the safety paths, and the tests that must catch each one.

    python3 tasks.py mutants                 # all of them (about 25 min on 2 shared cores)
    .venv/bin/python tests/mutants.py --list # what would be applied, and whether it still can be
    .venv/bin/python tests/mutants.py --only teardown,crc

Each mutant is one small edit located by an exact piece of code (never a line number),
so the list survives restructuring: a piece that no longer occurs exactly once is
reported as "pattern not found" (or "pattern ambiguous"), never skipped. One at a time,
in a temporary copy of the repository, the edit is applied and only the tests named for
it run, compiled, with a fresh numba cache (the cache does not notice edits in other
modules). A mutant is *caught* when a test fails; it *survived* when they all pass.
Before the mutants, the same tests run once on the unchanged copy: they must pass.

Standard library only (``tasks.py`` imports nothing else); run it with the project's
environment, which has pytest. Tests marked ``reference`` (brian2) run in
``.venv-reference`` (``--reference-python`` to point elsewhere). Not part of CI: too slow.

Every test module must be named as the catcher of at least one mutant: the script lists
those that are not (and, after a run of all mutants, those whose tests caught none) and
then exits non-zero.

Public names: ``Mutant``, ``MUTANTS``, ``suite_modules``, ``modules_without_mutant``, ``main``.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
_TIMEOUT_S = 1800  # one mutant's tests; a hang counts as "timeout", not as caught


@dataclass(frozen=True)
class Mutant:
    name: str  # short key (--only)
    what: str  # the bug, in words
    path: str  # file, relative to the repository root
    find: str  # exact code that must occur exactly once
    replace: str
    tests: tuple[str, ...]  # pytest node ids or files that must catch it
    reference: bool = False  # the tests run in the brian2 reference environment


E2E = "tests/test_loop_e2e.py"
MUTANTS: tuple[Mutant, ...] = (
    # ---- the output guard, the watchdog, the teardown (the cell's safety)
    Mutant(
        "current-limit",
        "current limit twice as high as set",
        "clampcore/step.py",
        "    if abs(total) > limit:",
        "    if abs(total) > 2.0 * limit:",
        ("tests/test_elements.py",),
    ),
    # ---- law mode (PROTOCOL.md §10): what the board must do at once
    Mutant(
        "law-lifetime",
        "the board holds a law twice its lifetime before 0 pA",
        "firmware_protocol/boardlaw.py",
        "k - bs[BS_LAW_SAMPLE] > bi[BI_LIFETIME]",
        "k - bs[BS_LAW_SAMPLE] > 2 * bi[BI_LIFETIME]",
        ("tests/test_boardlaw.py", "tests/test_linksim.py"),
    ),
    Mutant(
        "law-lifetime-c",
        "the C board holds a law one sample past its lifetime",
        "firmware_protocol/c/ccb_law.c",
        "k - s->law_sample > (int64_t)p->lifetime",
        "k - s->law_sample > (int64_t)p->lifetime + 1",
        ("tests/test_boardlaw.py",),
    ),
    Mutant(
        "law-limit",
        "the board's lower current limit not applied",
        "firmware_protocol/boardlaw.py",
        "            if x < bf[BF_LIMIT_LO]:",
        "            if False:",
        ("tests/test_boardlaw.py",),
    ),
    Mutant(
        "law-teardown-zero",
        "law mode: no zero request before STOP",
        "clampcore/engine.py",
        "session.zero = lambda: link.zero_now(confirm_s=_ZERO_CONFIRM_S)",
        "session.zero = lambda: None",
        ("tests/test_lawloop.py::test_zero_request_acts_at_once_and_teardown_leaves_zero",),
    ),
    Mutant(
        "law-due-sample",
        "the board (C core, also the rig's) never puts a queued law in force",
        "firmware_protocol/c/ccb_core.c",
        "(L->queued[slot >> 3] & bit) && L->due[slot] == b->counter)",
        "(L->queued[slot >> 3] & bit) && L->due[slot] == b->counter && L->k < 0)",
        (
            "tests/test_lawloop.py::test_lockstep_law_mode_equals_the_ideal_clamp",
            "tests/test_c_core_law.py",
        ),
    ),
    Mutant(
        "non-finite-guard",
        "a non-finite current is passed on instead of 0 pA",
        "clampcore/step.py",
        "    if not math.isfinite(total):",
        "    if False:",
        ("tests/test_elements.py", "tests/test_hostloop.py"),
    ),
    Mutant(
        "implausible-v",
        "implausible membrane potential (|V| > 200 mV) not flagged",
        "clampcore/step.py",
        "abs(v_mV) > loop_p[LP_V_FAULT_MV]",
        "abs(v_mV) > 10.0 * loop_p[LP_V_FAULT_MV]",
        ("tests/test_elements.py",),
    ),
    Mutant(
        "rig-lockstep-give-up",
        "the lockstep rig never lets the board's watchdog trip for a silent host",
        "simulated_rig/board.py",
        '        r["clock_base_us"] = clock_us + ahead',
        '        r["clock_base_us"] = clock_us',
        ("tests/test_rig.py::test_sigkill_of_the_host_hands_over_to_the_watchdog",),
    ),
    Mutant(
        "c-watchdog",
        "C core's watchdog twice too slow",
        "firmware_protocol/c/ccb_core.c",
        "(uint32_t)(now - b->last_rx_us) >= b->watchdog_us",
        "(uint32_t)(now - b->last_rx_us) >= 2u * b->watchdog_us",
        (
            "tests/test_c_core.py",
            "tests/test_rig.py::test_watchdog_on_the_wall_clock_trips_reports_and_recovers",
        ),
    ),
    Mutant(
        "teardown-zero",
        "the host's 0 pA command before STOP deleted",
        "clampcore/engine.py",
        "link.command_after(",
        "(lambda *args, **kwargs: None)(",
        (f"{E2E}::test_the_output_is_0_pA_by_the_hosts_command_before_stop",),
    ),
    Mutant(
        "teardown-stale",
        "the 0 pA command before STOP answers the sample already answered (rejected)",
        "clampcore/board_link.py",
        "        self.command_now(seq, newest, dac_counts)",
        "        self.command_now(seq, last_counter, dac_counts)",
        (f"{E2E}::test_the_output_is_0_pA_by_the_hosts_command_before_stop",),
    ),
    Mutant(
        "zero-control",
        "the zero-current control does nothing",
        "clampcore/engine.py",
        "self.shared.ctrl[CTRL_ZERO] = 1 if on else 0",
        "self.shared.ctrl[CTRL_ZERO] = 0",
        ("tests/test_gui.py::test_zero_current_control",),
    ),
    # ---- refusals before a start
    Mutant(
        "refuse-rate",
        "a rate above the board's maximum is not refused",
        "clampcore/preflight.py",
        "    if rate > hello.max_rate_hz:",
        "    if rate > 10 * hello.max_rate_hz:",
        (
            "tests/test_preflight.py::test_rate_above_the_boards_maximum_is_refused_naming_both",
            "tests/test_engine.py::test_refuses_a_rate_above_the_boards_maximum",
        ),
    ),
    Mutant(
        "refuse-calibration",
        "a run without calibration on a real port is not refused",
        "clampcore/preflight.py",
        "if not exp.amplifier_given and not simulated:",
        "if False:",
        (
            "tests/test_preflight.py::test_a_missing_calibration_is_refused_except_on_the_simulated_rig",
            f"{E2E}::test_refuses_to_start_without_calibration_on_a_real_port",
        ),
    ),
    Mutant(
        "refuse-limit",
        "a current limit the board cannot represent is not refused",
        "clampcore/preflight.py",
        '    if problem:\n        raise PreflightError(f"refusing to start: {problem}")',
        '    if False:\n        raise PreflightError(f"refusing to start: {problem}")',
        (
            "tests/test_preflight.py::test_a_current_limit_the_dac_cannot_reach_is_refused",
            f"{E2E}::test_refuses_a_limit_the_board_cannot_represent",
        ),
    ),
    Mutant(
        "refuse-lead",
        "a look-ahead beyond the board's law queue is not refused",
        "clampcore/preflight.py",
        "if law_queue is not None and lead > law_queue:",
        "if False:",
        (
            "tests/test_preflight.py::test_a_lead_beyond_the_boards_queue_is_refused_with_the_longest_it_allows",
        ),
    ),
    Mutant(
        "refuse-mg-groups",
        "more Mg-blocked groups than the board evaluates are not refused",
        "clampcore/preflight.py",
        "    if len(groups) > hello.mg_groups:",
        "    if False:",
        (
            "tests/test_preflight.py::test_more_mg_groups_than_the_board_evaluates_is_refused_naming_the_synapses",
        ),
    ),
    Mutant(
        "rules-at-ignored",
        "the C core never puts a live rule change in force",
        "firmware_protocol/c/ccb_core.c",
        "        L->params = L->next[L->next_head];",
        "        (void)L->next[L->next_head];",
        ("tests/test_c_core_law.py::test_a_rule_change_acts_from_its_sample",),
    ),
    # ---- calibration
    Mutant(
        "junction-sign",
        "liquid-junction correction added instead of subtracted on the host",
        "clampcore/calibration.py",
        "+ conv[C_VM_OFFSET] - conv[C_LJP]",
        "+ conv[C_VM_OFFSET] + conv[C_LJP]",
        ("tests/test_calibration.py",),
    ),
    Mutant(
        "vm-offset-sign",
        "membrane-potential offset subtracted instead of added on the host",
        "clampcore/calibration.py",
        "volts * conv[C_VM_SCALE] + conv[C_VM_OFFSET]",
        "volts * conv[C_VM_SCALE] - conv[C_VM_OFFSET]",
        ("tests/test_calibration.py",),
    ),
    Mutant(
        "command-offset-sign",
        "command offset added instead of subtracted on the host",
        "clampcore/calibration.py",
        "volts = (i_pA - conv[C_CMD_OFFSET]) / conv[C_CMD_SCALE]",
        "volts = (i_pA + conv[C_CMD_OFFSET]) / conv[C_CMD_SCALE]",
        ("tests/test_calibration.py",),
    ),
    Mutant(
        "rounding",
        "counts rounded half to even instead of floor(x + 1/2)",
        "clampcore/calibration.py",
        "c = math.floor(x + 0.5)",
        "c = round(x)",
        ("tests/test_calibration.py",),
    ),
    # ---- CRC and COBS, both codecs, every C build
    Mutant(
        "py-crc",
        "Python codec's CRC polynomial 0x1012 instead of 0x1021",
        "firmware_protocol/codec.py",
        "c = ((c << 1) ^ 0x1021) if c & 0x8000 else (c << 1)",
        "c = ((c << 1) ^ 0x1012) if c & 0x8000 else (c << 1)",
        ("tests/test_protocol_vectors.py",),
    ),
    Mutant(
        "py-cobs-encode",
        "Python COBS encoder closes a block at 253 bytes instead of 254",
        "firmware_protocol/codec.py",
        "            if code == 0xFF:",
        "            if code == 0xFE:",
        ("tests/test_protocol_codec.py",),
    ),
    Mutant(
        "py-cobs-decode",
        "Python COBS decoder adds a zero after a 0xFF block",
        "firmware_protocol/codec.py",
        "        zero = 1 if code != 0xFF else 0",
        "        zero = 1",
        # Not the fuzz test: inside a frame (at most 254 bytes) a 0xFF block is always the
        # last one, so this bug only shows on longer data.
        ("tests/test_protocol_codec.py",),
    ),
    Mutant(
        "py-deframe-crc",
        "Python deframer checks only the CRC's low byte",
        "firmware_protocol/codec.py",
        "if (c & 0xFF) != dbuf[fill - 2] or (c >> 8) != dbuf[fill - 1]:",
        "if (c & 0xFF) != dbuf[fill - 2]:",
        ("tests/test_protocol_fuzz.py",),
    ),
    Mutant(
        "c-crc-table",
        "C core's CRC table: one entry wrong (default build)",
        "firmware_protocol/c/ccb_core.c",
        "0x0000u, 0x1021u, 0x2042u,",
        "0x0000u, 0x1021u, 0x2043u,",
        ("tests/test_c_core.py",),
    ),
    Mutant(
        "c-crc-bitwise",
        "C core's bit-by-bit CRC (-DCCB_CRC_BITWISE): polynomial 0x1012",
        "firmware_protocol/c/ccb_core.c",
        "(uint16_t)((crc << 1) ^ 0x1021u)",
        "(uint16_t)((crc << 1) ^ 0x1012u)",
        ("tests/test_c_core.py",),
    ),
    Mutant(
        "c-cobs-decode",
        "C core's COBS decoder adds a zero after a 0xFF block",
        "firmware_protocol/c/ccb_core.c",
        "        zero = (code != 0xFFu);",
        "        zero = 1;",
        ("tests/test_c_core.py",),
    ),
    Mutant(
        "c-small-buffer",
        "C core's small-buffer build accepts frames longer than its buffer",
        "firmware_protocol/c/ccb_core.c",
        "        if (d->fill >= CCB_RX_MAX_PAYLOAD) {\n"
        "            d->drop = CCB_FRAME_ERR_LONG;\n"
        "            return 0;\n"
        "        }\n"
        "        d->buf[d->fill++] = byte;",
        "        if (d->fill >= CCB_MAX_PAYLOAD) {\n"
        "            d->drop = CCB_FRAME_ERR_LONG;\n"
        "            return 0;\n"
        "        }\n"
        "        d->buf[d->fill++] = byte;",
        ("tests/test_c_core.py::test_the_small_buffer_build_against_the_shared_vectors",),
    ),
    Mutant(
        "c-pty-cell",
        "C pty board's cell: injected current hyperpolarises",
        "firmware_protocol/c/ports/pty_board.c",
        "double v_inf_mV = r->e_mV + r->i_pA[i] / r->g_nS;",
        "double v_inf_mV = r->e_mV - r->i_pA[i] / r->g_nS;",
        ("tests/test_c_core_pty.py",),
    ),
    Mutant(
        "rig-duplicates",
        "the board (C core, also the rig's) applies a command older than the one in force",
        "firmware_protocol/c/ccb_core.c",
        "(b->have_command && !newer(c.answers_counter, b->cmd_answers))",
        "(b->have_command && 0)",
        ("tests/test_rig.py", "tests/test_c_core.py"),
    ),
    Mutant(
        "rig-port-adc",
        "the rig's board (C core through rig_port.c) reads the cell's ADC one count high",
        "firmware_protocol/c/ports/rig_port.c",
        "    ccb_mem_set_adc(r, 0u, adc);",
        "    ccb_mem_set_adc(r, 0u, (uint16_t)(adc + 1u));",
        ("tests/test_rig.py::test_lockstep_run_equals_offline_simulation",),
    ),
    # ---- elements: signs and time constants, spike detection
    Mutant(
        "leak-sign",
        "leak current sign flipped",
        "clampcore/elements/leak.py",
        "return -p[P_G] * (v_mV - p[P_E])",
        "return p[P_G] * (v_mV - p[P_E])",
        ("tests/test_elements.py",),
    ),
    Mutant(
        "noise-tau",
        "OU noise correlation time 10% too long",
        "clampcore/elements/noise.py",
        "decay = decay_factor(s, S_DECAY, p[P_TAU], dt_ms)",
        "decay = decay_factor(s, S_DECAY, 1.1 * p[P_TAU], dt_ms)",
        ("tests/test_elements.py::test_ou_noise_correlation_time_to_within_two_percent",),
    ),
    Mutant(
        "mg-block",
        "Mg block constant 3.75 mM instead of 3.57",
        "clampcore/elements/synapse.py",
        "_MG_K_MM = 3.57",
        "_MG_K_MM = 3.75",
        ("tests/test_elements.py",),
    ),
    Mutant(
        "refractory",
        "threshold_reset clamp one sample longer than the refractory period",
        "clampcore/elements/threshold_reset.py",
        "math.ceil(p[P_REFRACTORY] / dt_ms - 1e-9)",
        "math.ceil(p[P_REFRACTORY] / dt_ms - 1e-9) + 1",
        ("tests/test_elements.py",),
    ),
    Mutant(
        "spike-rearm",
        "spike detector re-armed above threshold (one spike counted many times)",
        "clampcore/step.py",
        "    elif v_mV < threshold - loop_p[LP_SPIKE_HYSTERESIS_MV]:",
        "    elif v_mV < threshold + loop_p[LP_SPIKE_HYSTERESIS_MV]:",
        ("tests/test_elements.py",),
    ),
    Mutant(
        "adex-jump",
        "AdEx adaptation jump b halved",
        "clampcore/elements/neuron.py",
        "            w += p[P_B]",
        "            w += 0.5 * p[P_B]",
        ("tests/test_reference_brian2.py",),
        reference=True,
    ),
    Mutant(
        "hh-gna",
        "Hodgkin-Huxley sodium conductance 110 instead of 120 mS/cm2",
        "simulated_rig/cells.py",
        '"gna_mS_per_cm2": 120.0,',
        '"gna_mS_per_cm2": 110.0,',
        ("tests/test_cells.py",),
    ),
    # ---- recorder, journal, NWB, the loop's logging, the commands
    Mutant(
        "recorder-changes",
        "the recorder drops parameter changes",
        "clampcore/recorder.py",
        "            self.journal.event(self._describe(change))",
        "            pass",
        ("tests/test_engine.py::test_a_live_change_reaches_the_cell_and_the_recording",),
    ),
    Mutant(
        "change-sample",
        "a live change is logged five samples after the one it took effect at",
        "clampcore/hostloop.py",
        "applied[slot, APPLIED_SAMPLE] = sample",
        "applied[slot, APPLIED_SAMPLE] = sample + 5",
        ("tests/test_hostloop.py",),
    ),
    Mutant(
        "lost-rows",
        "the recorder does not count rows the ring overwrote",
        "clampcore/recorder.py",
        "self.lost_rows += written - self.layout.rows - start",
        "self.lost_rows += 0",
        ("tests/test_engine.py::test_recorder_counts_the_rows_the_ring_lapped",),
    ),
    Mutant(
        "journal-events",
        "the journal's flush never writes the events (parameter changes, faults)",
        "clampcore/journal.py",
        "        if self._events:\n            count = self._events.count",
        "        if False:\n            count = self._events.count",
        ("tests/test_journal.py",),
    ),
    Mutant(
        "nwb-rate",
        "NWB series written at half the sample rate",
        "clampcore/nwb.py",
        'self.common = {"rate": self.rate_hz, "starting_time"',
        'self.common = {"rate": self.rate_hz / 2, "starting_time"',
        ("tests/test_nwb.py",),
    ),
    Mutant(
        "npz-time",
        "simulate --out FILE.npz writes the time axis in ms",
        "clampcore/offline.py",
        "np.savez_compressed(path, t_s=self.t_s, **self.columns())",
        "np.savez_compressed(path, t_s=self.t_s * 1000, **self.columns())",
        ("tests/test_commands.py",),
    ),
    Mutant(
        "extra-delay",
        "extra_delay_samples ignored offline",
        "clampcore/offline.py",
        'delay = 1 + int(exp.loop["extra_delay_samples"])',
        "delay = 1",
        ("tests/test_engine.py::test_extra_delay_samples_put_the_command_in_force_later",),
    ),
    Mutant(
        "latency",
        "loop latency counted one sample short",
        "clampcore/hostloop.py",
        "latency = counter - answered_counter if answered_counter >= 0 else -1",
        "latency = counter - answered_counter - 1 if answered_counter >= 0 else -1",
        ("tests/test_hostloop.py",),
    ),
    # ---- stability guard, characterisation, the model checks, the loop over a link
    Mutant(
        "static-limit",
        "stability guard: a negative leak counted as positive in the static limit",
        "clampcore/stability.py",
        "static_ok=g + g_min > 0.0,",
        "static_ok=g - g_min > 0.0,",
        ("tests/test_stability.py::test_negative_leak_static_limit_with_delay",),
    ),
    Mutant(
        "fit-resistance",
        "characterisation: input resistance 10% low (slope of dV over dI misscaled)",
        "clampcore/cellfeatures.py",
        "r_MOhm = reg.slope * 1000.0",
        "r_MOhm = reg.slope * 900.0",
        ("tests/test_characterize.py::test_passive_cell_values_within_five_percent",),
    ),
    Mutant(
        "onset-drift",
        "characterisation: the onset taken from a flat baseline (a slow cell's drift ignored)",
        "clampcore/cellfeatures.py",
        "- (intercept + slope * t[on - lo :])",
        "- (intercept + 0.0 * t[on - lo :])",
        (
            "tests/test_characterize.py::test_passive_cell_values_within_five_percent",
            "tests/test_characterize.py::test_passive_values_hold_across_cells",
        ),
    ),
    Mutant(
        "release-from-spike",
        "characterisation: the release from an imposed clamp fitted from the spike, not the reset",
        "clampcore/cellfeatures.py",
        "    t = np.arange(low, hi) * dt_ms\n    y = trace_mV[low:hi]",
        "    t = np.arange(0, hi) * dt_ms\n    y = trace_mV[0:hi]",
        (
            "tests/test_characterize.py::test_lif_fit_recovers_the_imposed_rule",
            "tests/test_characterize.py::test_rheobase_and_fi_hold_across_cells",
        ),
    ),
    Mutant(
        "poisson-one",
        "Poisson input: at most one event per sample (events sharing a sample lost)",
        "clampcore/elements/synapse.py",
        "    while u > cdf and p > 0.0:",
        "    while u > cdf and p > 0.0 and k < 1:",
        ("tests/test_model_checks.py",),
    ),
    Mutant(
        "late-spikes",
        "law mode: spikes heard after their law was made are not counted late",
        "clampcore/step.py",
        "            late += 1\n",
        "            late += 0\n",
        ("tests/test_linksim.py::test_a_delay_shorter_than_the_lead_is_counted_late",),
    ),
    Mutant(
        "late-spike-lost",
        "law mode: a spike heard after its delivery sample's law was made is never delivered",
        "clampcore/step.py",
        "            pa.state[r, _syn.S_LATE] += 1.0",
        "            pass",
        (
            "tests/test_lawloop.py::"
            "test_a_spike_heard_too_late_is_delivered_with_the_next_law_and_counted",
        ),
    ),
    Mutant(
        "c-law-zero",
        "C board ignores the host's zero request in law mode",
        "firmware_protocol/c/ccb_core.c",
        "b->law.state.hold_zero = payload[CCB_HEADER] != 0u;",
        "(void)payload; /* a mutant */\n    b->law.state.hold_zero = 0u;",
        ("tests/test_c_core_law.py",),
    ),
    Mutant(
        "engine-imports-rig",
        "the engine starts the simulated rig itself instead of through the factory it is handed",
        "clampcore/engine.py",
        "            self._rig = self.rig_factory(",
        "            from clampcore.simulated_rig import start_rig\n\n"
        "            self._rig = start_rig(",
        ("tests/test_architecture.py",),
    ),
    Mutant(
        "spec-too-wide",
        "an element spec one params column too wide for N_PARAMS is accepted",
        "clampcore/elements/spec.py",
        "        if N_COMMON_PARAMS + len(self.params) > N_PARAMS:",
        "        if N_COMMON_PARAMS + len(self.params) > N_PARAMS + 1:",
        ("tests/test_element_spec.py::test_a_spec_that_does_not_fit_the_arrays_is_refused",),
    ),
    Mutant(
        "kernel-no-cache",
        "compiled kernels not kept in numba's on-disk cache (every run compiles again)",
        "clampcore/jit.py",
        "njit(cache=True, nogil=True, _nrt=False)(fn)",
        "njit(cache=False, nogil=True, _nrt=False)(fn)",
        ("tests/test_kernel_cache.py",),
    ),
    Mutant(
        "roundtrip-guard",
        "fast round trip: no guard band at a rounding boundary (rounding errors decide)",
        "clampcore/roundtrip.py",
        "        if part > margin and part < 1.0 - margin:",
        "        if part >= 0.0 and part < 1.0:",
        ("tests/test_roundtrip.py",),
    ),
    Mutant(
        "spool-chunk-rows",
        "NWB spool: a short last chunk counted as a whole chunk of rows",
        "clampcore/nwb_spool.py",
        "            self.rows += part.shape[0]",
        "            self.rows += step",
        ("tests/test_nwb.py::test_spooled_columns_are_the_stops_conversion",),
    ),
    # ---- outputs and recordings kept
    Mutant(
        "overwrite",
        "an existing output file is replaced without --force",
        "clampcore/cli.py",
        "    if path.exists() and not force:",
        "    if False:",
        ("tests/test_faults.py::test_existing_outputs_are_never_replaced_without_force",),
    ),
    Mutant(
        "journal-unchecked",
        "the journal is removed although the NWB file does not match it",
        "clampcore/nwb.py",
        "        return check_against_journal(out, data)\n",
        "        check_against_journal(out, data)\n        return []\n",
        ("tests/test_recording.py::test_one_copy_journal_removed_only_after_a_check",),
    ),
    # ---- the window
    Mutant(
        "gui-esc-zero",
        "window: Esc no longer holds 0 pA",
        "gui/window.py",
        "                self._window.set_zero_current(True)",
        "                pass",
        ("tests/test_gui_safety.py::test_zero_current_reaches_the_loop_from_any_state",),
    ),
    Mutant(
        "gui-zero-narrow",
        "window: the zero-current button too narrow to read",
        "gui/window.py",
        "        row.addWidget(self.zero_button)",
        "        self.zero_button.setMaximumWidth(60)\n        row.addWidget(self.zero_button)",
        ("tests/test_gui_layout.py",),
    ),
    Mutant(
        "gui-watchdog-marker",
        "window: a watchdog trip is neither marked nor logged",
        "gui/events.py",
        '"watchdog": ((status & STATUS_WATCHDOG) != 0, None),',
        '"watchdog": (status < 0, None),',
        ("tests/test_gui_events.py",),
    ),
    Mutant(
        "gui-form-fields",
        "window: the form shows fields that do not apply to the element's choices",
        "gui/editor.py",
        "on = kept or field_applies(row.field, values)",
        "on = True",
        ("tests/test_gui_form.py",),
    ),
    Mutant(
        "gui-record-path",
        "window: shows only the recording's file name, not where it is",
        "gui/window.py",
        "self.recording_path.setText(str(engine.nwb_path))",
        "self.recording_path.setText(engine.nwb_path.name)",
        ("tests/test_gui_recording.py",),
    ),
    Mutant(
        "gui-rin-unsettled",
        "window: test-pulse input resistance read before the membrane settles",
        "gui/testpulse.py",
        "dv = np.nanmean(v_mV[end - settle : end])",
        "dv = np.nanmean(v_mV[start : start + settle])",
        ("tests/test_gui_views.py::test_test_pulse_gives_the_input_resistance",),
    ),
    Mutant(
        "gui-stability-start",
        "window: Start not refused beyond the stability bound (as if overridden)",
        "gui/window.py",
        "report = stability.guard(stability.assess(exp, delay), override, OVERRIDE_HINT)",
        "report = stability.guard(stability.assess(exp, delay), True, OVERRIDE_HINT)",
        ("tests/test_gui_stability.py::test_the_line_shows_the_bound_warns_and_start_is_refused",),
    ),
    Mutant(
        "gui-stability-live",
        "window: a live change beyond the stability bound applied without the override",
        "gui/window.py",
        "        if not pushes_beyond(before, after):",
        "        if True:",
        ("tests/test_gui_stability.py::test_live_change_refused_then_overridden_and_logged",),
    ),
    # ---- validation, defaults, timing primitives
    Mutant(
        "limit-default",
        "default current limit 5000 pA instead of 500",
        "clampcore/schema.py",
        '_f("max_current_pA", 500.0, "positive"),',
        '_f("max_current_pA", 5000.0, "positive"),',
        ("tests/test_experiment.py",),
    ),
    Mutant(
        "refractory-default",
        "default neuron refractory period 20 ms",
        "clampcore/elements/neuron.py",
        '    Field("refractory_ms", 2.0, "positive"),\n    # EIF/AdEx shape',
        '    Field("refractory_ms", 20.0, "positive"),\n    # EIF/AdEx shape',
        ("tests/test_defaults.py",),
    ),
    Mutant(
        "sleep-until",
        "sleep_until_ns wakes a second early",
        "clampcore/sysio.py",
        "    timespec[0] = deadline_ns // 1_000_000_000\n",
        "    timespec[0] = deadline_ns // 1_000_000_000 - 1\n",
        ("tests/test_realtime.py",),
    ),
)


# --------------------------------------------------------------------- the runner
def _occurrences(mutant: Mutant, root: Path) -> int:
    path = root / mutant.path
    return path.read_text(encoding="utf-8").count(mutant.find) if path.is_file() else 0


def _copy_repository(dest: Path) -> None:
    """Tracked and untracked-but-not-ignored files (git), else everything but caches."""
    try:
        listing = subprocess.run(
            ["git", "ls-files", "-z", "--cached", "--others", "--exclude-standard"],
            cwd=ROOT,
            capture_output=True,
            check=True,
        ).stdout.decode()
        files = [f for f in listing.split("\0") if f and (ROOT / f).is_file()]
    except (OSError, subprocess.CalledProcessError):
        files = []
    if not files:
        skip = shutil.ignore_patterns(
            ".git", ".venv*", "__pycache__", ".numba-cache", ".pytest_cache", "*.so", "*.o"
        )
        shutil.copytree(ROOT, dest, ignore=skip, symlinks=True)
        return
    for f in files:
        target = dest / f
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(ROOT / f, target)


def _pytest(
    python: str, repo: Path, tests: tuple[str, ...], reference: bool, cache: Path
) -> tuple[str, str, float]:
    """Run ``tests`` in ``repo``; returns (outcome, detail, seconds)."""
    env = dict(os.environ)
    env.update(
        PYTHONPATH=str(repo),
        NUMBA_CACHE_DIR=str(cache),
        QT_QPA_PLATFORM="offscreen",
        PYTHONDONTWRITEBYTECODE="1",
    )
    cmd = [python, "-m", "pytest", "-q", "-x", "-rf", "-p", "no:cacheprovider", *tests]
    if reference:
        env["CLAMPCORE_REQUIRE_BRIAN2"] = "1"
        cmd += ["-p", "no:pytest-qt", "-m", "reference"]
    start = time.monotonic()
    try:
        proc = subprocess.run(
            cmd, cwd=repo, env=env, capture_output=True, text=True, timeout=_TIMEOUT_S
        )
    except subprocess.TimeoutExpired:
        return "timeout", f"no result within {_TIMEOUT_S} s", time.monotonic() - start
    seconds = time.monotonic() - start
    out = proc.stdout + proc.stderr
    if proc.returncode == 0:
        return "passed", "", seconds
    failed = re.findall(r"^(?:FAILED|ERROR) (\S+)", out, flags=re.MULTILINE)
    if proc.returncode == 1 and failed:
        return "failed", failed[0], seconds
    tail = " / ".join(line for line in out.strip().splitlines()[-3:])
    return "error", f"pytest exit {proc.returncode}: {tail[:300]}", seconds


def _module(node: str) -> str:
    return node.split("::")[0]


def suite_modules(root: Path = ROOT) -> list[str]:
    """Every test module of the suite, as ``tests/test_*.py`` paths."""
    return sorted(p.relative_to(root).as_posix() for p in (root / "tests").glob("test_*.py"))


def modules_without_mutant(mutants: tuple[Mutant, ...] = MUTANTS, root: Path = ROOT) -> list[str]:
    """Test modules that no mutant names among the tests that must catch it.

    Each module must be able to fail on some deliberate bug: one that cannot is either the
    only witness of untested code or a test that asserts nothing (issue #9).
    """
    named = {_module(t) for m in mutants for t in m.tests}
    return [m for m in suite_modules(root) if m not in named]


def _say_modules(label: str, modules: list[str]) -> None:
    print(f"{label}: " + (", ".join(modules) if modules else "none"))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--list", action="store_true", help="list the mutants and exit")
    parser.add_argument("--only", default="", help="comma-separated names (or parts of names)")
    parser.add_argument("--skip-baseline", action="store_true", help="trust the unmutated run")
    parser.add_argument(
        "--reference-python",
        default=str(ROOT / ".venv-reference" / "bin" / "python"),
        help="python of the brian2 reference environment",
    )
    parser.add_argument("--table", help="also write the result table (Markdown) to this file")
    args = parser.parse_args(argv)

    chosen = [
        m
        for m in MUTANTS
        if not args.only or any(part and part in m.name for part in args.only.split(","))
    ]
    problems = {}
    for m in chosen:
        n = _occurrences(m, ROOT)
        if n != 1:
            problems[m.name] = "pattern not found" if n == 0 else f"pattern ambiguous ({n}x)"
    unnamed = modules_without_mutant()
    if args.list:
        for m in chosen:
            print(f"{m.name:<20} {problems.get(m.name, 'ok'):<20} {m.path}: {m.what}")
        _say_modules("test modules no mutant names as catcher", unnamed)
        return 1 if problems or unnamed else 0

    rows: list[tuple[Mutant, str, str]] = []
    with tempfile.TemporaryDirectory(prefix="clampcore-mutants-") as tmp:
        repo = Path(tmp) / "repo"
        _copy_repository(repo)

        def python_for(m: Mutant) -> str:
            return args.reference_python if m.reference else sys.executable

        if not args.skip_baseline:
            for reference in (False, True):
                group = [m for m in chosen if m.reference == reference and m.name not in problems]
                tests = tuple(dict.fromkeys(t for m in group for t in m.tests))
                if not tests:
                    continue
                python = args.reference_python if reference else sys.executable
                print(f"baseline: {len(tests)} test selections, unmutated ...", flush=True)
                cache = Path(tmp) / f"cache-baseline-{reference}"
                outcome, detail, secs = _pytest(python, repo, tests, reference, cache)
                if outcome != "passed":
                    print(f"the unmutated tests do not pass ({outcome}: {detail}); stopping")
                    return 2
                print(f"baseline passed in {secs:.0f} s", flush=True)

        for k, m in enumerate(chosen, 1):
            if m.name in problems:
                rows.append((m, "NOT APPLIED", problems[m.name]))
                print(f"[{k}/{len(chosen)}] {m.name}: {problems[m.name]}", flush=True)
                continue
            target = repo / m.path
            original = target.read_text(encoding="utf-8")
            target.write_text(original.replace(m.find, m.replace), encoding="utf-8")
            try:
                cache = Path(tmp) / f"cache-{k}"
                outcome, detail, secs = _pytest(python_for(m), repo, m.tests, m.reference, cache)
                shutil.rmtree(cache, ignore_errors=True)
            finally:
                target.write_text(original, encoding="utf-8")
            verdict = {"failed": "caught", "passed": "SURVIVED"}.get(outcome, outcome.upper())
            rows.append((m, verdict, detail))
            print(f"[{k}/{len(chosen)}] {m.name}: {verdict} {detail} ({secs:.0f} s)", flush=True)

    lines = ["| deliberate bug | in | caught by (first failing test) |", "|---|---|---|"]
    for m, verdict, detail in rows:
        by = detail.removeprefix("tests/") if verdict == "caught" else f"**{verdict}** {detail}"
        what = m.what.replace("|", "\\|")  # a literal bar inside a Markdown table cell
        lines.append(f"| {what} | `{m.path}` | {by.strip()} |")
    caught = sum(1 for _, v, _ in rows if v == "caught")
    summary = f"{caught} of {len(rows)} mutants caught, {len(rows) - caught} not"
    # With -x the first failing test is the catcher: a module named second may catch nothing.
    killers = {_module(d) for _, v, d in rows if v == "caught"}
    unkilled = [m for m in suite_modules() if m not in killers]
    table = "\n".join(lines)
    print("\n" + table + "\n\n" + summary)
    full = len(chosen) == len(MUTANTS)
    if full:
        _say_modules("test modules that caught no mutant in this run", unkilled)
    _say_modules("test modules no mutant names as catcher", unnamed)
    if args.table:
        Path(args.table).write_text(table + "\n\n" + summary + "\n", encoding="utf-8")
    all_caught = caught == len(rows)
    return 0 if all_caught and not unnamed and not (full and unkilled) else 1


if __name__ == "__main__":
    sys.exit(main())
