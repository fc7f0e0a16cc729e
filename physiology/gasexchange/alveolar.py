"""Alveolar gas, alveolar ventilation, dead space and shunt equations.

References
----------
[1] Antoine equation for water, 1-100 degC: log10 P[mmHg] = 8.07131 - 1730.63/(233.426 + T).
[2] Riley RL, Cournand A. "Ideal" alveolar air and the analysis of
    ventilation-perfusion relationships in the lungs. J Appl Physiol 1949;1:825-847
    (alveolar gas equation, full form).
[3] Bohr C. 1891; Enghoff H. Volumen inefficax. Uppsala Lakareforen Forh 1938;44:191-218
    (dead-space equations; from memory for the citations).
[4] Berggren SM. The oxygen deficit of arterial blood caused by non-ventilating
    parts of the lung. Acta Physiol Scand 1942;4(Suppl 11):1-92.
"""

from __future__ import annotations

import numpy as np

from .._checks import check_fio2, check_positive, check_range

__all__ = [
    "water_vapour_pressure_antoine",
    "btps_factor",
    "inspired_po2",
    "alveolar_po2",
    "alveolar_po2_simplified",
    "paco2_alveolar_ventilation",
    "alveolar_ventilation_from_paco2",
    "mixed_expired_pco2",
    "dead_space_bohr",
    "dead_space_enghoff",
    "shunt_berggren",
]


def water_vapour_pressure_antoine(temperature=37.0):
    """Saturated water vapour pressure, Antoine equation [mmHg].

    Parameters
    ----------
    temperature : float or array
        Gas temperature [degC], 1-100.

    References: [1]. 37 degC gives 46.95 mmHg.
    """
    t = check_range("temperature", temperature, 1.0, 100.0, "degC")
    return 10.0 ** (8.07131 - 1730.63 / (233.426 + t))


def btps_factor(temperature=37.0):
    """Factor that turns VA [L/min BTPS] x P [mmHg] into gas flow [mL/min STPD] when divided.

    ``k = 760 (273.15 + T) / 273.15 / 1000``; 0.8630 at 37 degC, so that
    ``V[mL STPD/min] = VA[L/min] * P[mmHg] / k`` [mmHg L / mL].
    """
    t = check_range("temperature", temperature, 20.0, 45.0, "degC")
    return 760.0 * (273.15 + t) / 273.15 / 1000.0


def inspired_po2(fio2, barometric=760.0, temperature=37.0):
    """Inspired PO2 of humidified gas at body temperature [mmHg]: ``FiO2 (PB - PH2O)``.

    Parameters
    ----------
    fio2 : float or array  [fraction 0.21-1.0]
    barometric : float or array  [mmHg]
    temperature : float or array  [degC]
    """
    f = check_fio2(fio2)
    pb = check_range("barometric pressure", barometric, 400.0, 1100.0, "mmHg")
    return f * (pb - water_vapour_pressure_antoine(temperature))


def alveolar_po2(fio2, paco2, r=0.8, barometric=760.0, temperature=37.0):
    """Ideal alveolar PO2, full alveolar gas equation [mmHg].

    ``PAO2 = PIO2 - PACO2 [FiO2 + (1 - FiO2)/R]`` with PACO2 = PaCO2 [2]. At FiO2 1.0
    this is exactly ``PB - PH2O - PaCO2``.

    Parameters
    ----------
    fio2 : float or array  [fraction]
    paco2 : float or array  [mmHg]
    r : float or array  Respiratory exchange ratio VCO2/VO2 [unitless]
    barometric : float or array  [mmHg]
    temperature : float or array  [degC]
    """
    f = check_fio2(fio2)
    pa = check_positive("PaCO2", paco2, "mmHg")
    rr = check_range("respiratory exchange ratio", r, 0.5, 1.5)
    return inspired_po2(f, barometric, temperature) - pa * (f + (1.0 - f) / rr)


