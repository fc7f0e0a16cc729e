"""The main window's menus, shortcuts and Help boxes."""

from __future__ import annotations

from html import escape

from PySide6 import QtGui, QtWidgets

from .. import CAUTION, version
from ..report import SOURCES
from .common import SHORTCUTS, TRIALS


def build_menus(self) -> None:
    """File, Edit, View and Help menus of the main window ``self``, with their shortcuts."""
    bar = self.menuBar()
    m = bar.addMenu("&File")
    self.recent_menu = QtWidgets.QMenu("Open recent", self)
    for text, seq, slot in (("&New case...", QtGui.QKeySequence.New, self.new_case_dialog),
                            ("&Open...", QtGui.QKeySequence.Open, self.open_dialog),
                            ("&Save", QtGui.QKeySequence.Save, self.save),
                            ("Save &as...", QtGui.QKeySequence("Ctrl+Shift+S"), self.save_as)):
        a = m.addAction(text)
        a.setShortcut(seq)
        a.triggered.connect(slot)
    m.addMenu(self.recent_menu)
    m.addSeparator()
    m.addAction("Import blood gases from FHIR...").triggered.connect(self.import_fhir_dialog)
    m.addAction("Export report (PDF)...").triggered.connect(self.export_report_dialog)
    m.addAction("Export courses and observations (CSV)...").triggered.connect(self.export_csv_dialog)
    m.addAction("Export charts (PNG and SVG)...").triggered.connect(self.export_charts_dialog)
    demos = m.addMenu("Open demo case")
    from ..casefile import DEMO_NAMES
    for name in DEMO_NAMES:
        demos.addAction(name).triggered.connect(lambda _c=False, n=name: self.open_demo(n))
    m.addSeparator()
    q = m.addAction("&Quit")
    q.setShortcut(QtGui.QKeySequence("Ctrl+Q"))
    q.triggered.connect(self.close)
    e = bar.addMenu("&Edit")
    u = self.undo_stack.createUndoAction(self, "Undo")
    u.setShortcut(QtGui.QKeySequence("Ctrl+Z"))
    r = self.undo_stack.createRedoAction(self, "Redo")
    r.setShortcut(QtGui.QKeySequence("Ctrl+Shift+Z"))
    e.addAction(u)
    e.addAction(r)
    gas = e.addAction("Add blood gas...")
    gas.setShortcut(QtGui.QKeySequence("Ctrl+G"))
    gas.triggered.connect(self.add_gas_dialog)
    apply_ = e.addAction("Apply the trial to the patient...")
    apply_.setShortcut(QtGui.QKeySequence("Ctrl+Shift+A"))
    apply_.triggered.connect(self.apply_trial_dialog)
    reset = e.addAction("Reset trial to current")
    reset.setShortcut(QtGui.QKeySequence("Ctrl+R"))
    reset.triggered.connect(self.reset_trial)
    for i, t in enumerate(TRIALS):
        a = e.addAction(f"Edit Trial {t}")
        a.setShortcut(QtGui.QKeySequence(f"Ctrl+{i + 1}"))
        a.triggered.connect(lambda _c=False, i=i: self.trial_tabs.setCurrentIndex(i))
    v = bar.addMenu("&View")
    self.kpa_action = v.addAction("Pressures of gases in kPa")
    self.kpa_action.setCheckable(True)
    self.kpa_action.setChecked(self.units == "kPa")
    self.kpa_action.setShortcut(QtGui.QKeySequence("Ctrl+K"))
    self.kpa_action.toggled.connect(lambda on: self.set_units("kPa" if on else "mmHg"))
    self.sao2_action = v.addAction("Oxygen chart shows SpO2 (the model's SaO2, in %)")
    self.sao2_action.setCheckable(True)
    self.sao2_action.setChecked(self.oxygen_view == "sao2")
    self.sao2_action.setShortcut(QtGui.QKeySequence("Ctrl+Shift+O"))
    self.sao2_action.toggled.connect(lambda on: self.set_oxygen_view("sao2" if on else "pao2"))
    h = bar.addMenu("&Help")
    keys = h.addAction("Keyboard shortcuts")
    keys.setShortcut(QtGui.QKeySequence("F1"))
    keys.triggered.connect(self.show_shortcuts)
    h.addAction("About Ventcast").triggered.connect(self.show_about)
    self._refresh_recent()


def show_shortcuts(self) -> None:
    """The keyboard shortcuts, in a fixed-width box over the window ``self``."""
    text = "\n".join(f"{k:24s} {v}" for k, v in SHORTCUTS)
    box = QtWidgets.QMessageBox(QtWidgets.QMessageBox.Information, "Keyboard shortcuts", text, parent=self)
    box.setFont(QtGui.QFontDatabase.systemFont(QtGui.QFontDatabase.FixedFont))
    box.open()

def show_about(self) -> None:
    """Version, the caution and the model's sources."""
    QtWidgets.QMessageBox.about(self, "About Ventcast", f"<b>Ventcast {escape(version())}</b><p>{escape(CAUTION)}</p><p>Model sources:</p><ul>"
                                + "".join(f"<li>{escape(s)}</li>" for s in SOURCES) + "</ul>")
