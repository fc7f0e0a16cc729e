"""Step-down of pressure support toward a spontaneous breathing trial, each step with its two bounds.

Once FiO2 and PEEP are at their targets, support is lowered in 2 cmH2O steps until the breathing-trial
conditions (pressure support at most 8 cmH2O on PEEP at most 5, or CPAP; common practice: MacIntyre
2001, Boles 2007). The patient's answer to each step is not fully predictable, so every step carries
both bounds of :func:`physiology.mechanics.spontaneous.support_bounds` -- *effort unchanged* and *drive
preserved* -- with VT, rate, RSBI, effort, and the blood gases of each from the gas-exchange engine (the
breath's alveolar ventilation given to the lung as a volume-controlled breath of the same VT, rate and
inspiratory time). Every stop rule is checked on both bounds and every rule a bound breaks is named on
its step. A step whose *effort unchanged* bound breaks a rule is still proposed (the patient may raise
their effort; the step says what happens if not); the plan ends at the step whose *drive preserved*
bound breaks one, listed with the rules named.

Stop rules (:data:`STOP_RULES`): rate above 35/min, RSBI above 105 breaths/min/L (Yang & Tobin 1991),
SaO2 below the goal, pH below 7.32 (failure criteria of a breathing trial: Boles 2007, from memory),
Pmus above 10 cmH2O (Bertoni 2019).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..forecast import PatientModel, predict
from ..mechanics.spontaneous import (CYCLE_OFF_DEFAULT, PMUS_EXCESSIVE, RSBI_FAILURE, supported_breath,
                                     support_bounds, volume_stand_in)

__all__ = ["SupportStep", "support_step_down", "support_matching_vt", "STOP_RULES", "breaks"]

SUPPORT_STEP_CMH2O = 2.0
#: Breathing-trial conditions: pressure support at most 8 cmH2O on PEEP at most 5 (common practice;
#: MacIntyre 2001, Boles 2007).
TRIAL_SUPPORT_MAX = 8.0
TRIAL_PEEP_MAX = 5.0
#: Stop rules: (key, words, test on a bound's numbers).
RATE_MAX = 35.0
PH_MIN = 7.32
STOP_RULES = (
    ("rate", f"rate above {RATE_MAX:g}/min", lambda b, goal: b["rr_per_min"] > RATE_MAX),
    ("rsbi", f"RSBI above {RSBI_FAILURE:g} breaths/min/L (Yang & Tobin 1991)", lambda b, goal: b["rsbi"] > RSBI_FAILURE),
    ("spo2", "SaO2 below the goal", lambda b, goal: not b["sao2"] >= goal),
    ("ph", f"pH below {PH_MIN:g}", lambda b, goal: not b["ph"] >= PH_MIN),
    ("effort", f"Pmus above {PMUS_EXCESSIVE:g} cmH2O (Bertoni 2019)", lambda b, goal: b["pmus_cmh2o"] > PMUS_EXCESSIVE),
)


def breaks(bound: dict, spo2_goal: float) -> list:
    """Words of every stop rule the bound's numbers break (a bound without a steady state breaks pH and
    SaO2: NaN never meets a goal)."""
    return [words for _key, words, test in STOP_RULES if test(bound, spo2_goal)]


@dataclass(frozen=True)
class SupportStep:
    """pressure_support [cmH2O]; bounds: {"effort_unchanged", "drive_preserved"} each {vt_ml,
    rr_per_min, rsbi, pmus_cmh2o, pao2, paco2, ph, sao2, attainable, breaks: [words]}; breaks: the
    rules either bound breaks."""

    pressure_support: float
    bounds: dict
    breaks: tuple


def _gas(model: PatientModel, fio2, peep, apparatus_dead_space_ml, breath, rr):
    """Blood gases of a supported breath: the lung given its volume-controlled stand-in (the same VT and rate,
    :func:`physiology.mechanics.spontaneous.volume_stand_in`, as every forecast on support)."""
    p = predict(model, volume_stand_in(breath.vt_ml, rr, fio2, peep, apparatus_dead_space_ml))
    g = p.gas
    return {"pao2": float(g.pao2), "paco2": float(g.paco2), "ph": float(g.ph), "sao2": float(g.sao2)}


def _bound_numbers(model, fio2, peep, apparatus, bound):
    b = bound["breath"]
    out = {"vt_ml": float(b.vt_ml), "rr_per_min": float(bound["rr"]), "rsbi": float(b.rsbi),
           "pmus_cmh2o": float(b.pmus), "attainable": bool(bound["attainable"])}
    out.update(_gas(model, fio2, peep, apparatus, b, float(bound["rr"])))
    return out


def support_matching_vt(vt_ml, peep, resistance, compliance_ml, pmus, rr, ti_neural,
                        cycle_off_fraction=CYCLE_OFF_DEFAULT) -> float:
    """The pressure support [cmH2O, 0-40] that gives ``vt_ml`` with the patient's effort: the first
    level when a patient moves from controlled ventilation to pressure support (VT rises with support:
    one batch over a 0.5 cmH2O grid, interpolated). Refuses a VT outside what 0-40 cmH2O gives."""
    grid = np.arange(0.0, 40.0001, 0.5)
    vts = np.asarray(supported_breath(grid, peep, resistance, compliance_ml, pmus, rr, ti_neural,
                                      cycle_off_fraction).vt_ml)
    if not vts[0] <= vt_ml <= vts[-1]:
        raise ValueError(f"VT = {vt_ml:g} mL is outside what pressure support 0 to 40 cmH2O gives with this effort "
                         f"({vts[0]:.0f} to {vts[-1]:.0f} mL)")
    return float(np.interp(vt_ml, vts, grid))


def support_step_down(model: PatientModel, fio2, peep, pressure_support_now, pmus, rr, ti_neural,
                      resistance, compliance_ml, apparatus_dead_space_ml=0.0, spo2_goal=0.88,
                      cycle_off_fraction=CYCLE_OFF_DEFAULT, start=None) -> dict:
    """Lower pressure support by 2 cmH2O a step from ``pressure_support_now`` until the trial conditions.

    Returns {"now": the numbers of the current level, "steps": [SupportStep], "reached_trial_conditions":
    bool, "stopped_because": str or None, "note": str}. ``model`` is the fitted patient (one parameter set); ``pmus``, ``rr`` and
    ``ti_neural`` the effort measured at ``pressure_support_now`` (:mod:`physiology.mechanics.spontaneous`);
    ``resistance`` [cmH2O/L/s] and ``compliance_ml`` [mL/cmH2O] the mechanics the breath model uses;
    ``start``: the support the steps go down from when it is not the one the effort was measured at (a
    change applied since the last gas) [cmH2O].
    """
    series = float(np.asarray(model.mechanics.anatomic_dead_space_ml)) + float(apparatus_dead_space_ml)
    level_now = support_bounds(pressure_support_now, pressure_support_now, peep, resistance, compliance_ml, pmus, rr,
                               ti_neural, series, cycle_off_fraction)["now"]
    now = _bound_numbers(model, fio2, peep, apparatus_dead_space_ml, level_now)
    steps = []
    stopped = None
    ps = float(pressure_support_now if start is None else start)
    while ps > TRIAL_SUPPORT_MAX:
        new = max(ps - SUPPORT_STEP_CMH2O, TRIAL_SUPPORT_MAX if ps - SUPPORT_STEP_CMH2O < TRIAL_SUPPORT_MAX else 0.0)
        bounds = support_bounds(pressure_support_now, new, peep, resistance, compliance_ml, pmus, rr, ti_neural,
                                series, cycle_off_fraction)
        numbers = {}
        for name in ("effort_unchanged", "drive_preserved"):
            n = _bound_numbers(model, fio2, peep, apparatus_dead_space_ml, bounds[name])
            n["breaks"] = breaks(n, spo2_goal)
            numbers[name] = n
        broken = tuple(dict.fromkeys(numbers["effort_unchanged"]["breaks"] + numbers["drive_preserved"]["breaks"]))
        steps.append(SupportStep(new, numbers, broken))
        ps = new
        # The plan goes on while the patient could manage the step by keeping their drive (each step says what
        # breaks if they do not); it ends where even that breaks a rule, or cannot keep the ventilation.
        kept = numbers["drive_preserved"]
        if kept["breaks"] or not kept["attainable"]:
            why = kept["breaks"] or ["the alveolar ventilation of now cannot be kept"]
            stopped = f"at pressure support {new:g} cmH2O, even with the drive preserved: " + "; ".join(why)
            break
    reached = stopped is None and ps <= TRIAL_SUPPORT_MAX and float(peep) <= TRIAL_PEEP_MAX
    note = ""
    if stopped is None and float(peep) > TRIAL_PEEP_MAX:
        note = f"PEEP {float(peep):g} cmH2O is above the trial's {TRIAL_PEEP_MAX:g}: lower it first"
    return {"now": now, "steps": steps, "reached_trial_conditions": reached, "stopped_because": stopped,
            "note": note}
