"""The tuning window: run controls, live traces, parameter editor and loop health.

The loop runs in its own process (``clampcore.engine``); this window only reads
the shared-memory ring and counters, and writes live changes into the mailbox,
so a busy or frozen window cannot make the loop miss a sample. One timer
(``REFRESH_HZ``) redraws the traces and the health figures; nothing else runs
periodically. Slow jobs (checking a board, stopping a run and writing its NWB
file) run on worker threads and are polled by the same timer.

Layout, top to bottom: the run bar (state, port, Connect, Start, Stop and the
zero-current control; then where recordings go, this run's recording and the
progress of writing it), the alarm banner, then the traces with their readout
strip on the left and, on the right, the loop-stability line (gui.guard: the largest
stable virtual conductance, the experiment's total, the override) over the tabs
(Parameters, Loop health, Log). It fits 1280x720 (tests/test_gui_layout.py).

Safety controls stay in reach whatever else is open: Esc is caught by an
application-wide event filter (modal dialogs, menus and text fields cannot keep
it from holding 0 pA), and the window's own dialogs are not modal, so the
zero-current button can always be clicked. Quitting, opening another experiment
or removing an element during a run first asks, saying what will happen.

Public names: ``TuningWindow``, ``REFRESH_HZ``, ``ZERO_SHORTCUT``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import threading
import time
from pathlib import Path
from typing import Any

from clampcore.gui import testpulse
from clampcore.gui.editor import ParameterEditor, Target
from clampcore.gui.guard import (
    OVERRIDE_HINT,
    StabilityLine,
    loop_delay,
    meta_with_override,
    pushes_beyond,
)
from clampcore.gui.health import AlarmBanner, HealthPanel
from clampcore.gui.savefile import experiment_toml
from clampcore.gui.traces import TracePanel
from clampcore.simulated_rig import start_rig
from PySide6 import QtCore, QtGui, QtWidgets

from clampcore import stability
from clampcore.engine import Engine, EngineError, RunOptions
from clampcore.experiment import Experiment, ExperimentError, load_experiment, validate_element
from clampcore.health import loop_health
from clampcore.shared import STATE_FAILED, STATE_RUNNING, STATE_STARTING, STATE_STOPPED

# The issue asks for at least 30 redraws a second (smooth to the eye: film runs at 24). Timer
# ticks are lost when the two cores are busy (a 36 Hz timer gave 28.7 redraws/s with the
# simulated rig and the loop at 20 kHz), so the timer asks for 45 and the benchmark
# (bench/bench_gui.py) checks what arrives: 39.4/s.
REFRESH_HZ = 45.0
# Health figures are redrawn every 9th tick (5 times a second) unless their tab is shown.
_HEALTH_EVERY = 9
# Esc: the key a hand finds without looking; shown on the button.
ZERO_SHORTCUT = "Esc"

_STATE_COLOURS = {
    "idle": "#3a3f47",
    "connected": "#3a5f8a",
    "checking": "#3a5f8a",
    "starting": "#3a5f8a",
    "running": "#1f7a3a",
    "stopping": "#8a6d1f",
    "stopped": "#3a3f47",
    "failed": "#b00020",
}


class _Job:
    """A function run on a worker thread; the timer polls ``done``."""

    def __init__(self, name: str, fn: Any) -> None:
        self.result: Any = None
        self.error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, args=(fn,), name=name, daemon=True)
        self._thread.start()

    def _run(self, fn: Any) -> None:
        try:
            self.result = fn()
        except BaseException as exc:
            self.error = exc

    @property
    def done(self) -> bool:
        return not self._thread.is_alive()

    def wait(self, timeout_s: float | None = None) -> bool:
        self._thread.join(timeout_s)
        return self.done


class _ZeroKeyFilter(QtCore.QObject):
    """Esc anywhere in the application holds 0 pA (an application-wide event filter).

    It sees the key before any widget, dialog or menu does; it lets the key go on
    (Esc still closes the dialog or menu it was pressed in).
    """

    def __init__(self, window: TuningWindow) -> None:
        super().__init__(window)
        self._window = window

    def eventFilter(self, obj: QtCore.QObject, event: QtCore.QEvent) -> bool:
        kind = event.type()
        if kind in (QtCore.QEvent.Type.KeyPress, QtCore.QEvent.Type.ShortcutOverride):
            key_event = event  # a QKeyEvent
            if key_event.key() == QtCore.Qt.Key.Key_Escape and not key_event.isAutoRepeat():
                self._window.set_zero_current(True)
        return False


def _copy_experiment(exp: Experiment) -> Experiment:
    """An independent experiment equal to ``exp`` (the loader's own round trip)."""
    out = load_experiment(exp.to_dict())
    out.path = exp.path
    return out


def _slot_names(engine: Engine) -> dict[tuple[float, int, int], tuple[str, str]]:
    """(mailbox array, row, col) -> (element, field) for every live field of a run."""
    from clampcore.program import MAIL_TARGETS

    slots = engine.program.slot_names()
    return {(MAIL_TARGETS[array], row, col): name for (array, row, col), name in slots.items()}


class TuningWindow(QtWidgets.QMainWindow):
    """Run an experiment on a port and tune it live.

    ``experiment``: anything ``load_experiment`` takes, or None for an empty one;
    ``port``: a device path, a pyserial URL, or "sim" for the simulated rig;
    ``options``: the engine's ``RunOptions``; ``record_dir``: where recordings go.
    """

    def __init__(
        self,
        experiment: Any = None,
        port: str = "sim",
        options: RunOptions | None = None,
        record_dir: Path | str | None = None,
    ) -> None:
        super().__init__()
        self.options = options or RunOptions()
        self.experiment: Experiment = (
            load_experiment(experiment) if experiment is not None else load_experiment({})
        )
        self.experiment_path: Path | None = self.experiment.path
        self.engine: Engine | None = None
        self.result: Any = None  # RunResult of the last run
        self.last_error: str | None = None
        self._finishing: _Job | None = None
        self._finish_t0 = 0.0
        self._checking: _Job | None = None
        self._zero_held = False
        self._run_count = 0
        self._changes_logged = 0
        self._slot_names: dict[tuple[float, int, int], tuple[str, str]] | None = None
        self._ticks = 0
        self._state = ""
        self._saved = self.experiment.to_dict()  # what the file holds: unsaved edits differ
        # The file's own text: saving edits it in place (comments kept, see gui.savefile).
        self._source_text = self.experiment.text if self.experiment.path else None
        self._pending_open: Path | None = None  # opened once the stopping run is written
        self._close_confirmed = False
        self._health: dict[str, Any] | None = None  # the running loop's, for its latency
        self._run_override = False  # this run was let past the stability bound
        self.question: QtWidgets.QMessageBox | None = None  # the open question, if any
        self.dialog: QtWidgets.QFileDialog | None = None  # the open file dialog, if any
        self.setWindowTitle("clampcore — tuning")
        self.resize(1500, 920)

        self._build_run_bar(port, record_dir)
        self.banner = AlarmBanner()
        self.traces = TracePanel()
        self.editor = ParameterEditor(self._submit)
        self.editor.add_requested = self.add_element
        self.editor.remove_requested = self.request_remove
        self.editor.fileAction.connect(self._file_action)
        self.health = HealthPanel()
        self.log = QtWidgets.QPlainTextEdit()
        self.log.setReadOnly(True)
        self.log.setMaximumBlockCount(2000)

        self.tabs = QtWidgets.QTabWidget()
        self.tabs.addTab(self.editor, "Parameters")
        self.tabs.addTab(self.health, "Loop health")
        self.tabs.addTab(self.log, "Log")
        self.stability_line = StabilityLine()
        right = QtWidgets.QWidget()
        right_col = QtWidgets.QVBoxLayout(right)
        right_col.setContentsMargins(0, 0, 0, 0)
        right_col.setSpacing(2)
        right_col.addWidget(self.stability_line)
        right_col.addWidget(self.tabs, 1)
        split = QtWidgets.QSplitter(QtCore.Qt.Orientation.Horizontal)
        split.addWidget(self.traces)
        split.addWidget(right)
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 1)
        split.setSizes([1050, 450])
        central = QtWidgets.QWidget()
        col = QtWidgets.QVBoxLayout(central)
        col.setContentsMargins(6, 6, 6, 6)
        col.addWidget(self.run_bar)
        col.addWidget(self.banner)
        col.addWidget(split, 1)
        self.setCentralWidget(central)
        self._build_menu()

        # Esc: caught before any widget, dialog or menu can take it (see _ZeroKeyFilter).
        self._zero_filter = _ZeroKeyFilter(self)
        app = QtWidgets.QApplication.instance()
        if app is not None:
            app.installEventFilter(self._zero_filter)

        self.timer = QtCore.QTimer(self)
        self.timer.setTimerType(QtCore.Qt.TimerType.PreciseTimer)
        self.timer.setInterval(round(1000 / REFRESH_HZ))
        self.timer.timeout.connect(self._tick)
        self.timer.start()

        self.editor.set_experiment(self.experiment)
        self.traces.show_experiment(self.experiment)
        self.traces.readout.pulse_box.toggled.connect(self.set_test_pulse)
        self._sync_pulse_box()
        self._set_state("idle", "not running")
        self._update_title()
        self.port_box.currentTextChanged.connect(lambda _text: self.update_stability())
        self.update_stability()

    # ------------------------------------------------------------------ building
    def _build_run_bar(self, port: str, record_dir: Path | str | None) -> None:
        """Two rows: state and run controls with the zero-current button; then recordings."""
        bar = QtWidgets.QFrame()
        bar.setObjectName("runbar")
        rows = QtWidgets.QVBoxLayout(bar)
        rows.setContentsMargins(4, 2, 4, 2)
        rows.setSpacing(3)
        row = QtWidgets.QHBoxLayout()
        rows.addLayout(row)
        self.state_label = QtWidgets.QLabel()
        self.state_label.setMinimumWidth(130)
        self.state_label.setAlignment(QtCore.Qt.AlignmentFlag.AlignCenter)
        font = self.state_label.font()
        font.setBold(True)
        font.setPointSize(font.pointSize() + 2)
        self.state_label.setFont(font)
        row.addWidget(self.state_label)
        self.state_detail = _ElidedLabel()
        row.addWidget(self.state_detail, 1)
        row.addWidget(QtWidgets.QLabel("Port"))
        self.port_box = QtWidgets.QComboBox()
        self.port_box.setEditable(True)
        self.port_box.setMinimumWidth(150)
        self.port_box.addItem("sim")
        with contextlib.suppress(Exception):
            from clampcore.board_link import list_ports

            for p in list_ports():
                self.port_box.addItem(p["device"])
        self.port_box.setCurrentText(port)
        self.port_box.setToolTip("a serial device, a pyserial URL, or 'sim' for the simulated rig")
        row.addWidget(self.port_box)
        self.connect_button = QtWidgets.QPushButton("Connect")
        self.connect_button.setToolTip("ask the board on this port who it is")
        self.connect_button.clicked.connect(self.check_board)
        row.addWidget(self.connect_button)
        self.start_button = QtWidgets.QPushButton("Start")
        self.start_button.clicked.connect(lambda: self.start_run())
        row.addWidget(self.start_button)
        self.stop_button = QtWidgets.QPushButton("Stop")
        self.stop_button.clicked.connect(self.stop_run)
        row.addWidget(self.stop_button)
        self.zero_button = QtWidgets.QPushButton()
        self.zero_button.setCheckable(True)
        self.zero_button.setToolTip(
            f"hold the injected current at 0 pA ({ZERO_SHORTCUT}, from anywhere in the "
            "application); click again to release"
        )
        self.zero_button.clicked.connect(self.set_zero_current)
        row.addWidget(self.zero_button)

        files = QtWidgets.QHBoxLayout()
        rows.addLayout(files)
        files.addWidget(QtWidgets.QLabel("Record into"))
        self.record_dir = QtWidgets.QLineEdit(str(Path(record_dir or default_record_dir())))
        self.record_dir.setToolTip("folder for the NWB recordings; each run gets its own file")
        files.addWidget(self.record_dir, 2)
        browse = QtWidgets.QPushButton("Choose…")
        browse.setToolTip("choose the folder for recordings")
        browse.clicked.connect(self._choose_record_dir)
        files.addWidget(browse)
        files.addSpacing(12)
        files.addWidget(QtWidgets.QLabel("Recording"))
        # The full path of the current (or last) recording: selectable, and a button copies it.
        self.recording_path = QtWidgets.QLineEdit()
        self.recording_path.setReadOnly(True)
        self.recording_path.setPlaceholderText("none yet")
        self.recording_path.setToolTip("the NWB file of this run (select to copy)")
        files.addWidget(self.recording_path, 3)
        copy = QtWidgets.QPushButton("Copy path")
        copy.clicked.connect(
            lambda: QtWidgets.QApplication.clipboard().setText(self.recording_path.text())
        )
        files.addWidget(copy)
        self.progress = QtWidgets.QProgressBar()
        self.progress.setRange(0, 0)  # busy: the writer gives no fraction done
        self.progress.setMaximumWidth(260)
        self.progress.setTextVisible(True)
        self.progress.hide()
        files.addWidget(self.progress)
        self.run_bar = bar
        self._style_zero()

    def _build_menu(self) -> None:
        menu = self.menuBar().addMenu("&Experiment")
        for text, key, slot in (
            ("&Open…", QtGui.QKeySequence.StandardKey.Open, lambda: self._file_action("load")),
            ("&Save", QtGui.QKeySequence.StandardKey.Save, self._save_here),
            ("Save &as…", QtGui.QKeySequence.StandardKey.SaveAs, lambda: self._file_action("save")),
        ):
            action = menu.addAction(text)
            action.setShortcut(QtGui.QKeySequence(key))
            action.triggered.connect(slot)
        menu.addSeparator()
        menu.addAction("&Quit", QtGui.QKeySequence.StandardKey.Quit, self.request_quit)

    # ------------------------------------------------------------------ state
    @property
    def running(self) -> bool:
        """A run exists and has not been finished."""
        return self.engine is not None and self._finishing is None

    def _set_state(self, state: str, detail: str) -> None:
        if detail != self.state_detail.text():
            self.state_detail.setText(detail)
        if state == self._state:
            return
        self._state = state
        self.state_label.setText(state.upper())
        self.state_label.setStyleSheet(
            f"background: {_STATE_COLOURS[state]}; color: white; padding: 4px 10px;"
            " border-radius: 3px;"
        )
        busy = state in ("starting", "running", "stopping")
        self.start_button.setEnabled(not busy and self._checking is None)
        self.stop_button.setEnabled(state in ("starting", "running"))
        self.port_box.setEnabled(not busy)
        self.connect_button.setEnabled(not busy and self._checking is None)

    @property
    def state(self) -> str:
        """idle, checking, connected, starting, running, stopping, stopped or failed."""
        return self._state

    def _update_title(self) -> None:
        name = self.experiment_path.name if self.experiment_path else "unsaved experiment"
        self.setWindowTitle(f"clampcore — tuning — {name}")

    def _note(self, text: str) -> None:
        self.log.appendPlainText(time.strftime("%H:%M:%S ") + text)

    # ------------------------------------------------------------------ run control
    def check_board(self) -> None:
        """Ask the board on the chosen port for its identity (on a worker thread)."""
        if self._checking is not None or self.engine is not None:
            return
        port = self.port_box.currentText().strip()
        exp_text = self.experiment.to_toml()
        clock = self.options.rig_clock

        def ask() -> str:
            from clampcore.board_link import BoardLink

            rig = None
            try:
                if port == "sim":
                    import tempfile

                    with tempfile.TemporaryDirectory(prefix="clampcore-") as tmp:
                        path = Path(tmp) / "experiment.toml"
                        path.write_text(exp_text, encoding="utf-8")
                        rig = start_rig(path, clock=clock)
                        return _hello_text(BoardLink(rig.path), "simulated rig")
                return _hello_text(BoardLink(port), port)
            finally:
                if rig is not None:
                    rig.stop()

        self._checking = _Job("clampcore-connect", ask)
        self._set_state("checking", f"asking the board on {port}…")

    def start_run(self, duration_s: float | None = None, out: Path | str | None = None) -> bool:
        """Start a run of the current experiment; returns False (and says why) if it cannot."""
        if self.engine is not None or self._checking is not None:
            return False
        port = self.port_box.currentText().strip()
        if not port:
            self._fail_start("choose a port ('sim' for the simulated rig)")
            return False
        if out is None:
            folder = Path(self.record_dir.text().strip() or ".")
            try:
                folder.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                self._fail_start(f"cannot use {folder} for recordings: {exc}")
                return False
            out = _free_name(folder, time.strftime("clampcore-%Y%m%d-%H%M%S"))
        exp = _copy_experiment(self.experiment)
        try:  # the command line's guard: refused beyond the bound unless overridden
            delay, _ = self._delay(exp, running=False)
            override = self.stability_line.override_box.isChecked()
            report = stability.guard(stability.assess(exp, delay), override, OVERRIDE_HINT)
        except ValueError as exc:  # StabilityError, or cell values it cannot use
            self.update_stability()
            self._fail_start(str(exc))
            return False
        # Recorded as --override-stability records it; a per-run copy, updated by live overrides.
        options = dataclasses.replace(
            self.options, extra_meta={**self.options.extra_meta, "stability": report.as_meta()}
        )
        try:
            engine = Engine(exp, port, options, rig_factory=start_rig)
            engine.start(duration_s=duration_s, out=out)
        except (EngineError, ExperimentError, OSError, RuntimeError, ValueError) as exc:
            self._fail_start(str(exc))
            return False
        self.engine = engine
        self._run_override = report.override
        self._health = None
        self.result = None
        self.last_error = None
        self._run_count += 1
        self._changes_logged = 0
        self._slot_names = None
        self.banner.reset()
        if self._zero_held:
            engine.set_zero_current(True)
        assert engine.shared is not None
        self.traces.attach(engine.shared, engine.experiment)
        self.health.set_rate(engine.experiment.loop["rate_hz"])
        self.editor.set_experiment(
            self.experiment, {e["name"] for e in engine.experiment.elements}, running=True
        )
        self.recording_path.setText(str(engine.nwb_path))
        self.recording_path.end(False)  # the file name in view; the whole path on selecting
        self._set_state("starting", f"opening {port}; recording to {engine.nwb_path.name}")
        self._note(f"run {self._run_count}: started on {port}, recording to {engine.nwb_path}")
        for line in report.lines()[1:]:  # warnings, or what the override let through
            self._note(
                f"run {self._run_count}: {line}" + (" (overridden)" if report.override else "")
            )
        self.update_stability()
        return True

    def update_stability(self) -> None:
        """Show the stability bound of what runs (or of what will run, when stopped)."""
        engine = self.engine if self.running else None
        exp = engine.experiment if engine is not None else self.experiment
        delay, where = self._delay(exp, running=engine is not None)
        try:
            report = stability.assess(exp, delay)
        except ValueError as exc:
            self.stability_line.show_problem(str(exc))
            return
        report.override = engine is not None and self._run_override and not report.ok
        self.stability_line.show_report(report, where)

    def _delay(self, exp: Experiment, running: bool = True) -> tuple[int, str]:
        """The loop delay for the stability guard (gui.guard.loop_delay): the port chosen,
        the run's mode, and while ``running`` the loop's measured latency."""
        port = self.port_box.currentText().strip()
        return loop_delay(exp, port, self.options.mode, self._health if running else None)

    def _stability_check(self, engine: Engine, element: str, field: str, value: Any) -> Any:
        """A live change that would push the loop beyond its stability bound: the reason it is
        refused (a str), or, overridden, the report to log (None: nothing to refuse or log)."""
        draft = engine.experiment.to_dict()
        if element == "loop":
            draft["loop"][field] = value
        else:
            next(el for el in draft["element"] if el["name"] == element)[field] = value
        try:
            after_exp = load_experiment(draft)
        except ExperimentError:
            return None  # the loop's own rules refuse it, and say why
        delay, _ = self._delay(engine.experiment)
        try:
            before = stability.assess(engine.experiment, delay)
            after = stability.assess(after_exp, delay)
        except ValueError:
            return None
        if not pushes_beyond(before, after):
            return None
        try:
            return stability.guard(
                after, self.stability_line.override_box.isChecked(), OVERRIDE_HINT
            )
        except stability.StabilityError as exc:
            why = str(exc).removeprefix("refusing to start: ")
            return f"{element}.{field} = {value}: not applied: {why}"

    def _log_override(
        self, engine: Engine, report: Any, posted_at: int, element: str, field: str, value: Any
    ) -> None:
        """Keep a live override in the recording, where --override-stability keeps it
        (``posted_at``: the samples written when it was posted; the loop applies it later)."""
        change = {
            "sample": posted_at,
            "element": element,
            "field": field,
            "value": value,
            "g_virtual_max_nS": report.g_virtual_max_nS,
            "g_stable_max_nS": report.g_stable_max_nS,
            "delay_samples": report.delay_samples,
        }
        meta = engine.options.extra_meta
        meta["stability"] = meta_with_override(report, change, meta.get("stability", {}))
        self._run_override = True
        self._note(
            f"stability override: {element}.{field} = {value} takes the loop to "
            f"{report.g_virtual_max_nS:.4g} nS, beyond its {report.g_stable_max_nS:.4g} nS "
            "(logged in the recording)"
        )

    def _fail_start(self, why: str) -> None:
        self.last_error = why
        self._note(f"cannot start: {why}")
        self.banner.show_message("fault", f"Cannot start: {why}")
        self._set_state("failed", "not started")

    def stop_run(self) -> None:
        """Stop the loop (0 pA first) and write the recording, on a worker thread."""
        engine = self.engine
        if engine is None or self._finishing is not None:
            return
        self._log_changes()
        self.traces.detach()  # before the shared memory closes (takes the last rows)
        self._log_events()
        self._finishing = _Job("clampcore-finish", engine.finish)
        self._finish_t0 = time.monotonic()
        self.progress.setFormat("writing the recording…")
        self.progress.show()
        self._set_state("stopping", "0 pA, board stopped; writing the recording…")

    def wait_finished(self, timeout_s: float = 30.0) -> Any:
        """Block until a stopping run is written (for scripts and tests); returns its result."""
        job = self._finishing
        if job is not None:
            job.wait(timeout_s)
            self._tick()
        return self.result

    def set_zero_current(self, on: bool = True) -> None:
        """Hold the injected current at 0 pA (True) or give it back to the elements.

        The loop sees it at once (a shared control word it reads every sample).
        """
        changed = self._zero_held != bool(on)
        self._zero_held = bool(on)
        if self.engine is not None and self._finishing is None:
            self.engine.set_zero_current(self._zero_held)
        if changed:
            self._style_zero()
            self._note("current held at 0 pA" if on else "current released to the elements")
        elif self.zero_button.isChecked() != on:
            self._style_zero()

    def _style_zero(self) -> None:
        held = self._zero_held
        self.zero_button.setChecked(held)
        self.zero_button.setText(
            "HELD AT 0 pA: click to release" if held else f"Zero current [{ZERO_SHORTCUT}]"
        )
        colour = "#b00020" if held else "#7a1f1f"
        self.zero_button.setStyleSheet(
            f"QPushButton {{ background: {colour}; color: white; font-weight: bold;"
            " padding: 4px 10px; }"
        )

    @property
    def zero_held(self) -> bool:
        return self._zero_held

    # ------------------------------------------------------------------ the timer
    def _tick(self) -> None:
        """Redraw and poll; the only periodic work of the window."""
        if self._checking is not None and self._checking.done:
            job, self._checking = self._checking, None
            if job.error is not None:
                self._note(f"connect: {job.error}")
                self._set_state("failed", f"no board: {job.error}")
            else:
                self._note(f"connect: {job.result}")
                self._set_state("connected", job.result)
        if self._finishing is not None:
            if self._finishing.done:
                self._finished()
            else:
                self._show_writing()
            return
        engine = self.engine
        if engine is None:
            return
        state = engine.state
        if state == STATE_RUNNING:
            self._ticks += 1
            self.traces.refresh()
            stats = engine.shared.stats.copy()
            health = loop_health(stats, engine.experiment.loop["rate_hz"])
            if self._ticks % _HEALTH_EVERY == 0 or self.tabs.currentWidget() is self.health:
                self.health.update_from(health)
            if self._ticks % _HEALTH_EVERY == 0:  # the measured latency may change the bound
                self._health = health
                shown = self.stability_line
                delay, where = self._delay(engine.experiment)
                if shown.report is None or (delay, where) != (
                    shown.report.delay_samples,
                    shown.delay_from,
                ):
                    self.update_stability()
            self.banner.update_from(health, *self.traces.limit_summary())
            self._log_changes()
            self._log_events()
            elapsed = health["samples"] / engine.experiment.loop["rate_hz"]
            zero = "  ·  0 pA HELD" if self._zero_held else ""
            self._set_state("running", f"{elapsed:.1f} s  ·  {engine.nwb_path.name}{zero}")
        elif state == STATE_STARTING:
            if not engine.running and engine.wait(0):
                self.stop_run()  # the loop process ended before it ran
        elif state in (STATE_STOPPED, STATE_FAILED) or not engine.running:
            self._log_changes()
            self.stop_run()

    def _show_writing(self) -> None:
        """Progress while the recording is written: time so far and the NWB file's size."""
        elapsed = time.monotonic() - self._finish_t0
        nwb = self.engine.nwb_path if self.engine is not None else None
        size = nwb.stat().st_size if nwb is not None and nwb.exists() else 0
        text = f"writing the recording: {elapsed:.0f} s, {size / 1e6:.0f} MB so far"
        if text != self.progress.format():
            self.progress.setFormat(text)

    def _log_events(self) -> None:
        """Events found on the traces, timed, into the Log."""
        for ev in self.traces.take_events():
            self._note(ev.text)

    def _log_changes(self) -> None:
        engine = self.engine
        if engine is None or engine.shared is None:
            return
        rate = engine.experiment.loop["rate_hz"]
        changes = engine.shared.applied_changes(self._changes_logged)
        if changes and self._slot_names is None:
            self._slot_names = _slot_names(engine)
        for ch in changes:
            key = (ch["array"], ch["row"], ch["col"])
            element, field = (self._slot_names or {}).get(key, ("?", "?"))
            self._note(
                f"t = {ch['sample'] / rate:.3f} s: applied {element}.{field} = {ch['value']:g} "
                f"(sample {ch['sample']})"
            )
            self.traces.add_marker(ch["sample"], "param", f"{field} {ch['value']:g}")
            self._changes_logged = ch["number"] + 1

    def _finished(self) -> None:
        job, self._finishing = self._finishing, None
        self.progress.hide()
        self.engine = None
        assert job is not None
        if job.error is not None:
            self.last_error = str(job.error)
            self._note(f"stopping failed: {job.error}")
            self.banner.show_message("fault", f"Stopping failed: {job.error}")
            self._set_state("failed", str(job.error))
        else:
            result = job.result
            self.result = result
            where = f"saved {result.nwb_path}" if result.nwb_path else "no recording written"
            journal = result.journal_path
            if result.nwb_path is not None and journal is not None and journal.exists():
                size = sum(f.stat().st_size for f in journal.rglob("*") if f.is_file())
                where += (
                    f"; its journal ({size / 1e6:.0f} MB) is kept at {journal}: delete it once "
                    "the NWB file is checked, or rebuild the NWB from it with clampcore recover"
                )
            self._note(f"run {self._run_count} ended: {result.exit_reason}; {where}")
            if result.error:
                self.last_error = result.error
                self.banner.show_message("fault", f"The run failed: {result.error.strip()}")
                self._set_state("failed", f"{result.error.strip()[:120]} · {where}")
            else:
                self._set_state("stopped", f"{result.exit_reason} · {where}")
        self.editor.set_experiment(self.experiment)
        self.traces.show_experiment(self.experiment)
        self._health = None
        self._run_override = False
        self.stability_line.override_box.setChecked(False)  # an override is for one run
        self.update_stability()
        if self._pending_open is not None:
            path, self._pending_open = self._pending_open, None
            self._show_file_result(self.load_file(path))

    # ------------------------------------------------------------------ edits
    def _submit(self, target: Target, field: str, value: Any) -> str | None:
        """Validate and apply one field; None when accepted, else why not."""
        section, name = target
        engine = self.engine if self.running else None
        live_here = engine is not None and (
            section == "section" or name in {e["name"] for e in engine.experiment.elements}
        )
        if live_here:
            assert engine is not None
            if section == "section" and name != "loop":
                return f"[{name}] cannot change while running: stop first"
            element = "loop" if section == "section" else name
            guarded = self._stability_check(engine, element, field, value)
            if isinstance(guarded, str):
                return guarded
            # Read before posting: the loop may apply the change at once.
            posted_at = engine.shared.written() if engine.shared is not None else 0
            try:
                engine.change(element, field, value)
            except ExperimentError as exc:
                return str(exc)
            except KeyError as exc:
                return str(exc.args[0]) if exc.args else "cannot change while running"
            except RuntimeError as exc:  # a full mailbox
                return str(exc)
            if guarded is not None:
                self._log_override(engine, guarded, posted_at, element, field, value)
        # The experiment for saving and for the next run, checked by the loader.
        draft = self.experiment.to_dict()
        if section == "section":
            draft.setdefault(name, {})[field] = value
        else:
            for el in draft["element"]:
                if el["name"] == name:
                    el[field] = value
        try:
            checked = load_experiment(draft)
        except ExperimentError as exc:
            if live_here:  # the loop took it; the file cannot: say so rather than diverge
                return f"sent to the loop, but the experiment file refuses it: {exc}"
            return str(exc)
        self._adopt(checked)
        # The lines drawn are those of what runs (or of what will run, when stopped).
        self.traces.update_levels(engine.experiment if engine is not None else self.experiment)
        return None

    def _adopt(self, checked: Experiment) -> None:
        """Take ``checked`` as the current experiment (keeping what to_dict leaves out)."""
        old = self.experiment
        checked.path = old.path
        if not checked.amplifier_given:
            checked.amplifier = dict(old.amplifier)
        self.experiment = checked
        self.editor.experiment = checked  # what a refused or dropped value snaps back to
        self._sync_pulse_box()
        self.update_stability()

    def add_element(self, kind: str, name: str) -> str | None:
        """Add an element with default values; None when added, else why not."""
        try:
            el = validate_element({"kind": kind, "name": name}, len(self.experiment.elements),
                                  self.experiment.dt_ms)  # fmt: skip
            draft = self.experiment.to_dict()
            draft["element"].append(el)
            checked = load_experiment(draft)
        except ExperimentError as exc:
            return str(exc)
        self._adopt(checked)
        self._refresh_editor()
        self._note(f"added {kind} '{name}'" + (" (next run)" if self.running else ""))
        return None

    def set_test_pulse(self, on: bool) -> None:
        """Switch the test pulse (an element, see gui.testpulse) on or off.

        On adds it to the experiment if it has none (a running loop gets it at the next
        start: elements cannot be added to a run); then on and off are its ``enabled``,
        live during a run.
        """
        pulse = next((e for e in self.experiment.elements if e["name"] == testpulse.NAME), None)
        if pulse is None and on:
            draft = self.experiment.to_dict()
            draft["element"].append(dict(testpulse.ELEMENT))
            try:
                checked = load_experiment(draft)
            except ExperimentError as exc:
                self.editor.report(f"no test pulse: {exc}", "")
                self._sync_pulse_box()
                return
            self._adopt(checked)
            self._refresh_editor()
            later = " (from the next run)" if self.running else ""
            self._note(f"test pulse added{later}: {testpulse.describe(testpulse.ELEMENT)}")
        elif pulse is not None and bool(pulse["enabled"]) != on:
            reason = self._submit(("element", testpulse.NAME), "enabled", on)
            if reason:
                self.editor.report(reason, "")
            else:
                self._refresh_editor()
                self._note("test pulse " + ("on" if on else "off"))
        self._sync_pulse_box()

    def _sync_pulse_box(self) -> None:
        pulse = next((e for e in self.experiment.elements if e["name"] == testpulse.NAME), None)
        box = self.traces.readout.pulse_box
        box.blockSignals(True)
        box.setChecked(bool(pulse and pulse["enabled"]))
        box.blockSignals(False)

    def request_remove(self, name: str) -> None:
        """The form's Remove: during a run, ask first (the element is switched off now)."""
        runs_now = (
            self.running
            and self.engine is not None
            and any(e["name"] == name for e in self.engine.experiment.elements)
        )
        if not runs_now:
            self.editor.report(self.remove_element(name), f"removed {name}")
            return
        engine = self.engine

        def remove() -> None:
            if self.engine is not engine or not self.running:
                self.editor.report(self.remove_element(name), f"removed {name}")
                return
            try:  # it would go on injecting until the next start: off now, at a sample boundary
                engine.change(name, "enabled", False)
            except (ExperimentError, KeyError, RuntimeError) as exc:
                self.editor.report(f"cannot switch {name!r} off: {exc}", "")
                return
            self._note(f"switched '{name}' off (removed from the next run)")
            self.editor.report(self.remove_element(name), f"removed {name}; switched off now")

        self._ask(
            f"Remove {name}?",
            f"'{name}' is running. It is switched off now (it injects nothing from the next "
            "sample on) and is left out of the next run. The recording goes on.",
            "Switch off and remove",
            remove,
        )

    def remove_element(self, name: str) -> str | None:
        """Remove an element; None when removed, else why not."""
        draft = self.experiment.to_dict()
        kept = [e for e in draft["element"] if e["name"] != name]
        if len(kept) == len(draft["element"]):
            return f"no element named {name!r}"
        draft["element"] = kept
        try:
            checked = load_experiment(draft)
        except ExperimentError as exc:
            return f"cannot remove {name!r}: {exc}"
        self._adopt(checked)
        self._refresh_editor()
        self._note(f"removed '{name}'" + (" (next run)" if self.running else ""))
        return None

    def _refresh_editor(self) -> None:
        if self.running:
            assert self.engine is not None
            names = {e["name"] for e in self.engine.experiment.elements}
            self.editor.set_experiment(self.experiment, names, running=True)
        else:
            self.editor.set_experiment(self.experiment)
            self.traces.show_experiment(self.experiment)

    # ------------------------------------------------------------------ files
    @property
    def unsaved(self) -> bool:
        """The experiment differs from the file it came from (or was saved to)."""
        return self.experiment.to_dict() != self._saved

    def request_open(self, path: Path | str) -> None:
        """Open ``path`` as the form's Open does: first asks when a run or edits would be lost."""
        path = Path(path)
        consequences = []
        if self.running:
            assert self.engine is not None
            consequences.append(
                f"The run is stopped (0 pA, board stopped) and its recording is written to "
                f"{self.engine.nwb_path}."
            )
        if self.unsaved:
            consequences.append("Unsaved edits to the current experiment are discarded.")
        if not consequences:
            self._show_file_result(self.load_file(path))
            return

        def go() -> None:
            if self.running:
                self._pending_open = path
                self.stop_run()
            else:
                self._show_file_result(self.load_file(path))

        self._ask(f"Open {path.name}?", " ".join(consequences), "Open", go)

    def load_file(self, path: Path | str) -> str | None:
        """Open an experiment file; None when loaded, else why not (no question asked)."""
        if self.running:
            return "stop the run before opening another experiment"
        try:
            exp = load_experiment(Path(path))
        except ExperimentError as exc:
            return str(exc)
        self.experiment = exp
        self.experiment_path = Path(path)
        self._saved = exp.to_dict()
        self._source_text = exp.text
        self.editor.set_experiment(exp)
        self._sync_pulse_box()
        self.traces.clear()  # the last run's traces do not belong to this experiment
        self.traces.show_experiment(exp)
        self.banner.reset()
        self._update_title()
        self.stability_line.override_box.setChecked(False)
        self.update_stability()
        self._note(f"opened {path}")
        return None

    def save_file(self, path: Path | str) -> str | None:
        """Write the experiment (as edited) to ``path``; None when saved, else why not."""
        path = Path(path)
        text = experiment_toml(self.experiment, self._source_text)
        try:
            back = load_experiment(text)  # what is saved must load back to the same
        except ExperimentError as exc:
            return f"not saved: {exc}"
        if back != self.experiment:
            return "not saved: the file would not load back to the same experiment"
        try:
            path.write_text(text, encoding="utf-8")
        except OSError as exc:
            return f"not saved: {exc}"
        self.experiment.path = path
        self.experiment_path = path
        self._saved = self.experiment.to_dict()
        self._source_text = text
        self._update_title()
        self._note(f"saved {path}")
        return None

    def _file_action(self, what: str) -> None:
        """Open or save through a file dialog that does not block the rest of the window."""
        start = str(self.experiment_path or Path.cwd())
        if what == "load":
            self._file_dialog("Open experiment", start, False, self.request_open)
        else:
            self._file_dialog(
                "Save experiment", start, True, lambda p: self._show_file_result(self.save_file(p))
            )

    def _file_dialog(self, title: str, start: str, save: bool, chosen: Any) -> None:
        _close_quietly(self.dialog)
        dialog = QtWidgets.QFileDialog(self, title, start, "Experiment (*.toml)")
        dialog.setAcceptMode(
            QtWidgets.QFileDialog.AcceptMode.AcceptSave
            if save
            else QtWidgets.QFileDialog.AcceptMode.AcceptOpen
        )
        dialog.setFileMode(
            QtWidgets.QFileDialog.FileMode.AnyFile
            if save
            else QtWidgets.QFileDialog.FileMode.ExistingFile
        )
        if save:
            dialog.setDefaultSuffix("toml")
        self._show_modeless(dialog)
        dialog.fileSelected.connect(chosen)
        self.dialog = dialog

    @staticmethod
    def _show_modeless(dialog: QtWidgets.QDialog) -> None:
        """Show ``dialog`` without blocking the window: the zero-current button stays usable."""
        if isinstance(dialog, QtWidgets.QFileDialog):
            # Qt's own dialog: a platform's native one may block the window whatever we ask.
            dialog.setOption(QtWidgets.QFileDialog.Option.DontUseNativeDialog, True)
        dialog.setWindowModality(QtCore.Qt.WindowModality.NonModal)
        dialog.setAttribute(QtCore.Qt.WidgetAttribute.WA_DeleteOnClose)
        dialog.show()

    def _ask(self, title: str, text: str, yes: str, on_yes: Any) -> None:
        """Ask a yes/no question without blocking the window; ``on_yes()`` if confirmed."""
        _close_quietly(self.question)
        box = QtWidgets.QMessageBox(self)
        box.setWindowTitle(title)
        box.setIcon(QtWidgets.QMessageBox.Icon.Question)
        box.setText(title)
        box.setInformativeText(text)
        yes_button = box.addButton(yes, QtWidgets.QMessageBox.ButtonRole.AcceptRole)
        box.addButton(QtWidgets.QMessageBox.StandardButton.Cancel)
        box.setDefaultButton(QtWidgets.QMessageBox.StandardButton.Cancel)

        def answered(button: QtWidgets.QAbstractButton) -> None:
            self.question = None
            if button is yes_button:
                on_yes()

        box.buttonClicked.connect(answered)
        self._show_modeless(box)
        self.question = box

    def answer(self, yes: bool) -> None:
        """Answer the open question (for scripts and tests)."""
        box = self.question
        if box is None:
            raise RuntimeError("no question is open")
        buttons = box.buttons()
        role = QtWidgets.QMessageBox.ButtonRole.AcceptRole
        chosen = next(b for b in buttons if (box.buttonRole(b) == role) == yes)
        chosen.click()

    def _save_here(self) -> None:
        if self.experiment_path is None:
            self._file_action("save")
        else:
            self._show_file_result(self.save_file(self.experiment_path))

    def _show_file_result(self, reason: str | None) -> None:
        if reason:
            self.editor.message.setStyleSheet("color: #ff7f7f;")
            self.editor.message.setText(reason)
            self._note(reason)

    def _choose_record_dir(self) -> None:
        _close_quietly(self.dialog)
        dialog = QtWidgets.QFileDialog(self, "Record into", self.record_dir.text())
        dialog.setFileMode(QtWidgets.QFileDialog.FileMode.Directory)
        dialog.setOption(QtWidgets.QFileDialog.Option.ShowDirsOnly, True)
        self._show_modeless(dialog)
        dialog.fileSelected.connect(self.record_dir.setText)
        self.dialog = dialog

    # ------------------------------------------------------------------ closing
    def request_quit(self) -> None:
        """Quit (Ctrl+Q, the window's close button): asks first if a run or edits would go."""
        consequences = []
        if self.running:
            assert self.engine is not None
            consequences.append(
                "The run is stopped (0 pA, board stopped) and its recording is written to "
                f"{self.engine.nwb_path} before the window closes."
            )
        if self.unsaved:
            consequences.append("Unsaved edits to the experiment are discarded.")
        if not consequences:
            self._close_confirmed = True
            self.close()
            return

        def go() -> None:
            self._close_confirmed = True
            self.close()

        self._ask("Quit clampcore?", " ".join(consequences), "Quit", go)

    def closeEvent(self, event: QtGui.QCloseEvent) -> None:
        """Closing the window stops a run cleanly (0 pA, board stopped, NWB written).

        Closed by the user (the title bar's button) during a run or with unsaved
        edits, it asks first; closed by a program (``close()``), it does not.
        """
        if event.spontaneous() and not self._close_confirmed and (self.running or self.unsaved):
            event.ignore()
            self.request_quit()
            return
        app = QtWidgets.QApplication.instance()
        if app is not None:
            app.removeEventFilter(self._zero_filter)
        _close_quietly(self.question)
        _close_quietly(self.dialog)
        self.timer.stop()
        if self.engine is not None:
            if self._finishing is None:
                self.traces.detach()
                self._finishing = _Job("clampcore-finish", self.engine.finish)
            self._finishing.wait(30.0)
            self._tick()
        super().closeEvent(event)


