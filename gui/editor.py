"""The parameter editor: every section and element of an experiment, field by field.

Each field shows its value, its unit and whether it can change while the loop
runs. A value typed in counts only when Enter is pressed: it is parsed by
``parse_value`` and handed to the window's ``submit`` callback, which validates
it with the experiment loader's rules and either sends it to the running loop or
keeps it for the next run. A refused value is not sent: the field goes back to
the value in force and is marked, with the reason beside it. Leaving a field
without Enter applies nothing and also puts back the value in force, so the form
always shows what the loop holds. Elements can be switched on and off, removed,
and added from the list of kinds.

Public names: ``ParameterEditor``, ``parse_value``, ``format_value``, ``unit_of``,
``Target``, ``SECTIONS``.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from typing import Any

from PySide6 import QtCore, QtGui, QtWidgets

from clampcore.experiment import Experiment
from clampcore.schema import (
    COMMON_FIELDS,
    ELEMENT_FIELDS,
    KINDS,
    SECTION_FIELDS,
    Field,
    field_applies,
)

# Sections shown in the editor (session/subject/electrode are kept as loaded).
SECTIONS = ("loop", "cell", "amplifier")

# A field is addressed as ("section", name) or ("element", name).
Target = tuple[str, str]

# Units as they appear at the end of field names (DEVELOPERS.md: units in names).
_UNITS = {
    "mV": "mV",
    "nS": "nS",
    "pA": "pA",
    "pF": "pF",
    "ms": "ms",
    "hz": "Hz",
    "mM": "mM",
    "MOhm": "MΩ",
    "mS_per_cm2": "mS/cm²",
    "uF_per_cm2": "µF/cm²",
    "pA_per_V": "pA/V",
    "mV_per_V": "mV/V",
    "samples": "samples",
}

_INVALID_STYLE = "background: #5a1a1a; color: #ffd0d0; border: 1px solid #ff5a5a;"
_NEXT_RUN_STYLE = "color: #ffb347;"


def unit_of(field_name: str) -> str:
    """The unit carried by a field's name ("" when it has none)."""
    for suffix in sorted(_UNITS, key=len, reverse=True):
        if field_name.endswith("_" + suffix):
            return _UNITS[suffix]
    return ""


def unit_label(field: Field) -> str:
    """The unit shown beside a field: its unit, or what a number without one is."""
    unit = unit_of(field.name)
    if unit or field.rule in ("choice", "bool", "text", "ref"):
        return unit
    return {"fraction": "fraction", "int": "count" if field.name != "seed" else "—"}.get(
        field.rule, "—"
    )


def parse_value(field: Field, text: str) -> Any:
    """The value that ``text`` means for ``field``; ``ValueError`` says why it means none.

    Range rules are not checked here (the loader's rules are, by the caller).
    """
    text = text.strip()
    rule = field.rule
    if rule in ("real", "positive", "nonnegative", "fraction"):
        if not text:
            raise ValueError("needs a number")
        try:
            return float(text)
        except ValueError:
            raise ValueError(f"{text!r} is not a number") from None
    if rule == "int":
        if not re.fullmatch(r"[+-]?\d+", text):
            raise ValueError(f"{text!r} is not a whole number")
        return int(text)
    if rule == "bool":
        low = text.lower()
        if low in ("true", "1", "yes", "on"):
            return True
        if low in ("false", "0", "no", "off"):
            return False
        raise ValueError(f"{text!r} is not true or false")
    if rule == "times":
        parts = [p for p in re.split(r"[,\s]+", text.strip("[] ")) if p]
        try:
            return [float(p) for p in parts]
        except ValueError:
            raise ValueError(f"{text!r} is not a list of numbers (e.g. 10, 20.5, 40)") from None
    return text  # choice, text, ref: checked by the loader's rules


