"""The Options and Step-down plan panels: settings that meet the goals, and a step-down (weaning) plan.

Each panel shows plain data from :mod:`app.engine` (``plan_case``, ``wean_case``) and reports what the
user asks for (``search_requested``, ``option_chosen(row)``, ``plan_requested``).
"""

from __future__ import annotations

from html import escape

from PySide6 import QtCore, QtWidgets

from ..casefile import SPONTANEOUS_MODES
from ..engine import ie_text
from ..precision import sao2_text
from .common import gas_text, wrapped_table


def _readiness_value(value) -> str:
    """A readiness criterion's value at the last step ('not entered' when it needs data not given)."""
    return "not entered" if value is None else f"{value:g}"


class OptionsPanel(QtWidgets.QWidget):
    """Settings found by the goal search, best first, with their probability of meeting every goal."""

    search_requested = QtCore.Signal()
    option_chosen = QtCore.Signal(int)   # row of the option to try in the current trial

    def __init__(self, parent=None):
        super().__init__(parent)
        lay = QtWidgets.QVBoxLayout(self)
        self.button = QtWidgets.QPushButton("Find settings that meet the goals")
        self.button.clicked.connect(self.search_requested.emit)
        lay.addWidget(self.button)
        self.message = QtWidgets.QLabel("Searches tens of thousands of settings within the Limits, then checks "
                                        "the best 50 against the fit's parameter draws.")
        self.message.setWordWrap(True)
        lay.addWidget(self.message)
        self.table = wrapped_table(["probability", "changes", "forecast"])
        self.table.setSelectionBehavior(QtWidgets.QAbstractItemView.SelectRows)
        self.table.cellDoubleClicked.connect(lambda row, _col: self.option_chosen.emit(row))
        lay.addWidget(self.table, 1)
        self.use_button = QtWidgets.QPushButton("Try the selected option in the current trial")
        self.use_button.clicked.connect(lambda: self.option_chosen.emit(self.table.currentRow()))
        lay.addWidget(self.use_button)

    def show_plan(self, out: dict, units: str):
        head = f"\u2713 {out['message']}" if out["met"] else f"\u26a0 {out['message']}"
        g = out["goals"]
        oxygen = " or ".join(part for part in (
            None if g.get("pao2_mmhg") is None else
            f"PaO2 {gas_text(g['pao2_mmhg'][0], units).split()[0]}\u2013{gas_text(g['pao2_mmhg'][1], units)}",
            None if g.get("spo2") is None else f"SpO2 {100 * g['spo2'][0]:.0f}\u2013{sao2_text(g['spo2'][1])} (the model's SaO2)")
            if part)
        self.message.setText(f"{escape(head)}<br>Oxygenation goal: {escape(oxygen) or 'none'} (either one is met). "
                             f"Screened {out['screened']} settings. Double-click an option to try it in the current "
                             f"trial.")
        self.table.setRowCount(len(out["options"]))
        for i, o in enumerate(out["options"]):
            st = o["steady"]
            forecast = (f"{gas_text(st['pao2_mmhg'], units)}, SaO2 {sao2_text(st['sao2'])}, "
                        f"PaCO2 {gas_text(st['paco2_mmhg'], units, 1)}, pH {st['ph']:.2f}, "
                        f"Pplat {st['pplat_cmh2o']:.1f}, \u0394P (Pplat \u2212 total PEEP) {st['driving_pressure_cmh2o']:.1f}, "
                        f"intrinsic PEEP {st['intrinsic_peep_cmh2o']:.1f} cmH2O, "
                        f"mechanical power {st['mechanical_power_j_min']:.1f} J/min")
            changes = "\n".join(o["changes"] + [ie_text(o["i_to_e"])] + [c for c in o["cautions"] if not c.startswith("I:E")])
            for j, text in enumerate((f"{100 * o['probability_all_goals']:.0f} %", changes, forecast)):
                self.table.setItem(i, j, QtWidgets.QTableWidgetItem(text))
        self.table.resizeRowsToContents()


