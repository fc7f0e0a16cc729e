"""Recruitment with PEEP, the aerated lung's pressure-volume curve, and PEEP's effect on cardiac output.

The model, built from published pieces (the combination is ours and documented here):

* **Opening and closing pressures** of the recruitable lung are normally
  distributed (Crotti 2001: modes ~20 and ~5 cmH2O) with patient-specific
  spreads. A recruitable unit is open at end-expiration when it has been opened
  (its opening pressure reached by the plateau or by a recent higher pressure,
  e.g. a recruitment manoeuvre) and the end-expiratory pressure stays above its
  closing pressure: ``f_ee = Phi((Pmax - mu_o)/sd_o) Phi((PEEPtot - mu_c)/sd_c)``
  (hysteresis: units opened at a high pressure stay open above their closing
  pressure). Units opened each breath but closing at end-expiration (tidal
  recruitment) count as open for the inspiratory fraction of the breath.
* **Collapsed recruitable lung is shunt**: ``shunt = shunt_fixed + shunt_recruitable (1 - f)``.
* **Aerated lung's elastic curve** has the Venegas (1998) sigmoid shape above its
  inflection ``c`` (stiffening towards the upper corner ``c + 2d``: overdistension)
  and is linear below it with the sigmoid's maximum compliance — the lower bend of
  Venegas' curve is recruitment, which the first point carries explicitly. The
  whole curve scales with the aerated fraction of the lung.
* **Overdistension** (plateau beyond the inflection) adds unperfused, ventilated
  lung: alveolar dead space grows with the overdistended fraction.
* **Venous return** (Guyton): ``VR = (Pmsf - Pra) / Rvr``; a fraction of the rise
  in mean airway pressure is transmitted to the right atrium, so cardiac output
  falls by ``transmission x 0.7356 x dPmean / (Pmsf - Pra)`` relative to a
  reference state. ``preload_dependence`` scales the transmission (0: PEEP does not
  reduce output; 1: typical; 2: hypovolaemic).

References
----------
[1] Crotti S, Mascheroni D, Caironi P, et al. Recruitment and derecruitment during
    acute respiratory failure: a clinical study. Am J Respir Crit Care Med 2001;164:131-140.
[2] Venegas JG, Harris RS, Simon BA. A comprehensive equation for the pulmonary
    pressure-volume curve. J Appl Physiol 1998;84:389-395.
[3] Guyton AC. Determination of cardiac output by equating venous return curves with
    cardiac response curves. Physiol Rev 1955;35:123-129 (from memory); Luecke T,
    Pelosi P. Clinical review: positive end-expiratory pressure and cardiac output.
    Crit Care 2005;9:607-621.
[4] Maas JJ, Geerts BF, van den Berg PC, et al. Assessment of venous return curve and
    mean systemic filling pressure in postoperative cardiac surgery patients. Crit Care
    Med 2009;37:912-918 (Pmsf 18-33 mmHg; from memory).
"""

from __future__ import annotations

import numpy as np
from scipy.special import ndtr

from .._checks import check_positive

__all__ = ["venegas_volume", "venegas_compliance", "aerated_volume", "aerated_pressure",
           "open_fraction", "cardiac_output_with_paw", "MMHG_PER_CMH2O"]

MMHG_PER_CMH2O = 0.73556


def venegas_volume(p, a, b, c, d):
    """Venegas 1998 sigmoid ``V = a + b / (1 + exp(-(P - c)/d))`` [mL].

    Parameters
    ----------
    p : float or array  Pressure [cmH2O]
    a : float  Lower asymptote [mL]
    b : float  Upper minus lower asymptote [mL]
    c : float  Inflection pressure (maximum compliance) [cmH2O]
    d : float  Width [cmH2O]
    """
    return a + b / (1.0 + np.exp(-(np.asarray(p, dtype=float) - c) / d))


def venegas_compliance(p, b, c, d):
    """Slope of the Venegas curve ``b e^(-(P-c)/d) / (d (1 + e^(-(P-c)/d))^2)`` [mL/cmH2O]."""
    e = np.exp(-(np.asarray(p, dtype=float) - c) / d)
    return b * e / (d * (1.0 + e) ** 2)


