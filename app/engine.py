"""Glue between case files and the engine: fit a case, forecast trial settings, check limits.

Everything returned is plain data (dicts of floats, lists and strings) with units in the key names,
ready for JSON, tables or the window.
"""

from __future__ import annotations

import json
import math
import re
import threading
from collections import OrderedDict

import numpy as np

from ventcast.physiology.bloodgas.acidbase import ph_invivo
from ventcast.physiology.bloodgas.oxygen import saturation
from ventcast.physiology.dynamics.course import simulate
from ventcast.physiology.fitting.fit import (Observation, Patient, SamplerStopped, fit, likely_range, measured_at,
                                             model_error_factors, next_best_measurement, sample_posterior)
from ventcast.physiology.fitting.priors import CONDITION_LABELS, structure
from ventcast.physiology.forecast import predict
from ventcast.physiology.indices import oxygenation_index
from ventcast.physiology.mechanics.motion import mean_airway_pressure, mechanical_power_simplified
from ventcast.physiology.mechanics.recruitment import aerated_volume
from ventcast.physiology.mechanics.spontaneous import (DPL_DYN_EXCESSIVE, NEURAL_DUTY, PMUS_EXCESSIVE, RSBI_FAILURE,
                                                       effort_from_occlusion, effort_from_tidal_volume, support_bounds,
                                                       volume_stand_in)
from ventcast.physiology.mechanics.ventilator import BEYOND_CAPACITY, NO_ALVEOLAR_VENTILATION, Settings
from ventcast.physiology.planning.search import Goals, margins, search
from ventcast.physiology.planning.stepdown import HOLD_FLOOR_MIN, step_down
from ventcast.physiology.planning.support import PH_MIN, RATE_MAX
from ventcast.physiology.protocols import LIMITS

from . import CAUTION
from .bedside import bedside_indices
from .casefile import CYCLE_OFF_DEFAULT, SPONTANEOUS_MODES, CaseError, check_settings
from .precision import decimals_for, sao2_text

SETTING_KEYS = ("mode", "fio2", "peep_cmh2o", "vt_ml", "inspiratory_pressure_cmh2o", "rr_per_min",
                "inspiratory_time_s", "apparatus_dead_space_ml", "pressure_support_cmh2o", "cycle_off_fraction")
MODES = ("volume", "pressure", "pressure-support", "cpap")


#: The other bound of a forecast on support.
OTHER_BOUND = {"effort_unchanged": "drive_preserved", "drive_preserved": "effort_unchanged"}


class ModelError(RuntimeError):
    """The model could not fit or converge (exit status 3)."""


class Stopped(RuntimeError):
    """A computation given a ``stop`` check gave up because the check said its result is no longer wanted."""


def _check(stop) -> None:
    if stop is not None and stop():
        raise Stopped("stopped: a newer request replaced this one")


def is_spontaneous(s: dict) -> bool:
    """True for settings in which the patient makes every breath (pressure support, CPAP)."""
    return s.get("mode") in SPONTANEOUS_MODES


def to_settings(s: dict, observation: dict | None = None) -> Settings:
    """Engine settings from a case-file settings block. A block on pressure support or CPAP needs the
    observation that measured the patient's own breathing: the lung model is then given a
    volume-controlled breath of the measured VT and rate (inspiratory time NEURAL_DUTY of the breath),
    which carries the same alveolar ventilation; the support itself enters through
    :func:`spontaneous_now` and the bounds of :func:`forecast_fitted`."""
    if is_spontaneous(s):
        if observation is None or observation.get("vte_ml") is None or observation.get("spontaneous_rr_per_min") is None:
            raise CaseError("observations", f"settings in {s['mode']} mode are forecast from the patient's own "
                                            f"breathing: a blood gas at them with vte_ml and spontaneous_rr_per_min "
                                            f"is needed")
        return volume_stand_in(observation["vte_ml"], observation["spontaneous_rr_per_min"], s["fio2"],
                               s["peep_cmh2o"], s.get("apparatus_dead_space_ml"))
    return Settings(mode=s["mode"], fio2=float(s["fio2"]), peep=float(s["peep_cmh2o"]),
                    vt_ml=None if s.get("vt_ml") is None else float(s["vt_ml"]),
                    inspiratory_pressure=None if s.get("inspiratory_pressure_cmh2o") is None
                    else float(s["inspiratory_pressure_cmh2o"]),
                    rr=float(s["rr_per_min"]), ti=float(s["inspiratory_time_s"]),
                    apparatus_dead_space_ml=float(s.get("apparatus_dead_space_ml") or 0.0))


def to_patient(case: dict) -> Patient:
    p = case["patient"]
    return Patient(sex=p["sex"], height_cm=float(p["height_cm"]), weight_kg=float(p["weight_kg"]),
                   age_years=p.get("age_years"), temperature_c=float(p["temperature_c"]),
                   hb_g_dl=float(p["hb_g_dl"]), barometric_mmhg=float(p["barometric_mmhg"]),
                   condition=p.get("condition") or "other")


def latest_spontaneous(case: dict) -> dict | None:
    """The newest observation taken on pressure support or CPAP (None if there is none)."""
    return next((o for o in reversed(case["observations"]) if is_spontaneous(o["settings"])), None)


def current_settings(case: dict) -> Settings:
    """The engine settings now: the case's settings, or on pressure support or CPAP their volume-controlled
    stand-in from the newest gas measured on them (:func:`to_settings`)."""
    s = case["settings"]
    return to_settings(s, latest_spontaneous(case) if is_spontaneous(s) else None)


def to_observations(case: dict):
    out = []
    for o in case["observations"]:
        spontaneous = is_spontaneous(o["settings"])
        # On support the peak pressure is PEEP + support whatever the lung (left out of the fit); a plateau
        # is an end-inspiratory hold with the patient relaxed, the passive lung's, and is kept.
        out.append(Observation(
            settings=to_settings(o["settings"], o), pao2=float(o["pao2_mmhg"]), paco2=float(o["paco2_mmhg"]),
            ph=float(o["ph"]), sao2=o.get("sao2"), hco3=o.get("hco3_mmol_l"), petco2=o.get("petco2_mmhg"),
            pplat=o.get("pplat_cmh2o"), ppeak=None if spontaneous else o.get("ppeak_cmh2o"),
            vte_ml=o.get("vte_ml"),
            ve_l_min=o.get("ve_l_min"), vco2=o.get("vco2_ml_min"), cardiac_output=o.get("cardiac_output_l_min"),
            taken_at=o.get("taken_at", "")))
    return out


_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")
#: Settings that mean something in one mode only: setting them in the other is refused, never ignored.
MODE_ONLY = {"vt_ml": "volume", "inspiratory_pressure_cmh2o": "pressure",
             "pressure_support_cmh2o": "pressure-support", "cycle_off_fraction": "pressure-support"}


def drop_other_modes(settings: dict, keep=()) -> dict:
    """Clear (in place) the settings of modes other than ``settings["mode"]`` (a mode change never carries them
    over silently; the new mode's own settings are then required by the checks), except the keys in ``keep``
    (given explicitly: those are refused by the caller instead). CPAP keeps the cycling criterion."""
    for key, mode in MODE_ONLY.items():
        if key not in keep and settings.get(key) is not None and settings["mode"] != mode \
                and not (key == "cycle_off_fraction" and settings["mode"] == "cpap"):
            settings[key] = None
    return settings


def apply_sets(case: dict, sets, where: str = "--set") -> dict:
    """Trial settings: the case settings with each ``KEY=VALUE`` applied and range-checked.

    ``where`` names the source in errors: a command-line option ('--set', refusals read '--set KEY')
    or a file field ('script.start_settings', refusals read 'script.start_settings.KEY')."""
    option = re.fullmatch(r"--[a-z-]+", where) is not None

    def field(key):
        return f"{where} {key}" if option else f"{where}.{key}"

    trial = dict(case["settings"])
    given = []
    for item in sets or ():
        if "=" not in item:
            raise CaseError(where, f"value {item!r} is not of the form KEY=VALUE")
        key, value = item.split("=", 1)
        key, value = key.strip(), value.strip()
        if key not in SETTING_KEYS:
            raise CaseError(where, f"key {key!r} is not a setting; accepted keys: {', '.join(SETTING_KEYS)}")
        given.append(key)
        if key == "mode":
            if value not in MODES:
                raise CaseError(field("mode"), f"value {value!r} is not accepted; expected one of "
                                               f"{', '.join(repr(m) for m in MODES)}")
            trial[key] = value
            continue
        if not _NUMBER.fullmatch(value):  # float() would also take '1_2', 'nan' and 'inf'
            raise CaseError(field(key), f"value {value!r} is not a number (finite, in digits with an "
                                        f"optional decimal point and exponent, e.g. 12 or 0.45)")
        v = float(value)
        if not math.isfinite(v):
            raise CaseError(field(key), f"value {value!r} must be a finite number")
        trial[key] = v
    for key in given:
        mode = MODE_ONLY.get(key)
        if mode is not None and trial["mode"] != mode:
            raise CaseError(field(key), f"applies in {mode} mode only, and the trial is in {trial['mode']} mode; "
                                        f"add mode={mode} to change the mode")
    drop_other_modes(trial, keep=given)
    from ventcast.physiology.indices import predicted_body_weight
    pbw = float(predicted_body_weight(case["patient"]["height_cm"], case["patient"]["sex"]))
    return check_settings("trial settings" if option else where, trial, pbw)


