"""The two views of a walkthrough run: the learner's bedside Monitor (monitored values with realistic
noise, never the true course) and the Instructor panel (the true course, the teaching summary, upcoming
events, event injection and the full log), which sits in a dock that can float onto a second screen."""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from .common import COLOUR, OKABE_ITO, _axis, fit_y

#: Monitor noise, one SD: pulse oximetry about 2 % (accuracy figures of pulse oximeters are about
#: 2-3 % SpO2 for SaO2 above 70 %; from memory), end-tidal CO2 about 1 mmHg (common practice).
SPO2_NOISE_SD = 2.0
ETCO2_NOISE_SD = 1.0
#: Smallest y spans drawn, so noise or solver-size wiggles never look like a collapse (clinical minimum
#: spans; common practice).
MIN_SPAN = {"spo2": 10.0, "etco2": 10.0, "pao2": 20.0, "paco2": 10.0}


class MonitorPanel(QtWidgets.QGroupBox):
    """What a bedside team sees: SpO2 and end-tidal CO2 as a monitor shows them (noisy, whole numbers),
    the set ventilation, and their trend; blood gases only when drawn."""

    def __init__(self, duration: float, seed: int = 0, spontaneous: bool = False, parent=None):
        super().__init__("Monitor", parent)
        lay = QtWidgets.QVBoxLayout(self)
        grid = QtWidgets.QGridLayout()
        self.values = {}
        for i, (key, label, colour) in enumerate((("spo2", "SpO2 [%]", OKABE_ITO["blue"]),
                                                  ("etco2", "EtCO2 [mmHg]", OKABE_ITO["vermillion"]))):
            name = QtWidgets.QLabel(label)
            value = QtWidgets.QLabel("-")
            value.setStyleSheet(f"font-size: 28px; font-weight: bold; color: {colour};")
            grid.addWidget(name, 0, i)
            grid.addWidget(value, 1, i)
            self.values[key] = value
        # Ventilator readings: peak pressure, total PEEP and exhaled VT (from the lung's mechanics, with the
        # events so far), each as the ventilator displays it.
        # On support the rate is the patient's own, and the ventilator shows f/VT (RSBI).
        self.vent = {}
        readings = [("ppeak", "Ppeak [cmH2O]"), ("peep_total", "total PEEP [cmH2O]"), ("vte", "exhaled VT [mL]"),
                    ("rr", "RR, patient's own [/min]" if spontaneous else "RR [/min]")]
        if spontaneous:
            readings += [("rsbi", "RSBI, f/VT [breaths/min/L]"), ("pocc", "\u0394Pocc, expiratory hold [cmH2O]")]
        for i, (key, label) in enumerate(readings):
            name = QtWidgets.QLabel(label)
            value = QtWidgets.QLabel("-")
            value.setStyleSheet("font-size: 16px; font-weight: bold;")
            row, col = 2 + 2 * (i // 2), i % 2
            grid.addWidget(name, row, col)
            grid.addWidget(value, row + 1, col)
            self.vent[key] = value
        lay.addLayout(grid)
        note = QtWidgets.QLabel(f"SpO2 reads within about \u00b1{2 * SPO2_NOISE_SD:.0f} % of the arterial "
                                f"saturation (2 SD of pulse oximetry).")
        note.setWordWrap(True)
        lay.addWidget(note)
        self.set_label = QtWidgets.QLabel("")
        self.set_label.setWordWrap(True)
        lay.addWidget(self.set_label)
        self.chart = pg.GraphicsLayoutWidget()
        self.plots, self.curves = {}, {}
        for i, (key, label, colour) in enumerate((("spo2", "SpO2 [%]", OKABE_ITO["blue"]),
                                                  ("etco2", "EtCO2 [mmHg]", OKABE_ITO["vermillion"]))):
            p = self.chart.addPlot(row=i, col=0)
            _axis(p, label, "minutes of the walkthrough [min]")
            p.setXRange(0, duration, padding=0.01)
            self.plots[key] = p
            self.curves[key] = p.plot(pen=pg.mkPen(colour, width=1))
        lay.addWidget(self.chart, 1)
        self.rng = np.random.default_rng(seed)
        self.reset()

    def reset(self):
        self.samples = {"minute": [], "spo2": [], "etco2": []}
        for key, curve in self.curves.items():
            curve.setData([], [])
            self.values[key].setText("-")

    def show_ventilator(self, breathing):
        """Ventilator readings (a Breathing of one breath): whole cmH2O and mL, as displayed."""
        ok = bool(np.all(breathing.success))
        for key, value in (("ppeak", breathing.ppeak), ("peep_total", breathing.peep_total),
                           ("vte", breathing.vt_ml)):
            self.vent[key].setText(f"{float(value):.0f}" if ok else "-")

    def show_supported(self, breath):
        """Ventilator readings of a supported breath (a SupportedBreath): Ppeak (PEEP plus support), total PEEP,
        exhaled VT, f/VT and the occlusion swing an expiratory hold would show (ΔPocc = -4/3 Pmus, Bertoni
        2019), whole numbers as displayed."""
        from ventcast.physiology.mechanics.spontaneous import PMUS_PER_DELTA_POCC
        for key, value in (("ppeak", breath.ppeak), ("peep_total", breath.peep_total), ("vte", breath.vt_ml),
                           ("rsbi", breath.rsbi), ("pocc", -float(breath.pmus) / PMUS_PER_DELTA_POCC)):
            self.vent[key].setText(f"{float(value):.0f}")

    def sample(self, minute: float, course, settings_text: str, rr: float | None = None):
        """One monitor reading at ``minute`` from the true course (plus monitor noise)."""
        if rr is not None:
            self.vent["rr"].setText(f"{rr:.0f}")
        sao2 = float(np.interp(minute, course.minutes, course.sao2))
        petco2 = float(np.interp(minute, course.minutes, course.petco2))
        spo2 = float(np.clip(round(100.0 * sao2 + self.rng.normal(0.0, SPO2_NOISE_SD)), 0, 100))
        etco2 = float(max(round(petco2 + self.rng.normal(0.0, ETCO2_NOISE_SD)), 0))
        if self.samples["minute"] and self.samples["minute"][-1] >= minute:
            for key in self.samples:  # the clock has not moved (a recomputed course): one reading per minute shown
                self.samples[key].pop()
        self.samples["minute"].append(minute)
        self.samples["spo2"].append(spo2)
        self.samples["etco2"].append(etco2)
        self.values["spo2"].setText(f"{spo2:.0f}")
        self.values["etco2"].setText(f"{etco2:.0f}")
        self.set_label.setText(f"Set: {settings_text}")
        for key, curve in self.curves.items():
            curve.setData(self.samples["minute"], self.samples[key])
            fit_y(self.plots[key], self.samples[key], MIN_SPAN[key])
        return spo2, etco2


class InstructorPanel(QtWidgets.QWidget):
    """The instructor's view: the true course, the teaching summary, upcoming events, event injection
    and the full log (events included)."""

    inject_requested = QtCore.Signal(str, float)
    pause_requested = QtCore.Signal()
    jump_requested = QtCore.Signal(float)
    restart_requested = QtCore.Signal()

    def __init__(self, script: dict, duration: float, parent=None):
        super().__init__(parent)
        from ventcast.physiology.scenario import EVENT_KINDS
        lay = QtWidgets.QVBoxLayout(self)
        summary = QtWidgets.QLabel(script.get("summary", ""))
        summary.setTextFormat(QtCore.Qt.PlainText)  # script text is shown as written, never as HTML
        summary.setWordWrap(True)
        # The clock from the instructor's screen too (the dock may float on a second screen).
        clock = QtWidgets.QHBoxLayout()
        for text, slot in (("Start / pause", self.pause_requested.emit), ("Jump 5 min", lambda: self.jump_requested.emit(5.0)),
                           ("Restart", self.restart_requested.emit)):
            b = QtWidgets.QPushButton(text)
            b.clicked.connect(slot)
            clock.addWidget(b)
        lay.addLayout(clock)
        lay.addWidget(QtWidgets.QLabel("<b>Teaching summary</b> (not shown to the learner)"))
        lay.addWidget(summary)
        self.chart = pg.GraphicsLayoutWidget()
        self.chart.setMinimumHeight(260)
        self.plots, self.curves = {}, {}
        for i, (key, label) in enumerate((("pao2", "true PaO2 [mmHg]"), ("paco2", "true PaCO2 [mmHg]"))):
            p = self.chart.addPlot(row=i, col=0)
            _axis(p, label, "minutes of the walkthrough [min]")
            p.setXRange(0, duration, padding=0.01)
            self.plots[key] = p
            self.curves[key] = p.plot(pen=pg.mkPen(COLOUR[key], width=1))
        lay.addWidget(self.chart, 1)
        lay.addWidget(QtWidgets.QLabel("<b>Upcoming</b>"))
        self.upcoming = QtWidgets.QListWidget()
        self.upcoming.setMaximumHeight(90)
        lay.addWidget(self.upcoming)
        box = QtWidgets.QGroupBox("Inject an event now")
        form = QtWidgets.QFormLayout(box)
        self.event_kind = QtWidgets.QComboBox()
        for kind, (name, (lo, hi), what) in EVENT_KINDS.items():
            self.event_kind.addItem(f"{what} ({name} {lo:g}-{hi:g})", kind)
        self.event_value = QtWidgets.QDoubleSpinBox()
        self.event_value.setRange(0, 50)
        self.event_value.setDecimals(2)
        self.event_value.setValue(0.1)
        inject = QtWidgets.QPushButton("Inject now")
        inject.clicked.connect(lambda: self.inject_requested.emit(self.event_kind.currentData(),
                                                                  float(self.event_value.value())))
        form.addRow("Event", self.event_kind)
        form.addRow("Value", self.event_value)
        form.addRow(inject)
        lay.addWidget(box)
        lay.addWidget(QtWidgets.QLabel("<b>Everything that happened</b> (events included)"))
        self.log = QtWidgets.QListWidget()
        self.log.setWordWrap(True)
        lay.addWidget(self.log, 1)

    def show_course(self, course, minute: float):
        keep = course.minutes <= minute + 1e-9
        for key, curve in self.curves.items():
            y = getattr(course, key)[keep]
            curve.setData(course.minutes[keep], y)
            fit_y(self.plots[key], y, MIN_SPAN[key])

    def show_upcoming(self, lines: list):
        self.upcoming.clear()
        self.upcoming.addItems(lines or ["nothing more scheduled"])
