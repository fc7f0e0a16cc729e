"""Published protocol tables and thresholds, as data with their sources.

References
----------
[1] ARDS Network. Ventilation with lower tidal volumes as compared with traditional tidal
    volumes for acute lung injury and the acute respiratory distress syndrome. N Engl J Med
    2000;342:1301-1308 (PBW, lower-PEEP/higher-FiO2 table, plateau, oxygenation and pH goals).
[2] Brower RG, Lanken PN, MacIntyre N, et al. Higher versus lower positive end-expiratory
    pressures in patients with the acute respiratory distress syndrome. N Engl J Med
    2004;351:327-336 (higher-PEEP/lower-FiO2 table).
[3] Amato MBP, Meade MO, Slutsky AS, et al. Driving pressure and survival in the acute
    respiratory distress syndrome. N Engl J Med 2015;372:747-755 (ceiling of 15 cmH2O:
    common practice).
[4] ARDS Definition Task Force. Acute respiratory distress syndrome: the Berlin definition.
    JAMA 2012;307:2526-2533.
[5] Boles JM, Bion J, Connors A, et al. Weaning from mechanical ventilation. Eur Respir J
    2007;29:1033-1056, Table 5 (readiness to wean).
[6] MacIntyre NR, Cook DJ, Ely EW, et al. Evidence-based guidelines for weaning and
    discontinuing ventilatory support. Chest 2001;120(6 Suppl):375S-395S.
[7] Yang KL, Tobin MJ. A prospective study of indexes predicting the outcome of trials of
    weaning from mechanical ventilation. N Engl J Med 1991;324:1445-1450 (RSBI > 105).
[8] Serpa Neto A, Deliberato RO, Johnson AEW, et al. Mechanical power of ventilation is
    associated with mortality in critically ill patients. Intensive Care Med 2018;44:1914-1922
    (about 17 J/min; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["PEEP_FIO2_LOWER", "PEEP_FIO2_HIGHER", "PEEP_TABLES", "Limit", "LIMITS", "BERLIN_PF_BANDS",
           "READINESS_CRITERIA", "RSBI_THRESHOLD", "table_steps"]

#: ARDS Network lower-PEEP/higher-FiO2 table [1], column by column: (FiO2, PEEP cmH2O); a pair
#: (low, high) is a range printed in one cell.
PEEP_FIO2_LOWER = (
    (0.3, 5), (0.4, 5), (0.4, 8), (0.5, 8), (0.5, 10), (0.6, 10), (0.7, 10), (0.7, 12), (0.7, 14),
    (0.8, 14), (0.9, 14), (0.9, 16), (0.9, 18), (1.0, (18, 24)),
)
#: Higher-PEEP/lower-FiO2 table [2]. One reproduction prints 15 for the second FiO2-0.4 cell;
#: 16 is used (every other step is even).
PEEP_FIO2_HIGHER = (
    (0.3, 5), (0.3, 8), (0.3, 10), (0.3, 12), (0.3, 14), (0.4, 14), (0.4, 16), (0.5, 16), (0.5, 18),
    ((0.5, 0.8), 20), (0.8, 22), (0.9, 22), (1.0, 22), (1.0, 24),
)
PEEP_TABLES = {"lower-peep": PEEP_FIO2_LOWER, "higher-peep": PEEP_FIO2_HIGHER}


def table_steps(table: str):
    """The rungs of a named PEEP/FiO2 table as (FiO2, PEEP) pairs, lowest first.

    Range cells are expanded: FiO2 in 0.1 steps, PEEP in 2 cmH2O steps.
    ``table`` is ``"lower-peep"`` or ``"higher-peep"``.
    """
    if table not in PEEP_TABLES:
        raise ValueError(f"table = {table!r} is not one of {tuple(PEEP_TABLES)}")
    rungs = []
    for fio2, peep in PEEP_TABLES[table]:
        fio2s = [round(fio2[0] + 0.1 * k, 1) for k in range(int(round((fio2[1] - fio2[0]) / 0.1)) + 1)] \
            if isinstance(fio2, tuple) else [fio2]
        peeps = list(range(peep[0], peep[1] + 1, 2)) if isinstance(peep, tuple) else [peep]
        rungs.extend((f, p) for f in fio2s for p in peeps)
    return tuple(rungs)


@dataclass(frozen=True)
class Limit:
    """One lung-protective or goal threshold: what, bounds, unit, source."""

    key: str
    what: str
    low: float | None
    high: float | None
    unit: str
    source: str


LIMITS = {
    "pplat": Limit("pplat", "Plateau pressure", None, 30.0, "cmH2O", "ARDS Network 2000"),
    "driving_pressure": Limit("driving_pressure", "Driving pressure", None, 15.0, "cmH2O",
                              "Amato 2015; ceiling common practice"),
    "vt_per_kg": Limit("vt_per_kg", "Tidal volume", 4.0, 8.0, "mL/kg PBW", "ARDS Network 2000"),
    "ph": Limit("ph", "pH", 7.30, 7.45, "", "ARDS Network 2000"),
    "pao2": Limit("pao2", "PaO2", 55.0, 80.0, "mmHg", "ARDS Network 2000"),
    "spo2": Limit("spo2", "SpO2", 0.88, 0.95, "fraction", "ARDS Network 2000"),
    "intrinsic_peep": Limit("intrinsic_peep", "Intrinsic PEEP", None, 5.0, "cmH2O", "common practice"),
    "mechanical_power": Limit("mechanical_power", "Mechanical power", None, 17.0, "J/min",
                              "Serpa Neto 2018, from memory"),
    "fio2": Limit("fio2", "FiO2", None, 0.6, "fraction", "common practice (oxygen toxicity above 0.6)"),
    "rr": Limit("rr", "Rate", None, 35.0, "/min", "ARDS Network 2000"),
}

#: Berlin P/F bands on PEEP >= 5 cmH2O [4]: (name, P/F upper bound inclusive) [mmHg].
BERLIN_PF_BANDS = (("severe", 100.0), ("moderate", 200.0), ("mild", 300.0))

#: Readiness for a spontaneous breathing trial [5], [6]: (key, description, threshold, source).
READINESS_CRITERIA = (
    ("fio2", "FiO2 at most 0.4 with SaO2 above 90 %", 0.4, "Boles 2007 Table 5"),
    ("peep", "PEEP at most 8 cmH2O", 8.0, "Boles 2007 Table 5"),
    ("pf_ratio", "P/F at least 150 mmHg", 150.0, "Boles 2007 Table 5; MacIntyre 2001"),
    ("rr", "Rate at most 35/min", 35.0, "Boles 2007 Table 5"),
    ("ph", "No significant respiratory acidosis: pH at least 7.25", 7.25, "MacIntyre 2001"),
    ("rsbi", "RSBI (f/VT) below 105 breaths/min/L", 105.0, "Yang & Tobin 1991"),
)
RSBI_THRESHOLD = 105.0
