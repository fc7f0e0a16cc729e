"""Case files (``.ventcast.json``): reading, validation and atomic saving.

A case is validated in two stages: the JSON Schema in
``resources/schema/case.schema.json`` (structure, types, unknown keys), then
physiological range and consistency checks here. Every refusal is a
:class:`CaseError` whose message names the field, the value and what is
accepted.
"""

from __future__ import annotations

import copy
import json
import math
import os
import stat
import tempfile
from datetime import datetime, timedelta, timezone
from importlib import resources
from pathlib import Path

import jsonschema

from ventcast.physiology.gasexchange.alveolar import alveolar_po2
from ventcast.physiology.indices import predicted_body_weight
# The breath model's cycling criterion when a pressure-support case gives none, and its accepted ranges.
from ventcast.physiology.mechanics.spontaneous import CYCLE_OFF_DEFAULT, INPUT_LIMITS

FORMAT = "ventcast.case"
VERSION = 3  # 2 adds settings_history; 3 the pressure-support and cpap modes and effort measurements (older files read unchanged)
MAX_BYTES = 1_000_000
DEMO_NAMES = ("ards-moderate", "copd-trapping", "postop-wean", "refractory-shunt", "support-trial")

#: Defaults for optional fields, documented in the README.
PATIENT_DEFAULTS = {"temperature_c": 37.0, "barometric_mmhg": 760.0, "hb_g_dl": 12.0, "age_years": None,
                    "condition": "other"}
SETTINGS_DEFAULTS = {"apparatus_dead_space_ml": 0.0, "vt_ml": None, "inspiratory_pressure_cmh2o": None}
#: Modes in which the patient breathes: every breath is the patient's, supported (or not, on CPAP).
SPONTANEOUS_MODES = ("pressure-support", "cpap")

# (low, high, unit) accepted in code, after the schema.
SETTING_RANGES = {
    "peep_cmh2o": (0.0, 30.0, "cmH2O"),
    "rr_per_min": (1.0, 60.0, "/min"),
    "inspiratory_time_s": (0.2, 5.0, "s"),
    "inspiratory_pressure_cmh2o": (1.0, 50.0, "cmH2O"),
    "apparatus_dead_space_ml": (0.0, 300.0, "mL"),
    # The breath model's own ranges (physiology.mechanics.spontaneous).
    "pressure_support_cmh2o": INPUT_LIMITS["pressure_support"],
    "cycle_off_fraction": (*INPUT_LIMITS["cycle_off_fraction"][:2], "(fraction of peak flow)"),
}
#: Settings in the words on screen: (name, unit with its leading space).
SETTING_WORDS = {"mode": ("mode", ""), "fio2": ("FiO2", ""), "peep_cmh2o": ("PEEP", " cmH2O"), "vt_ml": ("VT", " mL"),
                 "rr_per_min": ("RR", "/min"), "inspiratory_time_s": ("Ti", " s"),
                 "inspiratory_pressure_cmh2o": ("inspiratory pressure", " cmH2O"),
                 "apparatus_dead_space_ml": ("apparatus dead space", " mL"),
                 "pressure_support_cmh2o": ("pressure support", " cmH2O"),
                 "cycle_off_fraction": ("cycling at", " of peak flow")}


def setting_words(key: str, value=None, relation: str = "") -> str:
    """A setting (and its value) in the words on screen: ``('inspiratory_time_s', 0.8)`` -> 'Ti 0.8 s';
    with ``relation='at most'``: 'Ti at most 0.8 s'."""
    name, unit = SETTING_WORDS.get(key, (key.replace("_", " "), ""))
    if value is None:
        return name
    name = f"{name} {relation}" if relation else name
    if isinstance(value, str):
        return f"{name} {value}"
    return f"{name} {value:.2f}" if key == "fio2" else f"{name} {float(value):g}{unit}"


