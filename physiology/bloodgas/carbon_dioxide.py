"""Carbon dioxide in whole blood, with the Haldane effect.

Model choice: Kelman 1967, the procedure used by the West/Wagner V/Q programs.
It splits total CO2 between plasma (Henderson-Hasselbalch with a pH- and
temperature-dependent pK' and solubility) and red cells (a cell/plasma ratio
that is higher in reduced blood: the Haldane effect, interpolated on
saturation). It carries no O2-Bohr term of its own, so pairing it with the
Kelman virtual-PO2 curve of :mod:`physiology.bloodgas.oxygen` counts the CO2
Bohr effect once.

References
----------
[1] Kelman GR. Digital computer procedure for the conversion of PCO2 into
    blood CO2 content. Respir Physiol 1967;3:111-115.
"""

from __future__ import annotations

import numpy as np

from .._checks import check_fraction, check_positive, check_range

__all__ = ["co2_content_kelman", "hematocrit_from_hb", "MMOL_TO_ML_DL"]

#: mmol/L of CO2 to mL/dL: 22.2 mL/mmol divided by 10 dL/L [mL/dL per mmol/L].
MMOL_TO_ML_DL = 2.22


def hematocrit_from_hb(hb, mchc=33.3):
    """Haematocrit from haemoglobin with a fixed mean cell Hb concentration [fraction].

    Parameters
    ----------
    hb : float or array
        Haemoglobin [g/dL].
    mchc : float
        Mean corpuscular Hb concentration [g/dL]; 33.3 makes Hb 15 give Hct 0.45
        (common practice).
    """
    h = check_positive("Hb", hb, "g/dL", allow_zero=True)
    return h / mchc


def co2_content_kelman(pco2, ph, so2, hct=0.45, temperature=37.0):
    """Whole-blood CO2 content, Kelman 1967 [mL CO2 / dL blood].

    Parameters
    ----------
    pco2 : float or array
        CO2 partial pressure [mmHg], > 0.
    ph : float or array
        Plasma pH [pH units].
    so2 : float or array
        O2 saturation [fraction] (Haldane effect).
    hct : float or array
        Haematocrit [fraction].
    temperature : float or array
        Blood temperature [degC].

    Returns
    -------
    float or array
        Total CO2 content [mL/dL] (STPD).
    """
    pco2 = check_positive("PCO2", pco2, "mmHg")
    ph = check_range("pH", ph, 6.3, 8.0)
    so2 = check_fraction("SO2", so2)
    hct = check_range("haematocrit", hct, 0.0, 0.8)
    t = check_range("temperature", temperature, 20.0, 45.0, "degC")
    return _kelman_co2(pco2, ph, so2, hct, t)


def _kelman_co2(pco2, ph, so2, hct, t):
    p = 7.4 - ph
    pk = 6.086 + 0.042 * p + (38.0 - t) * (0.00472 + 0.00139 * p)
    dt = 37.0 - t
    sol = 0.0307 + 0.00057 * dt + 0.00002 * dt * dt
    dox = 0.590 + 0.2913 * p - 0.0844 * p * p
    dr = 0.664 + 0.2275 * p - 0.0938 * p * p
    ddd = dox + (dr - dox) * (1.0 - so2)
    cp = sol * pco2 * (1.0 + 10.0 ** (ph - pk))
    return (hct * ddd + (1.0 - hct)) * cp * MMOL_TO_ML_DL