def alveolar_po2_simplified(fio2, paco2, r=0.8, barometric=760.0, temperature=37.0):
    """Simplified alveolar gas equation [mmHg]: ``FiO2 (PB - PH2O) - PaCO2 / R``."""
    pa = check_positive("PaCO2", paco2, "mmHg")
    rr = check_range("respiratory exchange ratio", r, 0.5, 1.5)
    return inspired_po2(fio2, barometric, temperature) - pa / rr


def paco2_alveolar_ventilation(vco2, va, temperature=37.0):
    """Alveolar ventilation equation [mmHg]: ``PaCO2 = k VCO2 / VA`` (k 0.863 at 37 degC).

    Parameters
    ----------
    vco2 : float or array  CO2 output [mL/min STPD]
    va : float or array  Alveolar ventilation [L/min BTPS]
    temperature : float  [degC]
    """
    v = check_positive("VCO2", vco2, "mL/min")
    a = check_positive("alveolar ventilation", va, "L/min")
    return btps_factor(temperature) * v / a


def alveolar_ventilation_from_paco2(vco2, paco2, temperature=37.0):
    """Alveolar ventilation that gives ``paco2`` for ``vco2`` [L/min BTPS]."""
    v = check_positive("VCO2", vco2, "mL/min")
    p = check_positive("PaCO2", paco2, "mmHg")
    return btps_factor(temperature) * v / p


def mixed_expired_pco2(vco2, ve, temperature=37.0):
    """Mixed-expired PCO2 from CO2 output and minute ventilation [mmHg]: ``k VCO2 / VE``."""
    v = check_positive("VCO2", vco2, "mL/min", allow_zero=True)
    e = check_positive("minute ventilation", ve, "L/min")
    return btps_factor(temperature) * v / e


def dead_space_bohr(paco2_alveolar, pe_co2):
    """Bohr dead-space fraction [fraction]: ``(PACO2 - PECO2) / PACO2`` [3].

    Parameters
    ----------
    paco2_alveolar : float or array  Mean alveolar PCO2 [mmHg]
    pe_co2 : float or array  Mixed-expired PCO2 [mmHg]
    """
    pa = check_positive("alveolar PCO2", paco2_alveolar, "mmHg")
    pe = check_positive("mixed-expired PCO2", pe_co2, "mmHg", allow_zero=True)
    return (pa - pe) / pa


def dead_space_enghoff(paco2, pe_co2):
    """Enghoff dead-space fraction [fraction]: ``(PaCO2 - PECO2) / PaCO2`` [3].

    A global inefficiency index: shunt raises it as well as true dead space.

    Parameters
    ----------
    paco2 : float or array  Arterial PCO2 [mmHg]
    pe_co2 : float or array  Mixed-expired PCO2 [mmHg]
    """
    pa = check_positive("PaCO2", paco2, "mmHg")
    pe = check_positive("mixed-expired PCO2", pe_co2, "mmHg", allow_zero=True)
    return (pa - pe) / pa


def shunt_berggren(cc_o2, ca_o2, cv_o2):
    """Shunt (venous admixture) fraction, Berggren 1942 [fraction].

    ``Qs/Qt = (Cc'O2 - CaO2) / (Cc'O2 - CvO2)`` [4]; "true shunt" when measured on
    FiO2 1.0, "venous admixture" at lower FiO2.

    Parameters
    ----------
    cc_o2 : float or array  End-capillary O2 content [mL/dL]
    ca_o2 : float or array  Arterial O2 content [mL/dL]
    cv_o2 : float or array  Mixed-venous O2 content [mL/dL]
    """
    cc = check_positive("Cc'O2", cc_o2, "mL/dL")
    ca = check_positive("CaO2", ca_o2, "mL/dL")
    cv = check_positive("CvO2", cv_o2, "mL/dL")
    if np.any(cc <= cv):
        raise ValueError("Cc'O2 must exceed CvO2 for the shunt equation (end-capillary above mixed venous)")
    return (cc - ca) / (cc - cv)
