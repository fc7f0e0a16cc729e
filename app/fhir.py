"""Blood gases and ventilator data from an HL7 FHIR R4 Bundle (JSON) into case observations.

Parsed strictly by hand (no FHIR library): the importer reads only Observation resources (and a
Patient's gender), maps them **by LOINC code, never by display text**, converts UCUM units, and
refuses anything malformed with the JSON path named. Codes and confidence: the shared notes
``data-exchange-codes.md`` (HL7 implementation guides and LOINC term pages); a code marked there
as "memory" is marked the same way here.

Rules
-----
* Arterial values are used; venous and capillary samples are recognised by code and never used
  as arterial; unspecified-blood codes count as arterial only when the specimen says arterial or
  the Observation belongs to an arterial gas panel (24336-0).
* 2708-6 is SaO2 only for a laboratory result without a 59408-5 (pulse oximetry) coding.
* FiO2: a value <= 1.0 is a fraction, 21-100 a percentage; anything between is refused.
* Blood gases taken at the same ``effectiveDateTime`` form one observation; the ventilator
  settings in force are the latest ones recorded at or before it.
* Unknown codes, pulse oximetry and values the case format does not hold are listed as skipped.
"""

from __future__ import annotations

import copy
import json
import math
import re
from datetime import datetime

from . import MMHG_PER_KPA
from .casefile import CaseError, FORMAT, PATIENT_DEFAULTS, VERSION, parse_json, validate

MAX_GAS_TIMES = 200  # as many blood gases as a case holds (case.schema.json)
HB_G_DL_PER_MMOL_L = 1.611  # haemoglobin (monomer) 16.11 g/mmol, common practice

#: Arterial blood gas: code -> (observation key, kind). Temperature-adjusted codes are accepted.
ARTERIAL = {
    "2703-7": ("pao2_mmhg", "pressure"), "19255-9": ("pao2_mmhg", "pressure"),
    "2019-8": ("paco2_mmhg", "pressure"), "32771-8": ("paco2_mmhg", "pressure"),
    "2744-1": ("ph", "ph"), "33254-4": ("ph", "ph"),
    "1960-4": ("hco3_mmol_l", "mmol"),
    "2708-6": ("sao2", "saturation"),
}
#: Not stored in a case (the fit estimates it) but recognised.
RECOGNISED_NOT_STORED = {"1925-7": "base excess (the fit estimates it from pH and PaCO2)",
                         "59408-5": "SpO2 by pulse oximetry (not a blood gas)",
                         "76248-4": "total PEEP measured (the case holds the set PEEP)",
                         "19840-8": "total breath rate measured (the case holds the set rate)",
                         "76530-5": "mean airway pressure (the model computes it)",
                         "24336-0": "arterial gas panel (its members are read one by one)"}
VENOUS_OR_CAPILLARY = {
    "2705-2": "venous PO2", "2021-4": "venous PCO2", "2746-6": "venous pH", "14627-4": "venous HCO3",
    "1927-3": "venous base excess", "2711-0": "venous O2 saturation", "24339-4": "venous gas panel",
    "2704-5": "capillary PO2", "2020-6": "capillary PCO2", "2745-8": "capillary pH", "2709-4": "capillary O2 saturation",
    "24337-8": "capillary gas panel", "24338-6": "blood gas panel (specimen unspecified)",
}
UNSPECIFIED_BLOOD = {"11556-8": ("pao2_mmhg", "pressure"), "11557-6": ("paco2_mmhg", "pressure"),
                     "11558-4": ("ph", "ph")}
#: Other measurements of an observation.
MEASURED = {"19891-1": ("petco2_mmhg", "pressure"), "76259-1": ("pplat_cmh2o", "cmh2o"),
            "76531-3": ("ppeak_cmh2o", "cmh2o"), "76222-9": ("vte_ml", "ml"), "76007-4": ("vte_ml", "ml")}
#: Ventilator settings. 19834-1 is marked "memory" in the shared notes: verify before relying on it.
SETTINGS = {"3150-0": ("fio2", "fio2"), "19994-3": ("fio2", "fio2"), "71835-3": ("fio2", "fio2"),
            "20077-4": ("peep_cmh2o", "cmh2o"), "20112-9": ("vt_ml", "ml"), "19834-1": ("rr_per_min", "rate"),
            "76334-2": ("inspiratory_time_s", "seconds"), "20124-4": ("mode", "mode")}