def _f(x):
    x = float(np.asarray(x))
    return None if not math.isfinite(x) else x


#: Complete fits already made in this process, newest last. A fit is a pure function of the patient,
#: the observations, the number of draws and the seed, so the same inputs (a case opened again, an undo
#: back to the same data) give the same result at once instead of after the sampler.
FIT_MEMO_SIZE = 8
_FITS: OrderedDict = OrderedDict()
_FITS_LOCK = threading.Lock()


def _remembered(key):
    with _FITS_LOCK:
        hit = _FITS.get(key)
        if hit is not None:
            _FITS.move_to_end(key)
        return hit


def _remember(key, result) -> None:
    if not (result.sampled and result.success):
        return
    with _FITS_LOCK:
        _FITS[key] = result
        _FITS.move_to_end(key)
        while len(_FITS) > FIT_MEMO_SIZE:
            _FITS.popitem(last=False)


def _fit_key(patient, observations, n_draws=200, seed=0):
    key = (patient, tuple(observations), n_draws, seed)
    try:
        hash(key)
    except TypeError:  # a value that cannot be a key (never expected from a checked case): no memo
        return None
    return key


def fit_case(case: dict, sample: bool = True):
    """Fit the case's observations: (patient, observations, FitResult). ``sample=False`` gives the
    estimate alone (no draws or ranges yet; complete it with :func:`sample_fit`), unless the same
    inputs were fitted completely before in this process."""
    if not case["observations"]:
        raise CaseError("observations", "the case has no blood gas yet: add one (ventcast add-gas, or Add blood gas "
                                        "in the window) before the model can be fitted")
    patient = to_patient(case)
    observations = to_observations(case)
    key = _fit_key(patient, observations)
    result = _remembered(key) if key is not None else None
    if result is not None:
        return patient, observations, result
    try:
        result = fit(patient, observations, sample=sample)
    except ValueError as exc:
        raise CaseError("observations", str(exc)) from None
    if not result.success:
        raise ModelError(result.message)
    if key is not None:
        _remember(key, result)
    return patient, observations, result


def sample_fit(result, stop=None):
    """The posterior draws of a fit made with ``sample=False`` (:func:`physiology.fitting.fit.sample_posterior`);
    a sampler that cannot finish is a :class:`ModelError`, as in :func:`fit_case`; one whose ``stop`` check
    turns True gives up with :class:`Stopped`."""
    key = _fit_key(result.patient, result.observations, result.n_draws, result.seed)
    done = _remembered(key) if key is not None else None
    if done is not None:
        return done
    try:
        result = sample_posterior(result, stop)
    except SamplerStopped:
        raise Stopped("stopped: the draws are no longer wanted") from None
    if not result.success:
        raise ModelError(result.message)
    if key is not None:
        _remember(key, result)
    return result


def fit_block(result, current: Settings) -> dict:
    now = predict(result.model, current)
    if not now.success:
        raise ModelError(f"the fitted model has no steady state at the current settings: {now.message}")
    e = result.estimates
    return {
        "success": bool(result.success), "message": result.message,
        "shunt_fraction": _f(now.shunt), "shunt_fixed_fraction": e["shunt_fixed"],
        "recruitable_lung_fraction": e["recruitable"], "vq_log_sd": e["log_sd"],
        "alveolar_dead_space_fraction": _f(now.alveolar_dead_space), "vco2_ml_min": e["vco2"], "vo2_ml_min": e["vo2"],
        "cardiac_output_l_min": _f(now.cardiac_output), "alveolar_ventilation_l_min": _f(now.breathing.alveolar_ventilation),
        "hb_g_dl": float(result.patient.hb_g_dl), "compliance_ml_per_cmh2o": e["c_max"],
        "resistance_cmh2o_l_s": e["resistance"], "base_excess_mmol_l": e["base_excess"],
        "respiratory_quotient": e["rq"], "series_dead_space_ml": _f(now.breathing.series_dead_space_ml),
        "anatomic_dead_space_ml": e["anatomic_dead_space"],
        "upper_inflection_cmh2o": e["inflection"], "overdistension_dead_space_fraction": e["overdistension_dead_space"],
        "low_vq_fraction": e.get("low_vq_fraction", 0.0),
        "condition": result.patient.condition, "assumptions": model_assumptions(result.patient.condition),
        "identifiability": list(result.identifiability), "warnings": list(result.warnings),
        "likely_range": {k: [float(a), float(b)] for k, (a, b) in result.ranges.items()},
    }


#: How each fitted parameter (and VCO2 = RQ x VO2) is named on screen and in reports: (label, unit, decimals).
PARAMETER_LABELS = {
    "shunt_fixed": ("shunt (not recruitable)", "", 2), "recruitable": ("recruitable lung", "", 2),
    "log_sd": ("V/Q mismatch (log SD)", "", 2), "dead_space_fraction": ("alveolar dead space", "", 2),
    "vco2": ("VCO2", "mL/min", 0), "vo2": ("VO2", "mL/min", 0),
    "cardiac_output_ref": ("cardiac output at mean Paw 10 cmH2O", "L/min", 1),
    "c_max": ("compliance of aerated lung", "mL/cmH2O", 0), "resistance": ("resistance", "cmH2O/L/s", 1),
    "base_excess": ("base excess", "mmol/L", 1), "rq": ("respiratory quotient (VCO2/VO2)", "", 2),
    "anatomic_dead_space": ("series dead space below the Y-piece", "mL", 0),
    "inflection": ("upper inflection pressure", "cmH2O", 0),
    "overdistension_dead_space": ("dead space of overdistended lung", "", 2),
    "low_vq_fraction": ("low-V/Q mode (share of blood flow)", "", 2),
}


def model_assumptions(condition: str) -> list:
    """What the model assumes for this case, in words (shown with every fit and forecast)."""
    st = structure(condition)
    out = [f"condition: {CONDITION_LABELS[condition]} (sets the population priors)",
           "a passive patient in volume or pressure control: no spontaneous breaths or inspiratory effort; on "
           "pressure support or CPAP the patient's measured VT and rate stand in for the breath, and the "
           "answer to a change of support is bounded (effort unchanged, drive preserved)"]
    if st["flow_limitation"] > 0:
        out.append("expiratory flow limitation: set PEEP below about 80 % of intrinsic PEEP does not raise total "
                   "PEEP (Tobin & Lodato 1989)")
    if st.get("low_vq_ratio"):
        out.append("blood flow may go to a low-V/Q mode (poorly ventilated units) with little true shunt")
    return out


def steady_block(pred, spontaneous: bool = False) -> dict:
    """The steady-state forecast in case-file keys. ``spontaneous``: the prediction is the volume-controlled
    stand-in of a breath on pressure support or CPAP, whose mechanical power would be the ventilator doing all
    the work, and whose peak and mean airway pressures are not those of the supported breath: they are left
    out (None; :func:`supported_steady` gives the breath's own)."""
    g, b = pred.gas, pred.breathing
    out = {
        "pao2_mmhg": _f(g.pao2), "paco2_mmhg": _f(g.paco2), "ph": _f(g.ph), "sao2": _f(g.sao2),
        "petco2_mmhg": _f(g.petco2), "vd_vt": _f(g.vd_vt), "shunt_fraction": _f(pred.shunt),
        "pplat_cmh2o": _f(b.pplat), "ppeak_cmh2o": _f(b.ppeak), "driving_pressure_cmh2o": _f(b.driving_pressure),
        "mean_airway_pressure_cmh2o": _f(b.mean_paw), "intrinsic_peep_cmh2o": _f(b.intrinsic_peep),
        "mechanical_power_j_min": _f(b.mechanical_power), "inspiratory_filling": _f(b.inspiratory_filling),
        "vt_ml": _f(b.vt_ml), "vt_ml_per_kg_pbw": _f(pred.vt_per_kg_pbw),
        "pf_ratio_mmhg": _f(g.pf_ratio), "cardiac_output_l_min": _f(pred.cardiac_output),
        "minute_ventilation_l_min": _f(b.minute_ventilation), "alveolar_ventilation_l_min": _f(b.alveolar_ventilation),
    }
    vt, ve = _f(b.vt_ml), _f(b.minute_ventilation)
    out["rr_per_min"] = None if not vt or ve is None else 1000.0 * ve / vt
    out["pmus_cmh2o"] = out["rsbi"] = None  # a passive patient makes no effort (and RSBI is a spontaneous index)
    if spontaneous:
        out["mechanical_power_j_min"] = out["ppeak_cmh2o"] = out["mean_airway_pressure_cmh2o"] = None
    return out


