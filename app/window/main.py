"""The main window: it wires the panels (Bedside, Trial settings, Outlook, Limits, Lung fit, Options,
Step-down plan) to the case, the trials and the engine.

Widgets write to plain data (the case dict and the trial settings dicts); every change is
debounced, frozen into a request and computed on a worker (:mod:`app.worker`); the newest result
wins and is drawn by the panels, which compute nothing. File actions are in :mod:`.files`.
"""

from __future__ import annotations

import copy
import os
from pathlib import Path

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from .. import CAUTION
from ..engine import (case_goals, effort_limit_lines, is_spontaneous, now_block, plan_case, recheck_sentence,
                      steady_block, wean_case)
from ..worker import EngineRunner
from .bedside import BedsidePanel
from .common import (APP_NAME, AUTOSAVE_MS, DEBOUNCE_MS, ORG_NAME, TRIALS, TrialState, file_stamp, gas_text,
                     new_recovery_path)
from .dialogs import GoalsDialog
from .files import CaseFiles
from .forecasting import ForecastPipeline
from .limits import LimitsPanel
from .lungfit import LungFitPanel
from .menus import build_menus, show_about, show_shortcuts
from .bedside_loop import BedsideLoop
from .checks import ForecastCheckPanel
from .outlook import OutlookPanel
from .plans import OptionsPanel, StepDownPanel
from .trial import TrialPanel
from .trials import TrialEditing


def _scrolling(panel: QtWidgets.QWidget) -> QtWidgets.QScrollArea:
    """``panel`` in a scroll area: on a small screen (1280 x 800) it scrolls instead of pushing the
    caution and the status bar off the screen."""
    area = QtWidgets.QScrollArea()
    area.setWidget(panel)
    area.setWidgetResizable(True)
    area.setFrameShape(QtWidgets.QFrame.NoFrame)
    area.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarAsNeeded)
    return area


