"""Acid-base chemistry: Henderson-Hasselbalch, base excess, pH after a PCO2 change.

Two buffering views are kept apart on purpose:

* **In vivo** (extracellular fluid, minutes to hours): the standard base excess
  (SBE, Hb 5 g/dL basis) is held fixed while PCO2 changes. This is what the
  arterial pH does after a ventilator change and what the engine reports.
* **Whole blood during capillary transit** (under a second): the West/Wagner
  buffer line with its oxylabile (Haldane) term, used only inside the V/Q
  compartment contents.

References
----------
[1] Lang W, Zander R. The accuracy of calculated base excess in blood.
    Clin Chem Lab Med 2002;40(4):404-410 (Van Slyke equation, Siggaard-Andersen form).
[2] Siggaard-Andersen O. The acid-base status of the blood, 4th ed. 1974
    (standard base excess of extracellular fluid; from memory).
[3] Acute/chronic compensation rules (Harrison-type): acute respiratory
    acidosis +1 mmol/L HCO3 per +10 mmHg PaCO2, chronic +3.5; acute alkalosis
    -2 per -10, chronic -5 per -10 (common practice).
[4] West JB, Wagner PD V/Q programs: blood buffer line
    ``pH = 7.59 + y - 0.2741 ln(PCO2/20)``, ``y = offset + 0.003 Hb (1 - S)``.
"""

from __future__ import annotations

import numpy as np

from .._checks import check_fraction, check_positive, check_range

__all__ = [
    "CO2_SOLUBILITY",
    "PK_PLASMA",
    "bicarbonate_henderson_hasselbalch",
    "ph_henderson_hasselbalch",
    "pco2_henderson_hasselbalch",
    "base_excess_van_slyke",
    "standard_base_excess",
    "ph_invivo",
    "ph_at_new_pco2",
    "ph_blood_buffer_line",
    "PH_AT_NEW_PCO2_MODELS",
]

#: CO2 solubility in plasma at 37 degC [mmol/L/mmHg].
CO2_SOLUBILITY = 0.0307
#: Apparent pK of carbonic acid in plasma at 37 degC [pH units].
PK_PLASMA = 6.1

PH_AT_NEW_PCO2_MODELS = ("invivo_sbe", "rule_acute", "rule_chronic")


def bicarbonate_henderson_hasselbalch(ph, pco2, pk=PK_PLASMA, solubility=CO2_SOLUBILITY):
    """Plasma bicarbonate from pH and PCO2 [mmol/L].

    ``HCO3 = solubility * PCO2 * 10^(pH - pK)``.

    Parameters
    ----------
    ph : float or array  [pH units]
    pco2 : float or array  [mmHg]
    pk : float  [pH units]
    solubility : float  [mmol/L/mmHg]
    """
    ph = check_range("pH", ph, 6.3, 8.0)
    pco2 = check_positive("PCO2", pco2, "mmHg")
    return solubility * pco2 * 10.0 ** (ph - pk)


def ph_henderson_hasselbalch(hco3, pco2, pk=PK_PLASMA, solubility=CO2_SOLUBILITY):
    """pH from bicarbonate and PCO2 [pH units]: ``pK + log10(HCO3 / (solubility PCO2))``.

    Parameters
    ----------
    hco3 : float or array  [mmol/L]
    pco2 : float or array  [mmHg]
    """
    hco3 = check_positive("HCO3", hco3, "mmol/L")
    pco2 = check_positive("PCO2", pco2, "mmHg")
    return pk + np.log10(hco3 / (solubility * pco2))


def pco2_henderson_hasselbalch(ph, hco3, pk=PK_PLASMA, solubility=CO2_SOLUBILITY):
    """PCO2 from pH and bicarbonate [mmHg]."""
    ph = check_range("pH", ph, 6.3, 8.0)
    hco3 = check_positive("HCO3", hco3, "mmol/L")
    return hco3 / (solubility * 10.0 ** (ph - pk))


def base_excess_van_slyke(ph, pco2, hb=15.0, so2=1.0):
    """Actual (whole-blood) base excess, Van Slyke equation [mmol/L].

    ``BE = (1 - 0.0143 Hb) [(0.0304 PCO2 10^(pH - 6.1) - 24.26) + (9.5 + 1.63 Hb)(pH - 7.4)]
    - 0.2 Hb (1 - SO2)`` [1].

    Parameters
    ----------
    ph : float or array  [pH units]
    pco2 : float or array  [mmHg]
    hb : float or array  Haemoglobin [g/dL]
    so2 : float or array  Saturation [fraction] (oxygenation correction)
    """
    ph = check_range("pH", ph, 6.3, 8.0)
    pco2 = check_positive("PCO2", pco2, "mmHg")
    hb = check_range("Hb", hb, 0.0, 25.0, "g/dL")
    so2 = check_fraction("SO2", so2)
    return ((1.0 - 0.0143 * hb) * ((0.0304 * pco2 * 10.0 ** (ph - 6.1) - 24.26)
                                   + (9.5 + 1.63 * hb) * (ph - 7.4))
            - 0.2 * hb * (1.0 - so2))