def format_value(field: Field, value: Any) -> str:
    """How a value is shown in its editor."""
    if field.rule == "times":
        return ", ".join(f"{t:g}" for t in value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return f"{value:.12g}"
    return str(value)


# submit(target, field, value) -> None when accepted, else the reason it was refused.
SubmitFn = Callable[[Target, str, Any], str | None]


class _FieldEdit(QtWidgets.QLineEdit):
    """A text field that reports losing focus (other than to its own context menu)."""

    left = QtCore.Signal()

    def focusOutEvent(self, event: QtGui.QFocusEvent) -> None:
        super().focusOutEvent(event)
        if event.reason() != QtCore.Qt.FocusReason.PopupFocusReason:
            self.left.emit()


class _FieldRow:
    """The widgets of one field."""

    def __init__(
        self, field: Field, widget: QtWidgets.QWidget, note: QtWidgets.QLabel, others: tuple
    ) -> None:
        self.field = field
        self.widget = widget
        self.note = note
        self.others = others  # the name and unit labels: shown and hidden with the field
        self.invalid_reason: str | None = None
        self.shown_text = ""


class ParameterEditor(QtWidgets.QWidget):
    """A scrollable list of sections and elements with an editor per field."""

    fileAction = QtCore.Signal(str)  # "load" / "save" pressed

    def __init__(self, submit: SubmitFn, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self._submit = submit
        self._rows: dict[tuple[Target, str], _FieldRow] = {}
        self.experiment: Experiment | None = None
        self._running_names: set[str] = set()
        self._running = False

        outer = QtWidgets.QVBoxLayout(self)
        outer.setContentsMargins(4, 4, 4, 4)
        files = QtWidgets.QHBoxLayout()
        self.load_button = QtWidgets.QPushButton("Open experiment…")
        self.save_button = QtWidgets.QPushButton("Save experiment…")
        self.load_button.clicked.connect(lambda: self.fileAction.emit("load"))
        self.save_button.clicked.connect(lambda: self.fileAction.emit("save"))
        files.addWidget(self.load_button)
        files.addWidget(self.save_button)
        files.addStretch(1)
        outer.addLayout(files)

        self.notice = QtWidgets.QLabel()
        self.notice.setWordWrap(True)
        self.notice.setStyleSheet(_NEXT_RUN_STYLE)
        self.notice.hide()
        outer.addWidget(self.notice)

        self.scroll = QtWidgets.QScrollArea()
        self.scroll.setWidgetResizable(True)
        outer.addWidget(self.scroll, 1)
        self._body: QtWidgets.QWidget | None = None

        add = QtWidgets.QHBoxLayout()
        add.addWidget(QtWidgets.QLabel("Add"))
        self.add_kind = QtWidgets.QComboBox()
        self.add_kind.addItems(list(KINDS))
        add.addWidget(self.add_kind)
        add.addWidget(QtWidgets.QLabel("named"))
        self.add_name = QtWidgets.QLineEdit()
        self.add_name.setPlaceholderText("name")
        add.addWidget(self.add_name, 1)
        self.add_button = QtWidgets.QPushButton("Add element")
        add.addWidget(self.add_button)
        outer.addLayout(add)
        self.add_kind.currentTextChanged.connect(lambda _k: self._suggest_name())

        self.message = QtWidgets.QLabel()
        self.message.setWordWrap(True)
        self.message.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        outer.addWidget(self.message)

        # The window connects these (structure edits go through it).
        self.add_requested: Callable[[str, str], str | None] | None = None
        self.remove_requested: Callable[[str], str | None] | None = None
        self.add_button.clicked.connect(self._on_add)

    # ------------------------------------------------------------------ building
    def set_experiment(
        self, experiment: Experiment, running_names: set[str] | None = None, running: bool = False
    ) -> None:
        """Show ``experiment``; while ``running``, elements in ``running_names`` edit the loop."""
        self.experiment = experiment
        self._running = running
        self._running_names = set(running_names or ())
        self._rows.clear()
        body = QtWidgets.QWidget()
        col = QtWidgets.QVBoxLayout(body)
        col.setContentsMargins(2, 2, 2, 2)
        # The loop first (thresholds and the current limit), then the elements, then
        # the model cell and the amplifier, which rarely change during a session.
        groups = [("loop", None)] + [(None, el) for el in experiment.elements]
        groups += [("cell", None), ("amplifier", None)]
        for section, el in groups:
            if section is not None:
                values = getattr(experiment, section)
                title = f"[{section}]"
                col.addWidget(
                    self._group(("section", section), title, SECTION_FIELDS[section], values)
                )
            else:
                fields = (*COMMON_FIELDS, *ELEMENT_FIELDS[el["kind"]])
                title = f"{el['name']}  ·  {el['kind']}"
                col.addWidget(self._group(("element", el["name"]), title, fields, el))
        col.addStretch(1)
        self.scroll.setWidget(body)
        self._body = body
        self._suggest_name()
        self._update_notice()

    def _update_notice(self) -> None:
        if not self._running or self.experiment is None:
            self.notice.hide()
            return
        names = {e["name"] for e in self.experiment.elements}
        added = sorted(names - self._running_names)
        removed = sorted(self._running_names - names)
        text = (
            "Running: live fields go to the loop at once; fields marked 'fixed' and "
            "added or removed elements take effect at the next start."
        )
        if added:
            text += f" Added for the next run: {', '.join(added)}."
        if removed:
            text += f" Removed for the next run (still running now): {', '.join(removed)}."
        self.notice.setText(text)
        self.notice.show()

    def _group(
        self, target: Target, title: str, fields: tuple[Field, ...], values: dict[str, Any]
    ) -> QtWidgets.QGroupBox:
        box = QtWidgets.QGroupBox(title)
        box.setObjectName(f"{target[0]}:{target[1]}")
        grid = QtWidgets.QGridLayout(box)
        grid.setContentsMargins(6, 4, 6, 4)
        grid.setVerticalSpacing(2)
        is_element = target[0] == "element"
        new_element = is_element and self._running and target[1] not in self._running_names
        row = 0
        if is_element:
            header = QtWidgets.QHBoxLayout()
            state = QtWidgets.QLabel("new: starts with the next run" if new_element else "")
            state.setStyleSheet(_NEXT_RUN_STYLE)
            header.addWidget(state)
            header.addStretch(1)
            remove = QtWidgets.QPushButton("Remove")
            remove.setObjectName(f"remove:{target[1]}")
            remove.setToolTip(
                "Remove this element from the experiment (takes effect at the next start)"
            )
            remove.clicked.connect(lambda _=False, n=target[1]: self._on_remove(n))
            header.addWidget(remove)
            grid.addLayout(header, row, 0, 1, 4)
            row += 1
        for f in fields:
            # While running, only live fields of elements the loop runs can change.
            editable = not self._running or new_element or f.live
            name = QtWidgets.QLabel(f.name)
            name.setToolTip(_describe(f))
            widget = self._field_widget(target, f, values.get(f.name, f.default), editable)
            unit = QtWidgets.QLabel(unit_label(f))
            if not unit_of(f.name):
                unit.setToolTip("no unit")
            note = QtWidgets.QLabel("")
            if self._running and not new_element:
                note.setText("live" if editable else "fixed")
                note.setToolTip(
                    "changes are applied by the running loop at a sample boundary"
                    if editable
                    else "cannot change while running: takes effect at the next start"
                )
            note.setStyleSheet("color: #8a9099;")
            grid.addWidget(name, row, 0)
            grid.addWidget(widget, row, 1)
            grid.addWidget(unit, row, 2)
            grid.addWidget(note, row, 3)
            self._rows[(target, f.name)] = _FieldRow(f, widget, note, (name, unit))
            self._rows[(target, f.name)].shown_text = format_value(f, values.get(f.name, f.default))
            row += 1
        grid.setColumnStretch(1, 1)
        self._show_applicable(target, values)
        return box

    def _show_applicable(self, target: Target, values: dict[str, Any], keep: str = "") -> None:
        """Show only the fields that apply to the chosen kinetics/source/waveform/model.

        ``keep``: a field just edited stays in view (it is about to apply).
        """
        for (t, name), row in self._rows.items():
            if t == target:
                kept = name == keep and not row.widget.isHidden()
                on = kept or field_applies(row.field, values)
                for w in (row.widget, row.note, *row.others):
                    w.setHidden(not on)

    def is_shown(self, target: Target | str, field_name: str) -> bool:
        """Whether the field is on the form (it applies to the element's current choices)."""
        return not self._row(target, field_name).widget.isHidden()

    def _field_widget(
        self, target: Target, f: Field, value: Any, editable: bool
    ) -> QtWidgets.QWidget:
        key = f"{target[1]}.{f.name}"
        if f.rule == "bool":
            w = QtWidgets.QCheckBox("on" if f.name == "enabled" else "")
            w.setChecked(bool(value))
            w.setEnabled(editable)
            w.toggled.connect(lambda on, t=target, n=f.name: self._send(t, n, on, None))
        elif f.rule == "choice":
            w = QtWidgets.QComboBox()
            w.addItems(list(f.choices))
            w.setCurrentText(str(value))
            w.setEnabled(editable)
            w.activated.connect(
                lambda _i, t=target, n=f.name, box=w: self._send(t, n, box.currentText(), None)
            )
        else:
            w = _FieldEdit(format_value(f, value))
            w.setReadOnly(not editable)
            if not editable:
                w.setStyleSheet("color: #8a9099;")
            # Only Enter applies; leaving the field puts back the value in force.
            w.returnPressed.connect(lambda t=target, n=f.name, e=w: self._on_text(t, n, e))
            w.left.connect(lambda t=target, n=f.name, e=w: self._on_leave(t, n, e))
        w.setObjectName(key)
        w.setToolTip(_describe(f))
        return w

    # ------------------------------------------------------------------ access (also for tests)
    def widget(self, target: Target | str, field_name: str) -> QtWidgets.QWidget:
        """The editor widget of ``field_name`` of ``target`` (an element name or a target)."""
        return self._row(target, field_name).widget

    def is_invalid(self, target: Target | str, field_name: str) -> bool:
        return self._row(target, field_name).invalid_reason is not None

    def invalid_reason(self, target: Target | str, field_name: str) -> str | None:
        return self._row(target, field_name).invalid_reason

    def enter_text(self, target: Target | str, field_name: str, text: str) -> str | None:
        """Type ``text`` into a field and press Enter; returns the refusal reason or None."""
        w = self.widget(target, field_name)
        if not isinstance(w, QtWidgets.QLineEdit):
            raise TypeError(f"{field_name} is not a text field")
        w.setText(text)
        self._on_text(_as_target(target, self.experiment), field_name, w)
        return self.invalid_reason(target, field_name)

    def _row(self, target: Target | str, field_name: str) -> _FieldRow:
        t = _as_target(target, self.experiment)
        try:
            return self._rows[(t, field_name)]
        except KeyError:
            raise KeyError(f"no field {field_name!r} of {t[1]!r} in the editor") from None

    # ------------------------------------------------------------------ edits
    def _on_text(self, target: Target, field_name: str, edit: QtWidgets.QLineEdit) -> None:
        row = self._rows.get((target, field_name))
        if row is None or edit.isReadOnly():
            return
        text = edit.text()
        if text == row.shown_text:
            return  # nothing changed
        try:
            value = parse_value(row.field, text)
        except ValueError as exc:
            self._mark(target, field_name, str(exc), text)
            self._restore(target, field_name)
            return
        self._send(target, field_name, value, text)

    def _on_leave(self, target: Target, field_name: str, edit: QtWidgets.QLineEdit) -> None:
        """Focus left a field: whatever was typed without Enter is dropped, not applied."""
        row = self._rows.get((target, field_name))
        if row is None or edit.isReadOnly() or edit.text() == row.shown_text:
            return
        dropped = edit.text()
        self._restore(target, field_name)
        self.message.setStyleSheet(_NEXT_RUN_STYLE)
        self.message.setText(
            f"Not applied: {target[1]}.{field_name} '{dropped}' (press Enter to apply); "
            f"it stays {row.shown_text}"
        )

    def _send(self, target: Target, field_name: str, value: Any, text: str | None) -> None:
        reason = self._submit(target, field_name, value)
        row = self._rows.get((target, field_name))
        if reason is not None:
            self._mark(target, field_name, reason, text)
            self._restore(target, field_name)  # the form shows what is in force
            # A refusal that names another field (a train source needs its times): show it.
            for other in re.findall(r"field '(\w+)'", reason):
                needed = self._rows.get((target, other))
                if needed is not None and other != field_name:
                    for w in (needed.widget, needed.note, *needed.others):
                        w.setHidden(False)
            return
        if row is not None:
            row.shown_text = text if text is not None else format_value(row.field, value)
        self._mark(target, field_name, None)
        if self.experiment is not None:
            exp = self.experiment
            values = getattr(exp, target[1]) if target[0] == "section" else exp.element(target[1])
            self._show_applicable(target, values, keep=field_name)
        self.message.setStyleSheet("")
        self.message.setText(
            f"{target[1]}.{field_name} = {format_value(row.field, value) if row else value}"
        )

    def _restore(self, target: Target, field_name: str) -> None:
        """Show the value in force again (what the loop holds, or will start with)."""
        row = self._rows[(target, field_name)]
        exp = self.experiment
        if exp is None:
            return
        values = getattr(exp, target[1]) if target[0] == "section" else exp.element(target[1])
        value = values.get(field_name, row.field.default)
        w = row.widget
        w.blockSignals(True)
        if isinstance(w, QtWidgets.QCheckBox):
            w.setChecked(bool(value))
        elif isinstance(w, QtWidgets.QComboBox):
            w.setCurrentText(str(value))
        elif isinstance(w, QtWidgets.QLineEdit):
            row.shown_text = format_value(row.field, value)
            w.setText(row.shown_text)
        w.blockSignals(False)

    def _mark(
        self, target: Target, field_name: str, reason: str | None, text: str | None = None
    ) -> None:
        row = self._rows.get((target, field_name))
        if row is None:
            return
        row.invalid_reason = reason
        w = row.widget
        w.setProperty("invalid", reason is not None)
        if reason is None:
            w.setStyleSheet(
                ""
                if not (isinstance(w, QtWidgets.QLineEdit) and w.isReadOnly())
                else "color: #8a9099;"
            )
            w.setToolTip(_describe(row.field))
            row.note.setStyleSheet("color: #8a9099;")
            if row.note.text().startswith("refused"):
                row.note.setText("live" if self._running else "")
        else:
            typed = f" '{text}'" if text is not None else ""
            w.setStyleSheet(_INVALID_STYLE)
            w.setToolTip(f"refused{typed}, not sent: {reason}")
            row.note.setText("refused")
            row.note.setToolTip(reason)
            row.note.setStyleSheet("color: #ff5a5a; font-weight: bold;")
            self.message.setStyleSheet("color: #ff7f7f;")
            self.message.setText(
                f"Refused, not sent: {target[1]}.{field_name}{typed}: {reason} "
                "(the field shows the value in force)"
            )

    def _suggest_name(self) -> None:
        if self.experiment is None:
            return
        kind = self.add_kind.currentText()
        names = {e["name"] for e in self.experiment.elements}
        k = 1
        while f"{kind}_{k}" in names:
            k += 1
        self.add_name.setText(f"{kind}_{k}")

    def _on_add(self) -> None:
        if self.add_requested is None:
            return
        name = self.add_name.text().strip()  # before the rebuilt form suggests the next name
        reason = self.add_requested(self.add_kind.currentText(), name)
        self.report(reason, f"added {name}")
        if reason is None:
            self.focus_element(name)

    def _on_remove(self, name: str) -> None:
        if self.remove_requested is not None:
            self.remove_requested(name)  # the window asks first during a run, then reports

    def focus_element(self, name: str) -> None:
        """Scroll to element ``name`` and put the cursor in its first editable field."""
        if self._body is None:
            return
        box = self._body.findChild(QtWidgets.QGroupBox, f"element:{name}")
        if box is None:
            return
        self._body.adjustSize()
        self.scroll.ensureWidgetVisible(box, 0, 0)
        for (target, _field), row in self._rows.items():
            w = row.widget
            mine = target == ("element", name)
            if mine and isinstance(w, QtWidgets.QLineEdit) and not w.isReadOnly():
                w.setFocus(QtCore.Qt.FocusReason.OtherFocusReason)
                w.selectAll()
                return

    def report(self, reason: str | None, done: str) -> None:
        """Say below the form that ``done`` happened, or why not (``reason``)."""
        if reason:
            self.message.setStyleSheet("color: #ff7f7f;")
            self.message.setText(f"Refused: {reason}")
        else:
            self.message.setStyleSheet("")
            suffix = " (takes effect at the next start)" if self._running else ""
            self.message.setText(done + suffix)


def _as_target(target: Target | str, experiment: Experiment | None) -> Target:
    if isinstance(target, tuple):
        return target
    if target in SECTIONS and (
        experiment is None or target not in {e["name"] for e in experiment.elements}
    ):
        return ("section", target)
    return ("element", target)


def _describe(f: Field) -> str:
    rules = {
        "real": "any number",
        "positive": "greater than 0" + (" (inf allowed)" if f.allow_inf else ""),
        "nonnegative": "0 or more",
        "fraction": "in (0, 1]",
        "int": "whole number, 0 or more",
        "choice": "one of " + ", ".join(f.choices),
        "bool": "on or off",
        "text": "text",
        "ref": "a name",
        "times": "times in ms, ascending, separated by commas",
    }
    live = "can change while running" if f.live else "fixed while running"
    doc = f"{f.doc}. " if f.doc else ""
    return f"{doc}{rules.get(f.rule, f.rule)}; default {f.default!r}; {live}"