class MainWindow(BedsideLoop, ForecastPipeline, CaseFiles, TrialEditing, QtWidgets.QMainWindow):
    """The window. ``synchronous=True`` computes on the calling thread (tests, screenshots)."""

    steady_shown = QtCore.Signal(object)     # stage 1: steady states and Limits on screen
    forecast_shown = QtCore.Signal(object)   # stage 2: the course drawn
    band_shown = QtCore.Signal(object)
    plan_shown = QtCore.Signal(object)
    exported = QtCore.Signal(object)         # list of files written
    wean_shown = QtCore.Signal(object)
    fit_shown = QtCore.Signal(object)
    failure_shown = QtCore.Signal(str)

    def __init__(self, case: dict, path: str | None = None, synchronous: bool = False, trials: dict | None = None,
                 parent=None):
        super().__init__(parent)
        self.setWindowTitle(APP_NAME)
        self.settings_store = QtCore.QSettings(ORG_NAME, APP_NAME)
        self.units = self.settings_store.value("units", "mmHg")
        self.oxygen_view = self.settings_store.value("oxygen_view", "pao2")
        self.runner = EngineRunner(self, synchronous=synchronous)
        self.runner.finished.connect(self._on_result)
        self.runner.failed.connect(self._on_failure)
        self.undo_stack = QtGui.QUndoStack(self)
        self.case_unsaved = False  # an imported or recovered case that was never saved
        self.recovery_file: Path | None = None  # this window's own autosave file (named after its case)
        self.disk_stamp: str | None = None  # hash of the case file as this window last read or wrote it
        self.undo_stack.cleanChanged.connect(self._on_clean_changed)
        self.fit_result = None
        self.last_steady = None
        self.last_forecast = None
        self.last_band = None
        self.last_plan = None  # the latest options (plain data)
        self.last_wean = None  # the latest step-down plan (plain data)
        self.now_prediction = None
        self.state = TrialState(case=case, trials={"A": dict(case["settings"]), "B": None, "C": None}, path=path)
        self.debounce = QtCore.QTimer(self)
        self.debounce.setSingleShot(True)
        self.debounce.setInterval(DEBOUNCE_MS)
        self.debounce.timeout.connect(self._request_forecast)
        self.autosave = QtCore.QTimer(self)
        self.autosave.setInterval(int(os.environ.get("VENTCAST_AUTOSAVE_MS", AUTOSAVE_MS)))
        self.autosave.timeout.connect(self.write_recovery)
        self._build()
        build_menus(self)
        self.resize(1500, 940)
        self.load_case(case, path, trials=trials)
        self.autosave.start()

    # --- layout -------------------------------------------------------------------------------------
    def _build(self):
        pg.setConfigOptions(antialias=False, background="#fafafa", foreground="#222222")
        central = QtWidgets.QWidget()
        outer = QtWidgets.QVBoxLayout(central)
        outer.setContentsMargins(6, 6, 6, 2)
        self.bedside = BedsidePanel()
        self.trial_panel = TrialPanel()
        self.trial_panel.control_changed.connect(self._control_changed)
        self.trial_panel.tab_changed.connect(self._on_trial_tab)
        self.trial_panel.reset_requested.connect(self.reset_trial)
        self.outlook = OutlookPanel()
        self.limits_panel = LimitsPanel()
        self.limits_panel.goals_requested.connect(self.edit_goals)
        self.lung_fit = LungFitPanel()
        self.options = OptionsPanel()
        self.options.search_requested.connect(self.find_options)
        self.options.option_chosen.connect(self.use_option)
        self.step_down = StepDownPanel()
        self.step_down.plan_requested.connect(self.plan_step_down)
        self.step_down.step_chosen.connect(self.use_step)
        self.check_panel = ForecastCheckPanel()
        self.bedside.gas_requested.connect(self.add_gas_dialog)
        self.bedside.edit_requested.connect(self.edit_gas_dialog)
        self.bedside.delete_requested.connect(self.delete_gas)
        self.trial_panel.apply_requested.connect(self.apply_trial_dialog)
        self.right_tabs = QtWidgets.QTabWidget()
        for panel, title in ((self.limits_panel, "Limits"), (self.lung_fit, "Lung fit"), (self.options, "Options"),
                             (self.step_down, "Step-down"), (self.check_panel, "Forecast check")):
            self.right_tabs.addTab(_scrolling(panel), title)
        self.right_tabs.setMinimumWidth(300)
        split = QtWidgets.QSplitter(QtCore.Qt.Horizontal)
        split.addWidget(_scrolling(self.bedside))
        middle = QtWidgets.QWidget()
        mid = QtWidgets.QVBoxLayout(middle)
        mid.setContentsMargins(0, 0, 0, 0)
        mid.addWidget(self.trial_panel)
        mid.addWidget(self.outlook, 1)
        split.addWidget(middle)
        split.addWidget(self.right_tabs)
        split.setStretchFactor(0, 0)
        split.setStretchFactor(1, 3)
        split.setStretchFactor(2, 1)
        split.setSizes([250, 850, 400])
        split.setChildrenCollapsible(False)
        outer.addWidget(split, 1)
        self.caution_label = QtWidgets.QLabel(CAUTION)
        self.caution_label.setWordWrap(True)
        self.caution_label.setObjectName("caution")
        self.caution_label.setStyleSheet("QLabel#caution { background: #fff4dc; border: 1px solid #b07d00; "
                                         "padding: 4px; font-weight: bold; color: #3a2a00; }")
        outer.addWidget(self.caution_label)
        self.setCentralWidget(central)
        self.status = QtWidgets.QLabel("")
        self.status.setTextFormat(QtCore.Qt.PlainText)  # messages quote file text: never rich text
        self.progress = QtWidgets.QProgressBar()
        self.progress.setRange(0, 0)
        self.progress.setMaximumWidth(160)
        self.progress.hide()
        self.cancel_button = QtWidgets.QPushButton("Cancel")
        self.cancel_button.hide()
        self.cancel_button.clicked.connect(self.cancel_fit)
        self.statusBar().addWidget(self.status, 1)
        self.statusBar().addPermanentWidget(self.progress)
        self.statusBar().addPermanentWidget(self.cancel_button)
        self.outlook.label_axes(self.units, self.oxygen_view)
        # The widgets other code (and the tests) reach directly, by their old names.
        self.bedside_values, self.history, self.case_label = self.bedside.values, self.bedside.history, self.bedside.case_label
        tp = self.trial_panel
        self.trial_tabs, self.mode, self.spins, self.sliders, self.compare = tp.trial_tabs, tp.mode, tp.spins, tp.sliders, tp.compare
        self.plots, self.charts = self.outlook.plots, self.outlook.charts
        self.limits, self.limits_title, self.recheck_label = (self.limits_panel.table, self.limits_panel.title,
                                                              self.limits_panel.recheck_label)
        lf = self.lung_fit
        self.fit_table, self.fit_message, self.ident_label, self.next_label = lf.table, lf.message, lf.ident_label, lf.next_label
        self.vq_perf, self.vq_text = lf.vq_perf, lf.vq_text
        self.options_table, self.options_message = self.options.table, self.options.message
        sd = self.step_down
        self.wean_message, self.wean_steps, self.wean_readiness = sd.message, sd.steps, sd.readiness
        self.wean_table_choice, self.spont_rr, self.spont_vt = sd.table_choice, sd.spont_rr, sd.spont_vt

    def find_options(self):
        result = self._fitted_for("search for options")
        if result is None:
            return
        case = copy.deepcopy(self.state.case)
        self.options.message.setText("searching...")
        self._start_busy(cancellable=True, kind="plan")
        self.runner.submit("plan", lambda: plan_case(case, result))

    def plan_step_down(self):
        result = self._fitted_for("plan a step-down")
        if result is None:
            return
        case, request = copy.deepcopy(self.state.case), self.step_down.request()
        self.step_down.message.setText("planning...")
        self._start_busy(cancellable=True, kind="wean")
        self.runner.submit("wean", lambda: wean_case(case, result, **request))

    # --- case ---------------------------------------------------------------------------------------
    def case_name(self) -> str:
        """What the user calls this case: its file name, else its label."""
        if self.state.path:
            return Path(self.state.path).name
        return self.state.case.get("label") or "unsaved case"

    def load_case(self, case: dict, path: str | None, trials: dict | None = None):
        self._drop_recovery()
        self.case_unsaved = False
        self.disk_stamp = file_stamp(path) if path else None
        case = dict(case)
        saved = case.pop("trials", None)  # trials saved in the case file come back as they were
        if trials is None and saved:
            trials = {t: (None if saved.get(t) is None else dict(saved[t])) for t in TRIALS}
        self.state = TrialState(case=case, trials=trials or {"A": dict(case["settings"]), "B": None, "C": None},
                                path=path)
        self.undo_stack.clear()
        self.fit_result = None
        self.last_steady = None
        self.last_forecast = None
        self.last_band = None
        self.bedside.show_case(self.state.case, self.units)
        pbw = self._pbw()  # VT is accepted from 2 to 20 mL/kg PBW (casefile.check_settings)
        self.trial_panel.set_range("vt_ml", round(2.0 * pbw), round(20.0 * pbw))
        self.trial_panel.select_tab("A")
        self._show_trial_controls()
        self._update_title()
        self.recovery_file = new_recovery_path(self.case_name())
        if path:
            self._remember_recent(path)
        self.show_forecast_check()
        self._refit()

    def _show_fit(self):
        self.lung_fit.show_fit(self.fit_result)
        self.bedside.show_notes(self.fit_result.warnings)
        now = self.now_prediction
        if now is not None and bool(np.all(now.success)):
            self.bedside.show_model_vd_vt(float(now.gas.vd_vt))
            self.lung_fit.show_vq(now)

    def _fill_compare(self, compare, ranges=None, ranges_trial=None):
        now = (steady_block(self.now_prediction, spontaneous=is_spontaneous(self.state.case["settings"]))
               if self.now_prediction is not None else None)
        self.trial_panel.fill_compare(now, compare, self.units, ranges, ranges_trial, self._measured())

    def _measured(self) -> dict:
        """The latest observation in the comparison table's keys (what was measured, nothing modelled)."""
        if not self.state.case["observations"]:
            return {}
        obs = self.state.case["observations"][-1]
        s = obs["settings"]
        vt = obs.get("vte_ml") or (s.get("vt_ml") if s["mode"] == "volume" else None)
        out = {k: obs.get(k) for k in ("pao2_mmhg", "paco2_mmhg", "ph", "sao2", "pplat_cmh2o")}
        out["vt_ml"] = vt
        bedside = now_block(self.state.case)
        out["rr_per_min"] = obs.get("spontaneous_rr_per_min") or s["rr_per_min"]
        out["rsbi"] = bedside.get("rsbi")
        out["pmus_cmh2o"] = bedside.get("pmus_from_pocc_cmh2o")
        out["vt_ml_per_kg_pbw"] = None if vt is None else vt / self._pbw()
        out["mechanical_power_j_min"] = bedside.get("mechanical_power_j_min")
        return out

    def _fill_limits(self, lines):
        self.limits_panel.fill(lines, self.units)

    def _draw_course(self, out, band=None):
        goals = case_goals(self.state.case).as_dict()
        self.outlook.draw(out, self.now_prediction, self.units, self.oxygen_view, goals, band, out.get("others"))
        self.outlook.show_goals(goals, self.units, self.oxygen_view)

    def _show_steady(self, out):
        self.trial_panel.clear_problem()
        self.limits_panel.set_trial(out["active"])
        self._fill_compare(out["compare"])
        self._fill_limits(out["limit_lines"])

    def _show_forecast(self, out):
        self._draw_course(out)
        self._fill_compare(out["compare"], out["likely_range"], out["active"])
        # On pressure support or CPAP the effort checks join the Limits (Pmus, RSBI, rate, for each bound).
        self._fill_limits(out["limit_lines"] + (effort_limit_lines(out["spontaneous"]) if out.get("spontaneous") else []))
        r = out.get("recheck_after_min")
        unchanged = out["settings"] == out["current_settings"]
        text = ("The trial equals the current settings: no change is expected." if unchanged else
                recheck_sentence(r))
        # A forecast outside its own likely range, or beyond most of its draws, is said where the re-check
        # advice is read.
        outside = [a["message"] for a in out.get("alerts", [])
                   if a["code"] in ("estimate_outside_range", "estimate_atypical")]
        lines = [text] + [f"\u26a0 {m[0].upper()}{m[1:]}." for m in outside]
        if out.get("spontaneous"):  # which bound is drawn, and what the other says
            b1, b2 = out["spontaneous"]["bounds"]["effort_unchanged"], out["spontaneous"]["bounds"]["drive_preserved"]
            if out["spontaneous"]["drawn"] == "effort_unchanged":
                lines.insert(0, f"On support the course drawn is the effort-unchanged bound (VT {b1['vt_ml']:.0f} mL "
                                f"at {b1['rr_per_min']:.0f}/min, PaCO2 {gas_text(b1['paco2_mmhg'], self.units, 1)}); "
                                f"with the drive preserved the patient breathes {b2['rr_per_min']:.0f}/min at VT "
                                f"{b2['vt_ml']:.0f} mL, PaCO2 {gas_text(b2['paco2_mmhg'], self.units, 1)}.")
            else:
                lines.insert(0, f"\u26a0 On support with the effort unchanged (VT {b1['vt_ml']:.0f} mL at "
                                f"{b1['rr_per_min']:.0f}/min) the ventilation is too little for any steady state: the "
                                f"course drawn is the drive-preserved bound ({b2['rr_per_min']:.0f}/min at VT "
                                f"{b2['vt_ml']:.0f} mL, PaCO2 {gas_text(b2['paco2_mmhg'], self.units, 1)}).")
        self.recheck_label.setText("\n".join(lines).strip())

    def _show_band(self, out):
        if self.last_forecast is None:
            return
        self._draw_course(self.last_forecast, band=out)
        self.lung_fit.show_next(out.get("next_best_measurement") or [])
        self._fill_compare(self.last_forecast["compare"], out["likely_range"], self.last_forecast["active"])
        for line in out.get("alerts", []):
            if line["code"] in ("band_unavailable", "range_incomplete"):
                self.status.setText(f"\u26a0 {line['message']}")

    def edit_goals(self):
        dialog = GoalsDialog(self.state.case.get("goals") or {}, self, units=self.units)
        dialog.accepted.connect(lambda: self.set_goals(dialog.goals()))
        dialog.open()
        return dialog

    def set_goals(self, goals: dict):
        """New goals for this case (kept in the case file on Save); the Limits are checked again."""
        if goals == (self.state.case.get("goals") or {}):
            return
        self.state.case["goals"] = goals
        self.undo_stack.resetClean()
        self._update_title()
        self.debounce.start()

    # --- units and views ----------------------------------------------------------------------------
    def set_units(self, units: str):
        self.units = units
        self.settings_store.setValue("units", units)
        self.outlook.label_axes(self.units, self.oxygen_view)
        self.bedside.show_case(self.state.case, self.units)
        self.show_forecast_check()
        if self.fit_result is not None:
            self._show_fit()
        self._redraw()

    def set_oxygen_view(self, view: str):
        self.oxygen_view = view
        self.settings_store.setValue("oxygen_view", view)
        self.outlook.label_axes(self.units, self.oxygen_view)
        self._redraw()

    def _redraw(self):
        if self.last_forecast is None and self.last_steady is not None:
            self._show_steady(self.last_steady)
        if self.last_forecast is not None:
            self._show_forecast(self.last_forecast)
            if self.last_band is not None:
                self._show_band(self.last_band)

    # --- busy ---------------------------------------------------------------------------------------
    def _start_busy(self, cancellable, kind="fit"):
        self.busy_kind = kind
        self.progress.show()
        self.cancel_button.setVisible(cancellable)

    def _stop_busy(self):
        self.progress.hide()
        self.cancel_button.hide()

    def cancel_fit(self):
        """Cancel the long work under way (fit, options or step-down plan): its result is discarded."""
        kind = getattr(self, "busy_kind", "fit")
        self.runner.cancel(kind)
        self._stop_busy()
        if kind == "fit":
            self.runner.cancel("draws")
            if self.fit_result is None:
                self.fit_message.setText("\u2716 fit cancelled: no forecast is shown. Open the case again to fit it.")
            else:
                self.fit_message.setText("\u2716 likely ranges cancelled: the forecast shown is the fitted estimate "
                                         "alone, with no range. Open the case again to compute them.")
        elif kind == "plan":
            self.options.message.setText("\u2716 search cancelled")
        elif kind == "wean":
            self.wean_message.setText("\u2716 planning cancelled")
        self.status.setText(f"{ {'fit': 'fit', 'plan': 'search', 'wean': 'step-down planning', 'export': 'export'}[kind]} "
                            f"cancelled")

    def closeEvent(self, event):
        if not self.may_leave_case("close the window"):
            event.ignore()
            return
        self.autosave.stop()
        self.debounce.stop()
        self.undo_stack.cleanChanged.disconnect(self._on_clean_changed)  # it fires while being destroyed
        self._drop_recovery()
        self.runner.cancel_all()  # queued work is dropped; a band running stops at its next chunk
        self.runner.wait(60000)
        super().closeEvent(event)

    def show_shortcuts(self):
        show_shortcuts(self)

    def show_about(self):
        show_about(self)