def supported_steady(case: dict, result, trial_dict: dict):
    """(prediction, steady block) of a trial on pressure support or CPAP: the drawn bound's (effort unchanged,
    unless it has no steady state: :func:`supported_trial`), with the breath's rate, Pmus and RSBI, and for VT,
    rate, Pmus and RSBI the span of both bounds (``<key>_bounds``)."""
    sup = supported_trial(case, result, trial_dict)
    pred = sup["predictions"][sup["drawn"]]
    steady = steady_block(pred, spontaneous=True)
    b1, b2 = sup["bounds"][sup["drawn"]], sup["bounds"][OTHER_BOUND[sup["drawn"]]]
    br = b1["breath"]
    steady.update(rr_per_min=float(b1["rr"]), pmus_cmh2o=_f(br.pmus), rsbi=_f(br.rsbi), ppeak_cmh2o=_f(br.ppeak),
                  mean_airway_pressure_cmh2o=_f(br.mean_paw), intrinsic_peep_cmh2o=_f(br.intrinsic_peep))
    for key, get in (("vt_ml", lambda b: float(b["breath"].vt_ml)), ("rr_per_min", lambda b: float(b["rr"])),
                     ("pmus_cmh2o", lambda b: float(b["breath"].pmus)), ("rsbi", lambda b: float(b["breath"].rsbi))):
        lo, hi = sorted((get(b1), get(b2)))
        steady[f"{key}_bounds"] = [lo, hi]
    return pred, steady, sup


def now_block(case: dict) -> dict:
    out = bedside_indices(case)
    obs = case["observations"][-1]
    s = obs["settings"]
    vt = obs.get("vte_ml") or s.get("vt_ml")
    ppeak, pplat = obs.get("ppeak_cmh2o"), obs.get("pplat_cmh2o")
    mp = oi = None
    if ppeak is not None:
        if is_spontaneous(s):  # a supported breath is a square pressure wave over the patient's inspiration
            rr = float(obs.get("spontaneous_rr_per_min") or s["rr_per_min"])
            mpaw = float(mean_airway_pressure("pressure", ppeak, s["peep_cmh2o"], NEURAL_DUTY * 60.0 / rr, rr))
        else:
            mpaw = float(mean_airway_pressure(s["mode"], ppeak, s["peep_cmh2o"], s["inspiratory_time_s"],
                                              s["rr_per_min"]))
        oi = float(oxygenation_index(s["fio2"], mpaw, obs["pao2_mmhg"]))
        if vt and pplat is not None and not is_spontaneous(s):
            mp = float(mechanical_power_simplified(s["rr_per_min"], vt / 1000.0, ppeak, pplat, s["peep_cmh2o"]))
    out["mechanical_power_j_min"] = mp
    out["oxygenation_index"] = oi
    return out


#: Below this arterial pH a low pH is a danger line, not a caution, and no weaning advice (such as
#: lowering FiO2) is given beside it (common practice).
PH_DANGER = 7.15

#: A point forecast beyond this share of the parameter draws (above it, or below 1 minus it) is said to be
#: atypical, with the draws' median beside it (ours: outside the draws' quartiles; see forecast_fitted).
ATYPICAL_SHARE = 0.75

#: Margins to goals and limits in words: key -> (name on screen, unit, decimals: the clinical precision).
MARGIN_LABELS = {"spo2": ("SpO2", "", 3), "pao2_mmhg": ("PaO2", "mmHg", 0), "paco2_mmhg": ("PaCO2", "mmHg", 1),
                 "ph": ("pH", "", 2), "pplat_cmh2o": ("Pplat", "cmH2O", 1),
                 "driving_pressure_cmh2o": ("driving pressure", "cmH2O", 1),
                 "intrinsic_peep_cmh2o": ("intrinsic PEEP", "cmH2O", 1),
                 "mechanical_power_j_min": ("mechanical power", "J/min", 1)}

#: The clinical precision of each quantity a limit checks (decimals): the check is made on the value as it
#: is shown, so a pH shown as 7.30 is never "below 7.30" (common practice: PaO2 in whole mmHg, PaCO2 to 0.1,
#: pH to 0.01, SaO2 to 0.01 (whole %), pressures and VT per kg to 0.1, mechanical power to 0.1 J/min;
#: the one rule of :mod:`app.precision`).
CLINICAL_DECIMALS = {k: decimals_for(k) for k in ("pao2_mmhg", "paco2_mmhg", "ph", "sao2", "pplat_cmh2o",
                                                 "driving_pressure_cmh2o", "vt_ml_per_kg_pbw", "intrinsic_peep_cmh2o",
                                                 "mechanical_power_j_min")}

#: Pressure control: below this share of the equilibrium volume within Ti, the Limits say so
#: (1 - e^-3 = 0.95, three time constants; common practice).
FILLING_MIN = 0.95


def limit_checks(steady: dict, goals: dict | None = None, fio2: float | None = None) -> list:
    """Every lung-protective and goal check of a forecast, met or not (the window's Limits panel).

    Each line: ``code`` (set when the check is not met), ``what``, ``value`` and ``limit`` (text with
    units), ``source``, ``status`` ('ok', 'info', 'caution' or 'danger') and ``message``.
    """
    goals = goals or {}
    v = {k: (round(x, CLINICAL_DECIMALS[k]) if k in CLINICAL_DECIMALS and x is not None else x) for k, x in steady.items()}
    lines = []

    def line(key, what, value, limit_text, bad, code, severity, message, value_text):
        source = LIMITS[key].source if key in LIMITS else key
        if value is None:
            lines.append({"code": None, "what": what, "value": "-", "limit": limit_text, "source": source,
                          "status": "info", "message": f"{what}: not available"})
            return
        lines.append({"code": code if bad else None, "what": what, "value": value_text, "limit": limit_text,
                      "source": source, "status": severity if bad else "ok",
                      "message": f"{message} ({source})" if bad else f"{what} {value_text} within {limit_text}"})

    pplat_max = goals.get("pplat_max_cmh2o", LIMITS["pplat"].high)
    dp_max = goals.get("driving_pressure_max_cmh2o", LIMITS["driving_pressure"].high)
    vt_lo, vt_hi = goals.get("vt_ml_per_kg_pbw", (LIMITS["vt_per_kg"].low, LIMITS["vt_per_kg"].high))
    ph_lo, ph_hi = goals.get("ph", (LIMITS["ph"].low, LIMITS["ph"].high))
    o2_lo, o2_hi = goals.get("pao2_mmhg", (LIMITS["pao2"].low, LIMITS["pao2"].high))
    sp_lo, sp_hi = goals.get("spo2", (LIMITS["spo2"].low, LIMITS["spo2"].high))
    fio2_max = min(goals.get("fio2_max", 1.0), LIMITS["fio2"].high)
    x = v["pplat_cmh2o"]
    line("pplat", "Pplat", x, f"<= {pplat_max:g} cmH2O", x is not None and x > pplat_max, "pplat_high", "danger",
         f"Pplat {x or 0:.1f} cmH2O is above {pplat_max:g} cmH2O", f"{x or 0:.1f} cmH2O")
    x = v["driving_pressure_cmh2o"]
    line("driving_pressure", "Driving pressure (Pplat - total PEEP)", x, f"<= {dp_max:g} cmH2O", x is not None and x > dp_max,
         "driving_pressure_high", "caution", f"driving pressure {x or 0:.1f} cmH2O (Pplat - total PEEP) is above {dp_max:g} cmH2O",
         f"{x or 0:.1f} cmH2O")
    x = v["vt_ml_per_kg_pbw"]
    line("vt_per_kg", "VT", x, f"{vt_lo:g}-{vt_hi:g} mL/kg PBW", x is not None and not vt_lo <= x <= vt_hi,
         "vt_outside", "caution", f"VT {x or 0:.1f} mL/kg PBW is outside {vt_lo:g}-{vt_hi:g} mL/kg PBW",
         f"{x or 0:.1f} mL/kg PBW")
    x = v["ph"]
    low, high = x is not None and x < ph_lo, x is not None and x > ph_hi
    line("ph", "pH", x, f"{ph_lo:.2f}-{ph_hi:.2f}", low or high, "ph_low" if low else "ph_high",
         "danger" if (low and x < PH_DANGER) else "caution",
         f"pH {x or 0:.2f} is below {ph_lo:.2f}" if low else f"pH {x or 0:.2f} is above {ph_hi:.2f}", f"{x or 0:.2f}")
    # No advice to lower FiO2 beside a pH in the danger zone: the patient needs attention, not weaning.
    ph_danger = v["ph"] is not None and v["ph"] < PH_DANGER
    x = v["pao2_mmhg"]
    low, high = x is not None and x < o2_lo, x is not None and x > o2_hi
    line("pao2", "PaO2", x, f"{o2_lo:g}-{o2_hi:g} mmHg", low or high, "pao2_low" if low else "pao2_above_goal",
         "danger" if low else "info",
         f"PaO2 {x or 0:.0f} mmHg is below {o2_lo:g} mmHg" if low
         else f"PaO2 {x or 0:.0f} mmHg is above the {o2_hi:g} mmHg goal" + ("" if ph_danger else ": FiO2 could likely come down"),
         f"{x or 0:.0f} mmHg")
    x = v["sao2"]
    low = x is not None and x < sp_lo
    line("spo2", "SaO2 (for the SpO2 goal)", x, f"{100 * sp_lo:.0f}-{100 * sp_hi:.0f} %", low or (x is not None and x > sp_hi),
         "sao2_low" if low else "sao2_above_goal", "caution" if low else "info",
         f"SaO2 {sao2_text(x)} is below the {sao2_text(sp_lo)} goal" if low
         else f"SaO2 {sao2_text(x)} is above the {sao2_text(sp_hi)} goal", sao2_text(x))
    if "paco2_mmhg" in goals:
        c_lo, c_hi = goals["paco2_mmhg"]
        x = v["paco2_mmhg"]
        line("goal set for this case", "PaCO2", x, f"{c_lo:g}-{c_hi:g} mmHg", x is not None and not c_lo <= x <= c_hi,
             "paco2_outside", "caution", f"PaCO2 {x or 0:.1f} mmHg is outside the {c_lo:g}-{c_hi:g} mmHg goal",
             f"{x or 0:.1f} mmHg")
    ipeep_max = goals.get("intrinsic_peep_max_cmh2o", LIMITS["intrinsic_peep"].high)
    x = v["intrinsic_peep_cmh2o"]
    line("intrinsic_peep", "Intrinsic PEEP", x, f"<= {ipeep_max:g} cmH2O", x is not None and x > ipeep_max,
         "intrinsic_peep", "caution", f"intrinsic PEEP {x or 0:.1f} cmH2O: gas trapping; a longer expiration would help",
         f"{x or 0:.1f} cmH2O")
    mp_max = goals.get("mechanical_power_max_j_min", LIMITS["mechanical_power"].high)
    x = v["mechanical_power_j_min"]
    line("mechanical_power", "Mechanical power", x, f"<= {mp_max:g} J/min", x is not None and x > mp_max,
         "mechanical_power_high", "caution", f"mechanical power {x or 0:.1f} J/min is above {mp_max:g} J/min",
         f"{x or 0:.1f} J/min")
    x = v.get("inspiratory_filling")
    if x is not None and x < FILLING_MIN:
        line("single-compartment equation of motion", "Filling within Ti", x, f">= {FILLING_MIN:.0%}", True,
             "pc_incomplete_filling", "info",
             f"the lung fills to {x:.0%} of its pressure-control volume within Ti: flow has not stopped at the end "
             f"of inspiration; a longer Ti would deliver more VT", f"{x:.0%}")
    if fio2 is not None:
        line("fio2", "FiO2", fio2, f"<= {fio2_max:.2f}", fio2 > fio2_max, "fio2_high", "caution",
             f"FiO2 {fio2:.2f} is above {fio2_max:.2f}", f"{fio2:.2f}")
    return lines


