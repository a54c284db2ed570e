"""The tuning window (optional ``gui`` extra: PySide6 and pyqtgraph).

Modules: ``gui.app`` (the ``clampcore gui`` command), ``gui.window`` (the main
window), ``gui.traces`` (live plots), ``gui.editor`` (parameter editor),
``gui.health`` (loop health and alarms). Importing this package imports no Qt.

Public names: none here; see the modules.
"""
