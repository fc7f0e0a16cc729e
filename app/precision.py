"""One rounding rule per quantity: the clinical precision every output uses (window, command line, report,
JSON and alert text). PaO2 whole mmHg, PaCO2 0.1 mmHg, pH 0.01, SaO2 0.01 (whole %), FiO2 0.01,
pressures 0.1 cmH2O, P/F whole mmHg, RSBI whole (common practice).

Time series (a forecast's ``course`` and its band) keep finer steps so that a drawn curve is smooth; every
single value a person reads is rounded here.
"""

from __future__ import annotations

import math

#: Decimals by output key. Keys not named take the rule of their unit suffix (:data:`SUFFIX_DECIMALS`),
#: else three significant digits.
DECIMALS = {
    "pao2_mmhg": 0, "pf_ratio_mmhg": 0, "aa_gradient_mmhg": 0, "alveolar_po2_mmhg": 0, "pvo2_mmhg": 0,
    "paco2_mmhg": 1, "petco2_mmhg": 1, "ph": 2, "sao2": 2, "spo2": 2, "fio2": 2, "vd_vt": 2,
    "shunt_fraction": 2, "shunt_fixed_fraction": 2, "recruitable_lung_fraction": 2, "alveolar_dead_space_fraction": 2,
    "low_vq_fraction": 2, "vq_log_sd": 2, "respiratory_quotient": 2, "inspiratory_filling": 2,
    "vt_ml": 0, "vt_ml_per_kg_pbw": 1, "rr_per_min": 1, "inspiratory_time_s": 2, "i_to_e": 2, "rsbi": 0,
    "ventilatory_ratio": 2, "oxygenation_index": 1, "pbw_kg": 1, "hb_g_dl": 1, "base_excess_mmol_l": 1,
    "compliance_ml_per_cmh2o": 1, "resistance_cmh2o_l_s": 1, "probability_all_goals": 2, "recheck_after_min": 1,
}
#: Decimals by the unit at the end of a key.
SUFFIX_DECIMALS = {"_mmhg": 1, "_cmh2o": 1, "_j_min": 1, "_l_min": 1, "_ml_min": 0, "_ml": 0, "_kg": 1,
                   "_mmol_l": 1, "_g_dl": 1, "_fraction": 2, "_min": 1, "_s": 2}
#: Subtrees left as they are: time series drawn as curves.
SERIES = {"course"}


def decimals_for(key: str) -> int | None:
    """The decimals of a value under ``key``; None: three significant digits."""
    if key in DECIMALS:
        return DECIMALS[key]
    for suffix, d in SUFFIX_DECIMALS.items():
        if key.endswith(suffix):
            return d
    return None


def _round(x: float, d: int | None) -> float:
    if not math.isfinite(x):
        return x
    if d is None:
        d = 0 if x == 0 else max(0, 2 - int(math.floor(math.log10(abs(x)))))
    return round(x, d) + 0.0  # + 0.0: never -0.0


def rounded(doc, key: str = ""):
    """A copy of an output document with every number at its clinical precision (by its key; a list
    takes the key it is under, e.g. a likely range ``"pao2_mmhg": [62.8, 81.3]`` -> ``[63, 81]``)."""
    if isinstance(doc, dict):
        return {k: (v if k in SERIES else rounded(v, k)) for k, v in doc.items()}
    if isinstance(doc, list):
        return [rounded(v, key) for v in doc]
    if isinstance(doc, bool) or not isinstance(doc, float):
        return doc
    return _round(doc, decimals_for(key))


def sao2_text(sao2) -> str:
    """SaO2 (a fraction) as people read it: whole per cent ('91 %'); '-' when missing."""
    return "-" if sao2 is None or not math.isfinite(float(sao2)) else f"{100.0 * float(sao2):.0f} %"