def limit_alerts(steady: dict, goals: dict | None = None) -> list:
    """Lung-protective and goal checks of a forecast that are not met: [{code, severity, message}], with the source.

    The SaO2 goal line is left to the window (PaO2 carries the oxygenation goal here).
    """
    return [{"code": c["code"], "severity": c["status"], "message": c["message"]}
            for c in limit_checks(steady, goals) if c["code"] and not c["code"].startswith("sao2")]


def forecast_case(case: dict, sets=(), minutes: float = 60.0, with_course: bool = True) -> dict:
    """Fit the case and forecast its trial settings: the ``predict`` JSON of the README."""
    trial_dict = apply_sets(case, sets)
    _patient, _observations, result = fit_case(case)
    return forecast_fitted(case, result, trial_dict, minutes=minutes, with_course=with_course)


#: Said with every re-check time: the model's oxygen settles faster than measured in patients after an
#: FiO2 decrease (Cakar 2001; README, model section), so its 90 % time is a lower bound.
RECHECK_NOTE = ("the model's 90 % time of the PaO2 and PaCO2 change; patients often take longer (Cakar 2001), "
                "and a gas 10-30 min after a change is common practice")


def recheck_advised(model_min):
    """The re-check time to advise [min]: the model's 90 % time, never below the step-down plan's floor
    (``HOLD_FLOOR_MIN``, 10 min: common practice is a gas 10-30 min after a change and Cakar 1998 found
    10 min adequate). Patients' oxygen settles more slowly than the model's after an FiO2 decrease
    (Cakar 2001): a gas drawn at the model's minute or two would still show most of the fall to come."""
    return None if model_min is None else max(float(model_min), HOLD_FLOOR_MIN)


def recheck_sentence(model_min) -> str:
    """The re-check advice in words, for the command line, the window and the report ('' without a time)."""
    if model_min is None:
        return ""
    model = max(float(model_min), 1.0)
    advised = recheck_advised(model_min)
    if advised > model_min:
        return (f"Re-check a blood gas after about {advised:.0f} min at the earliest: the model's PaO2 and PaCO2 "
                f"reach 90 % of their change within about {model:.0f} min, but patients' oxygen often takes longer "
                f"(Cakar 2001); a gas 10-30 min after a change is common practice, and Cakar 1998 found 10 min "
                f"adequate after FiO2 changes.")
    return f"Re-check a blood gas after about {advised:.0f} min at the earliest ({RECHECK_NOTE})."


def capacity_refusal(model, trial: Settings, pred) -> str:
    """Why a trial the fitted lung cannot take is refused (the input's fault, not the model's), or ''.

    A VT beyond the model lung's capacity at the trial PEEP: the plateau pressure would have to pass the
    top of the pressure-volume curve (inflection + 2 x width), where the model lung holds no more.
    """
    reason = str(pred.breathing.reasons) if np.ndim(pred.breathing.reasons) == 0 else ""
    if reason not in (BEYOND_CAPACITY, NO_ALVEOLAR_VENTILATION):
        return ""
    mech = model.mechanics
    if reason == NO_ALVEOLAR_VENTILATION:
        vds = float(mech.anatomic_dead_space_ml) + float(trial.apparatus_dead_space_ml or 0.0)
        return (f"the trial VT {float(trial.vt_ml or 0):g} mL does not exceed the series dead space (about {vds:.0f} mL "
                f"incl. apparatus): no alveolar ventilation; choose a larger VT")
    top = float(mech.inflection) + 2.0 * float(mech.width)
    c = float(mech.c_max) / 1000.0
    most = 1000.0 * (aerated_volume(np.inf, c, float(mech.inflection), float(mech.width))
                     - aerated_volume(float(trial.peep), c, float(mech.inflection), float(mech.width)))
    drive = f"VT {float(trial.vt_ml):g} mL" if trial.mode == "volume" else \
        f"inspiratory pressure {float(trial.inspiratory_pressure):g} cmH2O"
    return (f"{drive} at PEEP {float(trial.peep):g} cmH2O is beyond the fitted lung's capacity: it would need a "
            f"plateau pressure above the top of its pressure-volume curve (about {top:.0f} cmH2O), and the aerated "
            f"lung holds at most about {most:.0f} mL above PEEP. Choose a smaller VT or a lower PEEP")


def spontaneous_now(case: dict, result) -> dict:
    """The patient's breathing and effort, on pressure support or CPAP, at the newest gas taken on it (and the
    support then in force): the measured VT and rate, the mechanics the breath model uses (resistance fitted;
    compliance the chord compliance of the fitted lung at the measured VT), and the peak muscle pressure Pmus
    that gives the measured VT at that support with those mechanics (:func:`physiology.mechanics.spontaneous.effort_from_tidal_volume`), so that the
    forecast starts from what was measured. An occlusion swing ΔPocc, when measured, gives the effort the
    Limits judge (Bertoni 2019: Pmus = -3/4 ΔPocc, ΔPL,dyn = (Ppeak - PEEP) - 2/3 ΔPocc); both are reported."""
    obs = latest_spontaneous(case)
    if obs is None:
        raise CaseError("observations", "no blood gas was taken on pressure support or CPAP: the patient's own "
                                        "breathing (vte_ml and spontaneous_rr_per_min) must be measured on it first")
    s = obs["settings"]  # the effort was measured at the support in force when the gas was taken
    equivalent = to_settings(s, obs)
    pred = predict(result.model, equivalent)
    if not pred.success:
        raise ModelError(f"the fitted model has no steady state at the measured breathing: {pred.message}")
    ps = float(s.get("pressure_support_cmh2o") or 0.0)
    peep = float(s["peep_cmh2o"])
    rr = float(obs["spontaneous_rr_per_min"])
    tin = NEURAL_DUTY * 60.0 / rr
    cyc = float(s.get("cycle_off_fraction") or CYCLE_OFF_DEFAULT)
    resistance = float(np.asarray(result.model.mechanics.resistance))
    compliance = float(np.asarray(pred.breathing.compliance))
    try:
        model_effort = effort_from_tidal_volume(float(obs["vte_ml"]), ps, peep, resistance, compliance, rr, tin, cyc)
    except ValueError as exc:
        raise ModelError(f"the patient's effort cannot be estimated from the measured breathing: {exc}") from None
    out = {"pressure_support_cmh2o": ps, "peep_cmh2o": peep, "cycle_off_fraction": cyc, "vt_ml": float(obs["vte_ml"]),
           "rr_per_min": rr, "ti_neural_s": tin, "resistance_cmh2o_l_s": resistance,
           "compliance_ml_per_cmh2o": compliance, "rsbi": rr / (float(obs["vte_ml"]) / 1000.0),
           "p01_cmh2o": obs.get("p01_cmh2o"), "delta_pocc_cmh2o": obs.get("delta_pocc_cmh2o"),
           "pmus_model_cmh2o": model_effort["pmus_cmh2o"], "pmus_model_basis": model_effort["basis"],
           "dpl_dyn_cmh2o": float(obs["vte_ml"]) / compliance, "dpl_dyn_basis": "VT / compliance of the fitted lung"}
    out["pmus_cmh2o"], out["pmus_basis"] = out["pmus_model_cmh2o"], out["pmus_model_basis"]
    if obs.get("delta_pocc_cmh2o") is not None:
        occ = effort_from_occlusion(obs["delta_pocc_cmh2o"], ppeak=peep + ps, peep=peep)
        out.update(pmus_cmh2o=occ["pmus_cmh2o"], pmus_basis=occ["basis"], dpl_dyn_cmh2o=occ["dpl_dyn_cmh2o"],
                   dpl_dyn_basis="(Ppeak - PEEP) - 2/3 ΔPocc (Bertoni 2019)")
    return out


