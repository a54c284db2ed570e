"""Benchmark of recordings: bytes per hour at 20 kHz and conversion time at stop.

The typical experiment is ``examples/slice_background.toml`` (20 kHz, HH model cell,
five virtual conductances: a leak, two fluctuating background conductances, two
Poisson-driven synapses) on the simulated rig with its wall clock, as a real run:
``--seconds`` (default 10) are recorded with the journal kept. From that journal,
in the same run:

1. Size: the first layout (every series float64, uncompressed: ``write_nwb(...,
   compact=False)``, what clampcore wrote before the compact layout) beside the
   compact layout, for each candidate HDF5 filter. Bytes per hour are marginal:
   (size of the whole run - size of its first half) per recorded second x 3600, so
   the fixed metadata does not count.
2. Conversion at stop: the run's journal repeated to one minute (sample counter
   continued) and converted as a run's stop does (``convert_journal``: write, read
   back, check against the journal, remove it), CPU and wall time, median of
   ``--repeats`` (3), per minute recorded: before, everything at stop; after, the
   columns encoded and compressed while recording (``clampcore.nwb_spool``, fed the
   minute in the recorder's 0.25 s blocks, its CPU time reported apart) and only the
   rest at stop; beside the first layout's write alone.
3. Lossless: V read back equals the journal bit for bit; the command equals the
   journal's current rounded to DAC counts.

    .venv/bin/python bench/bench_recording.py [--seconds 10] [--repeats 3]

Public names: ``main``.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
from clampcore.simulated_rig import start_rig

from clampcore.engine import Engine, RunOptions
from clampcore.journal import Journal, JournalData, read_journal
from clampcore.nwb import convert_journal, read_nwb_summary, write_nwb
from clampcore.nwb_series import COMPRESSION, dac_to_pA, pA_to_dac
from clampcore.nwb_spool import Spool
from clampcore.recorder import FLUSH_INTERVAL_S

EXPERIMENT = Path(__file__).resolve().parent.parent / "examples" / "slice_background.toml"
FILTERS = [("gzip", 1), ("gzip", 4), ("gzip", 9), ("lzf", None)]


def _record(seconds: float, tmp: Path) -> JournalData:
    options = RunOptions(keep_journal=True, seed=1)
    engine = Engine(EXPERIMENT, "sim", options, rig_factory=start_rig)
    engine.start(duration_s=seconds, out=tmp / "run.nwb")
    engine.wait()
    result = engine.finish()
    if result.error:
        raise RuntimeError(result.error)
    return read_journal(result.journal_path)


def _head(data: JournalData, rows: int) -> JournalData:
    columns = {k: np.asarray(v)[:rows] for k, v in data.columns.items()}
    return JournalData(meta=data.meta, columns=columns, events=[], complete=True)


def _size(data: JournalData, path: Path, **kw: object) -> int:
    write_nwb(path, data, overwrite=True, **kw)
    return path.stat().st_size


def _per_hour(data: JournalData, tmp: Path, **kw: object) -> float:
    n = len(data.columns["v_mV"])
    rate = float(data.meta["rate_hz"])
    whole = _size(data, tmp / "whole.nwb", **kw)
    half = _size(_head(data, n // 2), tmp / "half.nwb", **kw)
    return (whole - half) / ((n - n // 2) / rate) * 3600


def _minute_journal(data: JournalData, path: Path) -> Path:
    """The run's journal repeated to 60 s, the sample counter continued."""
    rate = float(data.meta["rate_hz"])
    names = list(data.columns)
    block = np.column_stack([np.asarray(data.columns[k], dtype=np.float64) for k in names])
    rows = round(60 * rate)
    reps = -(-rows // block.shape[0])
    big = np.concatenate([block] * reps)[:rows]
    if "sample_counter" in names:
        big[:, names.index("sample_counter")] = np.arange(rows, dtype=np.float64)
    meta = dict(data.meta)
    journal = Journal(path, names, meta)
    for start in range(0, rows, 20_000):
        journal.append(big[start : start + 20_000])
        journal.flush()
    journal.close({"timing": meta.get("timing", {})})
    return path


def _spool(journal: Path, data: JournalData, during: list[float]) -> Spool:
    """Feed the journal's rows to a spool as the recorder does (a block every 0.25 s)."""
    names = list(data.columns)
    table = np.column_stack([np.asarray(data.columns[k]) for k in names])
    block = round(FLUSH_INTERVAL_S * float(data.meta["rate_hz"]))
    c0 = time.process_time()
    spool = Spool(journal, names, dict(data.meta))
    for start in range(0, table.shape[0], block):
        spool.append(table[start : start + block])
    during.append(time.process_time() - c0)
    return spool


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=10.0)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)
    warnings.filterwarnings("ignore", message="lzf compression")
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        print(f"recording {args.seconds:g} s of {EXPERIMENT.name} on the simulated rig ...")
        data = _record(args.seconds, tmp)
        n, rate = len(data.columns["v_mV"]), float(data.meta["rate_hz"])
        print(f"{n} samples at {rate:g} Hz, {len(data.columns)} journal columns")

        before = _per_hour(data, tmp, compact=False)
        print("\nbytes per hour of recording (marginal), by layout and HDF5 filter:")
        print(f"  first layout, float64, no filter        {before / 1e9:7.2f} GB/h      1.0x")
        timings = {}
        minute = _minute_journal(data, tmp / "minute.journal")
        minute_data = read_journal(minute)
        for name, level in FILTERS:
            size = _per_hour(data, tmp, compression=(name, level))
            times = []
            for _ in range(args.repeats):
                t0 = time.perf_counter()
                write_nwb(tmp / "m.nwb", minute_data, overwrite=True, compression=(name, level))
                times.append(time.perf_counter() - t0)
            timings[(name, level)] = statistics.median(times)
            label = f"compact, shuffle + {name}{'' if level is None else f' {level}'}"
            print(
                f"  {label:<40} {size / 1e9:7.2f} GB/h  {before / size:5.1f}x smaller; "
                f"write of 1 min {timings[(name, level)]:.2f} s"
            )

        print(f"\nconversion at stop per minute recorded (median of {args.repeats}):")
        old = []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            write_nwb(tmp / "old.nwb", read_journal(minute), overwrite=True, compact=False)
            old.append(time.perf_counter() - t0)
        print(f"  first layout (read journal + write only)        {statistics.median(old):.2f} s")
        before, after, during = [], [], []
        for k in range(args.repeats):
            for spooled in (False, True):
                journal = tmp / f"stop{k}{spooled}.journal"
                shutil.copytree(minute, journal)
                spool = _spool(journal, minute_data, during) if spooled else None
                t0, c0 = time.perf_counter(), time.process_time()
                out, removed = convert_journal(journal, tmp / f"stop{k}.nwb", spool=spool)
                (after if spooled else before).append(
                    (time.process_time() - c0, time.perf_counter() - t0)
                )
                assert removed
        label = f"{COMPRESSION[0]} {COMPRESSION[1]}"
        for name, runs in (("compact, all at stop (before)", before),
                           ("compact, spooled while recording (after)", after)):  # fmt: skip
            cpu = statistics.median(c for c, _ in runs)
            wall = statistics.median(w for _, w in runs)
            print(f"  {name:<47} CPU {cpu:.2f} s, wall {wall:.2f} s")
        print(f"  (after: the recorder spent CPU {statistics.median(during):.2f} s per minute "
              f"encoding and compressing ({label}) while recording, off the loop)")  # fmt: skip
        print(f"  load average during the measurement: {os.getloadavg()[0]:.1f} on "
              f"{os.cpu_count()} cores")  # fmt: skip

        back = read_nwb_summary(out)
        exact_v = np.array_equal(back["v_mV"], minute_data.columns["v_mV"])
        sent = dac_to_pA(pA_to_dac(minute_data.columns["i_pA"], back["calibration"]),
                         back["calibration"])  # fmt: skip
        exact_i = np.array_equal(back["i_pA"], sent)
        print(f"\nlossless: V equals the journal bit for bit: {exact_v}; command equals the "
              f"DAC counts sent: {exact_i}")  # fmt: skip
        print("storage: " + ", ".join(
            f"{k}={v['encoding']}" for k, v in back["storage"].items()))  # fmt: skip
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
