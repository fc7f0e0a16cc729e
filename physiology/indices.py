"""Bedside indices computed from a blood gas and the ventilator settings.

References
----------
[1] ARDS Network. Ventilation with lower tidal volumes as compared with traditional
    tidal volumes for acute lung injury and ARDS. N Engl J Med 2000;342:1301-1308
    (predicted body weight).
[2] Sinha P, Fauvel NJ, Singh S, Soni N. Ventilatory ratio: a simple bedside measure
    of ventilation. Br J Anaesth 2009;102(5):692-697.
[3] ARDS Definition Task Force. Acute respiratory distress syndrome: the Berlin
    definition. JAMA 2012;307(23):2526-2533.
[4] Oxygenation index OI = FiO2 x mean airway pressure x 100 / PaO2 (common practice).
"""

from __future__ import annotations

from ._checks import check_fio2, check_positive, check_range

__all__ = [
    "predicted_body_weight",
    "ml_per_kg_pbw",
    "pf_ratio",
    "aa_gradient",
    "aa_ratio",
    "oxygenation_index",
    "ventilatory_ratio",
    "berlin_category",
    "BERLIN_CATEGORIES",
]

BERLIN_CATEGORIES = ("none", "mild", "moderate", "severe")


def predicted_body_weight(height_cm, sex):
    """Predicted body weight, ARDS Network 2000 [kg].

    ``50 (male) or 45.5 (female) + 0.91 (height_cm - 152.4)`` [1].

    Parameters
    ----------
    height_cm : float or array  Height [cm], 100-250
    sex : str  ``"male"`` or ``"female"``
    """
    h = check_range("height", height_cm, 100.0, 250.0, "cm")
    if sex not in ("male", "female"):
        raise ValueError(f"sex = {sex!r} is not accepted: use 'female' or 'male'")
    base = 50.0 if sex == "male" else 45.5
    return base + 0.91 * (h - 152.4)


def ml_per_kg_pbw(vt_ml, pbw_kg):
    """Tidal volume per kg of predicted body weight [mL/kg]."""
    v = check_positive("VT", vt_ml, "mL")
    w = check_positive("PBW", pbw_kg, "kg")
    return v / w


def pf_ratio(pao2, fio2):
    """PaO2/FiO2 ratio [mmHg]."""
    p = check_positive("PaO2", pao2, "mmHg")
    return p / check_fio2(fio2)


def aa_gradient(pao2_alveolar, pao2):
    """Alveolar-arterial PO2 difference [mmHg]: ``PAO2 - PaO2``."""
    return check_positive("PAO2", pao2_alveolar, "mmHg") - check_positive("PaO2", pao2, "mmHg")


def aa_ratio(pao2_alveolar, pao2):
    """Arterial/alveolar PO2 ratio [fraction]: ``PaO2 / PAO2``."""
    return check_positive("PaO2", pao2, "mmHg") / check_positive("PAO2", pao2_alveolar, "mmHg")


def oxygenation_index(fio2, mean_airway_pressure, pao2):
    """Oxygenation index [unitless]: ``FiO2 x Pmean x 100 / PaO2`` [4].

    Parameters
    ----------
    fio2 : float or array  [fraction]
    mean_airway_pressure : float or array  [cmH2O]
    pao2 : float or array  [mmHg]
    """
    f = check_fio2(fio2)
    m = check_positive("mean airway pressure", mean_airway_pressure, "cmH2O")
    p = check_positive("PaO2", pao2, "mmHg")
    return f * m * 100.0 / p


def ventilatory_ratio(ve_l_min, paco2, pbw_kg):
    """Ventilatory ratio, Sinha 2009 [unitless].

    ``VR = (VE [mL/min] x PaCO2) / (PBW x 100 x 37.5)`` [2].

    Parameters
    ----------
    ve_l_min : float or array  Measured minute ventilation [L/min]
    paco2 : float or array  [mmHg]
    pbw_kg : float or array  [kg]
    """
    ve = check_positive("minute ventilation", ve_l_min, "L/min")
    p = check_positive("PaCO2", paco2, "mmHg")
    w = check_positive("PBW", pbw_kg, "kg")
    return ve * 1000.0 * p / (w * 100.0 * 37.5)


def berlin_category(pf, peep_cmh2o):
    """Berlin severity from P/F on PEEP >= 5 cmH2O [3].

    Returns ``"severe"`` (P/F <= 100), ``"moderate"`` (100 < P/F <= 200), ``"mild"``
    (200 < P/F <= 300), ``"none"`` (P/F > 300), or ``"not assessable"`` when PEEP
    is below 5 cmH2O (the definition requires PEEP or CPAP >= 5). The clinical
    criteria (timing, bilateral opacities, not cardiac) are the clinician's.

    Parameters
    ----------
    pf : float  P/F ratio [mmHg]
    peep_cmh2o : float  [cmH2O]
    """
    pf = float(check_positive("P/F ratio", pf, "mmHg"))
    peep = float(check_range("PEEP", peep_cmh2o, 0.0, 40.0, "cmH2O"))
    if peep < 5.0:
        return "not assessable"
    if pf <= 100.0:
        return "severe"
    if pf <= 200.0:
        return "moderate"
    if pf <= 300.0:
        return "mild"
    return "none"

