"""Dialogs and questions of the window: the goals dialog, recovery offers, plain-text questions."""

from __future__ import annotations

from pathlib import Path

from PySide6 import QtCore, QtWidgets

from ..casefile import parse_json, read_text, validate
from .. import MMHG_PER_KPA
from .common import GOAL_FIELDS, RECOVERY_GLOB, TRIALS, _process_alive, data_dir


class GoalsDialog(QtWidgets.QDialog):
    """Per-case goals and limits (the case file's ``goals``); defaults are the published ones."""

    def __init__(self, goals: dict, parent=None, units: str = "mmHg"):
        super().__init__(parent)
        self.setWindowTitle("Goals and limits of this case")
        form = QtWidgets.QFormLayout(self)
        self.fields = {}
        self.original = dict(goals)
        self.defaults = {}
        self.shown = {}  # the values as first shown, in the window's unit: unchanged ones are kept as they were
        self.kpa = set()  # fields shown in kPa (gas pressures when the window shows kPa)
        for key, label, unit, default, lo, hi, step, dec in GOAL_FIELDS:
            self.defaults[key] = list(default) if isinstance(default, tuple) else default
            value = goals.get(key, default)
            if unit == "mmHg" and units == "kPa":
                self.kpa.add(key)
                unit, lo, hi, step, dec = "kPa", lo / MMHG_PER_KPA, hi / MMHG_PER_KPA, 0.1, 1
            spins = []
            for v in (value if isinstance(default, tuple) else (value,)):
                sp = QtWidgets.QDoubleSpinBox()
                sp.setDecimals(dec)
                sp.setRange(lo, hi)
                sp.setSingleStep(step)
                sp.setValue(float(v) / MMHG_PER_KPA if key in self.kpa else float(v))
                sp.setSuffix(f" {unit}" if unit and unit != "fraction" else "")
                spins.append(sp)
            row = QtWidgets.QHBoxLayout()
            for i, sp in enumerate(spins):
                if i:
                    row.addWidget(QtWidgets.QLabel("to"))
                row.addWidget(sp)
            form.addRow(label, row)
            self.fields[key] = spins
            self.shown[key] = [sp.value() for sp in spins]
        buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Ok | QtWidgets.QDialogButtonBox.Cancel)
        buttons.accepted.connect(self._accept)
        buttons.rejected.connect(self.reject)
        self.error = QtWidgets.QLabel("")
        form.addRow(self.error)
        form.addRow(buttons)

    def goals(self) -> dict:
        """The case's goals after the dialog: a goal the case had, or one the user moved from its
        default. Pressing OK without editing leaves the goals exactly as they were."""
        out = dict(self.original)
        for key, spins in self.fields.items():
            if [sp.value() for sp in spins] == self.shown[key]:
                continue  # not edited: the goal stays exactly as it was (no unit round trip)
            if key in self.kpa:
                vals = [round(sp.value() * MMHG_PER_KPA, 1) for sp in spins]
            else:
                vals = [round(sp.value(), 4) for sp in spins]
            value = vals if len(vals) == 2 else vals[0]
            if key in self.original or value != self.defaults[key]:
                out[key] = value
        return out

    def _accept(self):
        for key, label, *_ in GOAL_FIELDS:
            spins = self.fields[key]
            if len(spins) == 2 and spins[0].value() >= spins[1].value():
                self.error.setText(f"\u2716 {label}: the low end {spins[0].value():g} must be below the high end "
                                   f"{spins[1].value():g}")
                return
        self.accept()


def read_recoveries() -> list[tuple[Path, dict]]:
    """Recovery files left by windows that did not close cleanly (their process is gone), newest first,
    each with its document (case checked again). Files of windows still running are not offered."""
    found = []
    for p in sorted(data_dir().glob(RECOVERY_GLOB), key=lambda q: q.stat().st_mtime, reverse=True):
        try:
            doc = parse_json(read_text(p, str(p)), str(p))
            if not isinstance(doc, dict) or doc.get("format") != "ventcast.recovery" or _process_alive(doc.get("pid")):
                continue
            doc["case"] = validate(doc["case"])
            if not isinstance(doc.get("trials"), dict) or doc.get("active", "A") not in TRIALS:
                continue
            found.append((p, doc))
        except (OSError, ValueError, KeyError, TypeError):
            continue
    return found


def ask_recovery(window, doc: dict, more: int) -> str:
    """'recover', 'discard' or 'later' for one recovery document, naming its case. Tests replace this."""
    text = (f"Ventcast did not close cleanly while {doc.get('name') or 'a case'} had unsaved work "
            f"(autosaved {doc.get('saved_at') or 'earlier'}). Recover that case and its trials as they were on "
            f"screen?")
    if more:
        text += f" ({more} more unsaved case(s) will be offered next.)"
    return ask_plain(window, QtWidgets.QMessageBox.Question, "Recover unsaved work?", text,
                     [("Recover", QtWidgets.QMessageBox.AcceptRole, "recover"),
                      ("Discard it", QtWidgets.QMessageBox.DestructiveRole, "discard"),
                      ("Ask me next time", QtWidgets.QMessageBox.RejectRole, "later")])


def ask_plain(parent, icon, title: str, text: str, buttons):
    """A modal question in plain text (it may quote file names and case labels: never rich text);
    ``buttons`` are (label, role, answer); the answer of the button pressed (the last one if none)."""
    box = QtWidgets.QMessageBox(icon, title, text, parent=parent)
    box.setTextFormat(QtCore.Qt.PlainText)
    made = [(box.addButton(label, role), answer) for label, role, answer in buttons]
    box.exec()
    return next((answer for button, answer in made if box.clickedButton() is button), made[-1][1])