#: Patient facts.
PATIENT = {"718-7": ("hb_g_dl", "hb"), "30313-1": ("hb_g_dl", "hb"), "8310-5": ("temperature_c", "celsius"),
           "8329-5": ("temperature_c", "celsius"), "8302-2": ("height_cm", "cm"), "29463-7": ("weight_kg", "kg")}

UNITS = {
    "pressure": {"mm[Hg]": 1.0, "mmHg": 1.0, "kPa": MMHG_PER_KPA},
    "cmh2o": {"cm[H2O]": 1.0, "cmH2O": 1.0},
    "ph": {"[pH]": 1.0, "1": 1.0, "": 1.0},
    "mmol": {"mmol/L": 1.0, "meq/L": 1.0, "m[eq]/L": 1.0},
    "ml": {"mL": 1.0, "ml": 1.0, "L": 1000.0},
    "rate": {"/min": 1.0, "{breaths}/min": 1.0, "{Breaths}/min": 1.0},
    "seconds": {"s": 1.0},
    "hb": {"g/dL": 1.0, "g/L": 0.1, "mmol/L": HB_G_DL_PER_MMOL_L},
    "celsius": {"Cel": 1.0},
    "cm": {"cm": 1.0, "m": 100.0},
    "kg": {"kg": 1.0, "g": 0.001},
}


class BundleError(CaseError):
    """A malformed bundle or resource; ``field`` is the JSON path."""


def _path(*parts) -> str:
    out = "bundle"
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else f".{p}"
    return out


def _loinc_codes(resource, where):
    code = resource.get("code")
    if not isinstance(code, dict) or not isinstance(code.get("coding"), list) or not code["coding"]:
        raise BundleError(_path(*where, "code", "coding"), "an Observation needs a code with at least one coding")
    codes = []
    for k, c in enumerate(code["coding"]):
        if not isinstance(c, dict) or not isinstance(c.get("code"), str):
            raise BundleError(_path(*where, "code", "coding", k, "code"), "each coding needs a code (a string)")
        if c.get("system", "http://loinc.org") == "http://loinc.org":
            codes.append(c["code"])
    return codes


def _number(resource, where, kind):
    """Value and UCUM unit of a valueQuantity, converted to the case's unit."""
    q = resource.get("valueQuantity")
    if not isinstance(q, dict):
        raise BundleError(_path(*where, "valueQuantity"), "a valueQuantity (value and unit) is needed")
    v = q.get("value")
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise BundleError(_path(*where, "valueQuantity", "value"), f"value {v!r} is not a finite number")
    unit = q.get("code", q.get("unit", ""))
    if not isinstance(unit, str):
        raise BundleError(_path(*where, "valueQuantity", "code"), f"unit {unit!r} is not a UCUM unit (a string)")
    if kind in ("fio2", "saturation"):
        return _fraction(v, unit, _path(*where, "valueQuantity"), kind)
    table = UNITS[kind]
    if unit not in table:
        raise BundleError(_path(*where, "valueQuantity", "code"),
                          f"unit {unit!r} is not accepted here; accepted UCUM units: {', '.join(repr(u) for u in table)}")
    factor = table[unit]
    if factor == 1.0:
        return float(v)
    # A converted value keeps the precision it was reported with: the reported decimals, one more for
    # each tenfold the unit shrinks (9.1 kPa -> 68.3 mmHg, never 68.2556; 112 g/L -> 11.2 g/dL).
    return round(float(v) * factor, max(_decimals(v) + math.ceil(-math.log10(factor) - 1e-9), 0))


def _decimals(v) -> int:
    """Decimals of a reported number as written in the JSON (12 -> 0, 9.1 -> 1, 6.25 -> 2)."""
    text = repr(float(v))
    if "e" in text or text.endswith(".0"):
        return 0
    return len(text.split(".")[1])