def default_record_dir() -> Path:
    """Where recordings go unless told: ``recordings`` in the user's data folder.

    (platformdirs: ~/.local/share/clampcore/recordings on Linux, the platform's
    equivalent elsewhere.)
    """
    import platformdirs

    return platformdirs.user_data_path("clampcore") / "recordings"


class _ElidedLabel(QtWidgets.QLabel):
    """A one-line status that never widens the window: cut with "…" and whole in its tooltip."""

    def __init__(self) -> None:
        super().__init__()
        self._full = ""
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Preferred
        )
        self.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)

    def setText(self, text: str) -> None:
        self._full = text
        self.setToolTip(text)
        self._fit()

    def text(self) -> str:
        return self._full

    def resizeEvent(self, event: QtGui.QResizeEvent) -> None:
        super().resizeEvent(event)
        self._fit()

    def _fit(self) -> None:
        metrics = self.fontMetrics()
        shown = metrics.elidedText(self._full, QtCore.Qt.TextElideMode.ElideMiddle, self.width())
        super().setText(shown)

    def is_elided(self) -> bool:
        return super().text() != self._full


def _close_quietly(widget: QtWidgets.QWidget | None) -> None:
    """Close a dialog that may already be closed (and deleted by Qt)."""
    if widget is not None:
        with contextlib.suppress(RuntimeError):
            widget.close()


def _hello_text(link: Any, where: str) -> str:
    try:
        hello = link.handshake()
    finally:
        link.close()
    return (
        f"{where}: {hello.identity}, {hello.adc_bits}-bit ADC / {hello.dac_bits}-bit DAC, "
        f"up to {hello.max_rate_hz / 1000:g} kHz"
    )


def _free_name(folder: Path, stem: str) -> Path:
    """``folder/stem.nwb``, or ``stem-2.nwb``… if a recording by that name exists."""
    k = 1
    while True:
        name = stem if k == 1 else f"{stem}-{k}"
        if not (folder / f"{name}.nwb").exists() and not (folder / f"{name}.journal").exists():
            return folder / f"{name}.nwb"
        k += 1
