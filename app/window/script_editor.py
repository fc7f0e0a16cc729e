"""The walkthrough script editor: a form for a new or existing ``*.walkthrough.json`` script, validated as
it is typed with the loader's own rules (:func:`app.walkthrough.loads_script`), previewed headless (the
course and what a run with no learner action would score), and saved atomically."""

from __future__ import annotations

import json
from pathlib import Path

from PySide6 import QtCore, QtWidgets

from ..casefile import DEMO_NAMES, CaseError, SETTING_WORDS, write_atomic
from .common import wrapped_table

EXPECTED_KINDS = ("draw", "setting_at_least", "setting_at_most")


class ScriptEditor(QtWidgets.QDialog):
    """Title, opening story, teaching summary, starting case, clock, events, prompts and expected actions."""

    def __init__(self, script: dict | None = None, path: str | None = None, parent=None):
        super().__init__(parent)
        from ventcast.physiology.scenario import EVENT_KINDS
        self.event_kinds = list(EVENT_KINDS)
        self.path = path
        self.setWindowTitle("Walkthrough script editor")
        lay = QtWidgets.QVBoxLayout(self)
        form = QtWidgets.QFormLayout()
        self.title = QtWidgets.QLineEdit()
        self.story = QtWidgets.QPlainTextEdit()
        self.story.setMaximumHeight(60)
        self.summary = QtWidgets.QPlainTextEdit()
        self.summary.setMaximumHeight(60)
        self.case = QtWidgets.QComboBox()
        self.case.setEditable(True)  # a demo, or a case file path relative to the script
        self.case.addItems([f"demo:{n}" for n in DEMO_NAMES])
        self.speed, self.duration, self.delay = (QtWidgets.QDoubleSpinBox() for _ in range(3))
        for sp, lo, hi, v in ((self.speed, 1, 60, 10), (self.duration, 5, 240, 40), (self.delay, 0, 30, 2)):
            sp.setRange(lo, hi)
            sp.setValue(v)
            sp.valueChanged.connect(self.revalidate)
        for w in (self.title, self.story, self.summary):
            w.textChanged.connect(self.revalidate)
        self.case.currentTextChanged.connect(self.revalidate)
        # A patient breathing on support (a case on pressure support or CPAP) answers a change one way.
        self.response = QtWidgets.QComboBox()
        self.response.addItem("keeps their ventilation by breathing faster, then harder (drive preserved)",
                              "drive_preserved")
        self.response.addItem("keeps the same effort and rate (effort unchanged)", "effort_unchanged")
        self.response.currentIndexChanged.connect(self.revalidate)
        form.addRow("Title *", self.title)
        form.addRow("Opening story (the learner reads it)", self.story)
        form.addRow("Teaching summary (instructor and debrief)", self.summary)
        form.addRow("Starting case", self.case)
        form.addRow("A patient on support, as support falls", self.response)
        form.addRow("Clock speed [x real time]", self.speed)
        form.addRow("Duration [min]", self.duration)
        form.addRow("Blood-gas result delay [min]", self.delay)
        lay.addLayout(form)
        self.tables = {}
        for key, title, columns in (("events", "Events", ["minute", "kind", "value", "teaching note"]),
                                    ("checkpoints", "Prompts", ["minute", "prompt"]),
                                    ("expected_actions", "Expected actions",
                                     ["by minute", "what", "setting", "value", "why"])):
            box = QtWidgets.QGroupBox(title)
            b = QtWidgets.QVBoxLayout(box)
            t = wrapped_table(columns)
            t.setEditTriggers(QtWidgets.QAbstractItemView.AllEditTriggers)
            t.itemChanged.connect(self.revalidate)
            b.addWidget(t)
            row = QtWidgets.QHBoxLayout()
            add, remove = QtWidgets.QPushButton("Add"), QtWidgets.QPushButton("Remove selected")
            add.clicked.connect(lambda _c=False, k=key: self.add_row(k))
            remove.clicked.connect(lambda _c=False, k=key: self._remove(k))
            row.addWidget(add)
            row.addWidget(remove)
            b.addLayout(row)
            lay.addWidget(box)
            self.tables[key] = t
        self.error = QtWidgets.QLabel("")
        self.error.setWordWrap(True)
        self.error.setTextFormat(QtCore.Qt.PlainText)
        self.error.setStyleSheet("QLabel { color: #8a1c00; font-weight: bold; }")
        lay.addWidget(self.error)
        self.preview_text = QtWidgets.QLabel("")
        self.preview_text.setWordWrap(True)
        self.preview_text.setTextFormat(QtCore.Qt.PlainText)
        lay.addWidget(self.preview_text)
        buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Save | QtWidgets.QDialogButtonBox.Cancel)
        self.preview_button = buttons.addButton("Preview (headless)", QtWidgets.QDialogButtonBox.ActionRole)
        self.preview_button.clicked.connect(self.preview)
        buttons.accepted.connect(self.save)
        buttons.rejected.connect(self.reject)
        self.save_button = buttons.button(QtWidgets.QDialogButtonBox.Save)
        lay.addWidget(buttons)
        self.document = None
        if script:
            self._fill(script)
        self.revalidate()

    # -- rows -----------------------------------------------------------------------------------------
    def _choices(self, key: str, column: int):
        """(file key, words on screen) offered in a column chosen from a list, or None for typed cells."""
        from ventcast.physiology.scenario import EVENT_KINDS
        if key == "events" and column == 1:
            return [(k, f"{what} ({name} {lo:g}-{hi:g})") for k, (name, (lo, hi), what) in EVENT_KINDS.items()]
        if key == "expected_actions" and column == 1:
            return [("draw", "a blood gas drawn"), ("setting_at_least", "setting at least"),
                    ("setting_at_most", "setting at most")]
        if key == "expected_actions" and column == 2:
            return [("", "(none: a draw)")] + [(k, SETTING_WORDS[k][0]) for k in SETTING_WORDS if k != "mode"]
        return None

    def add_row(self, key: str, values: list | None = None):
        t = self.tables[key]
        t.blockSignals(True)
        r = t.rowCount()
        t.insertRow(r)
        defaults = {"events": ["5", self.event_kinds[0], "0.1", ""], "checkpoints": ["10", ""],
                    "expected_actions": ["15", "draw", "", "", ""]}[key]
        for c, v in enumerate(values or defaults):
            text = "" if v is None else str(v)
            choices = self._choices(key, c)
            if choices is None:
                t.setItem(r, c, QtWidgets.QTableWidgetItem(text))
                continue
            # Chosen in words; the file keeps its key. A key the list does not know (an old or hand-written
            # script) is shown as it is, so that the loader's refusal can name it.
            combo = QtWidgets.QComboBox()
            for k, words in choices:
                combo.addItem(words, k)
            if combo.findData(text) < 0:
                combo.addItem(text, text)
            combo.setCurrentIndex(combo.findData(text))
            combo.currentIndexChanged.connect(self.revalidate)
            t.setCellWidget(r, c, combo)
        t.blockSignals(False)
        self.revalidate()

    def _remove(self, key: str):
        t = self.tables[key]
        if t.currentRow() >= 0:
            t.removeRow(t.currentRow())
            self.revalidate()

    def _fill(self, s: dict):
        self.title.setText(s.get("title", ""))
        self.story.setPlainText(s.get("story", ""))
        self.summary.setPlainText(s.get("summary", ""))
        self.case.setCurrentText(s["case"] if isinstance(s.get("case"), str) else "demo:ards-moderate")
        self.response.setCurrentIndex(max(self.response.findData(s.get("patient_response", "drive_preserved")), 0))
        self.speed.setValue(float(s.get("speed", 10)))
        self.duration.setValue(float(s.get("duration_min", 40)))
        self.delay.setValue(float(s.get("draw_delay_min", 2)))
        for e in s.get("events", []):
            self.add_row("events", [e["minute"], e["kind"], e["value"], e.get("note", "")])
        for c in s.get("checkpoints", []):
            self.add_row("checkpoints", [c["minute"], c["prompt"]])
        for x in s.get("expected_actions", []):
            self.add_row("expected_actions", [x["by_minute"], x["what"], x.get("setting", ""), x.get("value", ""),
                                              x.get("why", "")])

    # -- the document ---------------------------------------------------------------------------------
    def _cell(self, key, r, c) -> str:
        widget = self.tables[key].cellWidget(r, c)
        if isinstance(widget, QtWidgets.QComboBox):
            return str(widget.currentData() or "")
        item = self.tables[key].item(r, c)
        return "" if item is None else item.text().strip()

    def _number(self, key, r, c, name):
        text = self._cell(key, r, c).replace(",", ".")
        try:
            return float(text)
        except ValueError:
            raise CaseError(f"{key}[{r + 1}].{name}", f"value {text!r} is not a number") from None

    def build(self) -> dict:
        """The script as the loader would read it (CaseError naming the field when it would refuse it)."""
        from ..walkthrough import FORMAT, VERSION, loads_script
        doc = {"format": FORMAT, "version": VERSION, "title": self.title.text().strip(),
               "summary": self.summary.toPlainText().strip(), "story": self.story.toPlainText().strip(),
               "case": self.case.currentText().strip(), "speed": self.speed.value(),
               "duration_min": self.duration.value(), "draw_delay_min": self.delay.value(),
               "events": [], "checkpoints": [], "expected_actions": []}
        for r in range(self.tables["events"].rowCount()):
            kind = self._cell("events", r, 1)
            if kind not in self.event_kinds:
                raise CaseError(f"events[{r + 1}].kind", f"value {kind!r} is not accepted; accepted: "
                                                         f"{', '.join(self.event_kinds)}")
            doc["events"].append({"minute": self._number("events", r, 0, "minute"), "kind": kind,
                                  "value": self._number("events", r, 2, "value"), "note": self._cell("events", r, 3)})
        for r in range(self.tables["checkpoints"].rowCount()):
            doc["checkpoints"].append({"minute": self._number("checkpoints", r, 0, "minute"),
                                       "prompt": self._cell("checkpoints", r, 1)})
        for r in range(self.tables["expected_actions"].rowCount()):
            what = self._cell("expected_actions", r, 1)
            if what not in EXPECTED_KINDS:
                raise CaseError(f"expected_actions[{r + 1}].what", f"value {what!r} is not accepted; accepted: "
                                                                   f"{', '.join(EXPECTED_KINDS)}")
            x = {"by_minute": self._number("expected_actions", r, 0, "by minute"), "what": what,
                 "why": self._cell("expected_actions", r, 4)}
            if what != "draw":
                setting = self._cell("expected_actions", r, 2)
                if setting not in SETTING_WORDS or setting == "mode":
                    raise CaseError(f"expected_actions[{r + 1}].setting",
                                    f"value {setting!r} is not a setting; accepted: "
                                    + ", ".join(k for k in SETTING_WORDS if k != "mode"))
                x.update(setting=setting, value=self._number("expected_actions", r, 3, "value"))
            doc["expected_actions"].append(x)
        if not doc["story"]:
            del doc["story"]
        if self.response.currentData() != "drive_preserved":  # the default is left implicit
            doc["patient_response"] = self.response.currentData()
        loads_script(json.dumps(doc))
        return doc

    def revalidate(self, *_args):
        try:
            self.document = self.build()
        except CaseError as exc:
            self.document = None
            self.error.setText(f"\u2716 {exc}")
        else:
            self.error.setText("")
        self.save_button.setEnabled(self.document is not None)
        self.preview_button.setEnabled(self.document is not None)

    def preview(self) -> dict | None:
        """Run the script headless with no learner action: the course's end and the score it would get."""
        from ..walkthrough import Run
        if self.document is None:
            return None
        folder = Path(self.path).resolve().parent if self.path else None
        try:
            out = Run(self.document, folder).debrief()
        except (CaseError, ArithmeticError) as exc:
            self.preview_text.setText(f"\u2716 preview: {exc}")
            return None
        c = out["course"]
        met = [s["expected"] for s in out["score"]["items"] if s["met"]]
        self.preview_text.setText(
            f"Preview without any learner action: at minute {c['minutes'][-1]:g} PaO2 {c['pao2_mmhg'][-1]:.0f} mmHg, "
            f"PaCO2 {c['paco2_mmhg'][-1]:.1f} mmHg, pH {c['ph'][-1]:.2f}, SaO2 {100 * c['sao2'][-1]:.0f} %; "
            f"score {out['score']['met']} of {out['score']['of']}"
            + (f" (met without acting: {'; '.join(met)})" if met else ""))
        return out

    def save(self, path: str | None = None) -> bool:
        path = path or self.path or QtWidgets.QFileDialog.getSaveFileName(
            self, "Save walkthrough script", "", "Walkthrough (*.walkthrough.json)")[0]
        if not path or self.document is None:
            return False
        if not path.endswith(".walkthrough.json"):
            path += ".walkthrough.json"
        write_atomic(path, json.dumps(self.document, indent=1) + "\n")
        self.path = path
        self.accept()
        return True