OBSERVATION_RANGES = {
    "pao2_mmhg": (20.0, 700.0, "mmHg"),
    "paco2_mmhg": (10.0, 150.0, "mmHg"),
    "ph": (6.5, 8.0, ""),
    "hco3_mmol_l": (2.0, 60.0, "mmol/L"),
    "petco2_mmhg": (0.0, 150.0, "mmHg"),
    "pplat_cmh2o": (0.0, 60.0, "cmH2O"),
    "ppeak_cmh2o": (0.0, 80.0, "cmH2O"),
    "vte_ml": (20.0, 2500.0, "mL"),
    "ve_l_min": (0.5, 40.0, "L/min"),
    "vco2_ml_min": (50.0, 800.0, "mL/min"),
    "cardiac_output_l_min": (1.0, 20.0, "L/min"),
    "spontaneous_rr_per_min": (4.0, 70.0, "/min"),
    "p01_cmh2o": (0.0, 20.0, "cmH2O"),
    "delta_pocc_cmh2o": (-60.0, 0.0, "cmH2O (a swing below PEEP is negative)"),
}
#: PaO2 may exceed the ideal alveolar PO2 by at most this much before we refuse [mmHg].
PAO2_ABOVE_ALVEOLAR_TOLERANCE = 10.0


class CaseError(ValueError):
    """A case file or value that cannot be used; ``field`` is the JSON path."""

    def __init__(self, field: str, message: str):
        super().__init__(f"{field}: {message}")
        self.field = field


def _schema() -> dict:
    text = resources.files("ventcast.resources.schema").joinpath("case.schema.json").read_text(encoding="utf-8")
    return json.loads(text)


def _path(parts) -> str:
    out = ""
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "(case)"


def short(value, limit: int = 60) -> str:
    """repr of a value, cut to ``limit`` characters: an error message never dumps a whole array."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit - 5] + " ...]" if text[0] == "[" else text[:limit - 4] + " ..."


def schema_error(err, path: str) -> CaseError:
    """A jsonschema error as a CaseError naming the field, the value (shortened) and what is accepted."""
    where = path
    s = err.schema
    if err.validator in ("maxItems", "minItems"):
        bound = "at most" if err.validator == "maxItems" else "at least"
        return CaseError(where, f"{len(err.instance)} items; {bound} {err.validator_value} are accepted")
    if err.validator in ("maxLength", "minLength"):
        bound = "at most" if err.validator == "maxLength" else "at least"
        return CaseError(where, f"text of {len(err.instance)} characters; {bound} {err.validator_value} are accepted")
    if err.validator == "pattern":
        return CaseError(where, f"value {short(err.instance)} is not of the accepted form")
    if err.validator in ("minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum"):
        low = s.get("minimum", s.get("exclusiveMinimum"))
        high = s.get("maximum", s.get("exclusiveMaximum"))
        return CaseError(where, f"value {short(err.instance)} is outside the accepted range {low} to {high}")
    if err.validator == "type":
        return CaseError(where, f"value {short(err.instance)} has the wrong type; expected {err.validator_value}")
    if err.validator in ("enum", "const"):
        allowed = err.validator_value if err.validator == "enum" else [err.validator_value]
        return CaseError(where, f"value {short(err.instance)} is not accepted; expected one of {allowed}")
    message = err.message
    return CaseError(where, message if len(message) <= 200 else message[:195] + " ...")


def check_patient(patient: dict) -> None:
    """The patient block alone, by the case schema's rules (a form or command checks it first)."""
    _schema_errors({"format": FORMAT, "version": VERSION, "patient": patient, "settings": {}, "observations": []},
                   only="patient")


