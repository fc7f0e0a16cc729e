"""Forms that bring the patient in: New case, Add blood gas (typed or pasted) and Apply a trial.

Every form builds its result with :mod:`app.entry` on each edit, so it accepts and refuses exactly what
the command line and the case-file loader do, with their messages; the message (in the words on screen)
and a red frame on the field appear at once, and OK stays disabled while the form is invalid. Nothing in
the case changes until OK.
"""

from __future__ import annotations

from html import escape

from PySide6 import QtCore, QtWidgets

from ..casefile import CaseError, setting_words
from ..engine import settings_text
from ..entry import add_observation, kpa_to_mmhg, new_case, replace_observation, settings_from_sets
from ..paste import FIELD, read_pasted
from .common import CONTROLS, HIDDEN_IN_MODE, field_in_words, kpa_from_mmhg, mmhg_text_in

_BAD = "border: 2px solid #b00020;"


def _number(text: str, field: str):
    """A typed number (a decimal comma accepted), None when empty."""
    t = text.strip().replace(",", ".")
    if not t:
        return None
    try:
        return float(t)
    except ValueError:
        raise CaseError(field, f"value {text.strip()!r} is not a number") from None


def _utc_text(dt: QtCore.QDateTime) -> str:
    return dt.toUTC().toString("yyyy-MM-ddTHH:mm") + "Z"


class _Form(QtWidgets.QDialog):
    """A form whose result is rebuilt on every edit; ``fields`` maps case-file keys to their widgets."""

    def __init__(self, title: str, parent=None):
        super().__init__(parent)
        self.setWindowTitle(title)
        self.fields = {}
        self.result_value = None
        self.layout_ = QtWidgets.QVBoxLayout(self)
        self.error = QtWidgets.QLabel("")
        self.error.setWordWrap(True)
        self.error.setTextFormat(QtCore.Qt.PlainText)
        self.error.setStyleSheet("QLabel { color: #8a1c00; font-weight: bold; }")
        self.buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Ok | QtWidgets.QDialogButtonBox.Cancel)
        self.buttons.accepted.connect(self._accept)
        self.buttons.rejected.connect(self.reject)

    def _finish_layout(self):
        self.layout_.addWidget(self.error)
        self.layout_.addWidget(self.buttons)

    def _line(self, key: str, placeholder: str = "") -> QtWidgets.QLineEdit:
        w = QtWidgets.QLineEdit()
        w.setPlaceholderText(placeholder)
        w.textChanged.connect(self.revalidate)
        self.fields[key] = w
        return w

    def build(self):
        """The form's result, or CaseError naming the field."""
        raise NotImplementedError

    def revalidate(self, *_args):
        for w in self.fields.values():
            w.setStyleSheet("")
        try:
            self.result_value = self.build()
        except CaseError as exc:
            self.result_value = None
            key = exc.field.rsplit(".", 1)[-1].replace("blood gas: ", "")
            widget = self.fields.get(key) or self.fields.get(exc.field)
            if widget is not None:
                widget.setStyleSheet(_BAD)
            why = mmhg_text_in(str(exc)[len(exc.field) + 2:], getattr(self, "units", "mmHg"))
            self.error.setText(f"\u2716 {field_in_words(exc.field)}: {why}")
        else:
            self.error.setText("")
        self.buttons.button(QtWidgets.QDialogButtonBox.Ok).setEnabled(self.result_value is not None)

    def _accept(self):
        self.revalidate()
        if self.result_value is not None:
            self.accept()


