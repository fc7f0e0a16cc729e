"""Oxygen in blood: the oxyhaemoglobin dissociation curve and O2 content.

Model choice. The curve is Severinghaus (1979) Eq. 1, the standard human curve
at 37 degC, pH 7.40, PCO2 40 mmHg; its exact inverse is the closed-form cubic
root given by Ellis (1989). Non-standard conditions are handled by the virtual
(standardised) PO2 of Kelman (1966), whose factors come from Severinghaus'
blood-gas calculator (1966): temperature, pH and a separate CO2 term. The
engine uses this one family throughout; it never adds a second Bohr term.

For blood-gas analyser temperature correction of a sealed sample (a different
question: the same blood measured at another temperature) Severinghaus 1979
Eq. 3 is provided separately; it must not be interchanged with the curve shift.

References
----------
[1] Severinghaus JW. Simple, accurate equations for human blood O2 dissociation
    computations. J Appl Physiol 1979;46(3):599-602.
[2] Ellis RK. Determination of PO2 from saturation. J Appl Physiol 1989;67(2):902.
[3] Kelman GR. Digital computer subroutine for the conversion of oxygen tension
    into saturation. J Appl Physiol 1966;21(4):1375-1376.
[4] Severinghaus JW. Blood gas calculator. J Appl Physiol 1966;21:1108-1116.
[6] Dash RK, Korman B, Bassingthwaighte JB. Simple accurate mathematical models
    of blood HbO2 and HbCO2 dissociation curves at varied physiological conditions.
    Eur J Appl Physiol 2016;116(1):97-113 (Eqs. 9-10, P50 components).
[5] Dijkhuizen P et al. The oxygen binding capacity of human haemoglobin.
    Hufner's factor redetermined. Pflugers Arch 1977;369:223-231.
"""

from __future__ import annotations

import numpy as np

from .._checks import check_fraction, check_positive, check_range

__all__ = [
    "saturation_severinghaus",
    "po2_from_saturation_ellis",
    "po2_from_saturation_severinghaus_approx",
    "virtual_po2_factor_kelman",
    "saturation_kelman",
    "saturation",
    "po2_from_saturation",
    "p50_dash",
    "SATURATION_MODELS",
    "p50",
    "po2_temperature_correction_severinghaus",
    "bohr_coefficient_severinghaus",
    "o2_content",
    "HUFNER_DEFAULT",
    "O2_SOLUBILITY",
]

#: Hufner constant [mL O2 / g Hb]: 1.34 is the common clinical value; the measured
#: value is 1.368 +/- 0.017 [5]. The engine uses the clinical value by default.
HUFNER_DEFAULT = 1.34
#: Solubility of O2 in blood at 37 degC [mL O2 / dL / mmHg].
O2_SOLUBILITY = 0.003

_SEV_A = 23400.0  # [1], Eq. 1
_SEV_B = 150.0


def saturation_severinghaus(po2):
    """Haemoglobin O2 saturation on the standard curve, Severinghaus 1979 Eq. 1.

    Parameters
    ----------
    po2 : float or array
        O2 partial pressure at standard conditions [mmHg], >= 0.

    Returns
    -------
    float or array
        Saturation [fraction 0-1].

    References: [1], Eq. 1: ``S = 1 / (23400 / (PO2^3 + 150 PO2) + 1)``.
    """
    p = check_positive("PO2", po2, "mmHg", allow_zero=True)
    return _sev(p)


def _sev(p):
    q = p * (p * p + _SEV_B)
    return q / (q + _SEV_A)


def po2_from_saturation_ellis(s):
    """Exact inverse of Severinghaus Eq. 1 (Ellis 1989) [mmHg].

    Parameters
    ----------
    s : float or array
        Saturation [fraction], 0 <= s < 1.

    Returns
    -------
    float or array
        PO2 on the standard curve [mmHg].

    Notes
    -----
    Ellis writes ``PO2 = cbrt(k + r) - cbrt(r - k)`` with ``k = 11700/(1/S - 1)``
    and ``r = sqrt(50^3 + k^2)``. The difference of cube roots loses digits at
    low S, so it is evaluated as ``2k / (a^2 + ab + b^2)`` (same number, since
    ``a^3 - b^3 = 2k``).
    """
    s = check_fraction("saturation", s)
    if np.any(s >= 1.0):
        raise ValueError("saturation = 1 has no finite PO2 on the dissociation curve; accepted range 0 to below 1")
    return _ellis(s)


def _ellis(s):
    k = 0.5 * _SEV_A * s / (1.0 - s)
    r = np.sqrt(50.0 ** 3 + k * k)
    a = np.cbrt(r + k)
    b = np.cbrt(r - k)
    return 2.0 * k / (a * a + a * b + b * b)


