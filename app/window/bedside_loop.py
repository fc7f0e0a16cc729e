"""The bedside loop of the main window: File -> New case, Add blood gas (typed or pasted), Apply a trial to
the patient (with the forecast on screen stored for it), and the Forecast check. Every data change is one
undoable step; it clears every forecast computed from the old data and refits on the worker.

A mixin of :class:`app.window.main.MainWindow`; the forms are in :mod:`app.window.entry_forms`.
"""

from __future__ import annotations

import copy

from PySide6 import QtGui

from ..casefile import CaseError, check_settings
from ..entry import apply_change, delete_observation, forecast_check, stored_forecast
from .entry_forms import ApplyDialog, GasDialog, NewCaseDialog


class CaseDataChange(QtGui.QUndoCommand):
    """One change of the case's data (a gas added, a change applied): undo restores the case before it."""

    def __init__(self, window, before: dict, after: dict, what: str):
        super().__init__(what)
        self.window, self.before, self.after = window, before, after

    def redo(self):
        self.window._set_case_data(self.after)

    def undo(self):
        self.window._set_case_data(self.before)


class BedsideLoop:
    """New case, Add blood gas, Apply trial, Forecast check."""

    def new_case_dialog(self):
        if not self.may_leave_case("start a new case"):
            return None
        dialog = NewCaseDialog(self)
        dialog.accepted.connect(lambda: self._new_case_made(dialog))
        dialog.open()
        return dialog

    def _new_case_made(self, dialog):
        self.load_case(dialog.result_value, None)
        self.case_unsaved = True  # in no file until it is saved; autosave and recovery apply
        self._update_title()
        if dialog.first_gas.isChecked():
            self.add_gas_dialog()

    def add_gas_dialog(self):
        dialog = GasDialog(self.state.case, self.units, self)
        dialog.accepted.connect(lambda: self.change_case_data(dialog.result_value, "add blood gas"))
        dialog.open()
        return dialog

    def edit_gas_dialog(self, index: int):
        """Correct an observation (a typing error); one undoable step, the stored forecasts untouched."""
        dialog = GasDialog(self.state.case, self.units, self, index=index)
        dialog.accepted.connect(lambda: self.change_case_data(dialog.result_value, "edit blood gas"))
        dialog.open()
        return dialog

    def delete_gas(self, index: int):
        try:
            new = delete_observation(self.state.case, index)
        except CaseError as exc:
            self.status.setText(f"\u2716 not deleted: {exc}")
            return
        self.change_case_data(new, "delete blood gas")
        self.status.setText("blood gas deleted (Ctrl+Z brings it back)")

    def apply_trial_dialog(self):
        """Apply the trial being edited as the patient's new settings, once its likely range is on screen."""
        active = self.state.active
        try:
            trial = check_settings(f"Trial {active}", dict(self.state.trials[active]), self._pbw())
        except CaseError as exc:
            self.status.setText(f"\u2716 not applied: {exc}")
            return None
        band = self.last_band
        if band is None or band.get("settings") != trial:
            self.status.setText(f"\u2716 not applied: wait until Trial {active}'s forecast and its likely range are "
                                f"on screen (they are stored with the change)")
            return None
        if trial == self.state.case["settings"]:
            self.status.setText(f"\u2716 not applied: Trial {active} equals the current settings")
            return None
        dialog = ApplyDialog(active, self.state.case["settings"], trial, self)
        dialog.accepted.connect(lambda: self.apply_trial(trial, band, dialog.applied_at()))
        dialog.open()
        return dialog

    def apply_trial(self, trial: dict, band: dict, applied_at: str) -> bool:
        try:
            new = apply_change(self.state.case, trial, stored_forecast(band), applied_at)
        except CaseError as exc:
            self.status.setText(f"\u2716 not applied: {exc}")
            return False
        self.change_case_data(new, f"apply Trial {self.state.active}")
        return True

    def change_case_data(self, new_case: dict, what: str):
        self.undo_stack.push(CaseDataChange(self, copy.deepcopy(self.state.case), copy.deepcopy(new_case), what))

    def _set_case_data(self, case: dict):
        """Show the case's new data and refit; nothing computed from the old data stays on screen."""
        for kind in ("fit", "draws", "steady", "course", "band", "plan", "wean"):
            self.runner.cancel(kind)
        self.state.case = copy.deepcopy(case)
        self.fit_result = self.now_prediction = None
        self.last_steady = self.last_forecast = self.last_band = None
        self._show_refused("the data changed: refitting the lung model")
        self.bedside.show_case(self.state.case, self.units)
        self.show_forecast_check()
        self._update_title()
        self._refit()

    def _refit(self):
        if not self.state.case["observations"]:
            self.status.setText("no blood gas yet: add one (Ctrl+G) to fit the lung model")
            self.fit_message.setText("No blood gas yet: nothing is fitted or forecast. Add one with Add blood gas "
                                     "(Ctrl+G).")
            self.outlook.show_placeholder("No blood gas yet: add one (Add blood gas, Ctrl+G) and the lung model is "
                                          "fitted to it.")
            self._stop_busy()
            return
        self.status.setText("fitting the lung model to the observations...")
        self.outlook.show_placeholder("No forecast yet: fitting the lung model...")
        self._start_busy(cancellable=True)
        case_copy = copy.deepcopy(self.state.case)
        self.runner.submit("fit", lambda: self._fit_work(case_copy))

    def show_forecast_check(self):
        self.check_panel.show_check(forecast_check(self.state.case), self.units, self.state.case)