#: Trials on support already worked out, newest last: a forecast asks for the same trial in each of its stages
#: (steady state, course, likely range) and for every other trial drawn beside it, and each answer is a pure
#: function of the fit, the newest gas on support and the trial (entries hold their fit, compared by identity).
_SUPPORTED: OrderedDict = OrderedDict()
_SUPPORTED_LOCK = threading.Lock()


def supported_trial(case: dict, result, trial_dict: dict) -> dict:
    """A trial on pressure support or CPAP: the effort now (:func:`spontaneous_now`), both bounds of the
    patient's answer (:func:`physiology.mechanics.spontaneous.support_bounds`), for each the
    volume-controlled stand-in the lung model is given (same VT, rate and neural inspiratory share) with its
    steady-state prediction ("predictions"), and the bound the forecast draws ("drawn")."""
    key = (json.dumps(latest_spontaneous(case), sort_keys=True), json.dumps(case["settings"]["mode"]),
           json.dumps(trial_dict, sort_keys=True), id(result))
    with _SUPPORTED_LOCK:
        hit = _SUPPORTED.get(key)
        if hit is not None and hit[0] is result:
            return hit[1]
    out = _supported_trial(case, result, trial_dict)
    with _SUPPORTED_LOCK:
        _SUPPORTED[key] = (result, out)
        while len(_SUPPORTED) > FIT_MEMO_SIZE:
            _SUPPORTED.popitem(last=False)
    return out


def _supported_trial(case: dict, result, trial_dict: dict) -> dict:
    if not is_spontaneous(case["settings"]):
        raise CaseError("trial settings.mode", f"value {trial_dict['mode']!r}: a forecast on pressure support or CPAP "
                                               f"needs the patient's own breathing, measured on it (a blood gas with "
                                               f"vte_ml and spontaneous_rr_per_min); this case is in "
                                               f"{case['settings']['mode']} mode")
    now = spontaneous_now(case, result)
    series = float(np.asarray(result.model.mechanics.anatomic_dead_space_ml)) + \
        float(trial_dict.get("apparatus_dead_space_ml") or 0.0)
    bounds = support_bounds(now["pressure_support_cmh2o"], float(trial_dict.get("pressure_support_cmh2o") or 0.0),
                            float(trial_dict["peep_cmh2o"]), now["resistance_cmh2o_l_s"],
                            now["compliance_ml_per_cmh2o"], now["pmus_model_cmh2o"], now["rr_per_min"],
                            now["ti_neural_s"], series,
                            float(trial_dict.get("cycle_off_fraction") or CYCLE_OFF_DEFAULT))
    equivalents = {}
    for name in ("effort_unchanged", "drive_preserved"):
        b = bounds[name]
        equivalents[name] = to_settings(dict(trial_dict), {"vte_ml": float(b["breath"].vt_ml),
                                                           "spontaneous_rr_per_min": float(b["rr"])})
    # The forecast drawn is the effort-unchanged bound; where that leaves too little ventilation for any steady
    # state (the patient cannot go on like that), the drive-preserved bound is drawn and the other is said.
    predictions = {name: predict(result.model, eq) for name, eq in equivalents.items()}
    ok = {name: bool(np.all(p.success)) for name, p in predictions.items()}
    drawn = "drive_preserved" if ok["drive_preserved"] and not ok["effort_unchanged"] else "effort_unchanged"
    return {"now": now, "bounds": bounds, "equivalents": equivalents, "predictions": predictions, "drawn": drawn}


def trial_engine_settings(case: dict, result, trial_dict: dict) -> Settings:
    """Engine settings of a trial; on pressure support or CPAP the stand-in breath of the drawn bound (effort
    unchanged unless it has no steady state; the other bound is in the ``spontaneous`` block)."""
    if is_spontaneous(trial_dict):
        sup = supported_trial(case, result, trial_dict)
        return sup["equivalents"][sup["drawn"]]
    return to_settings(trial_dict)


def _spontaneous_block(result, supported) -> tuple:
    """The ``spontaneous`` block of a forecast and the likely range spanning both bounds and the draws."""
    bounds_out = {}
    for name in ("effort_unchanged", "drive_preserved"):
        b = supported["bounds"][name]
        br = b["breath"]
        eq = supported["equivalents"][name]
        pred = supported["predictions"][name]
        gas = steady_block(pred) if bool(np.all(pred.success)) else {}
        ranges = None
        if result.sampled:
            r, _table, _ok = likely_range(result, eq)
            ranges = {"pao2_mmhg": list(r["pao2"]), "paco2_mmhg": list(r["paco2"]), "ph": list(r["ph"]),
                      "sao2": list(r["sao2"])}
        bounds_out[name] = {
            "vt_ml": _f(br.vt_ml), "rr_per_min": float(b["rr"]), "rsbi": _f(br.rsbi), "pmus_cmh2o": _f(br.pmus),
            "pressure_time_product_cmh2o_s_min": _f(br.ptp_per_min), "dpl_dyn_cmh2o": _f(br.dpl_dyn),
            "intrinsic_peep_cmh2o": _f(br.intrinsic_peep), "mean_airway_pressure_cmh2o": _f(br.mean_paw),
            "inspiratory_time_s": _f(br.ti_s), "alveolar_ventilation_l_min": float(b["alveolar_ventilation"]),
            "attainable": bool(b["attainable"]), "periodic": bool(np.all(br.periodic)),
            "pao2_mmhg": gas.get("pao2_mmhg"), "paco2_mmhg": gas.get("paco2_mmhg"),
            "ph": gas.get("ph"), "sao2": gas.get("sao2"), "likely_range": ranges}

    def span(key, ranged=False):
        vals = []  # a bound without a steady state (or draws without one) adds nothing
        for v in bounds_out.values():
            if v.get(key) is not None:
                vals.append(v[key])
            if ranged and v["likely_range"] is not None:
                vals += v["likely_range"][key]
        vals = [x for x in vals if x is not None and math.isfinite(x)]
        return [min(vals), max(vals)] if vals else None

    now = supported["now"]
    block = {"drawn": supported["drawn"],
             "pmus_cmh2o": span("pmus_cmh2o"), "vt_ml": span("vt_ml"), "rr_per_min": span("rr_per_min"),
             "rsbi": span("rsbi"), "paco2_mmhg": span("paco2_mmhg", ranged=True), "bounds": bounds_out,
             "effort_now": {k: now[k] for k in ("pmus_cmh2o", "pmus_basis", "pmus_model_cmh2o", "dpl_dyn_cmh2o",
                                                 "dpl_dyn_basis", "p01_cmh2o", "delta_pocc_cmh2o", "vt_ml",
                                                 "rr_per_min", "rsbi", "pressure_support_cmh2o",
                                                 "compliance_ml_per_cmh2o", "resistance_cmh2o_l_s")},
             "meaning": {"effort_unchanged": "the same effort and rate as now: with less support VT and alveolar "
                                             "ventilation fall and PaCO2 rises",
                         "drive_preserved": "the alveolar ventilation of now kept by a faster rate at the same "
                                            "effort per breath (more effort if the rate alone cannot): rapid "
                                            "shallow breathing"}}
    likely = None
    if result.sampled:
        likely = {k: span(k, ranged=True) for k in ("pao2_mmhg", "paco2_mmhg", "ph", "sao2")}
    return block, likely


#: Effort limits of a patient breathing on support: (what, limit, source).
EFFORT_LIMITS = {
    "pmus_high": ("Pmus", PMUS_EXCESSIVE, "Bertoni 2019"),
    "pmus_low": ("Pmus", 3.0, "lung- and diaphragm-protective targets, Goligher 2020, from memory"),
    "dpl_dyn": ("dynamic transpulmonary driving pressure", DPL_DYN_EXCESSIVE, "Bertoni 2019"),
    "rsbi": ("RSBI", RSBI_FAILURE, "Yang & Tobin 1991"),
    "rate": ("rate", RATE_MAX, "breathing-trial failure criterion, Boles 2007, from memory"),
}