def _schema_errors(doc: dict, only: str | None = None) -> None:
    validator = jsonschema.Draft202012Validator(_schema())
    errors = sorted(validator.iter_errors(doc), key=lambda e: (len(e.absolute_path), list(map(str, e.absolute_path))))
    if only is not None:
        errors = [e for e in errors if list(e.absolute_path)[:1] == [only]]
    if not errors:
        return
    err = errors[0]
    where = _path(err.absolute_path)
    if err.validator == "additionalProperties":
        extra = sorted(set(err.instance) - set(err.schema.get("properties", {})))
        raise CaseError(_path(list(err.absolute_path) + [extra[0]]), f"unknown key {extra[0]!r} is not accepted")
    if err.validator == "required":
        missing = [k for k in err.validator_value if k not in err.instance][0]
        raise CaseError(_path(list(err.absolute_path) + [missing]), "required field is missing")
    raise schema_error(err, where)


def _finite(field: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise CaseError(field, f"value {value!r} must be a finite number")
    return float(value)


def _check(field: str, value, low: float, high: float, unit: str) -> float:
    v = _finite(field, value)
    if not low <= v <= high:
        u = f" {unit}" if unit else ""
        raise CaseError(field, f"value {v:g}{u} is outside the accepted range {low:g} to {high:g}{u}")
    return v


def check_fio2_field(field: str, value) -> float:
    v = _finite(field, value)
    if 21 <= v <= 100:
        raise CaseError(field, f"value {v:g} is outside the accepted range 0.21 to 1.0: FiO2 is a fraction "
                               f"from 0.21 to 1.0; did you mean {v / 100:.2f}?")
    if not 0.21 <= v <= 1.0:
        raise CaseError(field, f"value {v:g} is outside the accepted range 0.21 to 1.0 (a fraction)")
    return v


def check_fraction_field(field: str, value) -> float:
    v = _finite(field, value)
    if 1 < v <= 100:
        raise CaseError(field, f"value {v:g} is outside the accepted range 0 to 1: saturations are "
                               f"fractions; did you mean {v / 100:.2f}?")
    if not 0 <= v <= 1:
        raise CaseError(field, f"value {v:g} is outside the accepted range 0 to 1 (a fraction)")
    return v


def check_settings(field: str, settings: dict, pbw_kg: float) -> dict:
    """Range-check one settings block; return it with defaults filled in."""
    s = dict(SETTINGS_DEFAULTS)
    s.update({k: v for k, v in settings.items() if v is not None or k not in s})
    check_fio2_field(f"{field}.fio2", s["fio2"])
    for key, (lo, hi, unit) in SETTING_RANGES.items():
        if s.get(key) is not None:
            _check(f"{field}.{key}", s[key], lo, hi, unit)
    if s["apparatus_dead_space_ml"] is None:
        s["apparatus_dead_space_ml"] = 0.0
    if s["mode"] == "volume":
        if s.get("vt_ml") is None:
            raise CaseError(f"{field}.vt_ml", "required in volume mode")
        lo, hi = 2.0 * pbw_kg, 20.0 * pbw_kg
        _check(f"{field}.vt_ml", s["vt_ml"], round(lo), round(hi), "mL (2 to 20 mL/kg PBW)")
    elif s["mode"] == "pressure":
        if s.get("inspiratory_pressure_cmh2o") is None:
            raise CaseError(f"{field}.inspiratory_pressure_cmh2o", "required in pressure mode")
    else:  # pressure-support or cpap: the patient sets VT and rate; RR and Ti are the ventilator's backup
        for key in ("vt_ml", "inspiratory_pressure_cmh2o"):
            if s.get(key) is not None:
                raise CaseError(f"{field}.{key}", f"applies in {'volume' if key == 'vt_ml' else 'pressure'} mode "
                                                  f"only, and this block is in {s['mode']} mode")
        if s["mode"] == "pressure-support":
            if s.get("pressure_support_cmh2o") is None:
                raise CaseError(f"{field}.pressure_support_cmh2o", "required in pressure-support mode")
        elif s.get("pressure_support_cmh2o") not in (None, 0, 0.0):
            raise CaseError(f"{field}.pressure_support_cmh2o", f"value {s['pressure_support_cmh2o']:g} cmH2O is not "
                                                               f"accepted in cpap mode (no support); use pressure-support")
        if s.get("cycle_off_fraction") is None:
            s["cycle_off_fraction"] = CYCLE_OFF_DEFAULT
    for key in ("pressure_support_cmh2o", "cycle_off_fraction"):
        if s["mode"] not in SPONTANEOUS_MODES and s.get(key) is not None:
            raise CaseError(f"{field}.{key}", f"applies in pressure-support mode only, and this block is in "
                                              f"{s['mode']} mode")
    breath = 60.0 / s["rr_per_min"]
    if s["inspiratory_time_s"] >= breath:
        raise CaseError(f"{field}.inspiratory_time_s",
                        f"value {s['inspiratory_time_s']:g} s leaves no time to breathe out at RR "
                        f"{s['rr_per_min']:g}/min (breath {breath:.2f} s); accepted range 0.2 to below {breath:.2f} s")
    return s


#: Goal ranges [low, high] accepted in code: each end within these bounds, low below high, and in
#: the documented unit (saturations as fractions 0-1, never percent).
GOAL_RANGE_BOUNDS = {
    "pao2_mmhg": (40.0, 500.0, "mmHg"),
    "spo2": (0.70, 1.0, "(fraction)"),
    "paco2_mmhg": (20.0, 100.0, "mmHg"),
    "ph": (6.9, 7.8, ""),
    "vt_ml_per_kg_pbw": (3.0, 12.0, "mL/kg PBW"),
}


def check_goals(field: str, goals: dict) -> dict:
    """Refuse goals that would switch a check off or mean something else: non-finite numbers, ranges
    out of order, ends outside the accepted bounds, saturations given in percent."""
    for key, value in goals.items():
        where = f"{field}.{key}"
        if key in GOAL_RANGE_BOUNDS:
            lo_b, hi_b, unit = GOAL_RANGE_BOUNDS[key]
            low, high = (_finite(f"{where}[{i}]", v) for i, v in enumerate(value))
            if key == "spo2" and (low > 1.0 or high > 1.0):
                raise CaseError(where, f"value {list(value)!r} looks like percent; give SpO2 goals as fractions "
                                       f"0-1 (e.g. [{low / 100:.2f}, {high / 100:.2f}])")
            for i, v in enumerate((low, high)):
                if not lo_b <= v <= hi_b:
                    raise CaseError(f"{where}[{i}]", f"value {v:g} is outside the accepted range {lo_b:g} to "
                                                     f"{hi_b:g} {unit}".rstrip())
            if not low < high:
                raise CaseError(where, f"value {list(value)!r} is not a range: the low end must come first "
                                       f"and be below the high end")
        else:
            _finite(where, value)
    return goals


def validate(doc) -> dict:
    """Validate a parsed case; return a normalised deep copy with defaults filled in."""
    if not isinstance(doc, dict):
        raise CaseError("(case)", "a case file must hold a JSON object")
    if doc.get("format") != FORMAT:
        raise CaseError("format", f"value {doc.get('format')!r} is not accepted; expected {FORMAT!r}")
    version = doc.get("version")
    if isinstance(version, int) and not isinstance(version, bool) and version > VERSION:
        raise CaseError("version", f"this case was written by a newer Ventcast (file version {version}); "
                                   f"this version reads up to {VERSION}")
    _schema_errors(doc)
    case = copy.deepcopy(doc)
    patient = dict(PATIENT_DEFAULTS)
    patient.update({k: v for k, v in case["patient"].items() if v is not None})
    case["patient"] = patient
    pbw = float(predicted_body_weight(patient["height_cm"], patient["sex"]))
    case["settings"] = check_settings("settings", case["settings"], pbw)
    if case.get("goals"):
        check_goals("goals", case["goals"])
    if case.get("trials") is not None:
        case["trials"] = {t: (None if case["trials"].get(t) is None else check_settings(f"trials.{t}", case["trials"][t], pbw))
                          for t in ("A", "B", "C")}
    pb = patient["barometric_mmhg"]
    t = patient["temperature_c"]
    for i, obs in enumerate(case["observations"]):
        field = f"observations[{i}]"
        obs["settings"] = check_settings(f"{field}.settings", obs.get("settings") or case["settings"], pbw)
        for key, (lo, hi, unit) in OBSERVATION_RANGES.items():
            if obs.get(key) is not None:
                _check(f"{field}.{key}", obs[key], lo, hi, unit)
        if obs.get("sao2") is not None:
            check_fraction_field(f"{field}.sao2", obs["sao2"])
        if obs["settings"]["mode"] in SPONTANEOUS_MODES:
            # The patient's own breathing is what the model is fitted to: it must be measured.
            for key in ("vte_ml", "spontaneous_rr_per_min"):
                if obs.get(key) is None:
                    raise CaseError(f"{field}.{key}", f"required for a blood gas taken in {obs['settings']['mode']} "
                                                      f"mode (the patient's own VT and rate)")
        fio2 = obs["settings"]["fio2"]
        pa_ideal = float(alveolar_po2(fio2, obs["paco2_mmhg"], 0.8, pb, min(max(t, 20.0), 45.0)))
        if obs["pao2_mmhg"] > pa_ideal + PAO2_ABOVE_ALVEOLAR_TOLERANCE:
            raise CaseError(f"{field}.pao2_mmhg",
                            f"value {obs['pao2_mmhg']:g} mmHg is impossible at FiO2 {fio2:g} with PaCO2 "
                            f"{obs['paco2_mmhg']:g} mmHg: the alveolar PO2 is only {pa_ideal:.0f} mmHg "
                            f"(accepted up to {pa_ideal + PAO2_ABOVE_ALVEOLAR_TOLERANCE:.0f}). Likely causes: "
                            f"FiO2 recorded wrongly, or air in the sample")
    previous = None
    for i, change in enumerate(case.get("settings_history") or []):
        field = f"settings_history[{i}]"
        change["settings"] = check_settings(f"{field}.settings", change["settings"], pbw)
        if change.get("previous_settings") is not None:
            change["previous_settings"] = check_settings(f"{field}.previous_settings", change["previous_settings"], pbw)
        at = check_taken_at(f"{field}.applied_at", change["applied_at"])
        if previous is not None and at <= previous:
            raise CaseError(f"{field}.applied_at", f"value {change['applied_at']!r} is not after the change before it; "
                                                   f"changes are listed oldest first")
        previous = at
        course = change["forecast"]["course"]
        lengths = {len(v) for v in course.values()}
        if len(lengths) != 1:
            raise CaseError(f"{field}.forecast.course", "its series have different lengths")
    times = [check_taken_at(f"observations[{i}].taken_at", o["taken_at"]) for i, o in enumerate(case["observations"])]
    # "now" is the newest gas, whatever order the file lists them in (a stable sort keeps equal times)
    order = sorted(range(len(times)), key=lambda i: times[i])
    case["observations"] = [case["observations"][i] for i in order]
    return case


#: A gas may be dated at most this far after the clock of this computer (time zones and clock drift).
FUTURE_TOLERANCE = timedelta(days=1)


def check_taken_at(field: str, text: str) -> datetime:
    """The time a gas was taken: a real date and time with its zone, not in the future."""
    try:
        t = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise CaseError(field, f"value {text!r} is not a real date and time (ISO 8601, e.g. 2026-03-14T05:40:00Z)") \
            from None
    if t.tzinfo is None:
        raise CaseError(field, f"value {text!r} has no time zone (add Z or +hh:mm)")
    latest = datetime.now(timezone.utc) + FUTURE_TOLERANCE
    if t > latest:
        raise CaseError(field, f"value {text!r} is in the future; accepted up to {latest:%Y-%m-%d %H:%M} UTC")
    return t


MAX_DEPTH = 32
MAX_INT_DIGITS = 18


def read_text(path, field: str, max_bytes: int = MAX_BYTES) -> str:
    """UTF-8 text of a file the user named, refused with ``field`` named when it is missing, not a
    regular file (a folder, a device such as /dev/zero, a FIFO), too large, or not text.

    The read itself is bounded: at most ``max_bytes`` + 1 bytes are ever read, whatever the file
    system says of the size.
    """
    p = Path(path)
    try:
        info = p.stat()
    except OSError as exc:
        raise CaseError(field, f"cannot read {str(p)!r}: {exc.strerror}") from None
    if not stat.S_ISREG(info.st_mode):
        kind = "a folder" if stat.S_ISDIR(info.st_mode) else "not a regular file (a device, FIFO or socket)"
        raise CaseError(field, f"{str(p)!r} is {kind}; a file is needed")
    if info.st_size > max_bytes:
        raise CaseError(field, f"{str(p)!r} is {info.st_size} bytes; at most {max_bytes} bytes are accepted")
    try:
        with open(p, "rb") as fh:
            data = fh.read(max_bytes + 1)
    except OSError as exc:
        raise CaseError(field, f"cannot read {str(p)!r}: {exc.strerror}") from None
    if len(data) > max_bytes:
        raise CaseError(field, f"{str(p)!r} is more than {max_bytes} bytes; at most {max_bytes} bytes are accepted")
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise CaseError(field, f"cannot read {str(p)!r} as UTF-8 text: {exc}") from None


class _JSONRefusal(ValueError):
    pass


def _no_constant(name: str):
    raise _JSONRefusal(f"{name} is not a number JSON accepts (only finite numbers are)")


def _bounded_int(text: str) -> int:
    digits = len(text.lstrip("-"))
    if digits > MAX_INT_DIGITS:
        raise _JSONRefusal(f"an integer of {digits} digits is too long (at most {MAX_INT_DIGITS})")
    return int(text)


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise _JSONRefusal(f"the number {text[:40]} is too large to be finite")
    return value


def _unique_keys(pairs):
    out = {}
    for key, value in pairs:
        if key in out:
            raise _JSONRefusal(f"the key {key!r} appears twice in one object")
        out[key] = value
    return out


def _nesting_depth(text: str) -> int:
    """Deepest nesting of objects and arrays, outside strings (a linear scan, no recursion)."""
    depth = deepest = 0
    in_string = escaped = False
    for ch in text:
        if in_string:
            if escaped:
                escaped = False
            elif ch == "\\":
                escaped = True
            elif ch == '"':
                in_string = False
        elif ch == '"':
            in_string = True
        elif ch in "[{":
            depth += 1
            deepest = max(deepest, depth)
        elif ch in "]}":
            depth -= 1
    return deepest


def parse_json(text: str, field: str, max_depth: int = MAX_DEPTH):
    """JSON from text, refused with ``field`` named and the place of the error.

    Stricter than ``json.loads``: NaN, Infinity and numbers too large to be finite are refused (a NaN
    would switch off every check it reaches), a key given twice in one object is refused (the last
    would silently win), integers longer than 18 digits and nesting deeper than ``max_depth`` too.
    """
    if _nesting_depth(text) > max_depth:
        raise CaseError(field, f"not accepted: objects and arrays nested more than {max_depth} deep")
    try:
        return json.loads(text, parse_constant=_no_constant, parse_int=_bounded_int,
                          parse_float=_finite_float, object_pairs_hook=_unique_keys)
    except json.JSONDecodeError as exc:
        raise CaseError(field, f"not valid JSON: {exc.msg} at line {exc.lineno}, column {exc.colno}") from None
    except _JSONRefusal as exc:
        raise CaseError(field, f"not accepted: {exc}") from None


def loads(text: str) -> dict:
    """Parse and validate case text."""
    return validate(parse_json(text, "(file)"))


def load(path) -> dict:
    """Read and validate a case file."""
    return loads(read_text(path, "(file)"))


def demo_text(name: str) -> str:
    """Text of a built-in demo case."""
    if name not in DEMO_NAMES:
        raise CaseError("--demo", f"value {name!r} is not a demo case; accepted: {', '.join(DEMO_NAMES)}")
    return resources.files("ventcast.resources.demo").joinpath(f"{name}.ventcast.json").read_text(encoding="utf-8")


def load_demo(name: str) -> dict:
    return loads(demo_text(name))


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


#: First bytes of the files Ventcast writes, to recognise "a file of the same kind" before replacing one.
MAGIC = {".pdf": b"%PDF", ".png": b"\x89PNG", ".svg": b"<", ".json": b"{", ".csv": b""}


def check_output_file(option: str, path, force: bool = False) -> Path:
    """Before anything is computed or written, refuse an output path that cannot or must not be
    written: a folder or special file, a missing parent folder (or a parent that is a file), a folder
    we may not write into, or an existing file of another kind (replaced only with ``force``)."""
    p = Path(path)
    if p.exists() and not p.is_file():
        raise CaseError(option, f"value {str(p)!r} exists and is not a regular file")
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise CaseError(option, f"value {str(p)!r}: the folder {str(parent)!r} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise CaseError(option, f"value {str(p)!r}: the folder {str(parent)!r} is not writable")
    if p.is_file() and not force:
        magic = MAGIC.get(p.suffix.lower())
        try:
            with open(p, "rb") as fh:
                head = fh.read(8).lstrip()
        except OSError as exc:
            raise CaseError(option, f"value {str(p)!r} cannot be read: {exc.strerror}") from None
        if magic is None or not head.startswith(magic):
            raise CaseError(option, f"value {str(p)!r} exists and is not a {p.suffix or 'file'} Ventcast wrote; "
                                    f"refusing to replace it")
    return p


def check_output_folder(option: str, path) -> Path:
    """A folder to write into: an existing folder, or one whose parent exists (it is created)."""
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise CaseError(option, f"value {str(p)!r} exists and is not a folder")
    if not p.exists():
        parent = p.parent if str(p.parent) else Path(".")
        if not parent.is_dir():
            raise CaseError(option, f"value {str(p)!r}: the folder {str(parent)!r} does not exist")
    elif not os.access(p, os.W_OK | os.X_OK):
        raise CaseError(option, f"value {str(p)!r} is not a writable folder")
    return p


def check_output_files(option: str, folder, names, force: bool = False) -> Path:
    """A folder to write ``names`` into (see :func:`check_output_folder`), and each file in it that
    already exists checked as :func:`check_output_file` does."""
    out = check_output_folder(option, folder)
    if out.is_dir():
        for name in names:
            check_output_file(option, out / name, force=force)
    return out


def write_atomic(path, text: str | bytes, mode: int | None = None) -> None:
    """Write ``text`` to ``path`` atomically: temporary file in the same folder, fsync, rename.

    The file keeps the permissions of the one it replaces; a new file gets ``mode`` (default: what
    an ordinary ``open`` would give, 0o666 less the umask). A failure leaves the old file as it was
    and no temporary file behind.
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    try:
        keep = target.stat().st_mode & 0o7777 if target.is_file() else None
    except OSError:
        keep = None
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    try:
        os.fchmod(fd, keep if keep is not None else (mode if mode is not None else 0o666 & ~_umask()))
        with os.fdopen(fd, "wb") as fh:
            fh.write(text.encode("utf-8") if isinstance(text, str) else text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def dumps(case: dict) -> str:
    """A case as the text of its file, in the current file version (an older file is migrated when saved)."""
    return json.dumps(dict(case, version=VERSION), indent=2) + "\n"


def save(path, case: dict) -> None:
    """Validate then save a case atomically."""
    validate(case)
    write_atomic(path, dumps(case))