def po2_from_saturation_severinghaus_approx(s):
    """Approximate inverse, Severinghaus 1979 Eq. 2 [mmHg] (for display only).

    ``ln PO2 = 0.385 ln(1/(1/S - 1)) + 3.32 - 1/(72 S) - 0.17 S^6``; within about
    1.3 % of the exact inverse.
    """
    s = check_fraction("saturation", s)
    if np.any((s <= 0) | (s >= 1)):
        raise ValueError("saturation must lie strictly between 0 and 1 for Severinghaus Eq. 2")
    return np.exp(0.385 * np.log(1.0 / (1.0 / s - 1.0)) + 3.32 - 1.0 / (72.0 * s) - 0.17 * s ** 6)


def virtual_po2_factor_kelman(ph=7.40, pco2=40.0, temperature=37.0):
    """Kelman's factor that turns an in-vivo PO2 into the standard-curve PO2.

    ``x = PO2 * 10^[0.024 (37 - T) + 0.40 (pH - 7.40) + 0.06 log10(40 / PCO2)]``

    Parameters
    ----------
    ph : float or array
        Blood pH [pH units].
    pco2 : float or array
        CO2 partial pressure [mmHg], > 0.
    temperature : float or array
        Blood temperature [degC].

    Returns
    -------
    float or array
        Multiplicative factor [unitless].

    References: [3], factors from [4].
    """
    ph = check_range("pH", ph, 6.3, 8.0)
    pco2 = check_positive("PCO2", pco2, "mmHg")
    t = check_range("temperature", temperature, 20.0, 45.0, "degC")
    return _kelman_factor(ph, pco2, t)


def _kelman_factor(ph, pco2, t):
    return 10.0 ** (0.024 * (37.0 - t) + 0.40 * (ph - 7.40) + 0.06 * np.log10(40.0 / pco2))


SATURATION_MODELS = ("severinghaus1979", "kelman1966")

_KELMAN_A = (-8532.2289, 2121.4010, -67.073989, 935960.87, -31346.258, 2396.1674, -67.104406)


def saturation_kelman(x):
    """Saturation on Kelman's 1966 rational polynomial of the virtual PO2 [fraction].

    ``S = (a1 x + a2 x^2 + a3 x^3 + x^4) / (a4 + a5 x + a6 x^2 + a7 x^3 + x^4)``; below
    10 mmHg the linear form ``(0.003683 + 0.000584 x) x`` used by the West/Wagner
    programs, because the polynomial turns negative at very low PO2 [3].

    Parameters
    ----------
    x : float or array
        Virtual (standardised) PO2 [mmHg].
    """
    x = check_positive("PO2", x, "mmHg", allow_zero=True)
    a1, a2, a3, a4, a5, a6, a7 = _KELMAN_A
    num = x * (a1 + x * (a2 + x * (a3 + x)))
    den = a4 + x * (a5 + x * (a6 + x * (a7 + x)))
    return np.where(x < 10.0, (0.003683 + 0.000584 * x) * x, num / den)


def saturation(po2, ph=7.40, pco2=40.0, temperature=37.0, model: str = "severinghaus1979"):
    """O2 saturation at the given blood conditions [fraction].

    Kelman's virtual PO2, then the standard curve of ``model``: Severinghaus 1979
    Eq. 1 (default, the engine's curve) or Kelman's 1966 polynomial.

    Parameters
    ----------
    po2 : float or array
        O2 partial pressure [mmHg], >= 0.
    ph : float or array
        pH [pH units].
    pco2 : float or array
        CO2 partial pressure [mmHg].
    temperature : float or array
        Blood temperature [degC].
    model : str
        ``"severinghaus1979"`` or ``"kelman1966"``.
    """
    if model not in SATURATION_MODELS:
        raise ValueError(f"model = {model!r} is not one of {SATURATION_MODELS}")
    p = check_positive("PO2", po2, "mmHg", allow_zero=True)
    x = p * virtual_po2_factor_kelman(ph, pco2, temperature)
    return _sev(x) if model == "severinghaus1979" else saturation_kelman(x)


def po2_from_saturation(s, ph=7.40, pco2=40.0, temperature=37.0):
    """PO2 at which blood of the given conditions has saturation ``s`` [mmHg].

    Exact inverse of :func:`saturation` (Ellis 1989 on the virtual PO2).
    """
    return po2_from_saturation_ellis(s) / virtual_po2_factor_kelman(ph, pco2, temperature)


def p50(ph=7.40, pco2=40.0, temperature=37.0):
    """In-vivo P50, the PO2 at 50 % saturation [mmHg]."""
    return po2_from_saturation(0.5, ph, pco2, temperature)


