"""The Trial settings panel: Trials A/B/C, the mode and the setting controls (spin box and slider each),
and the table that compares the current state with every trial (likely ranges for the active one).

The panel shows plain data and reports what the user changed (``control_changed(key)``, ``tab_changed``,
``reset_requested``); the main window keeps the trials, the undo stack and the engine requests.
"""

from __future__ import annotations

import math

from PySide6 import QtCore, QtGui, QtWidgets

from .common import CONTROLS, HIDDEN_IN_MODE, MODES, STYLE_NAME, TRIAL_STYLE, TRIALS, kpa_from_mmhg


class TrialPanel(QtWidgets.QGroupBox):
    """Controls of the active trial and the comparison of all trials."""

    control_changed = QtCore.Signal(str)   # a control's key ('mode' for the mode)
    tab_changed = QtCore.Signal(int)
    reset_requested = QtCore.Signal()
    apply_requested = QtCore.Signal()  # apply the trial to the patient (the ventilator was changed)

    COMPARE_ROWS = (("PaO2", "pao2_mmhg", "gas", 0), ("PaCO2", "paco2_mmhg", "gas", 1), ("pH", "ph", "", 2),
                    ("SaO2", "sao2", "%", 0), ("VD/VT", "vd_vt", "", 2), ("Pplat", "pplat_cmh2o", "cmH2O", 1),
                    ("\u0394P (Pplat \u2212 PEEPtot)", "driving_pressure_cmh2o", "cmH2O", 1),
                    ("Mech. power", "mechanical_power_j_min", "J/min", 1),
                    ("PEEPi", "intrinsic_peep_cmh2o", "cmH2O", 1), ("VT", "vt_ml", "mL", 0),
                    ("VT", "vt_ml_per_kg_pbw", "mL/kg PBW", 1), ("Rate", "rr_per_min", "/min", 0),
                    ("Pmus", "pmus_cmh2o", "cmH2O", 1), ("RSBI", "rsbi", "/min/L", 0),
                    ("Cardiac output", "cardiac_output_l_min", "L/min", 1))
    #: Rows whose model value at the current settings is shown with its difference from the measured one.
    DIFFERENCE_KEYS = {"pao2_mmhg", "paco2_mmhg", "ph", "sao2", "pplat_cmh2o", "vt_ml"}
    RANGE_KEYS = {"pao2_mmhg", "paco2_mmhg", "ph", "sao2"}
    ROW_TIPS = {"driving_pressure_cmh2o": "driving pressure: Pplat minus total PEEP (set plus intrinsic)",
                "mechanical_power_j_min": "mechanical power (Gattinoni 2016, simplified equation)",
                "vt_ml": "tidal volume delivered to the patient (measured: exhaled VT)",
                "intrinsic_peep_cmh2o": "intrinsic PEEP (auto-PEEP): gas trapped at the end of expiration",
                "pmus_cmh2o": "the patient's inspiratory muscle pressure (none in volume or pressure control); on "
                              "support a trial shows the span between its two bounds",
                "rsbi": "rapid shallow breathing index, rate / VT (Yang & Tobin 1991: above 105 a breathing trial is "
                        "likely to fail)",
                "rr_per_min": "breaths per minute: the set rate, or on support the patient's own"}

    def __init__(self, parent=None):
        super().__init__("Trial settings", parent)
        self._quiet = False  # True while the panel itself sets the controls
        self._compact = False  # True on a narrow screen: no sliders
        self._hidden = HIDDEN_IN_MODE["volume"]  # the breath-size controls the mode does not use
        lay = QtWidgets.QGridLayout(self)
        self.trial_tabs = QtWidgets.QTabBar()
        for i, t in enumerate(TRIALS):
            self.trial_tabs.addTab(f"Trial {t}")
            self.trial_tabs.setTabTextColor(i, QtGui.QColor(TRIAL_STYLE[t][0]))  # its colour on the Outlook
            self.trial_tabs.setTabToolTip(i, f"Trial {t}: drawn {STYLE_NAME[t]} on the Outlook")
        self.trial_tabs.currentChanged.connect(lambda i: None if self._quiet else self.tab_changed.emit(i))
        self.trial_tabs.setExpanding(False)
        lay.addWidget(self.trial_tabs, 0, 0, 1, 4)  # above the controls and the comparison
        self.mode = QtWidgets.QComboBox()
        self.mode.addItems([words for _mode, words in MODES])
        self.mode.currentIndexChanged.connect(lambda _i: self._changed("mode"))
        lay.addWidget(QtWidgets.QLabel("Mode"), 1, 0)
        lay.addWidget(self.mode, 1, 1)
        self.reset_button = QtWidgets.QPushButton("Reset to current")
        self.reset_button.clicked.connect(self.reset_requested.emit)
        self.spins, self.sliders, self.rows = {}, {}, {}
        for row, (key, label, unit, lo, hi, step, dec) in enumerate(CONTROLS, start=2):
            spin = QtWidgets.QDoubleSpinBox()
            spin.setRange(lo, hi)
            spin.setSingleStep(step)
            spin.setDecimals(dec)
            spin.setSuffix(f" {unit}" if unit else "")
            spin.setKeyboardTracking(False)
            spin.setAccessibleName(label)
            slider = QtWidgets.QSlider(QtCore.Qt.Horizontal)
            slider.setRange(0, int(round((hi - lo) / step)))
            slider.setPageStep(5)
            slider.setMaximumWidth(110)
            spin.valueChanged.connect(lambda _v, k=key: self._changed(k))
            slider.setProperty("low", lo)
            slider.valueChanged.connect(lambda i, k=key, step=step: self._slider_moved(k, i * step))
            name = QtWidgets.QLabel(label)
            lay.addWidget(name, row, 0)
            lay.addWidget(spin, row, 1)
            lay.addWidget(slider, row, 2)
            self.spins[key], self.sliders[key], self.rows[key] = spin, slider, (name, spin, slider)
        self.vt_per_kg = QtWidgets.QLabel("")
        self.vt_per_kg.setWordWrap(True)
        lay.addWidget(self.vt_per_kg, 2 + len(CONTROLS), 1, 1, 2)
        self.apply_button = QtWidgets.QPushButton("Apply to patient...")
        self.apply_button.setToolTip("the ventilator was set to this trial: record it as the new current settings, "
                                     "with the forecast on screen (Ctrl+Shift+A)")
        self.apply_button.clicked.connect(self.apply_requested.emit)
        buttons = QtWidgets.QHBoxLayout()
        buttons.addWidget(self.reset_button)
        buttons.addWidget(self.apply_button)
        lay.addLayout(buttons, 3 + len(CONTROLS), 0, 1, 2)
        # Why no forecast is shown for this trial, in the words on screen, next to the controls.
        self.problem = QtWidgets.QLabel("")
        self.problem.setWordWrap(True)
        self.problem.setTextFormat(QtCore.Qt.PlainText)
        self.problem.setStyleSheet("QLabel { color: #8a1c00; font-weight: bold; }")
        self.problem.hide()
        lay.addWidget(self.problem, 4 + len(CONTROLS), 0, 1, 4)
        self.compare = QtWidgets.QTableWidget(0, 5)
        self.compare.setHorizontalHeaderLabels(["measured", "now (\u0394)", "Trial A", "Trial B", "Trial C"])
        self.compare.horizontalHeaderItem(0).setToolTip("the latest observation of the case (blood gas, ventilator)")
        self.compare.horizontalHeaderItem(1).setToolTip("the fitted model at the current settings; \u0394: model "
                                                        "minus measured")
        for col, t in enumerate(TRIALS, start=2):
            self.compare.horizontalHeaderItem(col).setForeground(QtGui.QColor(TRIAL_STYLE[t][0]))
        self.compare.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.compare.horizontalHeader().setStretchLastSection(True)
        self.compare.verticalHeader().setDefaultSectionSize(20)
        self.compare.setMinimumHeight(236)
        self.compare.setMinimumWidth(300)  # scrolls sideways on a small screen
        lay.addWidget(self.compare, 1, 3, 3 + len(CONTROLS), 1)
        lay.setColumnStretch(3, 1)

    #: Below this panel width the sliders are hidden (the spin boxes stay), so that the comparison of
    #: every trial fits beside the controls on a 1280-pixel screen.
    COMPACT_WIDTH = 820

    def showEvent(self, event):
        # Columns filled before the panel was first shown (a forecast computed while the window was being
        # built) were measured before the style was applied: measure them again.
        super().showEvent(event)
        self._fit_columns()

    def _fit_columns(self):
        """Every column as wide as its values (with their ranges); the last one stretches into spare room
        only, so that where the panel is too narrow the table scrolls sideways instead of cutting a value."""
        header = self.compare.horizontalHeader()
        header.setStretchLastSection(False)
        self.compare.resizeColumnsToContents()
        needed = sum(header.sectionSize(c) for c in range(self.compare.columnCount()) if not header.isSectionHidden(c))
        header.setStretchLastSection(needed < self.compare.viewport().width())

    def resizeEvent(self, event):
        super().resizeEvent(event)
        self._fit_columns()
        compact = self.width() < self.COMPACT_WIDTH
        if compact != self._compact:
            self._compact = compact
            self._show_rows()

    def _show_rows(self):
        """The size of the breath is VT in volume control, the inspiratory pressure in pressure control, the
        support on pressure support (none on CPAP: the patient's own); sliders only when the panel is wide
        enough."""
        for key, (name, spin, slider) in self.rows.items():
            name.setVisible(key not in self._hidden)
            spin.setVisible(key not in self._hidden)
            slider.setVisible(key not in self._hidden and not self._compact)

    def _changed(self, key):
        if not self._quiet:
            self.control_changed.emit(key)

    def _slider_moved(self, key, offset):
        if not self._quiet:
            self.spins[key].setValue(float(self.sliders[key].property("low")) + offset)

    def set_range(self, key: str, low: float, high: float):
        """Accepted range of one control (the engine's; VT's depends on the patient's PBW)."""
        step = self.spins[key].singleStep()
        self._quiet = True
        try:
            self.spins[key].setRange(low, high)
            self.sliders[key].setRange(0, int(round((high - low) / step)))
            self.sliders[key].setProperty("low", low)
        finally:
            self._quiet = False

    def show_problem(self, text: str):
        """Say why the trial has no forecast (every number computed from the trial is cleared)."""
        self.problem.setText(f"\u2716 {text}")
        self.problem.show()

    def clear_problem(self):
        self.problem.clear()
        self.problem.hide()

    def mode_value(self) -> str:
        return MODES[self.mode.currentIndex()][0]

    def value(self, key: str) -> float:
        return round(float(self.spins[key].value()), 2)

    def select_tab(self, trial: str):
        """Show ``trial``'s tab without reporting a tab change."""
        self._quiet = True
        try:
            self.trial_tabs.setCurrentIndex(TRIALS.index(trial))
        finally:
            self._quiet = False

    def show_trial(self, s: dict, vt_text: str):
        """Set the controls to the settings ``s`` (case-file keys) without reporting changes."""
        self._quiet = True
        try:
            self.mode.setCurrentIndex([m for m, _w in MODES].index(s["mode"]))
            self._hidden = HIDDEN_IN_MODE[s["mode"]]
            self._show_rows()
            for key, _label, _unit, _lo, _hi, step, _dec in CONTROLS:
                v = s.get(key)
                if v is not None:
                    self.spins[key].setValue(float(v))
                    low = float(self.sliders[key].property("low"))
                    self.sliders[key].setValue(int(round((float(v) - low) / step)))
        finally:
            self._quiet = False
        self.vt_per_kg.setText(vt_text)

    @staticmethod
    def _value(v, unit, digits, units):
        if v is None or not math.isfinite(float(v)):
            return "-"
        if unit == "gas" and units == "kPa":
            return f"{kpa_from_mmhg(v):.{max(digits, 1)}f}"
        if unit == "%":  # a fraction shown in per cent (SaO2)
            return f"{100.0 * v:.{digits}f}"
        return f"{v:.{digits}f}"

    def fill_compare(self, now: dict | None, compare: dict, units: str, ranges=None, ranges_trial=None,
                     measured: dict | None = None):
        """Columns: the latest measurements (``measured``, same keys), the model at the current settings
        (``now``, a steady block, with its difference from the measurement) and each trial; the likely
        range beside the values of ``ranges_trial``."""
        gas_unit = "kPa" if units == "kPa" else "mmHg"
        self.compare.setRowCount(len(self.COMPARE_ROWS))
        self.compare.setVerticalHeaderLabels(
            [f"{name} [{gas_unit if unit == 'gas' else unit}]" if unit else name for name, _k, unit, _d in self.COMPARE_ROWS])
        for r, (_name, key, _unit, _d) in enumerate(self.COMPARE_ROWS):
            if key in self.ROW_TIPS:
                self.compare.verticalHeaderItem(r).setToolTip(self.ROW_TIPS[key])
        for col, t in enumerate(TRIALS, start=2):  # a trial not set up takes no room
            self.compare.setColumnHidden(col, bool(compare) and t not in compare)
        measured = measured or {}
        for r, (_name, key, unit, digits) in enumerate(self.COMPARE_ROWS):
            self.compare.setItem(r, 0, QtWidgets.QTableWidgetItem(self._value(measured.get(key), unit, digits, units)))
            for col, (label, block) in enumerate([("now", now)] + [(t, compare.get(t)) for t in TRIALS], start=1):
                text = "-" if block is None else self._value(block.get(key), unit, digits, units)
                if block is not None and block.get(f"{key}_bounds") is not None:
                    # On support: the span between the two bounds (effort unchanged, drive preserved).
                    lo, hi = block[f"{key}_bounds"]
                    text = self._value(lo, unit, digits, units) + "\u2013" + self._value(hi, unit, digits, units)
                if label == "now" and text != "-" and key in self.DIFFERENCE_KEYS and measured.get(key) is not None:
                    diff = float(block[key]) - float(measured[key])
                    kpa = unit == "gas" and units == "kPa"  # the same unit and decimals as _value
                    shown = max(digits, 1) if kpa else digits
                    diff = kpa_from_mmhg(diff) if kpa else 100.0 * diff if unit == "%" else diff
                    diff = round(diff, shown) + 0.0  # + 0.0: never "-0.00"
                    text += f" (\u0394 {diff:+.{shown}f})"
                if ranges and label == ranges_trial and key in self.RANGE_KEYS and text != "-":
                    lo, hi = ranges[key]
                    text += f" ({self._value(lo, unit, digits, units)}–{self._value(hi, unit, digits, units)})"
                self.compare.setItem(r, col, QtWidgets.QTableWidgetItem(text))
        self._fit_columns()
