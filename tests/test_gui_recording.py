"""Where the window records (issue 15): a default folder in the user's data folder, the
full path shown and copyable, progress while the recording is written, the journal's
fate said.

Reference: platformdirs' documented Linux location, $XDG_DATA_HOME/<app> (the XDG Base
Directory Specification), set here to a temporary folder.
"""

from __future__ import annotations

import pytest

pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")

from clampcore.gui.window import TuningWindow, default_record_dir
from guikit import LEAK_EXPERIMENT, start
from PySide6 import QtWidgets

from clampcore.engine import RunOptions

pytestmark = pytest.mark.gui


def test_default_folder_full_path_progress_and_journal(qtbot, tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "data"))
    # XDG Base Directory Specification: user data under $XDG_DATA_HOME/<app>.
    assert default_record_dir() == tmp_path / "data" / "clampcore" / "recordings"
    window = TuningWindow(LEAK_EXPERIMENT, port="sim", options=RunOptions(rig_clock="lockstep"))
    qtbot.addWidget(window)
    window.show()
    assert window.record_dir.text() == str(default_record_dir())
    start(qtbot, window)
    nwb = window.engine.nwb_path
    assert nwb.parent == default_record_dir()
    assert window.recording_path.text() == str(nwb)  # the whole path, not a name
    copy = next(b for b in window.findChildren(QtWidgets.QPushButton) if b.text() == "Copy path")
    copy.click()
    assert QtWidgets.QApplication.clipboard().text() == str(nwb)
    window.stop_run()
    assert window.progress.isVisible()  # shown while the recording is written
    window._tick()
    assert "writing the recording" in window.progress.format()
    result = window.wait_finished(60.0)
    assert not window.progress.isVisible() and result.nwb_path == nwb and nwb.exists()
    said = window.state_detail.text()
    assert f"saved {nwb}" in said
    if result.journal_path is not None and result.journal_path.exists():
        assert "journal" in said and str(result.journal_path) in said
    else:
        assert "journal" not in said
