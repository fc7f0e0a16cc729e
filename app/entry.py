"""Bringing the patient in: a new case, a blood gas added, a setting change applied (with the forecast
made for it), and the forecast check that holds each stored forecast against the gas that followed.

The window's forms and the commands ``new``, ``add-gas``, ``apply`` and ``check`` use these functions,
so both accept and refuse exactly the same input with the same messages (those of :mod:`app.casefile`).
Every function returns a new, validated case and never changes the one it was given.
"""

from __future__ import annotations

import copy
from datetime import datetime, timezone

import numpy as np

from . import CAUTION, MMHG_PER_KPA
from .casefile import FORMAT, VERSION, CaseError, check_patient, check_taken_at, validate

#: Observation fields a blood-gas form or command may fill, with their unit (gas pressures in mmHg).
GAS_FIELDS = ("pao2_mmhg", "paco2_mmhg", "ph", "sao2", "hco3_mmol_l", "petco2_mmhg", "pplat_cmh2o", "ppeak_cmh2o",
              "vte_ml", "ve_l_min", "spontaneous_rr_per_min", "p01_cmh2o", "delta_pocc_cmh2o")
#: The quantities the forecast check compares (the stored course has each with its likely range).
CHECKED = (("pao2_mmhg", "PaO2", "mmHg", 0), ("paco2_mmhg", "PaCO2", "mmHg", 1), ("ph", "pH", "", 2))


def now_text() -> str:
    """This minute in UTC, as a case file writes times."""
    return datetime.now(timezone.utc).replace(second=0, microsecond=0).isoformat().replace("+00:00", "Z")


def new_case(patient: dict, settings: dict, label: str | None = None, condition: str | None = None) -> dict:
    """A new case with the patient's body data and the current settings, and no blood gas yet."""
    patient = {k: v for k, v in patient.items() if v is not None}
    if condition is not None:
        patient["condition"] = condition
    doc = {"format": FORMAT, "version": VERSION, "label": label or "New patient", "patient": patient,
           "settings": dict(settings), "observations": []}
    validate(doc)
    return doc


#: Settings a new case needs (and VT in volume mode, the inspiratory pressure in pressure mode).
REQUIRED_SETTINGS = ("mode", "fio2", "peep_cmh2o", "rr_per_min", "inspiratory_time_s")


def settings_from_sets(patient: dict, sets, where: str = "--set") -> dict:
    """Current settings of a new case from ``KEY=VALUE`` items, each checked as a trial's would be."""
    from .engine import apply_sets
    check_patient({k: v for k, v in patient.items() if v is not None})
    given = {item.split("=", 1)[0].strip(): item.split("=", 1)[1].strip() for item in sets or () if "=" in item}
    size = {"volume": ["vt_ml"], "pressure": ["inspiratory_pressure_cmh2o"],
            "pressure-support": ["pressure_support_cmh2o"], "cpap": []}.get(given.get("mode", "volume"), [])
    needed = list(REQUIRED_SETTINGS) + size
    missing = [k for k in needed if k not in given]
    if missing:
        raise CaseError(f"{where} {missing[0]}", f"required for a new case (missing: {', '.join(missing)})")
    return apply_sets({"patient": patient, "settings": {}}, sets, where=where)


def kpa_to_mmhg(x: float) -> float:
    """A gas pressure read in kPa, in mmHg at the precision it was reported with (0.1 kPa -> 0.1 mmHg)."""
    return round(float(x) * MMHG_PER_KPA, 1)


def add_observation(case: dict, observation: dict) -> dict:
    """The case with one more observation (``taken_at``, the gas values; ``settings`` in force, the
    case's current settings when missing). Refused, naming the field, when any value is out of range."""
    obs = {k: v for k, v in observation.items() if v is not None}
    obs.setdefault("taken_at", now_text())
    obs.setdefault("settings", copy.deepcopy(case["settings"]))
    new = copy.deepcopy(case)
    hb = obs.pop("hb_g_dl", None)
    if hb is not None:  # a haemoglobin measured with the gas is the patient's latest Hb
        new["patient"]["hb_g_dl"] = hb
    new["observations"] = list(new["observations"]) + [obs]
    index = len(new["observations"]) - 1
    try:
        return validate(new)
    except CaseError as exc:
        # Name the field as the user entered it (the new gas), not by its place in the file.
        field = exc.field.replace(f"observations[{index}].", "blood gas: ").replace("patient.hb_g_dl", "blood gas: Hb")
        raise CaseError(field, str(exc)[len(exc.field) + 2:]) from None


def replace_observation(case: dict, index: int, observation: dict) -> dict:
    """The case with observation ``index`` (in the case's time order) replaced (a typing error corrected);
    refused like :func:`add_observation`. Stored forecasts are not touched."""
    if not 0 <= index < len(case["observations"]):
        raise CaseError("observation", f"number {index + 1} does not exist; the case has {len(case['observations'])}")
    rest = copy.deepcopy(case)
    del rest["observations"][index]
    return add_observation(rest, observation)


def delete_observation(case: dict, index: int) -> dict:
    """The case without observation ``index`` (in the case's time order)."""
    if not 0 <= index < len(case["observations"]):
        raise CaseError("observation", f"number {index + 1} does not exist; the case has {len(case['observations'])}")
    new = copy.deepcopy(case)
    del new["observations"][index]
    return validate(new)