class NewCaseDialog(_Form):
    """The patient (required fields marked *) and the current settings: a new case without a gas yet."""

    PATIENT = (("height_cm", "Height * [cm]", ""), ("weight_kg", "Weight * [kg]", ""),
               ("age_years", "Age [years]", "optional"), ("temperature_c", "Temperature [\u00b0C]", "37.0"),
               ("hb_g_dl", "Hb [g/dL]", "12.0"), ("barometric_mmhg", "Barometric pressure [mmHg]", "760"))

    def __init__(self, parent=None):
        super().__init__("New case", parent)
        top = QtWidgets.QHBoxLayout()
        patient = QtWidgets.QFormLayout()
        self.label = QtWidgets.QLineEdit()
        self.label.setPlaceholderText("a name for the case (no real names in shared files)")
        patient.addRow("Label", self.label)
        self.sex = QtWidgets.QComboBox()
        self.sex.addItems(["female", "male"])
        self.sex.currentIndexChanged.connect(self.revalidate)
        self.fields["sex"] = self.sex
        patient.addRow("Sex *", self.sex)
        for key, label, placeholder in self.PATIENT:
            patient.addRow(label, self._line(key, placeholder))
        self.condition = QtWidgets.QComboBox()
        self.condition.addItems(["other", "ards", "obstructive", "post-operative"])
        patient.addRow("Condition (sets the fit's priors)", self.condition)
        settings = QtWidgets.QFormLayout()
        self.mode = QtWidgets.QComboBox()
        self.mode.addItems(["volume", "pressure", "pressure-support", "cpap"])
        self.mode.currentIndexChanged.connect(self.revalidate)
        self.fields["mode"] = self.mode
        settings.addRow("Mode *", self.mode)
        # Empty, never the previous patient's settings: nothing is carried over from one patient to the next.
        for key, label, unit, *_ in CONTROLS:
            w = self._line(key, "required" if key not in ("inspiratory_pressure_cmh2o", "vt_ml", "pressure_support_cmh2o")
                           else "required in its mode")
            settings.addRow(f"{label} [{unit}]" if unit else label, w)
        settings.addRow("Apparatus dead space [mL]", self._line("apparatus_dead_space_ml", "0"))
        for title, form in (("Patient", patient), ("Current settings", settings)):
            box = QtWidgets.QGroupBox(title)
            box.setLayout(form)
            top.addWidget(box)
        self.layout_.addLayout(top)
        self.first_gas = QtWidgets.QCheckBox("Add the first blood gas next (the model is fitted once a gas is added)")
        self.first_gas.setChecked(True)
        self.layout_.addWidget(self.first_gas)
        self._finish_layout()
        self.revalidate()

    def build(self) -> dict:
        patient = {"sex": self.sex.currentText()}
        for key, _label, _p in self.PATIENT:
            v = _number(self.fields[key].text(), f"patient.{key}")
            if v is not None:
                patient[key] = v
        for key in ("height_cm", "weight_kg"):
            if key not in patient:
                raise CaseError(f"patient.{key}", "required")
        sets = [f"mode={self.mode.currentText()}"]
        unused = HIDDEN_IN_MODE[self.mode.currentText()]  # the breath-size settings of the other modes
        for key, *_ in list(CONTROLS) + [("apparatus_dead_space_ml",)]:
            v = _number(self.fields[key].text(), f"settings.{key}")
            if v is not None and key not in unused:
                sets.append(f"{key}={v!r}")
        settings = settings_from_sets(patient, sets, where="settings")
        return new_case(patient, settings, label=self.label.text().strip() or None,
                        condition=self.condition.currentText())