def _fraction(v, unit, where, kind):
    if unit not in ("%", "1", ""):
        raise BundleError(where + ".code", f"unit {unit!r} is not accepted for {kind}; accepted: '%', '1'")
    v = float(v)
    if kind == "fio2":
        # Published examples record 0.3 with unit '%': the scale follows the value.
        if 0.21 <= v <= 1.0:
            return v
        if 21.0 <= v <= 100.0:
            return v / 100.0
        raise BundleError(where + ".value", f"FiO2 {v:g} is neither a fraction 0.21-1.0 nor a percentage 21-100")
    # A saturation of 1 % or less is not compatible with life: such a value is a fraction whatever the
    # unit says (0.93 with unit '%' is 93 %, not 0.93 %), as for FiO2.
    if v > 1.0:
        v = v / 100.0
    if not 0.0 <= v <= 1.0:
        raise BundleError(where + ".value", f"saturation {v:g} is outside 0-1 (0-100 %)")
    return v


def _time(resource, where):
    t = resource.get("effectiveDateTime")
    if not isinstance(t, str):
        raise BundleError(_path(*where, "effectiveDateTime"), "an effectiveDateTime (ISO 8601) is needed")
    try:
        parsed = datetime.fromisoformat(t.replace("Z", "+00:00"))
    except ValueError:
        raise BundleError(_path(*where, "effectiveDateTime"), f"value {t!r} is not an ISO 8601 date-time") from None
    if parsed.tzinfo is None:
        raise BundleError(_path(*where, "effectiveDateTime"), f"value {t!r} has no time zone (add Z or +hh:mm)")
    return parsed


def _list(resource, key, where) -> list:
    """An optional FHIR list element: absent is empty, anything but a list is refused with its path."""
    value = resource.get(key)
    if value is None:
        return []
    if not isinstance(value, list):
        raise BundleError(_path(*where, key), f"{key} must be a list, not {type(value).__name__}")
    return value


def _is_lab(resource, where) -> bool:
    for cat in _list(resource, "category", where):
        codings = cat.get("coding") if isinstance(cat, dict) else None
        for c in codings if isinstance(codings, list) else []:
            if isinstance(c, dict) and c.get("code") == "laboratory":
                return True
    return False


#: Specimen types by SNOMED CT code (Specimen.type). Decided by code, never by display text.
#: 122555007 and 119297000 as in the FHIR R4 Specimen examples; 122552005 and 122554006 from memory.
SNOMED = "http://snomed.info/sct"
SPECIMEN_KIND = {"122552005": "arterial", "122555007": "venous", "122554006": "capillary",
                 "119297000": "blood, unspecified"}
#: Observation.status: imported as they are / imported with a note / skipped.
STATUS_IMPORTED = ("final", "amended", "corrected")
STATUS_NOTED = ("preliminary",)
STATUS_SKIPPED = ("registered", "cancelled", "entered-in-error", "unknown")


def _specimen_kind(resource, where, specimens) -> str | None:
    """'arterial', 'venous', 'capillary', 'blood, unspecified' or None, from the SNOMED CT type code
    of the Specimen the Observation refers to (contained, or an entry of the bundle)."""
    spec = resource.get("specimen")
    if spec is None:
        return None
    if not isinstance(spec, dict) or not isinstance(spec.get("reference"), str):
        raise BundleError(_path(*where, "specimen"), "specimen must be a Reference with a 'reference' string")
    ref = spec["reference"]
    target = None
    if ref.startswith("#"):
        for c in _list(resource, "contained", where):
            if isinstance(c, dict) and c.get("resourceType") == "Specimen" and c.get("id") == ref[1:]:
                target = c
    else:
        target = specimens.get(ref)
    if target is None:
        return None
    spec_type = target.get("type")
    codings = spec_type.get("coding") if isinstance(spec_type, dict) else None
    kinds = {SPECIMEN_KIND.get(c.get("code")) for c in (codings if isinstance(codings, list) else [])
             if isinstance(c, dict) and c.get("system") == SNOMED}
    kinds.discard(None)
    if len(kinds) > 1:
        raise BundleError(_path(*where, "specimen"), f"the specimen's SNOMED CT codes disagree: {sorted(kinds)}")
    return kinds.pop() if kinds else None