def stored_forecast(out: dict) -> dict:
    """What is kept of a forecast (``forecast_fitted`` with its band) when its change is applied:
    steady state, likely range and the course with its band, as they were shown."""
    if not out.get("likely_range") or "course" not in out or "pao2_low" not in out["course"]:
        raise CaseError("forecast", "the forecast has no likely range yet: wait for it before applying the change")
    c = out["course"]
    if any(x is None for x in c["pao2_low"]):
        raise CaseError("forecast", "the likely range of the course could not be computed; the change cannot be "
                                    "checked later without it")
    keys = ("minutes", "pao2_mmhg", "paco2_mmhg", "ph", "pao2_low", "pao2_high", "paco2_low", "paco2_high",
            "ph_low", "ph_high")
    return {"steady": {k: out["steady"][k] for k, *_ in CHECKED},
            "likely_range": {k: list(out["likely_range"][k]) for k, *_ in CHECKED},
            "course": {k: list(c[k]) for k in keys}}


def apply_change(case: dict, settings: dict, forecast: dict, applied_at: str | None = None) -> dict:
    """The case after the ventilator was set to ``settings`` at ``applied_at`` (now by default): the new
    current settings, and the change with the forecast made for it (:func:`stored_forecast`) appended
    to the settings history. The stored forecast is never changed afterwards."""
    applied_at = applied_at or now_text()
    check_taken_at("applied at", applied_at)
    history = case.get("settings_history") or []
    if history and _time(applied_at) <= _time(history[-1]["applied_at"]):
        raise CaseError("applied at", f"value {applied_at!r} is not after the last change "
                                      f"({history[-1]['applied_at']}); accepted: a later time")
    new = copy.deepcopy(case)
    new["version"] = VERSION
    new["settings_history"] = list(copy.deepcopy(history)) + [
        {"applied_at": applied_at, "settings": dict(settings), "previous_settings": dict(case["settings"]),
         "forecast": copy.deepcopy(forecast)}]
    new["settings"] = dict(settings)
    return validate(new)


def _time(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def _same_settings(a: dict, b: dict) -> bool:
    keys = ("mode", "fio2", "peep_cmh2o", "vt_ml", "inspiratory_pressure_cmh2o", "rr_per_min", "inspiratory_time_s")
    for k in keys:
        x, y = a.get(k), b.get(k)
        if isinstance(x, str) or isinstance(y, str) or x is None or y is None:
            if x != y:
                return False
        elif not np.isclose(float(x), float(y), rtol=0, atol=1e-6):
            return False
    return True


def forecast_check(case: dict) -> dict:
    """Each blood gas taken after an applied change (and before the next), at that change's settings,
    against the forecast stored for it at that minute of the course (the steady state after its last
    minute): measured, forecast, 90 % likely range, inside or not; and the tally."""
    history = case.get("settings_history") or []
    pairs = []
    for i, change in enumerate(history):
        start = _time(change["applied_at"])
        end = _time(history[i + 1]["applied_at"]) if i + 1 < len(history) else None
        stored = change["forecast"]
        course = stored["course"]
        minutes = np.asarray(course["minutes"], dtype=float)
        for obs in case["observations"]:
            taken = _time(obs["taken_at"])
            if taken < start or (end is not None and taken >= end):
                continue
            if not _same_settings(obs["settings"], change["settings"]):
                continue  # taken at other settings (entered as before the change): not this forecast's gas
            after = (taken - start).total_seconds() / 60.0
            forecast, rng, inside = {}, {}, {}
            for key, _name, _unit, digits in CHECKED:
                if after <= minutes[-1]:
                    value = float(np.interp(after, minutes, np.asarray(course[key], dtype=float)))
                    lo = float(np.interp(after, minutes, np.asarray(course[band_key(key, "low")], dtype=float)))
                    hi = float(np.interp(after, minutes, np.asarray(course[band_key(key, "high")], dtype=float)))
                else:  # past the course: the steady state and its range
                    value = float(stored["steady"][key])
                    lo, hi = (float(x) for x in stored["likely_range"][key])
                forecast[key], rng[key] = value, [lo, hi]
                # Judged as shown: the range at the quantity's clinical precision (app.precision).
                inside[key] = bool(round(lo, digits) <= round(float(obs[key]), digits) <= round(hi, digits))
            pairs.append({"applied_at": change["applied_at"], "settings": change["settings"],
                          "gas_taken_at": obs["taken_at"], "minutes_after_change": round(after, 1),
                          "measured": {k: obs[k] for k, *_ in CHECKED}, "forecast": forecast, "likely_range": rng,
                          "inside": inside, "all_inside": all(inside.values())})
    return {"pairs": pairs, "inside_count": sum(p["all_inside"] for p in pairs), "pair_count": len(pairs),
            "quantity_counts": {k: [sum(p["inside"][k] for p in pairs), len(pairs)] for k, *_ in CHECKED},
            "caution": CAUTION}


def band_key(key: str, end: str) -> str:
    """The course key of a quantity's band edge: ('pao2_mmhg', 'low') -> 'pao2_low'."""
    return f"{key.replace('_mmhg', '')}_{end}"


def tally_text(check: dict) -> str:
    """The running tally in words ('6 of 7 measured gases inside the 90 % range')."""
    n, k = check["pair_count"], check["inside_count"]
    if n == 0:
        return "no gas has been taken yet after an applied change: nothing to check"
    return f"{k} of {n} measured gas{'es' if n != 1 else ''} inside the forecast's 90 % range (PaO2, PaCO2 and pH)"
