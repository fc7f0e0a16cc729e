"""A blood-gas result pasted as text ("label value unit" lines from a laboratory system or an analyser
printout) read into case-file observation fields.

Nothing is guessed silently: every value read is reported with the line it came from and the unit it
was read in; a line that is not understood is listed; a gas pressure without a unit that could be kPa or
mmHg is a question for the user (answered with ``gas_unit``), as is a haemoglobin without a unit; two
values for one quantity are refused with both lines named. Decimal commas are read ("7,32").
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

from . import MMHG_PER_KPA
from .casefile import OBSERVATION_RANGES, CaseError

#: Labels (lower case, without spaces, dots, brackets and a trailing "-" or "(a)") -> quantity.
LABELS = {
    "ph": "ph", "phart": "ph",
    "pco2": "paco2", "paco2": "paco2", "pco2art": "paco2",
    "po2": "pao2", "pao2": "pao2", "po2art": "pao2",
    "so2": "sao2", "sao2": "sao2", "o2sat": "sao2", "sato2": "sao2", "oxygensaturation": "sao2",
    "hco3": "hco3", "chco3": "hco3", "hco3act": "hco3", "actualbicarbonate": "hco3", "bicarbonate": "hco3",
    "hb": "hb", "cthb": "hb", "thb": "hb", "haemoglobin": "hb", "hemoglobin": "hb", "hgb": "hb",
    "petco2": "petco2", "etco2": "petco2",
}
#: Labels of results Ventcast knows but does not use (listed as such, not as "not understood").
NOT_USED = {"be", "beecf", "beb", "sbe", "abe", "lactate", "lac", "clac", "na", "na+", "k", "k+", "cl", "cl-",
            "ca", "ca++", "ca2+", "glucose", "glu", "cglu", "cohb", "fcohb", "methb", "fmethb", "o2hb", "fo2hb",
            "hhb", "fhhb", "hct", "temp", "t", "fio2", "p50", "ctco2", "tco2", "aniongap", "ag", "osm", "crea",
            "ctbil", "bili", "sbc", "hco3std", "pao2/fio2", "pf", "cto2", "p/f"}
#: Units (lower case, without spaces) -> canonical unit.
UNITS = {"mmhg": "mmHg", "torr": "mmHg", "kpa": "kPa", "%": "%", "mmol/l": "mmol/L", "meq/l": "mmol/L",
         "g/dl": "g/dL", "g/l": "g/L"}
#: Hb in mmol/L (of the monomer) to g/dL: x 1.611 (64 458 g/mol / 4; common practice).
HB_G_DL_PER_MMOL_L = 1.611
#: Accepted ranges per quantity and unit (outside them a reading in that unit is refused): the case
#: file's own ranges (``casefile.OBSERVATION_RANGES``), in kPa too; SaO2 from 30 % (a reading below is not a
#: plausible arterial saturation); Hb as the case schema's 4-22 g/dL, also in g/L and mmol/L.
PLAUSIBLE = {("ph", ""): OBSERVATION_RANGES["ph"][:2], ("hco3", "mmol/L"): OBSERVATION_RANGES["hco3_mmol_l"][:2],
             ("sao2", "%"): (30.0, 100.0), ("sao2", ""): (0.3, 1.0), ("hb", "g/dL"): (4.0, 22.0),
             ("hb", "g/L"): (40.0, 220.0), ("hb", "mmol/L"): (round(4.0 / HB_G_DL_PER_MMOL_L, 1),
                                                              round(22.0 / HB_G_DL_PER_MMOL_L, 1))}
for _q in ("pao2", "paco2", "petco2"):
    _lo, _hi, _unit = OBSERVATION_RANGES[f"{_q}_mmhg"]
    PLAUSIBLE[(_q, "mmHg")] = (_lo, _hi)
    PLAUSIBLE[(_q, "kPa")] = (round(_lo / MMHG_PER_KPA, 1), round(_hi / MMHG_PER_KPA, 1))
#: Case-file field of each quantity.
FIELD = {"pao2": "pao2_mmhg", "paco2": "paco2_mmhg", "ph": "ph", "sao2": "sao2", "hco3": "hco3_mmol_l",
         "petco2": "petco2_mmhg", "hb": "hb_g_dl"}
NAME = {"pao2": "PaO2", "paco2": "PaCO2", "ph": "pH", "sao2": "SaO2", "hco3": "HCO3", "petco2": "PetCO2", "hb": "Hb"}

# A label (it may hold digits: pCO2, HCO3-, ctHb), then ":" or "=" or at least one space, then the value.
_LINE = re.compile(r"^\s*(?P<label>[A-Za-z][A-Za-z0-9+/\-\s().]*?)(?:\s*[:=]\s*|\s+)(?P<flag>[<>]?)\s*"
                   r"(?P<value>-?\d+(?:[.,]\d+)?)\s*(?P<unit>[A-Za-z%/]+(?:/[A-Za-z]+)?)?\s*(?P<rest>.*)$")


@dataclass
class Pasted:
    """What was read: ``values`` (case-file fields, gas pressures in mmHg, SaO2 a fraction, Hb in g/dL),
    ``read`` (one entry per value: line number, text, quantity, value and unit as written, the value
    used), ``not_used`` and ``not_understood`` (line number, text), and ``questions`` (quantities whose
    unit must be chosen)."""

    values: dict = field(default_factory=dict)
    read: list = field(default_factory=list)
    not_used: list = field(default_factory=list)
    not_understood: list = field(default_factory=list)
    questions: list = field(default_factory=list)

    def summary(self) -> str:
        """What was read, in words, one line each."""
        lines = [(r["line"], f"line {r['line']}: {NAME[r['quantity']]} {r['written']} -> {r['used']}") for r in self.read]
        lines += [(n, f"line {n}: not used by Ventcast: {t}") for n, t in self.not_used]
        lines += [(n, f"line {n}: not understood: {t}") for n, t in self.not_understood]
        return "\n".join([t for _n, t in sorted(lines)] + [f"question: {q}" for q in self.questions])


def _label_key(label: str) -> str:
    key = re.sub(r"[\s.]", "", label.lower())
    key = re.sub(r"\((a|art|arterial|t|37c?)\)$", "", key)
    if key.rstrip("-") in LABELS:
        return key.rstrip("-")
    bare = re.sub(r"\(.*\)$", "", key)  # "BE(ecf)" is a known result Ventcast does not use
    return bare if bare in NOT_USED else key


def read_pasted(text: str, gas_unit: str | None = None, hb_unit: str | None = None) -> Pasted:
    """Read a pasted result (see the module notes). ``gas_unit`` ('mmHg' or 'kPa') answers the question
    of gas pressures written without a unit, ``hb_unit`` ('g/dL', 'g/L' or 'mmol/L') that of Hb."""
    if len(text) > 20_000:
        raise CaseError("pasted text", f"{len(text)} characters; at most 20000 are accepted")
    if gas_unit not in (None, "mmHg", "kPa"):
        raise CaseError("gas unit", f"value {gas_unit!r} is not accepted; accepted: mmHg or kPa")
    if hb_unit not in (None, "g/dL", "g/L", "mmol/L"):
        raise CaseError("Hb unit", f"value {hb_unit!r} is not accepted; accepted: g/dL, g/L or mmol/L")
    out = Pasted()
    seen = {}
    for n, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line:
            continue
        m = _LINE.match(line)
        key = _label_key(m["label"]) if m else ""
        if m is None or (key not in LABELS and key not in NOT_USED):
            (out.not_used if key in NOT_USED else out.not_understood).append((n, line))
            continue
        if key in NOT_USED:
            out.not_used.append((n, line))
            continue
        q = LABELS[key]
        value = float(m["value"].replace(",", "."))
        unit_raw = (m["unit"] or "").strip()
        unit = UNITS.get(unit_raw.lower().replace(" ", ""), None) if unit_raw else ""
        if unit is None:
            out.not_understood.append((n, f"{line} (unit {unit_raw!r} not known)"))
            continue
        if m["flag"]:
            raise CaseError(f"pasted line {n}", f"{line!r} gives only a bound ({m['flag']}{m['value']}), not a value")
        if q in seen:
            raise CaseError(f"pasted lines {seen[q]} and {n}", f"two values for {NAME[q]}; keep the one to use")
        seen[q] = n
        used, inferred = _convert(q, value, unit, n, line, gas_unit, hb_unit, out)
        if used is None:
            continue
        written = f"{m['value']} {unit}".strip() + (f" (no unit written: {inferred})" if inferred else "")
        out.values[FIELD[q]] = used
        out.read.append({"line": n, "text": line, "quantity": q, "written": written, "used": _used_text(q, used),
                         "value": value, "unit": unit or None})
    return out


def _convert(q, value, unit, n, line, gas_unit, hb_unit, out):
    """(the value in the case file's unit, how a missing unit was decided) or (None, '') when a question
    was asked instead."""
    inferred = ""
    if q in ("pao2", "paco2", "petco2"):
        if unit == "":
            fits = [u for u in ("mmHg", "kPa") if _within(q, u, value)]
            if gas_unit is not None:
                unit, inferred = gas_unit, f"{gas_unit} as answered"
            elif len(fits) == 1:
                unit, inferred = fits[0], f"only {fits[0]} is plausible"
            else:
                out.questions.append(f"line {n} ({line!r}): is {NAME[q]} {value:g} in mmHg or kPa?")
                return None, ""
        if unit not in ("mmHg", "kPa"):
            raise CaseError(f"pasted line {n}", f"{NAME[q]} in {unit!r}; accepted units: mmHg or kPa")
        _refuse_outside(q, unit, value, n)
        return (round(value * MMHG_PER_KPA, 1) if unit == "kPa" else value), inferred
    if q == "ph":
        if unit:
            raise CaseError(f"pasted line {n}", f"pH has no unit (read {unit!r})")
        _refuse_outside(q, "", value, n)
        return value, ""
    if q == "sao2":
        if not unit and value > 1.0:
            unit, inferred = "%", "above 1, so per cent"
        if unit not in ("%", ""):
            raise CaseError(f"pasted line {n}", f"SaO2 in {unit!r}; accepted: % or a fraction")
        _refuse_outside(q, unit, value, n)
        return (round(value / 100.0, 3) if unit == "%" else value), inferred
    if q == "hco3":
        if not unit:
            unit, inferred = "mmol/L", "HCO3 is reported in mmol/L"
        if unit != "mmol/L":
            raise CaseError(f"pasted line {n}", f"HCO3 in {unit!r}; accepted: mmol/L")
        _refuse_outside(q, unit, value, n)
        return value, inferred
    # Hb: g/dL, g/L or mmol/L; without a unit only g/L is unmistakable (above 25).
    if unit == "":
        if hb_unit is not None:
            unit, inferred = hb_unit, f"{hb_unit} as answered"
        elif value > 25.0:
            unit, inferred = "g/L", "above 25, so g/L"
        else:
            out.questions.append(f"line {n} ({line!r}): is Hb {value:g} in g/dL or mmol/L?")
            return None, ""
    if unit not in ("g/dL", "g/L", "mmol/L"):
        raise CaseError(f"pasted line {n}", f"Hb in {unit!r}; accepted: g/dL, g/L or mmol/L")
    _refuse_outside(q, unit, value, n)
    return (round(value / 10.0, 2) if unit == "g/L" else round(value * HB_G_DL_PER_MMOL_L, 1) if unit == "mmol/L"
            else value), inferred


def _within(q, unit, value) -> bool:
    lo, hi = PLAUSIBLE[(q, unit)]
    return lo <= value <= hi


def _refuse_outside(q, unit, value, n):
    lo, hi = PLAUSIBLE[(q, unit)]
    if not lo <= value <= hi:
        raise CaseError(f"pasted line {n}", f"{NAME[q]} {value:g} {unit}".rstrip() +
                        f" is outside the accepted range {lo:g} to {hi:g} {unit}".rstrip())


def _used_text(q, used) -> str:
    if q in ("pao2", "paco2", "petco2"):
        return f"{used:g} mmHg"
    if q == "sao2":
        return f"{used:g} (fraction)"
    if q == "hco3":
        return f"{used:g} mmol/L"
    if q == "hb":
        return f"{used:g} g/dL"
    return f"{used:g}"