def read_bundle(text: str) -> dict:
    """Parse and check a Bundle; returns {"items": [...], "gender": ..., "skipped": [...]} (see :func:`import_bundle`)."""
    doc = parse_json(text, "bundle")
    if not isinstance(doc, dict) or doc.get("resourceType") != "Bundle":
        raise BundleError("bundle.resourceType", "the file is not an HL7 FHIR Bundle (resourceType 'Bundle')")
    entries = doc.get("entry")
    if not isinstance(entries, list):
        raise BundleError("bundle.entry", "a Bundle needs an entry list")
    panel_members, specimens = set(), {}
    for i, e in enumerate(entries):
        r = e.get("resource") if isinstance(e, dict) else None
        if isinstance(r, dict) and r.get("resourceType") == "Specimen":
            for key in (e.get("fullUrl"), f"Specimen/{r.get('id')}" if isinstance(r.get("id"), str) else None):
                if isinstance(key, str):
                    specimens[key] = r
        if isinstance(r, dict) and r.get("resourceType") == "Observation":
            try:
                codes = _loinc_codes(r, ("entry", i, "resource"))
            except BundleError:
                continue
            if "24336-0" in codes:
                for m in _list(r, "hasMember", ("entry", i, "resource")):
                    if isinstance(m, dict) and isinstance(m.get("reference"), str):
                        panel_members.add(m["reference"])
    items, skipped, gender, gender_path, birth = [], [], None, None, None
    for i, e in enumerate(entries):
        where = ("entry", i, "resource")
        if not isinstance(e, dict) or not isinstance(e.get("resource"), dict):
            raise BundleError(_path("entry", i, "resource"), "each entry needs a resource object")
        r = e["resource"]
        rtype = r.get("resourceType")
        if rtype == "Patient":
            g = r.get("gender")
            if g not in ("female", "male", None):
                raise BundleError(_path(*where, "gender"), f"gender {g!r} cannot give a predicted body weight; "
                                                           f"accepted: 'female', 'male'")
            if g is not None and gender is not None and g != gender:
                raise BundleError(_path(*where, "gender"), f"gender {g!r} contradicts {gender!r} at {gender_path}: "
                                                           f"the predicted body weight depends on it")
            if g is not None:
                gender, gender_path = g, _path(*where, "gender")
            b = r.get("birthDate")
            if b is not None:
                if not isinstance(b, str) or not re.fullmatch(r"\d{4}(-\d{2}(-\d{2})?)?", b):
                    raise BundleError(_path(*where, "birthDate"), f"value {b!r} is not a FHIR date (YYYY, YYYY-MM or "
                                                                  f"YYYY-MM-DD)")
                birth = b
            continue
        if rtype != "Observation":
            skipped.append({"code": None, "what": f"{rtype} resource", "why": "only Observations are read"})
            continue
        status = r.get("status")
        if not isinstance(status, str) or status not in STATUS_IMPORTED + STATUS_NOTED + STATUS_SKIPPED:
            raise BundleError(_path(*where, "status"), f"value {status!r} is not an Observation status; accepted: "
                                                       f"{', '.join(STATUS_IMPORTED + STATUS_NOTED + STATUS_SKIPPED)}")
        if status in STATUS_SKIPPED:
            skipped.append({"code": None, "what": f"entry {i}", "why": f"status {status}"})
            continue
        codes = _loinc_codes(r, where)
        for key in ("category", "hasMember", "contained"):
            _list(r, key, where)
        full_url = e.get("fullUrl", "")
        in_panel = any(full_url.endswith(ref) or ref == full_url for ref in panel_members) if full_url else False
        rid = f"Observation/{r.get('id')}" if r.get("id") else None
        in_panel = in_panel or (rid in panel_members)
        target = None
        specimen = _specimen_kind(r, where, specimens)
        for c in codes:
            if c == "2708-6":
                if "59408-5" in codes or not (_is_lab(r, where) or in_panel):
                    skipped.append({"code": c, "what": "oxygen saturation", "why": "pulse oximetry, not a blood gas"})
                    target = "skip"
                    break
            if specimen in ("venous", "capillary") and (c in ARTERIAL or c in UNSPECIFIED_BLOOD):
                skipped.append({"code": c, "what": f"blood gas from a {specimen} specimen (SNOMED CT)",
                                "why": "venous or capillary sample: never used as arterial"})
                target = "skip"
            elif c in ARTERIAL:
                target = ("observation",) + ARTERIAL[c] + (c,)
            elif c in UNSPECIFIED_BLOOD:
                if specimen == "arterial" or in_panel:
                    target = ("observation",) + UNSPECIFIED_BLOOD[c] + (c,)
                else:
                    skipped.append({"code": c, "what": "blood gas, specimen unspecified",
                                    "why": "not stated to be arterial: never used as arterial"})
                    target = "skip"
            elif c in VENOUS_OR_CAPILLARY:
                skipped.append({"code": c, "what": VENOUS_OR_CAPILLARY[c], "why": "venous or capillary sample: "
                                                                               "never used as arterial"})
                target = "skip"
            elif c in MEASURED:
                target = ("observation",) + MEASURED[c] + (c,)
            elif c in SETTINGS:
                target = ("settings",) + SETTINGS[c] + (c,)
            elif c in PATIENT:
                target = ("patient",) + PATIENT[c] + (c,)
            elif c in RECOGNISED_NOT_STORED:
                skipped.append({"code": c, "what": RECOGNISED_NOT_STORED[c], "why": "recognised, not held in a case"})
                target = "skip"
            if target is not None:
                break
        if target is None:
            skipped.append({"code": ", ".join(codes) or "(no LOINC code)", "what": "unknown code", "why": "not a code "
                            "Ventcast imports"})
            continue
        if target == "skip":
            continue
        part, key, kind, code = target
        if kind == "mode":
            concept = r.get("valueCodeableConcept")
            text = json.dumps(concept).lower() if isinstance(concept, dict) else ""
            if "pressure" in text and "volume" not in text:
                value = "pressure"
            elif "volume" in text and "pressure" not in text:
                value = "volume"
            else:
                raise BundleError(_path(*where, "valueCodeableConcept"),
                                  "the ventilation mode must say volume control or pressure control")
        else:
            comparator = r.get("valueQuantity", {}).get("comparator") if isinstance(r.get("valueQuantity"), dict) else None
            if comparator is not None:
                skipped.append({"code": code, "what": f"{key} {comparator} {r['valueQuantity'].get('value')!r}",
                                "why": "a bound, not a measured value: never taken as the value itself"})
                continue
            value = _number(r, where, kind)
        item = {"part": part, "key": key, "value": value, "code": code, "time": _time(r, where), "path": _path(*where)}
        if status in STATUS_NOTED:
            item["note"] = f"status {status}: confirm the final result"
        items.append(item)
    return {"items": items, "gender": gender, "skipped": skipped, "birth_date": birth}