class GasDialog(_Form):
    """A blood gas (and ventilator readings) typed or pasted; gas pressures in the window's unit."""

    GAS = (("ph", "pH *", ""), ("paco2_mmhg", "PaCO2 *", "gas"), ("pao2_mmhg", "PaO2 *", "gas"),
           ("sao2", "SaO2 [%]", ""), ("hco3_mmol_l", "HCO3 [mmol/L]", ""), ("petco2_mmhg", "PetCO2", "gas"),
           ("pplat_cmh2o", "Pplat [cmH2O]", ""), ("ppeak_cmh2o", "Ppeak [cmH2O]", ""), ("vte_ml", "Exhaled VT [mL]", ""),
           ("ve_l_min", "Minute ventilation [L/min]", ""), ("hb_g_dl", "Hb [g/dL]", ""),
           ("spontaneous_rr_per_min", "Own rate [/min] (on support)", ""), ("p01_cmh2o", "P0.1 [cmH2O]", ""),
           ("delta_pocc_cmh2o", "\u0394Pocc [cmH2O, negative]", ""))

    def __init__(self, case: dict, units: str, parent=None, index: int | None = None):
        super().__init__("Add blood gas" if index is None else "Edit blood gas", parent)
        self.case, self.units, self.index = case, units, index
        body = QtWidgets.QHBoxLayout()
        form = QtWidgets.QFormLayout()
        self.taken = QtWidgets.QDateTimeEdit(QtCore.QDateTime.currentDateTime())
        self.taken.setDisplayFormat("yyyy-MM-dd HH:mm")
        self.taken.dateTimeChanged.connect(self.revalidate)
        self.fields["taken_at"] = self.taken
        form.addRow("Taken at", self.taken)
        self.in_force = QtWidgets.QComboBox()
        self.choices = [("the current settings", case["settings"])]
        history = case.get("settings_history") or []
        if history and history[-1].get("previous_settings"):
            self.choices.append(("before the last change", history[-1]["previous_settings"]))
        for text, s in self.choices:
            self.in_force.addItem(f"{text}: {settings_text(s)}")
        self.in_force.currentIndexChanged.connect(self.revalidate)
        form.addRow("Settings in force", self.in_force)
        unit = "kPa" if units == "kPa" else "mmHg"
        for key, label, kind in self.GAS:
            form.addRow(f"{label} [{unit}]" if kind == "gas" else label, self._line(key, "" if "*" in label else "optional"))
        body.addLayout(form)
        paste = QtWidgets.QVBoxLayout()
        paste.addWidget(QtWidgets.QLabel("Or paste a result ('label value unit' lines, e.g. pCO2 6.7 kPa):"))
        self.paste = QtWidgets.QPlainTextEdit()
        self.paste.setPlaceholderText("pH 7.32\npCO2 6.7 kPa\npO2 72 mmHg\nsO2 94 %")
        paste.addWidget(self.paste, 1)
        row = QtWidgets.QHBoxLayout()
        row.addWidget(QtWidgets.QLabel("Gas pressures written without a unit are in"))
        self.paste_unit = QtWidgets.QComboBox()
        self.paste_unit.addItems(["(ask)", "mmHg", "kPa"])
        row.addWidget(self.paste_unit)
        self.read_button = QtWidgets.QPushButton("Read")
        self.read_button.clicked.connect(self.read_paste)
        row.addWidget(self.read_button)
        paste.addLayout(row)
        self.paste_report = QtWidgets.QLabel("")
        self.paste_report.setWordWrap(True)
        self.paste_report.setTextFormat(QtCore.Qt.PlainText)
        paste.addWidget(self.paste_report)
        body.addLayout(paste, 1)
        self.layout_.addLayout(body)
        self._finish_layout()
        if index is not None:
            self._fill(case["observations"][index])
        self.revalidate()

    def _fill(self, obs: dict):
        """Show an observation for editing (in the window's unit; SaO2 in %)."""
        taken = QtCore.QDateTime.fromString(obs["taken_at"].replace("Z", "+00:00"), QtCore.Qt.ISODate)
        self.taken.setDateTime(taken.toLocalTime())
        s = obs.get("settings") or self.case["settings"]
        if not any(s == c for _t, c in self.choices):
            self.choices.append(("as entered", s))
            self.in_force.addItem(f"as entered: {settings_text(s)}")
        self.in_force.setCurrentIndex(next(i for i, (_t, c) in enumerate(self.choices) if c == s))
        for key, _label, kind in self.GAS:
            v = obs.get(key)
            if v is None:
                continue
            if kind == "gas" and self.units == "kPa":
                v = round(kpa_from_mmhg(v), 2)
            elif key == "sao2":
                v = round(100.0 * v, 2)
            self.fields[key].setText(f"{v:g}")

    def read_paste(self):
        """Fill the form from the pasted text, after saying what was read (nothing is guessed)."""
        unit = self.paste_unit.currentText()
        try:
            got = read_pasted(self.paste.toPlainText(), gas_unit=None if unit == "(ask)" else unit)
        except CaseError as exc:
            self.paste_report.setText(f"\u2716 {exc}")
            return None
        text = got.summary() or "nothing read"
        if got.questions:
            text += "\nChoose the unit above and press Read again."
        self.paste_report.setText(text)
        written = {FIELD[r["quantity"]]: r for r in got.read}
        for key, value in got.values.items():
            if key in self.fields:
                r = written.get(key, {})
                if key.endswith("_mmhg") and r.get("unit") == ("kPa" if self.units == "kPa" else "mmHg"):
                    value = r["value"]  # written in the window's unit: shown exactly as pasted
                elif key.endswith("_mmhg") and self.units == "kPa":
                    value = round(kpa_from_mmhg(value), 2)
                elif key == "sao2":
                    value = round(100.0 * value, 1)
                self.fields[key].setText(f"{value:g}")
        return got

    def observation(self) -> dict:
        obs = {"taken_at": _utc_text(self.taken.dateTime()),
               "settings": dict(self.choices[self.in_force.currentIndex()][1])}
        for key, _label, kind in self.GAS:
            v = _number(self.fields[key].text(), f"blood gas: {key}")
            if v is None:
                continue
            if kind == "gas" and self.units == "kPa":
                v = kpa_to_mmhg(v)
            if key == "sao2":
                v = round(v / 100.0, 4)  # entered in %
            obs[key] = v
        for key in ("ph", "paco2_mmhg", "pao2_mmhg"):
            if key not in obs:
                raise CaseError(f"blood gas: {key}", "required (a blood gas needs PaO2, PaCO2 and pH)")
        return obs

    def build(self) -> dict:
        if self.index is not None:
            return replace_observation(self.case, self.index, self.observation())
        return add_observation(self.case, self.observation())


class ApplyDialog(QtWidgets.QDialog):
    """When the ventilator was set to the trial: the time of the change (now by default)."""

    def __init__(self, trial: str, before: dict, after: dict, parent=None):
        super().__init__(parent)
        self.setWindowTitle(f"Apply Trial {trial} to the patient")
        lay = QtWidgets.QFormLayout(self)
        changed = [setting_words(k, after[k]) for k in after
                   if k in before and after[k] != before[k] and k != "apparatus_dead_space_ml"]
        note = QtWidgets.QLabel(
            f"<b>New current settings:</b> {escape(settings_text(after))}<br>Changed: "
            f"{escape(', '.join(changed) or 'nothing')}.<br>The forecast on screen, its course and its likely range "
            f"are stored with the change, to be checked against the blood gases that follow.")
        note.setWordWrap(True)
        lay.addRow(note)
        self.when = QtWidgets.QDateTimeEdit(QtCore.QDateTime.currentDateTime())
        self.when.setDisplayFormat("yyyy-MM-dd HH:mm")
        lay.addRow("Changed at", self.when)
        buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Ok | QtWidgets.QDialogButtonBox.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay.addRow(buttons)

    def applied_at(self) -> str:
        return _utc_text(self.when.dateTime())
