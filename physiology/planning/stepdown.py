"""Step-down plans: one change per step from the current settings toward readiness to breathe alone.

Each step lowers FiO2 (by 0.10 or 0.05) or PEEP (by 2 cmH2O) — or, following a named ARDS Network
PEEP/FiO2 table, moves one rung down it — and is taken only when the model predicts the lower
oxygenation goal still holds across the fit's parameter draws (5th percentile of SaO2 at or above
the SpO2 goal; of PaO2 at or above the PaO2 goal when no SpO2 goal is set). When the pH leaves its goal, the next step
changes the rate by 2/min to bring it back. Each step carries its forecast with the 90 % likely
range, a hold time (time to 90 % of the PaO2 and PaCO2 change, from the time-course model) and a
stop rule. A readiness summary checks published criteria at the last step.

References: ARDS Network 2000 (tables, goals); Boles et al. 2007 and MacIntyre et al. 2001
(readiness criteria, :data:`physiology.protocols.READINESS_CRITERIA`); Yang & Tobin 1991 (RSBI).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..dynamics.course import simulate
from ..forecast import PatientModel, Prediction, predict
from ..protocols import READINESS_CRITERIA, RSBI_THRESHOLD, table_steps
from .search import Goals, _tile_model, changes_from

__all__ = ["Step", "StepDownResult", "step_down", "readiness"]

#: Rate change used to keep pH in its goal [/min].
RATE_STEP = 2.0
#: The percentile of the draws that must stay within the lower oxygenation goal [%].
SAFETY_PERCENTILE = 5.0
#: Shortest hold after a step before its blood gas [min]. Common practice is a gas 10-30 min after a
#: change; Cakar et al. (Crit Care 1998;2:P088, conference report) found 10 min adequate for PaO2 to
#: equilibrate after FiO2 changes in pressure control. The model's own 90 % time is shorter for most
#: patients (its oxygen washout is faster than Cakar et al. 2001 measured after a decrease), so it
#: never sets a hold below this floor.
HOLD_FLOOR_MIN = 10.0
HOLD_FLOOR_SOURCE = ("floor 10 min: a gas 10-30 min after a change is common practice; Cakar 1998 found "
                     "10 min adequate after FiO2 changes")


@dataclass(frozen=True)
class Step:
    """One step: settings, what changed and why, forecast at the fitted patient (Prediction), likely
    range {quantity: (low, high)}, hold time [min] (never shorter than the model's 90 % time of the
    step, nor than :data:`HOLD_FLOOR_MIN`), what set the hold, and the stop rule."""

    settings: object
    change: str
    why: str
    forecast: Prediction
    likely_range: dict
    hold_min: float
    stop_if: str
    hold_basis: str = ""


@dataclass(frozen=True)
class StepDownResult:
    """success, message; steps; reached_target; stopped_because (None when the target was reached);
    readiness : list of {criterion, value, met, source}."""

    success: bool
    message: str
    steps: tuple
    reached_target: bool
    stopped_because: str | None
    readiness: list


def _draw_quantities(draws: PatientModel, settings) -> dict:
    nd = int(np.atleast_1d(draws.shunt_fixed).size)
    tiled = replace(settings, **{f: (None if getattr(settings, f) is None else np.full(nd, float(getattr(settings, f))))
                                 for f in ("fio2", "peep", "vt_ml", "inspiratory_pressure", "rr", "ti",
                                           "apparatus_dead_space_ml", "pause")})
    p = predict(draws if nd > 1 or np.ndim(draws.shunt_fixed) else _tile_model(draws, 1), tiled)
    ok = np.asarray(p.success, dtype=bool)
    g = p.gas
    return {"ok": ok, "pao2": np.atleast_1d(g.pao2)[ok], "paco2": np.atleast_1d(g.paco2)[ok],
            "ph": np.atleast_1d(g.ph)[ok], "sao2": np.atleast_1d(g.sao2)[ok]}


def _oxygenation_safe(q: dict, goals: Goals) -> bool:
    """The lower oxygenation goal holds in all but SAFETY_PERCENTILE % of the draws: the SpO2 goal when
    one is set (what the bedside sees between blood gases), else the PaO2 goal."""
    if q["ok"].mean() < 0.95:
        return False
    if goals.spo2 is not None:
        return bool(np.percentile(q["sao2"], SAFETY_PERCENTILE) >= goals.spo2[0])
    if goals.pao2_mmhg is not None:
        return bool(np.percentile(q["pao2"], SAFETY_PERCENTILE) >= goals.pao2_mmhg[0])
    return True


def _ranges(q: dict) -> dict:
    return {k: (float(np.percentile(q[k], 5)), float(np.percentile(q[k], 95))) for k in ("pao2", "paco2", "ph", "sao2")}


def _stop_rule(goals: Goals) -> str:
    parts = []
    if goals.spo2 is not None:
        parts.append(f"SpO2 falls below {100 * goals.spo2[0]:.0f} %")
    elif goals.pao2_mmhg is not None:
        parts.append(f"PaO2 falls below {goals.pao2_mmhg[0]:g} mmHg")
    if goals.ph is not None:
        parts.append(f"pH falls below {goals.ph[0]:.2f}")
    return "stop, go back one step and re-check if " + " or ".join(parts)


def _table_rungs(table: str, fio2: float, peep: float):
    """The rungs below the current (FiO2, PEEP), nearest first; the first is the highest rung that
    asks for no more FiO2 and no more PEEP than now."""
    rungs = table_steps(table)
    at_or_below = [i for i, (f, p) in enumerate(rungs) if f <= fio2 + 1e-9 and p <= peep + 1e-9]
    if not at_or_below:
        return []
    start = max(at_or_below)
    first = [] if (abs(rungs[start][0] - fio2) < 1e-9 and abs(rungs[start][1] - peep) < 1e-9) else [rungs[start]]
    return first + [rungs[i] for i in range(start - 1, -1, -1)]


def _off_table(table: str, fio2: float, peep: float) -> str | None:
    """Why a table plan cannot start here (the current FiO2 and PEEP are not a rung of the table: its next
    rung could be a jump, e.g. FiO2 0.55 -> 0.30), naming what the table asks for at this FiO2; None on a rung."""
    rungs = table_steps(table)
    if any(abs(f - fio2) < 1e-9 and abs(p - peep) < 1e-9 for f, p in rungs):
        return None
    above = [r for r in rungs if r[0] >= fio2 - 1e-9]
    f_ask = min(r[0] for r in above) if above else max(r[0] for r in rungs)
    peeps = sorted({p for f, p in rungs if abs(f - f_ask) < 1e-9})
    asks = f"PEEP {peeps[0]:g}" if len(peeps) == 1 else f"PEEP {peeps[0]:g}-{peeps[-1]:g}"
    return (f"FiO2 {fio2:.2f} with PEEP {peep:g} cmH2O is not on the {table} table: at FiO2 {f_ask:.1f} the table "
            f"asks for {asks} cmH2O. Set a rung of the table first (or plan model-driven steps)")


def step_down(model: PatientModel, draws: PatientModel, now, goals: Goals, target_fio2: float = 0.4,
              target_peep: float = 8.0, table: str | None = None, max_steps: int = 20,
              spontaneous_rr: float | None = None, spontaneous_vt_ml: float | None = None) -> StepDownResult:
    """A step-down plan from ``now`` toward FiO2 <= ``target_fio2`` and PEEP <= ``target_peep`` (see module notes).

    ``table`` None plans by the model; 'lower-peep' or 'higher-peep' follows that ARDS Network table.
    """
    if not 0.21 <= target_fio2 <= 1.0:
        raise ValueError(f"target_fio2 = {target_fio2} is outside the accepted range 0.21 to 1.0")
    if not 0 <= target_peep <= 30:
        raise ValueError(f"target_peep = {target_peep} is outside the accepted range 0 to 30 cmH2O")
    current = now
    start_pred = predict(model, current)
    if not bool(np.all(start_pred.success)):
        return StepDownResult(False, f"no steady state at the current settings: {start_pred.message}", (), False,
                              "no steady state at the current settings", [])
    steps, stopped = [], None
    if not _oxygenation_safe(_draw_quantities(draws, current), goals):
        stopped = "oxygenation at the current settings is already at or below the lower goal: not a time to step down"
    rungs = _table_rungs(table, float(current.fio2), float(current.peep)) if table else None
    if table and stopped is None:
        stopped = _off_table(table, float(current.fio2), float(current.peep))
    if table and not rungs and stopped is None:
        stopped = f"the current FiO2 and PEEP are below every rung of the {table} table"
    rule = _stop_rule(goals)
    while stopped is None and len(steps) < max_steps:
        fio2, peep = float(current.fio2), float(current.peep)
        if fio2 <= target_fio2 + 1e-9 and peep <= target_peep + 1e-9:
            break
        q_now = _draw_quantities(draws, current)
        ph_now = float(np.median(q_now["ph"])) if q_now["ph"].size else np.nan
        # First keep the pH in its goal, with the rate, before lowering support further.
        if goals.ph is not None and np.isfinite(ph_now) and not goals.ph[0] <= ph_now <= goals.ph[1]:
            new_rr = float(current.rr) + (RATE_STEP if ph_now < goals.ph[0] else -RATE_STEP)
            if ph_now < goals.ph[0] and new_rr > goals.rr_max_per_min:
                stopped = f"pH {ph_now:.2f} is below its goal and the rate is at its limit"
                break
            options = [(replace(current, rr=new_rr), f"to bring pH {ph_now:.2f} back into {goals.ph[0]:.2f}-{goals.ph[1]:.2f}")]
            check_oxygen = False
        elif table:
            if not rungs:
                stopped = f"the bottom of the {table} table is reached"
                break
            f_next, p_next = rungs[0]
            options = [(replace(current, fio2=float(f_next), peep=float(p_next)), f"next rung of the {table} table")]
            check_oxygen = True
        else:
            options = []
            # Each move is labelled with its true size (a step that stops at the target is smaller).
            new_fio2 = [round(max(fio2 - d, target_fio2 if fio2 > target_fio2 else 0.21), 2) for d in (0.10, 0.05)]
            fio2_moves = [(replace(current, fio2=f), f"FiO2 down by {fio2 - f:.2f}")
                          for f in dict.fromkeys(new_fio2) if fio2 > target_fio2 + 1e-9 and f < fio2 - 1e-9]
            new_peep = max(peep - 2.0, target_peep if peep > target_peep else 0.0)
            peep_moves = [(replace(current, peep=new_peep), f"PEEP down by {peep - new_peep:g} cmH2O")
                          ] if peep > target_peep + 1e-9 else []
            # FiO2 first while it is above 0.5 (common practice), then PEEP before the last of the FiO2.
            options = fio2_moves + peep_moves if fio2 > 0.5 + 1e-9 else peep_moves + fio2_moves
            check_oxygen = True
        chosen = None
        for settings, why in options:
            q = _draw_quantities(draws, settings)
            if check_oxygen and not _oxygenation_safe(q, goals):
                continue
            pred = predict(model, settings)
            if not bool(np.all(pred.success)):
                continue
            chosen = (settings, why, q, pred)
            break
        if chosen is None:
            stopped = ("the next table step is predicted to break the lower oxygenation goal" if table else
                       "every next step is predicted to break the lower oxygenation goal "
                       f"(in more than {SAFETY_PERCENTILE:g} % of the parameter draws)")
            break
        settings, why, q, pred = chosen
        course = simulate(model, current, settings, minutes=60.0)
        hold, basis = _hold(course)
        steps.append(Step(settings=settings, change="; ".join(changes_from(current, settings)), why=why, forecast=pred,
                          likely_range=_ranges(q), hold_min=hold, stop_if=rule, hold_basis=basis))
        if table and check_oxygen:
            rungs = rungs[1:]
        current = settings
    reached = float(current.fio2) <= target_fio2 + 1e-9 and float(current.peep) <= target_peep + 1e-9
    if not reached and stopped is None:
        stopped = f"the plan stops after {max_steps} steps"
    last = steps[-1].forecast if steps else start_pred
    ready = readiness(last, current, spontaneous_rr, spontaneous_vt_ml)
    if reached:
        message = f"target FiO2 <= {target_fio2:.2f} and PEEP <= {target_peep:g} reached in {len(steps)} step(s)"
    else:
        message = f"target not reached after {len(steps)} step(s): {stopped}"
    return StepDownResult(True, message, tuple(steps), reached, None if reached else stopped, ready)


def _hold(course) -> tuple:
    """Hold time [min] after a step and what set it: the later of the model's 90 % times of PaO2 and
    PaCO2 (rounded up, so never shorter) and :data:`HOLD_FLOOR_MIN`. NaN when the course failed."""
    if not bool(np.all(course.success)):
        return np.nan, "the time course could not be computed: hold per local protocol"
    t90 = float(np.nanmax([course.t90_pao2, course.t90_paco2]))  # the re-check time is never later
    model = float(np.ceil(t90 * 10.0) / 10.0)
    if model >= HOLD_FLOOR_MIN:
        return float(np.ceil(t90)), f"90 % of the change takes {model:.1f} min in the model"
    return HOLD_FLOOR_MIN, f"model 90 % time {model:.1f} min; {HOLD_FLOOR_SOURCE}"


#: The precision each readiness value is shown and judged at (clinical precision: FiO2 0.01, PEEP 0.1
#: cmH2O, P/F whole mmHg, rate whole, pH 0.01, RSBI whole; common practice).
READINESS_DECIMALS = {"fio2": 2, "peep": 1, "pf_ratio": 0, "rr": 0, "ph": 2, "rsbi": 0}


def readiness(pred: Prediction, settings, spontaneous_rr=None, spontaneous_vt_ml=None) -> list:
    """Readiness criteria for a spontaneous breathing trial at a forecast (criteria and sources are data
    in :data:`physiology.protocols.READINESS_CRITERIA`). RSBI only when spontaneous rate and VT are given."""
    g = pred.gas
    # Each value at the precision it is shown with, and judged as shown (never "7.25" beside "not met").
    d = READINESS_DECIMALS
    fio2, peep, pf = round(float(settings.fio2), d["fio2"]), round(float(settings.peep), d["peep"]), round(float(g.pf_ratio), d["pf_ratio"])
    rr, ph, sao2 = round(float(settings.rr), d["rr"]), round(float(g.ph), d["ph"]), round(float(g.sao2), 2)
    values = {"fio2": (fio2, fio2 <= 0.4 and sao2 > 0.90), "peep": (peep, peep <= 8.0), "pf_ratio": (pf, pf >= 150.0),
              "rr": (rr, rr <= 35.0), "ph": (ph, ph >= 7.25)}
    if spontaneous_rr is not None and spontaneous_vt_ml:
        rsbi = round(float(spontaneous_rr) / (float(spontaneous_vt_ml) / 1000.0), d["rsbi"])
        values["rsbi"] = (rsbi, rsbi < RSBI_THRESHOLD)
    out = []
    for key, text, _threshold, source in READINESS_CRITERIA:
        if key not in values:
            out.append({"criterion": text, "value": None, "met": None, "source": source,
                        "note": "enter the spontaneous rate and VT to compute it"})
            continue
        v, met = values[key]
        out.append({"criterion": text, "value": v, "met": bool(met), "source": source})
    return out
