"""Walkthrough mode: its own window, a patient on a running clock, learner settings, instructor events."""

from __future__ import annotations

from html import escape

import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from .. import CAUTION
from ..casefile import CaseError, setting_words, write_atomic
from ..precision import sao2_text
from ..worker import EngineRunner
from .common import APP_NAME, CONTROLS
from .walkthrough_panels import InstructorPanel, MonitorPanel

#: Controls a patient on support never answers in a walkthrough (the backup rate and Ti: the patient
#: triggers every breath, and apnoea is not scripted).
SUPPORT_HIDDEN = ("rr_per_min", "inspiratory_time_s")


class WalkthroughWindow(QtWidgets.QMainWindow):
    """Walkthrough mode: a patient that evolves on a running clock (1x-60x), learner settings, instructor
    events, blood-gas draws with a result delay, and a debrief exported as PDF and CSV.

    The clock only moves the reading position along the course (:class:`app.walkthrough.Run`); a new
    event or setting recomputes the course on the worker, so nothing blocks the window.
    """

    ticked = QtCore.Signal(float)           # the clock [min]
    course_ready = QtCore.Signal()
    result_shown = QtCore.Signal(object)    # a draw's result
    finished = QtCore.Signal(object)        # the debrief

    TICK_MS = 100

    def __init__(self, script: dict, folder=None, synchronous: bool = False, parent=None):
        super().__init__(parent)
        from ..walkthrough import Run
        self.setWindowTitle(f"{APP_NAME} walkthrough \u2014 {script['title']}")
        self.run = Run(script, folder)
        self.minute = 0.0
        self.running = False
        self.runner = EngineRunner(self, synchronous=synchronous)
        self.runner.finished.connect(self._on_result)
        self.runner.failed.connect(self._on_failed)
        self.pending = None  # the learner's or instructor's change the course is being worked out with
        self.timer = QtCore.QTimer(self)
        self.timer.setInterval(self.TICK_MS)
        self.timer.timeout.connect(self._tick)
        self._build()
        self._recompute()

    def _build(self):
        pg.setConfigOptions(antialias=False, background="#fafafa", foreground="#222222")
        central = QtWidgets.QWidget()
        lay = QtWidgets.QGridLayout(central)
        self.clock = QtWidgets.QLabel("")
        self.clock.setStyleSheet("font-size: 18px; font-weight: bold;")
        lay.addWidget(self.clock, 0, 0, 1, 2)
        controls = QtWidgets.QHBoxLayout()
        self.start_button = QtWidgets.QPushButton("Start")
        self.start_button.clicked.connect(self.toggle)
        self.speed = QtWidgets.QSpinBox()
        self.speed.setRange(1, 60)
        self.speed.setValue(int(self.run.speed))
        self.speed.setSuffix("\u00d7 real time")
        self.jump_button = QtWidgets.QPushButton("Jump 5 min")
        self.jump_button.clicked.connect(lambda: self.advance(5.0))
        self.draw_button = QtWidgets.QPushButton("Draw a blood gas")
        self.draw_button.clicked.connect(self.draw)
        self.finish_button = QtWidgets.QPushButton("Finish and debrief")
        self.finish_button.clicked.connect(self.finish)
        self.restart_button = QtWidgets.QPushButton("Restart")
        self.restart_button.clicked.connect(self.restart)
        self.export_button = QtWidgets.QPushButton("Export debrief...")
        self.export_button.clicked.connect(self.export_debrief_dialog)
        for w in (self.start_button, self.speed, self.jump_button, self.draw_button, self.finish_button,
                  self.restart_button, self.export_button):
            controls.addWidget(w)
        lay.addLayout(controls, 1, 0, 1, 2)
        learner = QtWidgets.QGroupBox("Ventilator settings")
        form = QtWidgets.QFormLayout(learner)
        self.learner_spins = {}
        now = self.run.learner_at(0.0)
        for key, label, unit, lo, hi, step, dec in CONTROLS:
            if now.get(key) is None or (self.run.spontaneous and key in SUPPORT_HIDDEN):
                continue
            sp = QtWidgets.QDoubleSpinBox()
            sp.setRange(lo, hi)
            sp.setSingleStep(step)
            sp.setDecimals(dec)
            sp.setSuffix(f" {unit}" if unit else "")
            sp.setValue(float(now[key]))
            form.addRow(label, sp)
            self.learner_spins[key] = sp
        apply_button = QtWidgets.QPushButton("Apply settings now")
        apply_button.clicked.connect(self.apply_settings)
        form.addRow(apply_button)
        lay.addWidget(learner, 2, 0)
        # The learner's log: prompts, their own actions, draws and results; never the script's events.
        self.log = QtWidgets.QListWidget()
        self.log.setWordWrap(True)  # whole lines in a narrow column
        lay.addWidget(self.log, 3, 0)
        self.monitor = MonitorPanel(self.run.duration, seed=int(self.run.script.get("seed", 0) or 0),
                                    spontaneous=self.run.spontaneous)
        lay.addWidget(self.monitor, 2, 1, 2, 1)
        # The learner reads the opening story only; the teaching summary is the instructor's.
        self.prompt = QtWidgets.QLabel(self.run.script.get("story") or self.run.script["title"])
        self.prompt.setTextFormat(QtCore.Qt.PlainText)  # script text is shown as written, never as HTML
        self.prompt.setWordWrap(True)
        lay.addWidget(self.prompt, 4, 0, 1, 2)
        caution = QtWidgets.QLabel(CAUTION)
        caution.setWordWrap(True)
        caution.setStyleSheet("background: #fff4dc; border: 1px solid #b07d00; padding: 4px; font-weight: bold;")
        lay.addWidget(caution, 5, 0, 1, 2)
        lay.setColumnStretch(1, 1)
        self.setCentralWidget(central)
        self.instructor = InstructorPanel(self.run.script, self.run.duration)
        self.instructor.inject_requested.connect(self.inject)
        self.instructor.pause_requested.connect(self.toggle)
        self.instructor.jump_requested.connect(self.advance)
        self.instructor.restart_requested.connect(self.restart)
        self.instructor_dock = QtWidgets.QDockWidget("Instructor (drag onto a second screen)", self)
        self.instructor_dock.setObjectName("instructor")
        self.instructor_dock.setWidget(self.instructor)
        self.instructor_dock.setFeatures(QtWidgets.QDockWidget.DockWidgetMovable | QtWidgets.QDockWidget.DockWidgetFloatable)
        self.addDockWidget(QtCore.Qt.RightDockWidgetArea, self.instructor_dock)
        self.curves, self.plots = self.instructor.curves, self.instructor.plots  # the true course
        self.status = QtWidgets.QLabel("")
        self.status.setTextFormat(QtCore.Qt.PlainText)  # messages quote file text: never rich text
        self.statusBar().addWidget(self.status, 1)
        self.resize(1500, 900)
        self._show_clock()

    # -- clock ----------------------------------------------------------------------------------------
    def toggle(self):
        self.running = not self.running
        self.start_button.setText("Pause" if self.running else "Resume")
        if self.running:
            self.timer.start()
        else:
            self.timer.stop()

    def _tick(self):
        self.advance(self.TICK_MS / 1000.0 * self.speed.value() / 60.0)

    def advance(self, minutes: float):
        """Move the clock (pause, resume and jump all come here); reveals what falls due."""
        if self.run._course is None:
            return  # the course is being recomputed: the clock waits for it
        from ..walkthrough import event_words

        start, end = self.minute, min(self.minute + minutes, self.run.duration)
        due = self.run.due(start, end)
        # Everything that fell due, in time order: (minute, for the learner too, text).
        items = [(e.minute, False, f"{e.minute:5.1f} min  \u26a0 event: {event_words(e.kind, e.value)} \u2014 {e.note}")
                 for e in due["events"]]
        items += [(c["minute"], True, f"{c['minute']:5.1f} min  ? {c['prompt']}") for c in due["checkpoints"]]
        for d in due["results"]:
            v = d.values
            items.append((d.ready_at, True, f"{d.ready_at:5.1f} min  blood gas drawn at {d.minute:.1f} min: PaO2 "
                                            f"{v['pao2']:.0f} mmHg, PaCO2 {v['paco2']:.1f} mmHg, pH {v['ph']:.2f}, "
                                            f"SaO2 {sao2_text(v['sao2'])}"))
        for _m, learner, text in sorted(items, key=lambda it: it[0]):
            self.instructor.log.addItem(text)
            if learner:
                self.log.addItem(text)
        if due["checkpoints"]:
            self.prompt.setText(sorted(due["checkpoints"], key=lambda c: c["minute"])[-1]["prompt"])
        for d in sorted(due["results"], key=lambda d: d.ready_at):
            self.result_shown.emit(d)
        self.minute = end
        self._show_clock()
        self.ticked.emit(self.minute)
        if self.minute >= self.run.duration - 1e-9 and self.running:
            self.toggle()

    def _show_clock(self):
        c = self.run._course
        if c is not None:
            from ventcast.physiology.mechanics.ventilator import breathe

            from ..engine import settings_text
            self.instructor.show_course(c, self.minute)
            learner = self.run.learner_at(self.minute)
            breathing = self.run.timeline.breathing_at(self.minute)
            if breathing is not None:  # the patient's own breath and rate
                self.monitor.sample(self.minute, c, settings_text(learner), rr=float(breathing["rr"]))
                self.monitor.show_supported(breathing["breath"])
            else:
                self.monitor.sample(self.minute, c, settings_text(learner), rr=float(learner["rr_per_min"]))
                patient, delivered = self.run.timeline.state_at(self.minute)
                self.monitor.show_ventilator(breathe(delivered, patient.mechanics, pbw_kg=patient.pbw_kg))
            self.instructor.show_upcoming(self._upcoming())
        self.clock.setText(f"Minute {self.minute:5.1f} of {self.run.duration:g}")

    def _upcoming(self) -> list:
        """The script's events and prompts still to come, for the instructor."""
        from ..walkthrough import event_words
        later = [(e.minute, f"{e.minute:g} min: {event_words(e.kind, e.value)}") for e in self.run.timeline.events
                 if e.minute > self.minute]
        later += [(c["minute"], f"{c['minute']:g} min: prompt") for c in self.run.script.get("checkpoints", [])
                  if c["minute"] > self.minute]
        return [t for _m, t in sorted(later)]

    def restart(self):
        """The run from minute 0: a new patient course, empty logs and score (the script is the same)."""
        from ..walkthrough import Run
        if self.running:
            self.toggle()
        self.run = Run(self.run.script, self.run.folder, seed=self.run.seed)
        self.minute = 0.0
        self.pending = None
        self.debrief = None
        self.log.clear()
        self.instructor.log.clear()
        self.monitor.reset()
        self.prompt.setText(self.run.script.get("story") or self.run.script["title"])
        self.start_button.setText("Start")
        now = self.run.learner_at(0.0)
        for key, sp in self.learner_spins.items():
            sp.setValue(float(now[key]))
        self._recompute()
        self.status.setText("restarted at minute 0")

    def export_debrief_dialog(self):
        folder = QtWidgets.QFileDialog.getExistingDirectory(self, "Export the debrief into folder")
        if folder:
            self.export_debrief(folder)

    # -- learner and instructor -----------------------------------------------------------------------
    def _busy(self) -> bool:
        """True (and said) while the course of the last change is being worked out: one change at a time, so
        that a change the patient cannot be followed through is the one undone."""
        if self.run._course is None:
            self.status.setText("the course of the last change is being worked out: try again in a moment")
            return True
        return False

    def apply_settings(self):
        if self._busy():
            return
        now = self.run.learner_at(self.minute)
        sets = {k: round(sp.value(), 2) for k, sp in self.learner_spins.items()
                if now.get(k) is None or abs(round(sp.value(), 2) - float(now[k])) > 1e-9}  # what the learner changed
        if not sets:
            self.status.setText("no setting changed")
            return
        try:
            self.run.act(self.minute, sets, check=False)  # checked with the course, on the worker
        except (CaseError, ValueError) as exc:
            self.status.setText(f"\u2716 {exc}")
            return
        text = f"{self.minute:5.1f} min  learner: " + ", ".join(setting_words(k, v) for k, v in sets.items())
        self.log.addItem(text)
        self.instructor.log.addItem(text)
        self.pending = "the setting change"
        self._recompute()

    def inject(self, kind: str | None = None, value: float | None = None):
        if self._busy():
            return
        kind = kind or self.instructor.event_kind.currentData()
        value = float(self.instructor.event_value.value()) if value is None else float(value)
        try:
            self.run.inject(self.minute, kind, value, check=False)  # checked with the course, on the worker
        except (CaseError, ValueError) as exc:
            self.status.setText(f"\u2716 {exc}")
            return
        from ..walkthrough import event_words
        # Logged now: an event at the current minute is not "due" on the next tick (that starts after it).
        self.instructor.log.addItem(f"{self.minute:5.1f} min  \u26a0 event (instructor): {event_words(kind, value)}")
        self.pending = "the event"
        self._recompute()

    def draw(self):
        if self.run._course is None:
            return
        d = self.run.draw(self.minute)
        text = f"{self.minute:5.1f} min  blood gas drawn; result at {d['ready_at']:.1f} min"
        self.log.addItem(text)
        self.instructor.log.addItem(text)

    def _recompute(self):
        """Recompute the course on the worker from a frozen copy of the timeline (the window may add events
        or actions meanwhile; only the newest request's course is used)."""
        self.run._course = None
        from ..walkthrough import followed_course
        frozen = self.run.timeline.copy()
        duration = self.run.duration

        def work():
            return followed_course(frozen, duration)

        self.status.setText("computing the patient's course...")
        self.runner.submit("walk", work)

    def _on_failed(self, request, message):
        """A course that cannot be computed: the change just made is undone (the patient cannot be followed
        through it) and the course before it comes back; anything else is reported as it is."""
        if request.kind == "walk" and self.pending is not None:
            what, self.pending = self.pending, None
            self.run.revert_last()
            text = f"{self.minute:5.1f} min  \u2716 {what} is undone: {message}"
            self.log.addItem(text)
            self.instructor.log.addItem(text)
            self.status.setText(f"\u2716 {what} is undone: {message}")
            self._recompute()
            return
        self.status.setText(f"\u2716 {message}")

    def _on_result(self, request, result):
        if request.kind == "walk":
            self.pending = None
            self.run._course = result
            self.status.setText("")
            self._show_clock()
            self.course_ready.emit()

    # -- debrief --------------------------------------------------------------------------------------
    def finish(self):
        from ..walkthrough import breathing_lines, score_text
        if self.running:
            self.toggle()
        if self.run._course is None:
            return None
        out = self.run.debrief(self.minute if self.minute > 0 else None)
        # The debrief is for both: the score, why each expected action was met or missed, and now the
        # teaching summary the learner did not see during the run.
        lines = [f"Debrief: score {score_text(out)}"]
        for s in out["score"]["items"]:
            mark = "\u00b7" if s["met"] is None else "\u2713" if s["met"] else "\u2716"
            lines.append(f"   [{mark}] {s['expected']} \u2014 {s['why']}")
        breathing = breathing_lines(out)
        if breathing:
            lines.append("The patient's breathing on support:")
            lines += [f"   {b}" for b in breathing]
        if out.get("summary"):
            lines.append(f"Teaching summary: {out['summary']}")
        for text in lines:
            self.log.addItem(text)
            self.instructor.log.addItem(text)
        self.debrief = out
        self.finished.emit(out)
        return out

    def export_debrief(self, folder: str) -> list:
        """The debrief as CSV (timeline and course) and PDF (timeline, score, charts) into ``folder``."""
        import csv
        import io
        from ..report import chart_images, write_pdf
        from ..walkthrough import breathing_lines, score_text
        from ..casefile import check_output_files
        try:
            folder = check_output_files("debrief folder", folder,
                                        ("debrief-timeline.csv", "debrief-course.csv", "debrief.pdf"))
        except CaseError as exc:
            self.status.setText(f"\u2716 not exported: {exc}")
            return []
        out = getattr(self, "debrief", None) or self.finish()
        folder.mkdir(exist_ok=True)
        timeline = io.StringIO()
        w = csv.writer(timeline, lineterminator="\n")
        w.writerow(["minute [min]", "what", "detail"])
        rows = [(t["minute"], t["what"], t["detail"]) for t in out["timeline"]]  # in time order
        for r in rows:
            w.writerow(r)
        course = io.StringIO()
        w = csv.writer(course, lineterminator="\n")
        c = out["course"]
        w.writerow(["minutes [min]", "PaO2 [mmHg]", "PaCO2 [mmHg]", "pH [pH units]", "SaO2 [fraction]"])
        for row in zip(c["minutes"], c["pao2_mmhg"], c["paco2_mmhg"], c["ph"], c["sao2"]):
            w.writerow(row)
        write_atomic(folder / "debrief-timeline.csv", timeline.getvalue())
        write_atomic(folder / "debrief-course.csv", course.getvalue())
        html = [f"<h1>Walkthrough debrief: {escape(out['title'])}</h1><p><b>{escape(CAUTION)}</b></p>",
                f"<h2>Teaching summary</h2><p>{escape(out['summary'])}</p>",
                f"<p>Score {escape(score_text(out))}</p><ul>"]
        html += [f"<li>{'(not yet due)' if s['met'] is None else '(ok)' if s['met'] else '(missed)'} "
                 f"{escape(s['expected'])} \u2014 {escape(s['why'])}</li>"
                 for s in out["score"]["items"]]
        html.append("</ul>")
        if out["breathing"]:
            html.append("<h2>The patient's breathing on support</h2><ul>")
            html += [f"<li>{escape(b)}</li>" for b in breathing_lines(out)]
            html.append("</ul>")
        html.append("<h2>Timeline</h2><ul>")
        html += [f"<li>{m:.1f} min: {escape(what)} \u2014 {escape(detail)}</li>" for m, what, detail in rows]
        html.append("</ul><h2>Course</h2><p><img src='chart://pao2_mmhg' width='640'></p>"
                    "<p><img src='chart://paco2_mmhg' width='640'></p>"
                    f"<p><b>{escape(CAUTION)}</b></p>")
        course_for_chart = {"course": {"minutes": c["minutes"], "pao2_mmhg": c["pao2_mmhg"], "paco2_mmhg": c["paco2_mmhg"],
                                       "ph": c["ph"]}}
        # The learner's actions (and draws) marked on the true course.
        marks = [(t["minute"], t["detail"] if t["what"] == "learner" else "gas drawn") for t in out["timeline"]
                 if t["what"] in ("learner", "blood gas drawn")]
        images = chart_images({"true course": course_for_chart}, marks=marks, xlabel="minutes of the walkthrough [min]")
        write_pdf(folder / "debrief.pdf", "\n".join(html), images)
        files = [str(folder / n) for n in ("debrief-timeline.csv", "debrief-course.csv", "debrief.pdf")]
        self.status.setText("exported " + ", ".join(files))
        return files

    def closeEvent(self, event):
        self.timer.stop()
        self.runner.cancel_all()
        self.runner.wait(60000)
        super().closeEvent(event)