def _note(item) -> dict:
    """The note an imported value carries into the report ({} when it has none)."""
    return {"note": item["note"]} if "note" in item else {}


def _one_value_per_time(items):
    """Refuse two different values of one quantity at one time (the last would silently win)."""
    seen = {}
    for it in items:
        slot = (it["part"], it["key"], it["time"])
        if slot in seen and seen[slot]["value"] != it["value"]:
            raise BundleError(it["path"], f"{it['key']} {it['value']!r} contradicts {seen[slot]['value']!r} at "
                                          f"{seen[slot]['path']}, both at {it['time'].isoformat()}")
        seen[slot] = it


def import_bundle(text: str, into: dict | None = None, mode: str | None = None,
                  ti_s: float | None = None) -> tuple[dict, dict]:
    """A case from a Bundle, or ``into`` (a case) with the imported observations added.

    Returns (case, report) with report = {"imported": [...], "skipped": [...], "warnings": [...]} listing
    codes. ``mode`` and ``ti_s`` give a new case the ventilation mode and inspiratory time when the bundle
    has no coded ones. Into a case, the latest settings in force become its current settings, and patient
    facts that differ from the case's are named in a warning (sex, height and weight are kept from the
    case; Hb and temperature are taken from the bundle). The case is validated like a case file; nothing
    is written here.
    """
    parsed = read_bundle(text)
    items = sorted(parsed["items"], key=lambda it: it["time"])
    _one_value_per_time(items)
    gas_times = sorted({it["time"] for it in items if it["part"] == "observation"})
    case = copy.deepcopy(into) if into is not None else None
    settings_now, patient = {}, {}
    observations = []
    imported = []
    # bundle path of each value, by the case field it becomes: a value the case checks refuse is
    # named where the user can find it, in the bundle
    origin = {"patient": {}, "settings": {}, "observations": []}
    settings_origin = {}
    for it in items:
        if it["part"] == "patient":
            patient[it["key"]] = round(it["value"], 3)
            origin["patient"][it["key"]] = it["path"]
            imported.append({"code": it["code"], "into": f"patient.{it['key']}", "value": patient[it["key"]],
                             **_note(it)})
    if len(gas_times) > MAX_GAS_TIMES:
        raise BundleError("bundle.entry", f"{len(gas_times)} result times; a case holds at most {MAX_GAS_TIMES} "
                                          f"blood gases: import a shorter period")
    at_time = {}
    for it in items:
        if it["part"] == "observation":
            at_time.setdefault(it["time"], []).append(it)
    settings_items = [it for it in items if it["part"] == "settings"]  # sorted by time, as items are
    next_setting = 0
    for t in gas_times:
        while next_setting < len(settings_items) and settings_items[next_setting]["time"] <= t:
            it = settings_items[next_setting]
            settings_now[it["key"]] = it["value"]
            settings_origin[it["key"]] = it["path"]
            next_setting += 1
        values = {it["key"]: it["value"] for it in at_time[t]}
        missing = [k for k in ("pao2_mmhg", "paco2_mmhg", "ph") if k not in values]
        if missing:
            parsed["skipped"].append({"code": None, "what": f"results at {t.isoformat()}",
                                      "why": f"no arterial {', '.join(missing)} at that time: not a blood gas"})
            continue
        obs = {"taken_at": t.strftime("%Y-%m-%dT%H:%M:%S") + _zone(t)}
        obs.update({k: round(v, 4) for k, v in values.items()})
        if settings_now:
            obs["settings"] = dict(settings_now)
        observations.append(obs)
        where = {it["key"]: it["path"] for it in at_time[t]}
        origin["observations"].append({**where, "settings": dict(settings_origin)})
        for it in at_time[t]:
            imported.append({"code": it["code"], "into": f"observation {obs['taken_at']}.{it['key']}",
                             "value": round(it["value"], 4), **_note(it)})
    for it in settings_items:
        if gas_times and it["time"] <= gas_times[-1]:
            imported.append({"code": it["code"], "into": f"settings.{it['key']}", "value": it["value"],
                             **_note(it)})
    origin["settings"] = dict(settings_origin)
    if not observations:
        raise BundleError("bundle.entry", "no arterial blood gas (PaO2, PaCO2 and pH at one time) was found")
    warnings = []
    if case is None:
        for key, value in (("mode", mode), ("inspiratory_time_s", ti_s)):
            if value is not None:
                last = observations[-1].setdefault("settings", {})
                if key in last and last[key] != value:
                    warnings.append(f"the bundle's {key} {last[key]} is kept; the {value} given was not needed")
                for o in observations:
                    o.setdefault("settings", {}).setdefault(key, value)
        case = _new_case(parsed["gender"], patient, observations)
        if parsed.get("birth_date"):
            case["patient"]["age_years"] = _age(parsed["birth_date"], observations[-1]["taken_at"])
    else:
        case.setdefault("observations", [])
        base = case["settings"]
        for o in observations:
            if "settings" in o:
                o["settings"] = {**base, **o["settings"]}
        case["observations"] = case["observations"] + observations
        for k in ("hb_g_dl", "temperature_c"):
            if k in patient:
                case["patient"][k] = patient[k]
        facts = {"sex": parsed["gender"], "height_cm": patient.get("height_cm"), "weight_kg": patient.get("weight_kg")}
        for k, v in facts.items():
            if v is not None and v != case["patient"].get(k):
                warnings.append(f"the bundle's {k.split('_')[0]} {v} differs from the case's {case['patient'].get(k)}; "
                                f"the case's is kept (edit the case if the bundle is right)")
        latest = observations[-1].get("settings")
        if latest and latest != base:
            case["settings"] = dict(latest)
            warnings.append("the current settings are now the latest settings in force in the bundle")
    for o in case["observations"]:
        if "settings" in o and o["settings"].get("mode") == "volume" and o["settings"].get("vt_ml") is None:
            raise BundleError("bundle.entry", f"the settings in force at {o['taken_at']} are volume control without a "
                                              f"set tidal volume (LOINC 20112-9)")
    first_new = len(case["observations"]) - len(observations)
    try:
        case = validate(json.loads(json.dumps(case)))
    except CaseError as exc:
        where = _bundle_origin(exc.field, origin, first_new)
        if where is None:
            raise
        raise BundleError(where, f"{str(exc).split(': ', 1)[-1]} (becomes the case's {exc.field})") from None
    return case, {"imported": imported, "skipped": parsed["skipped"], "warnings": warnings}


