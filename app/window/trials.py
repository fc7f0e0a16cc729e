"""Editing the trials in the main window: the active trial, control changes as undoable commands, reset,
options put into a trial, and the checks of every trial against the accepted ranges.

A mixin of :class:`app.window.main.MainWindow` (the trials are its plain-data state).
"""

from __future__ import annotations

import numpy as np

from ..casefile import SPONTANEOUS_MODES, check_settings
from ..engine import drop_other_modes
from .common import MODES, TRIALS, TrialChange


class TrialEditing:
    """The trials' state changes; the panel (:class:`app.window.trial.TrialPanel`) only shows them."""

    @property
    def trial(self) -> dict:
        return self.state.trials[self.state.active]

    def _on_trial_tab(self, index):
        t = TRIALS[index]
        if self.state.trials[t] is None:
            self.state.trials[t] = dict(self.state.case["settings"])  # a new trial starts from the current settings
        self.state.active = t
        self._show_trial_controls()
        self.debounce.start()

    def _show_trial_controls(self):
        self.trial_panel.show_trial(self.trial, self._vt_text())
        self.limits_panel.set_trial(self.state.active)

    def _control_changed(self, key):
        before = dict(self.trial)
        after = dict(before)
        if key == "mode":
            mode = self.trial_panel.mode_value()
            after["mode"] = mode
            if mode == "pressure" and after.get("inspiratory_pressure_cmh2o") is None:
                after["inspiratory_pressure_cmh2o"] = self._pressure_for_volume(after)
            if mode == "volume" and after.get("vt_ml") is None:
                after["vt_ml"] = float(self.state.case["settings"].get("vt_ml") or 6.0 * self._pbw())
            if mode == "pressure-support" and after.get("pressure_support_cmh2o") is None:
                after["pressure_support_cmh2o"] = float(self.state.case["settings"].get("pressure_support_cmh2o") or 10.0)
            drop_other_modes(after)  # as on the command line
        else:
            after[key] = self.trial_panel.value(key)
        if after == before:
            return
        self.undo_stack.push(TrialChange(self, self.state.active, before, after, key))

    def _pressure_for_volume(self, s):
        """Inspiratory pressure that would deliver the trial VT with the fitted compliance [cmH2O]."""
        c = 35.0
        if self.fit_result is not None:
            c = float(self.fit_result.estimates["c_max"])
        vt = float(s.get("vt_ml") or 6.0 * self._pbw())
        return float(np.clip(round(vt / max(c, 5.0)), 5, 40))

    def _pbw(self):
        from ventcast.physiology.indices import predicted_body_weight
        p = self.state.case["patient"]
        return float(predicted_body_weight(p["height_cm"], p["sex"]))

    def _apply_trial(self, trial: str, settings: dict):
        """Set a trial's settings (from the undo stack) and ask for a new forecast."""
        self.state.trials[trial] = dict(settings)
        if trial != self.state.active:
            self.state.active = trial
            self.trial_panel.select_tab(trial)
        self._show_trial_controls()
        self.debounce.start()

    def reset_trial(self):
        before = dict(self.trial)
        after = dict(self.state.case["settings"])
        if before != after:
            self.undo_stack.push(TrialChange(self, self.state.active, before, after, "reset"))

    def set_trial_value(self, key: str, value):
        """Programmatic control change (tests, walkthroughs): as if the user had typed it."""
        if key == "mode":
            self.mode.setCurrentIndex([m for m, _w in MODES].index(value))
        else:
            self.spins[key].setValue(float(value))

    def _vt_text(self) -> str:
        s = self.trial
        pbw = self._pbw()
        if s["mode"] == "volume" and s.get("vt_ml"):
            return f"VT {s['vt_ml'] / pbw:.1f} mL/kg PBW (PBW {pbw:.1f} kg)"
        if s["mode"] in SPONTANEOUS_MODES:
            return (f"PBW {pbw:.1f} kg; VT and rate are the patient's: forecast between two bounds (effort unchanged, "
                    f"drive preserved); RR and Ti here are the backup")
        return f"PBW {pbw:.1f} kg; VT follows from the inspiratory pressure"

    def use_step(self, row):
        """Put a step-down step's settings into the current trial (undoable), to see its course."""
        self._try_row(self.last_wean, "steps", row, "step")

    def use_option(self, row):
        """Put an option's settings into the current trial (undoable)."""
        self._try_row(self.last_plan, "options", row, "option")

    def _try_row(self, shown, key: str, row: int, what: str):
        """The settings of row ``row`` of a plan shown (``shown[key]``) as the current trial, undoably."""
        if shown is None or not 0 <= row < len(shown[key]):
            return
        before = dict(self.trial)
        after = dict(shown[key][row]["settings"])
        if after != before:
            self.undo_stack.push(TrialChange(self, self.state.active, before, after, f"{what} {row + 1}"))

    def _checked_trials(self):
        pbw = self._pbw()
        out = {}
        for t in TRIALS:
            s = self.state.trials[t]
            if s is not None:
                out[t] = check_settings(f"Trial {t}", dict(s), pbw)
        return out