def effort_limit_lines(block: dict) -> list:
    """The effort checks of a trial on support, as lines of the Limits (same fields as :func:`limit_checks`):
    the effort now (Pmus and ΔPL,dyn, with their basis) and each bound's Pmus, RSBI and rate."""
    lines = []

    def line(code, what, value, digits, unit, limit_text, bad, severity, source, message):
        value_text = f"{value:.{digits}f} {unit}".strip()
        lines.append({"code": code if bad else None, "what": what, "value": value_text, "limit": limit_text,
                      "source": source, "status": severity if bad else "ok",
                      "message": f"{message} ({source})" if bad else f"{what} {value_text} within {limit_text}"})

    now = block["effort_now"]
    name, top, source = EFFORT_LIMITS["pmus_high"]
    p = now["pmus_cmh2o"]
    line("effort_excessive", "effort now: Pmus", p, 1, "cmH2O", f"\u2264 {top:g} cmH2O", p > top, "caution", source,
         f"effort now: Pmus {p:.1f} cmH2O, above {top:g} ({now['pmus_basis']})")
    low = EFFORT_LIMITS["pmus_low"]
    line("effort_low", "effort now: Pmus", p, 1, "cmH2O", f"\u2265 {low[1]:g} cmH2O", p < low[1], "info", low[2],
         f"effort now: Pmus {p:.1f} cmH2O, below {low[1]:g}: the support may be doing the patient's work "
         f"(over-assistance)")
    if now["dpl_dyn_cmh2o"] is not None:
        what, top, source = EFFORT_LIMITS["dpl_dyn"]
        d = now["dpl_dyn_cmh2o"]
        basis = now["dpl_dyn_basis"].split(" (Bertoni")[0]  # the line cites its source once, at the end
        line("dpl_dyn_excessive", "effort now: \u0394PL,dyn", d, 1, "cmH2O", f"\u2264 {top:g} cmH2O", d > top,
             "caution", source, f"{what} now {d:.1f} cmH2O, above {top:g}, as {basis}")
    for bound, words in (("effort_unchanged", "effort unchanged"), ("drive_preserved", "drive preserved")):
        b = block["bounds"][bound]
        for key, code, digits, unit in (("pmus_cmh2o", "pmus_high", 1, "cmH2O"), ("rsbi", "rsbi", 0, "/min/L"),
                                        ("rr_per_min", "rate", 0, "/min")):
            what, top, source = EFFORT_LIMITS[code]
            v = b[key]
            if v is None:
                continue
            line({"pmus_high": "effort_excessive", "rsbi": "rsbi_high", "rate": "rate_high"}[code],
                 f"{words}: {what}", v, digits, unit, f"\u2264 {top:g} {unit}", v > top, "caution", source,
                 f"{words}: {what} {v:.{digits}f} {unit}, above {top:g}"
                 + (": a breathing trial is likely to fail" if code == "rsbi" else ""))
        if not b["attainable"]:
            lines.append({"code": "drive_not_attainable", "what": f"{words}: alveolar ventilation kept", "value": "no",
                          "limit": "kept", "source": "the breath model", "status": "caution",
                          "message": f"{words}: the alveolar ventilation of now cannot be kept even with an effort of "
                                     f"40 cmH2O at this support"})
    return lines


def _spontaneous_alerts(block) -> list:
    """Alerts of a trial on support: every effort check not met (:func:`effort_limit_lines`), and what the
    forecast shown means."""
    out = [{"code": ln["code"], "severity": ln["status"], "message": ln["message"]}
           for ln in effort_limit_lines(block) if ln["status"] != "ok"]
    out.append({"code": "supported_breath", "severity": "info",
                "message": f"pressure support: the forecast shown is the {block['drawn'].replace('_', '-')} bound; "
                           f"the spontaneous block has both bounds, and the likely range spans them. Pplat and driving "
                           f"pressure are those of the same VT given passively (the lung's stretch); mechanical power "
                           f"is not shown (the patient does part of the work), and the patient's effort adds the "
                           f"transpulmonary pressure in ΔPL,dyn"})
    return out


def forecast_fitted(case: dict, result, trial_dict: dict, minutes: float = 60.0, with_course: bool = True,
                    with_band: bool = True, with_next: bool = True, stop=None) -> dict:
    """Forecast checked trial settings (case-file keys) for an already fitted case (same blocks as ``predict``).

    ``with_band`` adds the likely range of the course (200 parameter draws, the slowest part);
    ``with_next`` the next best measurement. The window asks for them in a second, later pass. ``stop``
    (optional, no arguments): checked between the band's chunks and before the next best measurement;
    once it returns True the forecast gives up with :class:`Stopped` (its result is no longer wanted).
    """
    supported = None
    if is_spontaneous(trial_dict):
        pred, steady, supported = supported_steady(case, result, trial_dict)
        trial = supported["equivalents"][supported["drawn"]]
    else:
        trial = to_settings(trial_dict)
        pred = predict(result.model, trial)
    current = current_settings(case)
    if not pred.success:
        refusal = capacity_refusal(result.model, trial, pred)
        if refusal:
            raise CaseError("trial settings", refusal)
        raise ModelError(f"no steady state at the trial settings: {pred.message}")
    if supported is None:
        steady = steady_block(pred)
    if with_band and not result.sampled:
        raise ValueError("the course's likely range needs the fit's posterior draws (sample_posterior)")
    out = {
        "settings": trial_dict,
        "current_settings": check_settings("settings", dict(case["settings"]), float(result.patient.pbw_kg)),
        "now": now_block(case),
        "fit": fit_block(result, current),
        "steady": steady,
        "likely_range": None,
    }
    ok_share = 1.0
    if result.sampled:  # a fit shown before its draws (the window's first forecast) has no range yet
        ranges, draw_table, ok_share = likely_range(result, trial)
        out["likely_range"] = {"pao2_mmhg": list(ranges["pao2"]), "paco2_mmhg": list(ranges["paco2"]),
                               "ph": list(ranges["ph"]), "sao2": list(ranges["sao2"])}
    if supported is not None:
        out["spontaneous"], likely = _spontaneous_block(result, supported)
        if likely is not None:
            out["likely_range"] = likely
    alerts = limit_alerts(steady, case.get("goals"))
    if supported is not None:
        alerts += _spontaneous_alerts(out["spontaneous"])
        if supported["drawn"] != "effort_unchanged":
            alerts.append({"code": "effort_unchanged_unsustainable", "severity": "danger",
                           "message": "with the effort and rate of now this support leaves too little alveolar "
                                      "ventilation for any steady state (PaCO2 would keep rising): the patient must "
                                      "breathe faster or harder; the forecast shown is the drive-preserved bound"})
    if out["likely_range"] is not None:
        # The point forecast comes from the fitted estimate, the range from the posterior draws; when the
        # estimate lies outside the draws' 90 % range it is atypical of what the data allow: say so.
        for key, q, name, digits in (("pao2_mmhg", "pao2", "PaO2", 0), ("paco2_mmhg", "paco2", "PaCO2", 1)):
            lo, hi = out["likely_range"][key]
            x = steady[key]
            if x is not None and not lo <= x <= hi:
                alerts.append({"code": "estimate_outside_range", "severity": "caution",
                               "message": f"the {name} forecast of the fitted estimate ({x:.{digits}f} mmHg) lies "
                                          f"outside its likely range ({lo:.{digits}f} to {hi:.{digits}f} mmHg): the "
                                          f"estimate is atypical of the parameters the data allow; read the range, "
                                          f"and a second blood gas at other settings would settle it"})
            elif x is not None:
                # Inside the range but beyond the draws' quartiles: the fitted estimate (the mode of 13
                # parameters) can sit far from the middle of what the data allow. Measured on the demos:
                # after a PEEP rise the estimate's PaCO2 lay above 74-90 % of the draws (COPD PEEP 5 -> 8:
                # 77.3 mmHg, draws' median 67.4), after FiO2 changes near their middle. Say where the middle is.
                v = np.asarray(draw_table[q], dtype=float)
                v = v[np.isfinite(v)]
                if v.size:
                    above = float(np.mean(v < x))
                    if above > ATYPICAL_SHARE or above < 1.0 - ATYPICAL_SHARE:
                        side, share = ("higher", above) if above > 0.5 else ("lower", 1.0 - above)
                        alerts.append({"code": "estimate_atypical", "severity": "caution",
                                       "message": f"the {name} forecast of the fitted estimate ({x:.{digits}f} mmHg) "
                                                  f"is {side} than {100 * share:.0f} % of the parameter draws (their "
                                                  f"median {np.median(v):.{digits}f} mmHg): the data allow values "
                                                  f"nearer that; read the likely range, and a second blood gas at "
                                                  f"other settings would settle it"})
    if ok_share < 0.95:
        alerts.append({"code": "range_incomplete", "severity": "caution",
                       "message": f"{100 * (1 - ok_share):.0f} % of the parameter draws have no steady state at the trial "
                                  f"settings; the likely range covers the rest"})
    for w in result.warnings:
        alerts.append({"code": "input_warning", "severity": "caution", "message": w})
    for m in result.identifiability:
        alerts.append({"code": "identifiability", "severity": "info", "message": m})
    if with_course:
        course = simulate(result.model, current, trial, minutes=minutes)
        if not course.success:
            raise ModelError(course.message)
        band = _band(result, current, trial, minutes, stop=stop) if with_band else None
        if band is None:
            if with_band:
                alerts.append({"code": "band_unavailable", "severity": "caution",
                               "message": "the likely range of the course could not be computed; the steady-state "
                                          "range above still holds"})
            lo_o2 = hi_o2 = lo_co2 = hi_co2 = lo_sa = hi_sa = lo_ph = hi_ph = np.full(course.minutes.size, np.nan)
        else:
            band_pao2, band_paco2, band_sao2, band_ph, left_out = band
            lo_o2, hi_o2 = np.nanpercentile(band_pao2, [5, 95], axis=0)
            lo_co2, hi_co2 = np.nanpercentile(band_paco2, [5, 95], axis=0)
            lo_sa, hi_sa = np.nanpercentile(band_sao2, [5, 95], axis=0)
            lo_ph, hi_ph = np.nanpercentile(band_ph, [5, 95], axis=0)
            if left_out:
                alerts.append({"code": "band_draws_left_out", "severity": "info",
                               "message": f"{left_out} of {left_out + band_pao2.shape[0]} parameter draws could not be "
                                          f"followed over time (close to an unsustainable state) and are left out of "
                                          f"the course's likely range"})

        out["course"] = course_block(course)
        if supported is not None and supported["drawn"] == "effort_unchanged":
            # the other bound's course, drawn beside (no likely range of its own)
            other = simulate(result.model, current, supported["equivalents"]["drive_preserved"], minutes=minutes)
            if other.success:
                out["course_drive_preserved"] = course_block(other)
        out["course"].update({"pao2_low": _listed(lo_o2), "pao2_high": _listed(hi_o2), "paco2_low": _listed(lo_co2),
                              "paco2_high": _listed(hi_co2), "sao2_low": _listed(lo_sa, 4),
                              "sao2_high": _listed(hi_sa, 4), "ph_low": _listed(lo_ph, 4), "ph_high": _listed(hi_ph, 4)})
        recheck = float(course.recheck_after_min)
        out["recheck_after_min"] = None if not math.isfinite(recheck) else round(max(recheck, 0.0), 1)
        out["recheck_advised_min"] = recheck_advised(out["recheck_after_min"])
    if with_next:
        _check(stop)
        try:
            best = next_best_measurement(result, trial)
        except (ValueError, np.linalg.LinAlgError) as exc:
            best = []
            alerts.append({"code": "next_best_unavailable", "severity": "info",
                           "message": f"the next best measurement could not be ranked: {exc}"})
        out["next_best_measurement"] = [{"probe": c["probe"], "why": c["why"]} for c in best[:3]]
    out["alerts"] = alerts
    out["caution"] = CAUTION
    return out