def _age(birth: str, at: str) -> int:
    """Age in whole years at the time ``at`` (ISO) of a FHIR birthDate (a year alone counts from 1 July)."""
    parts = [int(x) for x in birth.split("-")] + [7, 1][len(birth.split("-")) - 1:]
    y, m, d = parts[:3]
    when = datetime.fromisoformat(at.replace("Z", "+00:00"))
    return when.year - y - ((when.month, when.day) < (m, d))


def _bundle_origin(field: str, origin: dict, first_new: int) -> str | None:
    """The bundle path of the value that became case field ``field`` (None: not from the bundle)."""
    m = re.fullmatch(r"observations\[(\d+)\]\.(settings\.)?(\w+)", field)
    if m:
        k = int(m.group(1)) - first_new
        if not 0 <= k < len(origin["observations"]):
            return None
        block = origin["observations"][k]["settings"] if m.group(2) else origin["observations"][k]
        return block.get(m.group(3))
    part, _, key = field.partition(".")
    if part in ("patient", "settings"):
        return origin[part].get(key)
    return None


def _zone(t) -> str:
    off = t.utcoffset()
    if not off:
        return "Z"
    minutes = int(off.total_seconds() // 60)
    sign = "+" if minutes >= 0 else "-"
    return f"{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


def _new_case(gender, patient, observations) -> dict:
    missing = []
    if gender is None:
        missing.append("the patient's sex (a Patient resource with gender)")
    for key, code in (("height_cm", "8302-2"), ("weight_kg", "29463-7")):
        if key not in patient:
            missing.append(f"{key} (LOINC {code})")
    last = observations[-1].get("settings", {})
    for key, code in (("fio2", "3150-0 or 19994-3"), ("peep_cmh2o", "20077-4"), ("rr_per_min", "19834-1"),
                      ("inspiratory_time_s", "76334-2"), ("mode", "20124-4")):
        if key not in last:
            missing.append(f"settings.{key} (LOINC {code})")
    if missing:
        raise BundleError("bundle.entry", "a new case needs " + "; ".join(missing)
                          + " — or import into an existing case with --into")
    p = {"sex": gender, "height_cm": patient["height_cm"], "weight_kg": patient["weight_kg"]}
    for k in ("temperature_c", "hb_g_dl"):
        p[k] = patient.get(k, PATIENT_DEFAULTS[k])
    p["barometric_mmhg"] = PATIENT_DEFAULTS["barometric_mmhg"]
    settings = {"mode": last["mode"], "fio2": last["fio2"], "peep_cmh2o": last["peep_cmh2o"], "vt_ml": last.get("vt_ml"),
                "inspiratory_pressure_cmh2o": None, "rr_per_min": last["rr_per_min"],
                "inspiratory_time_s": last["inspiratory_time_s"], "apparatus_dead_space_ml": 0.0}
    if settings["mode"] == "pressure":
        raise BundleError("bundle.entry", "pressure control needs the inspiratory pressure, which the importer does "
                                          "not read yet — import into an existing case with --into")
    obs = []
    for o in observations:
        o = dict(o)
        if "settings" in o:
            o["settings"] = {**settings, **o["settings"]}
        obs.append(o)
    return {"format": FORMAT, "version": VERSION, "label": "Imported from an HL7 FHIR bundle",
            "patient": p, "settings": settings, "observations": obs}
