"""The forecast pipeline of the main window: the fit in two jobs (the estimate, then the posterior draws),
and each trial's forecast in three stages (steady states and Limits; the course; its likely range),
each a request to the worker whose newest result wins.

A mixin of :class:`app.window.main.MainWindow`; the panels draw what comes back.
"""

from __future__ import annotations

import copy
from html import escape

import numpy as np
from PySide6 import QtCore

from ventcast.physiology.forecast import predict

from ..casefile import CaseError
from ..engine import (ModelError, current_settings, fit_case, forecast_fitted, is_spontaneous, limit_checks, sample_fit,
                      steady_block, supported_steady, to_settings, trial_course)
from .common import field_in_words


class ForecastPipeline:
    """Requests to the engine and the handling of their results."""

    @staticmethod
    def _fit_work(case):
        # The estimate alone first (a tenth of the time): its forecast is shown while the posterior
        # draws, which give every likely range, are computed in a second job ("draws").
        _patient, _obs, result = fit_case(case, sample=False)
        now = predict(result.model, current_settings(case))
        return {"result": result, "now": now}

    def _fitted_for(self, doing: str):
        """The complete fit (with its draws) for ``doing``, or None after saying why there is none yet."""
        if self.fit_result is None:
            self.status.setText(f"\u2716 the lung model is not fitted yet: cannot {doing}")
            return None
        if not self.fit_result.sampled:
            self.status.setText(f"\u2716 the fit's likely ranges are still being computed (a few seconds): "
                                f"{doing} when they are shown")
            return None
        return self.fit_result

    # --- requests -----------------------------------------------------------------------------------
    def _request_forecast(self):
        """Stage 1 of a forecast: steady states of every trial and the Limits (fast); stages 2 (course and
        likely range) and 3 (band of the course, next best measurement) follow as each result lands."""
        if self.fit_result is None:
            return
        try:
            trials = self._checked_trials()
        except CaseError as exc:
            self._show_refused(f"{field_in_words(exc.field)}: {str(exc)[len(exc.field) + 2:]}")
            self.failure_shown.emit(str(exc))
            self._submit_draws()  # no forecast for a refused trial: the draws are still needed
            return
        case, result, active = copy.deepcopy(self.state.case), self.fit_result, self.state.active
        self.status.setText(f"forecasting Trial {active}...")
        self.runner.cancel("course")
        self.runner.cancel("band")
        self.runner.submit("steady", lambda: self._steady_work(case, result, trials, active))

    @staticmethod
    def _steady_work(case, result, trials, active):
        compare, reasons = {}, {}
        for t, s in trials.items():
            if is_spontaneous(s):  # the effort-unchanged bound, with the span of both bounds
                p, steady, _sup = supported_steady(case, result, s)
            else:
                p = predict(result.model, to_settings(s))
                steady = steady_block(p)
            compare[t] = steady if bool(np.all(p.success)) else None
            reasons[t] = p.message
        if compare[active] is None:
            raise ArithmeticError(f"Trial {active}: the model has no steady state at these settings ({reasons[active]})")
        return {"active": active, "trial_settings": trials[active], "all_trials": trials, "compare": compare,
                "steady": compare[active],
                "limit_lines": limit_checks(compare[active], case.get("goals"), fio2=float(trials[active]["fio2"])),
                "case": case}

    def _request_course(self, steady):
        case, result, trial = steady["case"], self.fit_result, steady["trial_settings"]

        def work():
            out = forecast_fitted(case, result, trial, with_band=False, with_next=False)
            out.update(active=steady["active"], trial_settings=trial, compare=steady["compare"],
                       limit_lines=steady["limit_lines"],
                       others=self._other_courses(case, result, steady["all_trials"], steady["active"],
                                                  steady["compare"]))
            return out

        self.runner.submit("course", work)

    @staticmethod
    def _other_courses(case, result, trials, active, compare) -> dict:
        """The course of every other trial (no likely range: that is drawn for the trial being edited),
        or the reason it has none, so that the Outlook draws the trials side by side."""
        others = {}
        for t, s in trials.items():
            if t == active:
                continue
            if compare.get(t) is None:
                others[t] = "no steady state at its settings"
                continue
            try:
                others[t] = trial_course(case, result, s)
            except (ModelError, ArithmeticError) as exc:
                others[t] = f"no course ({exc})"
        return others

    def _request_band(self, forecast):
        case, result = copy.deepcopy(self.state.case), self.fit_result
        trial = forecast["trial_settings"]
        self.runner.submit("band", lambda stop: forecast_fitted(case, result, trial, with_band=True, with_next=True,
                                                               stop=stop), stoppable=True)

    # --- results ------------------------------------------------------------------------------------
    def _on_result(self, request, result):
        if request.kind == "fit":
            self.fit_result = result["result"]
            self.now_prediction = result["now"]
            self._show_fit()
            if self.fit_result.sampled:  # a fit remembered complete: nothing more to compute
                self._draws_for = None
                self._stop_busy()
                self.fit_shown.emit(self.fit_result)
            else:
                # The draws start once the first forecast is on screen (they would slow it down); see
                # _submit_draws.
                self._draws_for = self.fit_result
            self._request_forecast()
        elif request.kind == "draws":
            if result["estimate"] is not self.fit_result:
                return  # draws of a fit that has since been replaced (another case, changed data)
            self._stop_busy()
            self.fit_result = result["result"]
            self._show_fit()
            self.fit_shown.emit(self.fit_result)
            self._request_forecast()
        elif request.kind == "steady":
            self.last_steady = result
            self._show_steady(result)
            self.status.setText(f"Trial {result['active']}: steady state shown; computing the course...")
            self.steady_shown.emit(result)
            self._after_paint(lambda: self._request_course(result) if result is self.last_steady else None)
        elif request.kind == "course":
            self.last_forecast = result
            self.last_band = None
            self._show_forecast(result)
            self.forecast_shown.emit(result)
            if self.fit_result is not None and self.fit_result.sampled:
                self.status.setText(f"Trial {result['active']}: course shown; computing its likely range...")
            else:
                self.status.setText(f"Trial {result['active']}: forecast from the fitted estimate shown; computing "
                                    f"the likely ranges (posterior draws)...")
            self._after_paint(lambda: self._next_after_course(result))
        elif request.kind == "export":
            self._stop_busy()
            self._finish_export(result)
        elif request.kind == "plan":
            self._stop_busy()
            self.last_plan = result
            self.options.show_plan(result, self.units)
            self.status.setText("options shown")
            self.plan_shown.emit(result)
        elif request.kind == "wean":
            self._stop_busy()
            self.last_wean = result
            self.step_down.show_wean(result, self.units)
            self.status.setText("step-down plan shown")
            self.wean_shown.emit(result)
        elif request.kind == "band":
            self.last_band = result
            self._show_band(result)
            self.status.setText("forecast and likely range shown")
            self.band_shown.emit(result)

    def _after_paint(self, fn):
        """Run ``fn`` (the next stage's request) once the window has drawn the result it was just given: the
        worker's next stage shares the interpreter with the paint, whose many Qt calls would each wait for
        it (window_event_gap_ms). A zero-delay timer fires after the posted repaints. Synchronous windows
        (tests, screenshots) go on at once."""
        if self.runner.synchronous:
            fn()
        else:
            QtCore.QTimer.singleShot(0, self, fn)

    def _next_after_course(self, forecast):
        """After a course is drawn: the posterior draws (once), then the likely range of that course, unless a
        newer forecast has replaced it meanwhile."""
        if forecast is not self.last_forecast:
            return
        self._submit_draws()
        if self.fit_result is not None and self.fit_result.sampled:
            self._request_band(forecast)

    def _submit_draws(self):
        """Start the posterior draws of the estimate shown (once), after its first forecast."""
        estimate, self._draws_for = getattr(self, "_draws_for", None), None
        if estimate is not None and estimate is self.fit_result:
            self.runner.submit("draws", lambda stop: {"estimate": estimate, "result": sample_fit(estimate, stop)},
                               stoppable=True)

    def _show_refused(self, why: str):
        """No forecast for the trial: clear every number, curve and Limits line computed from the trial
        before (never leave them on screen as if they were its forecast) and say why by the controls."""
        self.last_steady = self.last_forecast = self.last_band = None
        self.trial_panel.show_problem(why)
        self._fill_compare({})
        self.outlook.clear()
        self.limits_panel.clear(self.state.active, "no forecast for this trial")
        self.status.setText(f"\u2716 {why}")

    def _on_failure(self, request, message):
        if request is not None and request.kind in ("steady", "course"):
            self._show_refused(message)
            self._submit_draws()  # no first forecast at this trial: the draws are still needed
        if request is not None and request.kind in ("fit", "draws", "plan", "wean", "export"):
            self._stop_busy()
        if request is not None and request.kind == "plan":
            self.options_message.setText(f"\u2716 {escape(message)}")
        if request is not None and request.kind == "wean":
            self.wean_message.setText(f"\u2716 {escape(message)}")
        if request is not None and request.kind == "fit":
            self.fit_message.setText(f"<b>The model could not be fitted:</b> {escape(message)}")
            self.outlook.show_placeholder(f"No forecast: the model could not be fitted ({message}).")
        if request is not None and request.kind == "draws":
            self.fit_message.setText(f"<b>No likely ranges:</b> {escape(message)}. The forecast shown is the fitted "
                                     f"estimate alone; do not act on it without a range.")
        self.status.setText(f"\u2716 {message}")
        self.failure_shown.emit(message)