class StepDownPanel(QtWidgets.QWidget):
    """The step-down request (steps, targets, spontaneous breathing for RSBI) and the plan."""

    plan_requested = QtCore.Signal()
    step_chosen = QtCore.Signal(int)   # row of the step whose settings go into the current trial
    TABLES = (None, "lower-peep", "higher-peep")

    def __init__(self, parent=None):
        super().__init__(parent)
        lay = QtWidgets.QVBoxLayout(self)
        form = QtWidgets.QFormLayout()
        form.setRowWrapPolicy(QtWidgets.QFormLayout.WrapLongRows)  # a narrow panel puts fields under labels
        self.table_choice = QtWidgets.QComboBox()
        self.table_choice.addItems(["model-driven", "ARDS Network lower-PEEP table", "ARDS Network higher-PEEP table"])
        self.table_choice.setSizeAdjustPolicy(QtWidgets.QComboBox.AdjustToMinimumContentsLengthWithIcon)
        self.table_choice.setMinimumContentsLength(14)
        form.addRow("Steps", self.table_choice)
        self.fio2 = self._spin(0.21, 1.0, 2, 0.05, 0.4, "")
        form.addRow("Target FiO2 at most", self.fio2)
        self.peep = self._spin(0, 30, 0, 1, 8, " cmH2O")
        form.addRow("Target PEEP at most", self.peep)
        self.spont_rr = self._spin(0, 80, 0, 1, 0, " /min", "not entered")
        form.addRow("Spontaneous rate (for RSBI)", self.spont_rr)
        self.spont_vt = self._spin(0, 2000, 0, 10, 0, " mL", "not entered")
        form.addRow("Spontaneous VT (for RSBI)", self.spont_vt)
        lay.addLayout(form)
        self.button = QtWidgets.QPushButton("Plan the step-down")
        self.button.clicked.connect(self.plan_requested.emit)
        lay.addWidget(self.button)
        self.message = QtWidgets.QLabel("")
        self.message.setWordWrap(True)
        lay.addWidget(self.message)
        self.steps = wrapped_table(["step", "forecast (likely range 90 %)", "hold"])
        self.steps.horizontalHeaderItem(2).setToolTip("the shortest time to wait before the next step; hover a "
                                                      "hold time for its basis")
        self.steps.setSelectionBehavior(QtWidgets.QAbstractItemView.SelectRows)
        self.steps.cellDoubleClicked.connect(lambda row, _col: self.step_chosen.emit(row))
        lay.addWidget(self.steps, 1)
        self.use_button = QtWidgets.QPushButton("Try the selected step in the current trial")
        self.use_button.clicked.connect(lambda: self.step_chosen.emit(self.steps.currentRow()))
        lay.addWidget(self.use_button)
        self.readiness = QtWidgets.QLabel("")
        self.readiness.setWordWrap(True)
        lay.addWidget(self.readiness)

    @staticmethod
    def _spin(lo, hi, decimals, step, value, suffix, special=""):
        sp = QtWidgets.QDoubleSpinBox()
        sp.setRange(lo, hi)
        sp.setDecimals(decimals)
        sp.setSingleStep(step)
        sp.setValue(value)
        sp.setSuffix(suffix)
        if special:
            sp.setSpecialValueText(special)
        return sp

    def request(self) -> dict:
        """What the user asked for, as keyword arguments of :func:`app.engine.wean_case`."""
        return {"table": self.TABLES[self.table_choice.currentIndex()], "target_fio2": float(self.fio2.value()),
                "target_peep": float(self.peep.value()), "spontaneous_rr": float(self.spont_rr.value()) or None,
                "spontaneous_vt_ml": float(self.spont_vt.value()) or None}

    def show_wean(self, out: dict, units: str):
        head = "\u2713" if out["reached_target"] else "\u26a0"
        self.message.setText(f"{head} {escape(out['message'])}")
        self.steps.setRowCount(len(out["steps"]))
        for i, st in enumerate(out["steps"]):
            if "bounds" in st:  # a step of pressure support: both bounds of the patient's answer
                parts = []
                for name, words in (("effort_unchanged", "effort unchanged"), ("drive_preserved", "drive preserved")):
                    b = st["bounds"][name]
                    parts.append(f"{words}: VT {b['vt_ml']:.0f} mL, {b['rr_per_min']:.0f}/min, RSBI {b['rsbi']:.0f}, "
                                 f"Pmus {b['pmus_cmh2o']:.1f}, PaCO2 {gas_text(b['paco2'], units, 1)}, pH {b['ph']:.2f}"
                                 + (f" \u26a0 {'; '.join(b['breaks'])}" if b["breaks"] else ""))
                forecast = "\n".join(parts + [st["stop_if"]])
            else:
                v, r = st["steady"], st["likely_range"]
                forecast = (f"SaO2 {sao2_text(v['sao2'])} ({100 * r['sao2'][0]:.0f}\u2013{sao2_text(r['sao2'][1])}), "
                            f"{gas_text(v['pao2_mmhg'], units)}, PaCO2 {gas_text(v['paco2_mmhg'], units, 1)}, "
                            f"pH {v['ph']:.2f}\n{st['stop_if']}")
            hold = "-" if st["hold_min"] is None else f"{st['hold_min']:.0f} min"
            for j, text in enumerate((f"{i + 1}. {st['change']}\n({st['why']})", forecast, hold)):
                item = QtWidgets.QTableWidgetItem(text)
                if j == 2 and st.get("hold_basis"):
                    item.setToolTip(f"why {hold}: {st['hold_basis']}")  # the basis is long: hover to read it
                self.steps.setItem(i, j, item)
        self.steps.resizeRowsToContents()
        marks = {True: "\u2713", False: "\u2716", None: "?"}
        if out.get("mode") in SPONTANEOUS_MODES:
            end = (f"\u26a0 stopped {escape(out['stopped_because'])}" if out["stopped_because"] else
                   "\u2713 the breathing-trial conditions are reached at the last step" if out["reached_target"] else "")
            self.readiness.setText(f"<b>Pressure support:</b> {end}" + (f"<br>{escape(out['note'])}" if out.get("note")
                                                                         else ""))
            return
        self.readiness.setText("<b>Readiness at the last step:</b><br>" + "<br>".join(
            f"{marks[c['met']]} {escape(c['criterion'])}: {_readiness_value(c['value'])} ({escape(c['source'])})"
            for c in out["readiness"]))