def _listed(a, d=2) -> list:
    """An array as a JSON list (None where it is not finite), rounded to ``d`` decimals."""
    return [None if not math.isfinite(float(x)) else round(float(x), d) for x in a]


def course_block(course) -> dict:
    """A course (``physiology.dynamics.course.simulate`` of one patient) as JSON lists: minutes, PaO2,
    PaCO2, pH, SaO2 and VD/VT at each output time."""
    return {"minutes": _listed(course.minutes, 3), "pao2_mmhg": _listed(course.pao2),
            "paco2_mmhg": _listed(course.paco2), "ph": _listed(course.ph, 4), "sao2": _listed(course.sao2, 4),
            "vd_vt": _listed(course.vd_vt, 4)}


def trial_course(case: dict, result, trial_dict: dict, minutes: float = 60.0) -> dict:
    """The course (no likely range) from the current settings to checked trial settings, for drawing
    trials side by side; :class:`ModelError` when it has no course."""
    course = simulate(result.model, current_settings(case), trial_engine_settings(case, result, trial_dict),
                      minutes=minutes)
    if not course.success:
        raise ModelError(course.message)
    return course_block(course)


#: Parameter draws integrated together when computing a course's likely range.
BAND_CHUNK = 25


def _band(result, current, trial, minutes, n=200, stop=None):
    """Courses of up to ``n`` parameter draws that have a steady state at both settings, or None.

    Returns ``(pao2, paco2, sao2, ph, left_out)``: arrays (draws, time) and the number of draws whose course
    could not be integrated (near the edge of a sustainable state); those are left out of the band,
    found by halving the batch, and the caller says how many. Each draw carries the model error of the
    steady-state likely range (:func:`with_course_model_error`), so the band ends where the range does
    (none at settings where a gas was measured, as there).
    """
    draws = result.draws
    ok = np.asarray(predict(draws, _tile(current, draws)).success) & np.asarray(predict(draws, _tile(trial, draws)).success)
    idx = np.flatnonzero(ok)[:n]
    if idx.size < 50:
        return None
    # In chunks: one batch of 200 courses holds per-unit arrays of every draw at every output time
    # (about 170 MB at its peak); chunks of 25 keep the window's memory in bounds at about the same speed.
    parts = []
    for start in range(0, idx.size, BAND_CHUNK):
        _check(stop)  # a stale band stops between chunks (``stop``: see forecast_fitted)
        parts += _courses(draws, idx[start:start + BAND_CHUNK], current, trial, minutes)
    kept = sum(p[0].size for p in parts)
    if kept < 50:
        return None
    pao2, paco2 = np.vstack([p[1] for p in parts]), np.vstack([p[2] for p in parts])
    where = np.concatenate([p[0] for p in parts])
    if not measured_at(result, trial):
        factors = model_error_factors(int(np.atleast_1d(draws.shunt_fixed).size))
        pao2 = with_course_model_error(pao2, factors["pao2"][where])
        paco2 = with_course_model_error(paco2, factors["paco2"][where])
    # SaO2 of each draw as the steady-state range has it (fit.with_model_error): its PaO2 on the
    # dissociation curve at the pH of its PaCO2 and base excess (in-vivo curve) and its temperature.
    b = int(np.atleast_1d(draws.shunt_fixed).size)
    sbe = np.broadcast_to(np.asarray(draws.base_excess, dtype=float), (b,))[where][:, None]
    temp = np.broadcast_to(np.asarray(draws.temperature, dtype=float), (b,))[where][:, None]
    sao2, ph = np.full_like(pao2, np.nan), np.full_like(pao2, np.nan)
    ok = np.isfinite(pao2) & np.isfinite(paco2)
    sbe, temp = np.broadcast_to(sbe, pao2.shape)[ok], np.broadcast_to(temp, pao2.shape)[ok]
    ph[ok] = ph_invivo(paco2[ok], sbe)
    sao2[ok] = saturation(np.clip(pao2[ok], 1.0, None), ph[ok], paco2[ok], temp)
    return pao2, paco2, sao2, ph, int(idx.size - kept)


def with_course_model_error(values, factors):
    """Courses (draws, time) with each draw's model-error factor applied in proportion to how far the
    course has gone from its start toward its end (no error at minute 0, where the fit reproduces the
    data; the full factor once settled); a course that does not change carries the full factor."""
    start, end = values[:, :1], values[:, -1:]
    change = end - start
    with np.errstate(invalid="ignore", divide="ignore"):
        # Below 0.5 (the values' unit) a course has no change to measure progress by (as time_to_fraction).
        progress = np.where(np.abs(change) >= 0.5, np.clip((values - start) / change, 0.0, 1.0), 1.0)
    return values * factors[:, None] ** progress


def _courses(draws, idx, current, trial, minutes):
    """[(indices, pao2, paco2)] of the draws at ``idx`` whose course integrates; failing draws found by halving."""
    try:
        with np.errstate(invalid="ignore"):  # a failing draw's NaNs are reported through success, not warnings
            course = simulate(_take(draws, idx), current, trial, minutes=minutes)
    except ArithmeticError:
        course = None
    if course is not None and np.all(course.success):
        return [(idx, np.atleast_2d(course.pao2), np.atleast_2d(course.paco2))]
    if idx.size == 1:
        return []
    half = idx.size // 2
    return (_courses(draws, idx[:half], current, trial, minutes)
            + _courses(draws, idx[half:], current, trial, minutes))


def _tile(settings, draws):
    from ventcast.physiology.fitting.fit import _tile_settings
    return _tile_settings(settings, np.atleast_1d(draws.shunt_fixed).size)


def _take(draws, idx):
    """The parameter draws at positions ``idx`` (a PatientModel of arrays)."""
    from dataclasses import fields, replace
    sub = {}
    for f in fields(draws):
        v = getattr(draws, f.name)
        if f.name == "mechanics":
            sub["mechanics"] = replace(v, **{g.name: (np.asarray(getattr(v, g.name))[idx] if np.ndim(getattr(v, g.name))
                                                      else getattr(v, g.name)) for g in fields(v)})
        else:
            sub[f.name] = np.asarray(v)[idx] if np.ndim(v) else v
    return replace(draws, **sub)


def settings_dict(s: Settings) -> dict:
    """Engine Settings (scalars) as case-file settings keys."""
    return {"mode": s.mode, "fio2": round(float(s.fio2), 2), "peep_cmh2o": float(s.peep),
            "vt_ml": None if s.vt_ml is None else float(s.vt_ml),
            "inspiratory_pressure_cmh2o": None if s.inspiratory_pressure is None else float(s.inspiratory_pressure),
            "rr_per_min": float(s.rr), "inspiratory_time_s": float(s.ti),
            "apparatus_dead_space_ml": float(s.apparatus_dead_space_ml or 0.0)}


