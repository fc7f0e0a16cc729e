"""The Bedside panel: the patient's latest measured blood gas, the current settings, bedside indices
and the past observations (all from the case file; the model's VD/VT once the fit is known)."""

from __future__ import annotations

from html import escape

from PySide6 import QtCore, QtWidgets

from ..engine import now_block, settings_text
from ..precision import sao2_text
from .common import gas_text


class BedsidePanel(QtWidgets.QGroupBox):
    """Measured values of the case, shown in the window's unit."""

    gas_requested = QtCore.Signal()  # Add blood gas
    edit_requested = QtCore.Signal(int)    # observation index (the case's time order)
    delete_requested = QtCore.Signal(int)

    ROWS = (("pao2", "PaO2"), ("paco2", "PaCO2"), ("ph", "pH"), ("sao2", "SaO2"),
            ("settings", "Settings"), ("pf_ratio_mmhg", "P/F ratio"),
            ("aa_gradient_mmhg", "A\u2013a gradient"), ("vd_vt", "VD/VT (model)"),
            ("driving_pressure_cmh2o", "Driving pressure\n(Pplat \u2212 set PEEP)"), ("compliance_ml_per_cmh2o", "Crs"),
            ("pbw_kg", "PBW"), ("vt_ml_per_kg_pbw", "VT"), ("mechanical_power_j_min", "Mechanical power"),
            ("ventilatory_ratio", "Ventilatory ratio"), ("oxygenation_index", "Oxygenation index"),
            ("berlin_category", "Berlin category"), ("base_excess_mmol_l", "Base excess"),
            ("spontaneous_rr_per_min", "Own rate"), ("rsbi", "RSBI"), ("p01_cmh2o", "P0.1"),
            ("delta_pocc_cmh2o", "\u0394Pocc"), ("pmus_from_pocc_cmh2o", "Pmus (from \u0394Pocc)"))
    #: Effort measurements of a patient breathing on support: their rows are shown only when measured.
    EFFORT_KEYS = ("spontaneous_rr_per_min", "rsbi", "p01_cmh2o", "delta_pocc_cmh2o", "pmus_from_pocc_cmh2o")
    #: Index: (decimals, unit).
    FORMAT = {"pf_ratio_mmhg": (0, "mmHg"), "aa_gradient_mmhg": (0, "mmHg"), "driving_pressure_cmh2o": (1, "cmH2O"),
              "compliance_ml_per_cmh2o": (0, "mL/cmH2O"), "pbw_kg": (1, "kg"), "vt_ml_per_kg_pbw": (1, "mL/kg PBW"),
              "mechanical_power_j_min": (1, "J/min"), "ventilatory_ratio": (2, ""), "oxygenation_index": (1, ""),
              "base_excess_mmol_l": (1, "mmol/L"), "spontaneous_rr_per_min": (0, "/min"), "rsbi": (0, "/min/L"),
              "p01_cmh2o": (1, "cmH2O"), "delta_pocc_cmh2o": (1, "cmH2O"), "pmus_from_pocc_cmh2o": (1, "cmH2O")}

    def __init__(self, parent=None):
        super().__init__("Bedside", parent)
        lay = QtWidgets.QVBoxLayout(self)
        self.case_label = QtWidgets.QLabel("")
        self.case_label.setWordWrap(True)
        lay.addWidget(self.case_label)
        self.add_gas = QtWidgets.QPushButton("Add blood gas... (Ctrl+G)")
        self.add_gas.clicked.connect(self.gas_requested.emit)
        lay.addWidget(self.add_gas)
        form = QtWidgets.QFormLayout()
        self.form = form
        self.values = {}
        for key, label in self.ROWS:
            w = QtWidgets.QLabel("-")
            w.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
            w.setWordWrap(True)
            self.values[key] = w
            form.addRow(label, w)
        lay.addLayout(form)
        # The fit's data-quality notes, where the measurements they question are shown.
        self.notes = QtWidgets.QLabel("")
        self.notes.setWordWrap(True)
        self.notes.setTextFormat(QtCore.Qt.PlainText)
        self.notes.hide()
        lay.addWidget(self.notes)
        self.history_title = QtWidgets.QLabel("Past observations")
        self.history_title.setWordWrap(True)
        lay.addWidget(self.history_title)
        self.history = QtWidgets.QTableWidget(0, 5)
        self.history.setHorizontalHeaderLabels(["taken", "FiO2", "PEEP", "PaO2", "PaCO2"])
        self.history.verticalHeader().hide()
        self.history.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.history.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        self.history.setSelectionBehavior(QtWidgets.QAbstractItemView.SelectRows)
        self.history.setSelectionMode(QtWidgets.QAbstractItemView.SingleSelection)
        self.history.cellDoubleClicked.connect(lambda row, _c: self.edit_requested.emit(self.observation_index(row)))
        lay.addWidget(self.history, 1)
        row = QtWidgets.QHBoxLayout()
        for text, signal in (("Edit...", self.edit_requested), ("Delete", self.delete_requested)):
            b = QtWidgets.QPushButton(text)
            b.clicked.connect(lambda _c=False, sig=signal: self._emit_selected(sig))
            row.addWidget(b)
        lay.addLayout(row)

    def observation_index(self, row: int) -> int:
        """The case's observation shown in table row ``row`` (the newest is on top)."""
        return self.history.rowCount() - 1 - row

    def _emit_selected(self, signal):
        row = self.history.currentRow()
        if row >= 0:
            signal.emit(self.observation_index(row))
        self.setMinimumWidth(220)

    def show_case(self, case: dict, units: str):
        """The case's label, latest observation, settings, indices and past observations."""
        self.case_label.setText(f"<b>{escape(case.get('label', ''))}</b>")
        self.history.setRowCount(0)
        if not case["observations"]:  # a new case: its settings, and nothing measured yet
            for w in self.values.values():
                w.setText("-")
            for key in self.EFFORT_KEYS:
                self.form.setRowVisible(self.values[key], False)
            self.values["settings"].setText(settings_text(case["settings"]))
            self.values["pao2"].setText("no blood gas yet")
            return
        obs = case["observations"][-1]
        idx = now_block(case)
        v = self.values
        v["pao2"].setText(gas_text(obs["pao2_mmhg"], units))
        v["paco2"].setText(gas_text(obs["paco2_mmhg"], units, 1))
        v["ph"].setText(f"{obs['ph']:.2f}")
        v["sao2"].setText(sao2_text(obs.get("sao2")))
        v["settings"].setText(settings_text(obs["settings"]))
        for key, (d, unit) in self.FORMAT.items():
            x = idx.get(key)
            if key in ("pf_ratio_mmhg", "aa_gradient_mmhg") and x is not None:
                v[key].setText(gas_text(x, units, d))
            else:
                v[key].setText("-" if x is None else f"{x:.{d}f} {unit}".strip())
        v["berlin_category"].setText(str(idx.get("berlin_category") or "-"))
        for key in self.EFFORT_KEYS:
            self.form.setRowVisible(v[key], idx.get(key) is not None)
        if idx.get("rsbi") is not None:
            v["rsbi"].setToolTip("rapid shallow breathing index, own rate / VT; above 105 a breathing trial is likely "
                                 "to fail (Yang & Tobin 1991)")
        if idx.get("pmus_from_pocc_cmh2o") is not None:
            v["pmus_from_pocc_cmh2o"].setToolTip("Pmus = -3/4 \u0394Pocc (Bertoni 2019, coefficient from memory); "
                                                 "above 10 cmH2O is excessive")
        v["vd_vt"].setText("after the fit")
        rows = case["observations"]
        self.history.setRowCount(len(rows))
        # The unit once, in the header: the values fit the narrow panel without being cut off.
        u = "kPa" if units == "kPa" else "mmHg"
        self.history_title.setText(f"Past observations (PEEP in cmH2O, gases in {u})")
        for i, o in enumerate(reversed(rows)):
            s = o["settings"]
            for j, text in enumerate((o.get("taken_at", "")[5:16].replace("T", "\n"), f"{s['fio2']:.2f}",
                                      f"{s['peep_cmh2o']:g}", gas_text(o["pao2_mmhg"], units).split()[0],
                                      gas_text(o["paco2_mmhg"], units, 1).split()[0])):
                self.history.setItem(i, j, QtWidgets.QTableWidgetItem(text))
        self.history.resizeRowsToContents()

    def show_notes(self, warnings: list):
        """Data-quality notes of the fit (e.g. an SaO2 that does not match the PaO2), or none."""
        self.notes.setText("\n".join(f"\u26a0 {w}" for w in warnings))
        self.notes.setVisible(bool(warnings))

    def show_model_vd_vt(self, vd_vt: float):
        self.values["vd_vt"].setText(f"{vd_vt:.2f} (model, current settings)")