def p50_dash(ph=7.40, pco2=40.0, dpg_mmol_l=4.65, temperature=37.0):
    """P50 from the Dash 2016 component model, Eqs. 9a-d and 10 [mmHg].

    An alternative to :func:`p50` for comparison only: the engine does not combine
    it with Kelman's factor (that would count the CO2 Bohr effect twice).

    Parameters
    ----------
    ph : float or array  Plasma pH [pH units]; red-cell pH = 0.795 pH + 1.357
    pco2 : float or array  [mmHg]
    dpg_mmol_l : float or array  Red-cell 2,3-DPG [mmol/L]
    temperature : float or array  [degC]
    """
    ph = check_range("pH", ph, 6.3, 8.0)
    pco2 = check_positive("PCO2", pco2, "mmHg")
    t = check_range("temperature", temperature, 20.0, 45.0, "degC")
    dph = (0.795 * ph + 1.357) - (0.795 * 7.40 + 1.357)
    dco2 = pco2 - 40.0
    ddpg = (np.asarray(dpg_mmol_l, dtype=float) - 4.65) * 1e-3
    dt = t - 37.0
    p_ph = 26.8 - 25.535 * dph + 10.646 * dph ** 2 - 1.764 * dph ** 3
    p_co2 = 26.8 + 0.1273 * dco2 + 1.083e-4 * dco2 ** 2
    p_dpg = 26.8 + 795.63 * ddpg - 19660.89 * ddpg ** 2
    p_t = 26.8 + 1.435 * dt + 4.163e-2 * dt ** 2 + 6.86e-4 * dt ** 3
    return 26.8 * (p_ph / 26.8) * (p_co2 / 26.8) * (p_dpg / 26.8) * (p_t / 26.8)


def bohr_coefficient_severinghaus(po2):
    """PO2-dependent Bohr coefficient d ln PO2 / d pH, Severinghaus 1979 Eq. 4 [1/pH].

    ``(PO2 / 26.6)^0.184 - 2.2``.
    """
    p = check_positive("PO2", po2, "mmHg")
    return (p / 26.6) ** 0.184 - 2.2


def _eq3_coefficient(p):
    # [1], Eq. 3: d ln PO2 / dT [1/degC]
    return 0.058 / ((0.243 * p / 100.0) ** 3.88 + 1.0) + 0.013


def po2_temperature_correction_severinghaus(po2_37, temperature, steps: int = 64):
    """PO2 of a sealed sample measured at 37 degC, corrected to ``temperature``.

    Integrates Severinghaus 1979 Eq. 3, ``d ln PO2 / dT = 0.058 / ((0.243 PO2/100)^3.88 + 1) + 0.013``,
    from 37 degC to the patient's temperature (fourth-order Runge-Kutta, since the
    coefficient itself depends on PO2). This is what blood-gas analysers do; it is
    not the shift of the dissociation curve used by :func:`saturation`.

    Parameters
    ----------
    po2_37 : float or array
        PO2 measured at 37 degC [mmHg].
    temperature : float or array
        Patient temperature [degC].
    steps : int
        Integration steps [unitless].

    Returns
    -------
    float or array
        PO2 at the patient's temperature [mmHg].
    """
    p = check_positive("PO2", po2_37, "mmHg")
    t = check_range("temperature", temperature, 20.0, 45.0, "degC")
    h = (t - 37.0) / steps
    lnp = np.log(p)
    for _ in range(steps):
        k1 = _eq3_coefficient(np.exp(lnp))
        k2 = _eq3_coefficient(np.exp(lnp + 0.5 * h * k1))
        k3 = _eq3_coefficient(np.exp(lnp + 0.5 * h * k2))
        k4 = _eq3_coefficient(np.exp(lnp + h * k3))
        lnp = lnp + h * (k1 + 2 * k2 + 2 * k3 + k4) / 6.0
    return np.exp(lnp)


def o2_content(po2, so2, hb, hufner=HUFNER_DEFAULT, solubility=O2_SOLUBILITY):
    """Whole-blood O2 content [mL O2 / dL blood].

    ``CxO2 = hufner * Hb * SxO2 + solubility * PxO2``.

    Parameters
    ----------
    po2 : float or array
        O2 partial pressure [mmHg].
    so2 : float or array
        Saturation [fraction].
    hb : float or array
        Haemoglobin [g/dL].
    hufner : float
        O2 bound per gram of Hb [mL/g]; 1.34 clinical default, 1.368 measured [5].
    solubility : float
        Dissolved O2 [mL/dL/mmHg].
    """
    p = check_positive("PO2", po2, "mmHg", allow_zero=True)
    s = check_fraction("SO2", so2)
    h = check_positive("Hb", hb, "g/dL", allow_zero=True)
    return hufner * h * s + solubility * p