def settings_text(s: dict) -> str:
    """Case-file settings in one line of words, with units."""
    if s["mode"] in SPONTANEOUS_MODES:
        support = (f"pressure support {s['pressure_support_cmh2o']:g} cmH2O" if s["mode"] == "pressure-support"
                   else "CPAP")
        return (f"{support}, FiO2 {s['fio2']:.2f}, PEEP {s['peep_cmh2o']:g} cmH2O, backup RR {s['rr_per_min']:g}/min, "
                f"Ti {s['inspiratory_time_s']:g} s")
    size = f"VT {s['vt_ml']:g} mL" if s["mode"] == "volume" else f"Pinsp {s['inspiratory_pressure_cmh2o']:g} cmH2O"
    return (f"{s['mode']} control, FiO2 {s['fio2']:.2f}, PEEP {s['peep_cmh2o']:g} cmH2O, {size}, "
            f"RR {s['rr_per_min']:g}/min, Ti {s['inspiratory_time_s']:g} s")


def case_goals(case: dict) -> Goals:
    try:
        return Goals.from_case(case.get("goals"))
    except ValueError as exc:
        raise CaseError("goals", str(exc)) from None


def ie_text(i_to_e: float) -> str:
    """I:E in the usual form ("1:2.0"; "1.1:1" and a caution when inspiration is the longer, an inverse ratio)."""
    if i_to_e > 1.0:
        return f"I:E {i_to_e:.1f}:1 (\u26a0 inverse ratio: inspiration longer than expiration)"
    return f"I:E 1:{1.0 / i_to_e:.1f}"


#: The largest FiO2 drop an option proposes without saying to get there in steps (common practice).
FIO2_STEP_MAX = 0.10


def plan_case(case: dict, result=None, required_probability: float = 0.9, progress=None) -> dict:
    """Options that meet the case's goals: the ``plan`` JSON of the README."""
    if result is None:
        _p, _o, result = fit_case(case)
    if is_spontaneous(case["settings"]):
        raise CaseError("settings.mode", f"value {case['settings']['mode']!r}: options are searched among volume- and "
                                         f"pressure-control settings; for a patient on pressure support or CPAP the "
                                         f"step-down plan (ventcast wean) lowers the support")
    goals = case_goals(case)
    now = to_settings(case["settings"])
    res = search(result.model, result.draws, now, goals, float(result.patient.pbw_kg),
                 required_probability=required_probability, progress=progress)
    options = []
    for i, c in enumerate(res.options):
        pred = predict(result.model, c.settings)
        steady = steady_block(pred)
        ti, breath = float(c.settings.ti), 60.0 / float(c.settings.rr)
        i_to_e = ti / max(breath - ti, 1e-9)
        # The same cautions the Limits would show for this option (a limit the search only ranks is said so).
        cautions = [ie_text(i_to_e)] if i_to_e > 1.0 else []
        drop = float(now.fio2) - float(c.settings.fio2)
        if drop > FIO2_STEP_MAX + 1e-9:
            cautions.append(f"\u26a0 FiO2 {float(now.fio2):.2f} -> {float(c.settings.fio2):.2f} is a large drop: lower it "
                            f"in steps of at most {FIO2_STEP_MAX:.2f} and check SpO2 after each (common practice)")
        mp, mp_max = steady["mechanical_power_j_min"], (case.get("goals") or {}).get("mechanical_power_max_j_min")
        if mp_max is None and mp is not None and mp > LIMITS["mechanical_power"].high:
            cautions.append(f"\u26a0 mechanical power {mp:.1f} J/min, above {LIMITS['mechanical_power'].high:g} "
                            f"({LIMITS['mechanical_power'].source}): ranked, not refused")
        options.append({"settings": settings_dict(c.settings), "steady": steady, "cautions": cautions,
                        "i_to_e": round(i_to_e, 2), "inverse_ratio": bool(i_to_e > 1.0),
                        "margins": {k: round(v, 3) for k, v in margins(pred, goals).items()},
                        "probability_all_goals": round(c.probability, 3), "changes": list(c.changes),
                        "meets_goals_at_fit": c.map_meets,
                        "misses": {k: round(v, 3) for k, v in sorted(c.failures.items(), key=lambda kv: -kv[1])}})
    return {"goals": goals.as_dict(), "success": res.success, "message": res.message, "met": res.met,
            "required_probability": required_probability, "options": options,
            "binding_constraint": res.binding_constraint,
            "screened": res.screened, "gas_exchange_evaluated": res.evaluated, "probability_evaluated": res.ranked,
            "caution": CAUTION}


def wean_case(case: dict, result=None, table: str | None = None, target_fio2: float = 0.4, target_peep: float = 8.0,
              spontaneous_rr: float | None = None, spontaneous_vt_ml: float | None = None) -> dict:
    """A step-down plan for the case: the ``wean`` JSON of the README."""
    if result is None:
        _p, _o, result = fit_case(case)
    goals = case_goals(case)
    if is_spontaneous(case["settings"]):
        return _wean_support(case, result, goals)
    now = to_settings(case["settings"])
    res = step_down(result.model, result.draws, now, goals, target_fio2=target_fio2, target_peep=target_peep,
                    table=table, spontaneous_rr=spontaneous_rr, spontaneous_vt_ml=spontaneous_vt_ml)
    steps = [{"settings": settings_dict(st.settings), "change": st.change, "why": st.why,
              "steady": steady_block(st.forecast),
              "likely_range": {"pao2_mmhg": list(st.likely_range["pao2"]), "paco2_mmhg": list(st.likely_range["paco2"]),
                               "ph": list(st.likely_range["ph"]), "sao2": list(st.likely_range["sao2"])},
              "hold_min": _f(st.hold_min), "hold_basis": st.hold_basis,
              "stop_if": st.stop_if} for st in res.steps]
    return {"goals": goals.as_dict(), "table": table, "target": {"fio2": target_fio2, "peep_cmh2o": target_peep},
            "success": res.success, "message": res.message, "steps": steps, "reached_target": res.reached_target,
            "stopped_because": res.stopped_because, "readiness": res.readiness, "caution": CAUTION}


#: What to watch on each step of pressure support (common practice, from memory).
SUPPORT_STOP_IF = (f"go back one step if the rate rises above {RATE_MAX:g}/min, RSBI above {RSBI_FAILURE:g}, SpO2 falls "
                   f"below the goal, pH below {PH_MIN:g}, or signs of distress appear")


def _wean_support(case: dict, result, goals) -> dict:
    """The step-down of pressure support for a case on it (:func:`physiology.planning.support.support_step_down`):
    the ``wean`` JSON with each step's two bounds."""
    from ventcast.physiology.planning.support import TRIAL_PEEP_MAX, TRIAL_SUPPORT_MAX, support_step_down

    now = spontaneous_now(case, result)
    s = case["settings"]
    spo2_goal = goals.spo2[0] if goals.spo2 else 0.88
    plan = support_step_down(result.model, float(s["fio2"]), now["peep_cmh2o"], now["pressure_support_cmh2o"],
                             now["pmus_model_cmh2o"], now["rr_per_min"], now["ti_neural_s"],
                             now["resistance_cmh2o_l_s"], now["compliance_ml_per_cmh2o"],
                             float(s.get("apparatus_dead_space_ml") or 0.0), spo2_goal, now["cycle_off_fraction"],
                             start=float(s.get("pressure_support_cmh2o") or 0.0))
    steps = []
    before = float(s.get("pressure_support_cmh2o") or 0.0)  # the steps go down from the support in force
    for st in plan["steps"]:
        settings = dict(s, mode="pressure-support", pressure_support_cmh2o=st.pressure_support)
        bounds = {name: {k: (v if not isinstance(v, float) else float(v)) for k, v in b.items()}
                  for name, b in st.bounds.items()}
        same = bounds["effort_unchanged"]
        change = f"pressure support {before:g} -> {st.pressure_support:g} cmH2O"
        before = st.pressure_support
        steps.append({"settings": settings, "change": change,
                      "why": "lower the support toward the breathing-trial conditions",
                      "steady": {"pao2_mmhg": same["pao2"], "paco2_mmhg": same["paco2"], "ph": same["ph"],
                                 "sao2": same["sao2"], "vt_ml": same["vt_ml"], "rr_per_min": same["rr_per_min"]},
                      "bounds": bounds, "breaks": list(st.breaks), "hold_min": None,
                      "hold_basis": "watch the breathing pattern and SpO2 before the next step",
                      "stop_if": SUPPORT_STOP_IF})
    message = (f"{len(steps)} step(s) of pressure support" + (f"; stopped {plan['stopped_because']}"
                                                              if plan["stopped_because"] else ""))
    return {"goals": goals.as_dict(), "table": None, "mode": s["mode"],
            "target": {"pressure_support_cmh2o": TRIAL_SUPPORT_MAX, "peep_cmh2o": TRIAL_PEEP_MAX},
            "success": True, "message": message,
            "effort_now": {k: now[k] for k in ("pmus_cmh2o", "pmus_basis", "pmus_model_cmh2o", "vt_ml", "rr_per_min",
                                               "rsbi", "pressure_support_cmh2o")},
            "now": plan["now"], "steps": steps, "reached_target": plan["reached_trial_conditions"],
            "stopped_because": plan["stopped_because"], "note": plan["note"], "readiness": [], "caution": CAUTION}