def standard_base_excess(ph, hco3):
    """Standard (extracellular) base excess [mmol/L]: ``HCO3 - 24.8 + 16.2 (pH - 7.40)`` [2].

    Parameters
    ----------
    ph : float or array  [pH units]
    hco3 : float or array  [mmol/L]
    """
    ph = check_range("pH", ph, 6.3, 8.0)
    hco3 = check_positive("HCO3", hco3, "mmol/L")
    return hco3 - 24.8 + 16.2 * (ph - 7.40)


def ph_invivo(pco2, sbe):
    """Arterial pH at ``pco2`` for a fixed standard base excess (in-vivo CO2 curve) [pH units].

    Solves ``SBE = solubility PCO2 10^(pH - pK) - 24.8 + 16.2 (pH - 7.40)`` for pH
    (monotonic; Newton from 7.40, vectorised).

    Parameters
    ----------
    pco2 : float or array  [mmHg]
    sbe : float or array  Standard base excess [mmol/L]
    """
    pco2 = check_positive("PCO2", pco2, "mmHg")
    sbe = check_range("base excess", sbe, -40.0, 40.0, "mmol/L")
    return _ph_invivo(pco2, sbe)


def _ph_invivo(pco2, sbe):
    a = CO2_SOLUBILITY * pco2
    # Start from Henderson-Hasselbalch with the normal-pH bicarbonate shifted by SBE.
    ph = PK_PLASMA + np.log10(np.maximum(24.8 + sbe, 1.0) / a)
    target = 24.8 + sbe + 16.2 * 7.40
    ln10 = np.log(10.0)
    for _ in range(30):
        h = a * 10.0 ** (ph - PK_PLASMA)
        f = h + 16.2 * ph - target
        step = f / (h * ln10 + 16.2)
        ph = ph - step
        if np.all(np.abs(step) < 1e-12):
            break
    return ph


def ph_at_new_pco2(ph, pco2, new_pco2, model: str = "invivo_sbe"):
    """pH after PCO2 moves from ``pco2`` to ``new_pco2`` with the metabolic state fixed.

    Parameters
    ----------
    ph : float or array
        pH at ``pco2`` [pH units].
    pco2 : float or array
        Starting PCO2 [mmHg].
    new_pco2 : float or array
        New PCO2 [mmHg].
    model : str
        ``"invivo_sbe"`` (default; standard base excess held fixed, smooth, used by
        the engine), ``"rule_acute"`` or ``"rule_chronic"`` (bedside compensation
        rules [3], applied to HCO3 then Henderson-Hasselbalch).

    Returns
    -------
    float or array
        New pH [pH units].
    """
    if model not in PH_AT_NEW_PCO2_MODELS:
        raise ValueError(f"model = {model!r} is not one of {PH_AT_NEW_PCO2_MODELS}")
    hco3 = bicarbonate_henderson_hasselbalch(ph, pco2)
    new = check_positive("new PCO2", new_pco2, "mmHg")
    if model == "invivo_sbe":
        return _ph_invivo(new, standard_base_excess(ph, hco3))
    up, down = (0.1, 0.2) if model == "rule_acute" else (0.35, 0.5)
    d = new - np.asarray(pco2, dtype=float)
    new_hco3 = hco3 + np.where(d >= 0, up * d, down * d)
    return ph_henderson_hasselbalch(new_hco3, new)


def ph_blood_buffer_line(pco2, so2, hb, offset=0.0):
    """Whole-blood pH during capillary transit, West/Wagner buffer line [pH units].

    ``pH = 7.59 + offset + 0.003 Hb (1 - S) - 0.2741 ln(PCO2 / 20)`` [4]. ``offset``
    carries the metabolic state (0 for a normal base excess); the Hb term is the
    oxylabile (Haldane) pH shift.

    Parameters
    ----------
    pco2 : float or array  [mmHg]
    so2 : float or array  [fraction]
    hb : float or array  [g/dL]
    offset : float or array  [pH units]
    """
    pco2 = check_positive("PCO2", pco2, "mmHg")
    so2 = check_fraction("SO2", so2)
    return _buffer_line(pco2, so2, hb, offset)


def _buffer_line(pco2, so2, hb, offset):
    return 7.59 + offset + 0.003 * hb * (1.0 - so2) - 0.2741 * np.log(pco2 / 20.0)