def aerated_volume(p, c_max, inflection, width):
    """Volume of aerated lung above its relaxation volume at pressure ``p`` [L].

    Linear with compliance ``c_max`` up to ``inflection``, then the upper half of a
    Venegas sigmoid with the same slope there (``b = 4 d c_max``), tending to
    ``c_max (inflection + 2 width)``.

    Parameters
    ----------
    p : float or array  [cmH2O], >= 0
    c_max : float or array  Compliance of the (fully) aerated lung [L/cmH2O]
    inflection : float or array  [cmH2O]
    width : float or array  [cmH2O]
    """
    p = np.asarray(p, dtype=float)
    b = 4.0 * width * c_max
    upper = c_max * inflection + b * (1.0 / (1.0 + np.exp(-(p - inflection) / width)) - 0.5)
    return np.where(p <= inflection, c_max * p, upper)


def aerated_pressure(v, c_max, inflection, width):
    """Inverse of :func:`aerated_volume` [cmH2O]; ``inf`` where ``v`` is beyond the lung's capacity."""
    v = np.asarray(v, dtype=float)
    b = 4.0 * width * c_max
    knee = c_max * inflection
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = (v - knee) / b + 0.5  # sigmoid value in (0.5, 1)
        upper = inflection - width * np.log(1.0 / frac - 1.0)
    upper = np.where(frac >= 1.0, np.inf, upper)
    return np.where(v <= knee, v / c_max, upper)


def open_fraction(p_max, peep_total, ti_fraction, mu_open=20.0, sd_open=5.0, mu_close=5.0, sd_close=3.0):
    """Open fraction of the recruitable lung [fraction] (see module notes).

    Parameters
    ----------
    p_max : float or array  Highest recent airway pressure: plateau, or a recruitment manoeuvre [cmH2O]
    peep_total : float or array  End-expiratory alveolar pressure [cmH2O]
    ti_fraction : float or array  Ti / Ttot [fraction]
    mu_open, sd_open : float  Opening-pressure distribution [cmH2O] (Crotti 2001 mode ~20)
    mu_close, sd_close : float  Closing-pressure distribution [cmH2O] (Crotti 2001 mode ~5)

    Returns
    -------
    (effective, end_expiratory) : open fraction counting tidally recruited units for Ti/Ttot,
    and the end-expiratory open fraction [fraction].
    """
    opened = ndtr((np.asarray(p_max, dtype=float) - mu_open) / sd_open)
    kept = ndtr((np.asarray(peep_total, dtype=float) - mu_close) / sd_close)
    f_ee = opened * kept
    return f_ee + opened * (1.0 - kept) * np.asarray(ti_fraction), f_ee


def cardiac_output_with_paw(co_ref, mean_paw, mean_paw_ref, preload_dependence=1.0,
                            transmission=0.25, pmsf_minus_pra=12.0):
    """Cardiac output after mean airway pressure moves from ``mean_paw_ref`` [L/min].

    ``CO = CO_ref (1 - k transmission 0.7356 (Pmean - Pmean_ref) / (Pmsf - Pra))``, floored at
    20 % of the reference (the linear venous-return approximation is not used beyond that).

    Parameters
    ----------
    co_ref : float or array  Cardiac output at the reference state [L/min]
    mean_paw, mean_paw_ref : float or array  [cmH2O]
    preload_dependence : float or array  k [unitless]
    transmission : float  Fraction of mean airway pressure reaching the right atrium [fraction]
    pmsf_minus_pra : float  Venous-return driving pressure at the reference state [mmHg]
    """
    co_ref = check_positive("cardiac output", co_ref, "L/min")
    drop = (np.asarray(preload_dependence) * transmission * MMHG_PER_CMH2O
            * (np.asarray(mean_paw, dtype=float) - np.asarray(mean_paw_ref, dtype=float)) / pmsf_minus_pra)
    return co_ref * np.clip(1.0 - drop, 0.2, 2.0)
