"""Single-compartment equation of motion, intrinsic PEEP, mean airway pressure and mechanical power.

Units: pressures [cmH2O], volumes [L] unless the name says mL, resistance
[cmH2O/L/s], compliance [L/cmH2O], times [s], rates [1/min].

References
----------
[1] Equation of motion ``Paw = V/Crs + Rrs dV/dt + PEEPtot`` (common practice).
[2] Pepe PE, Marini JJ. Occult positive end-expiratory pressure in mechanically
    ventilated patients with airflow obstruction. Am Rev Respir Dis
    1982;126:166-170 (intrinsic PEEP; from memory). Trapped volume of a passive
    single compartment: ``Vtrap = VT e^(-Te/tau) / (1 - e^(-Te/tau))``.
[3] Gattinoni L, Tonetti T, Cressoni M, et al. Ventilator-related causes of lung
    injury: the mechanical power. Intensive Care Med 2016;42:1567-1575.
[4] Becher T, van der Staay M, Schadler D, Frerichs I, Weiler N. Calculation of
    mechanical power for pressure-controlled ventilation. Intensive Care Med
    2019;45:1321-1323.
[5] Giosa L, Busana M, Pasticci I, et al. Mechanical power at a glance: a simple
    surrogate for volume-controlled ventilation. Intensive Care Med Exp 2019;7:61.
"""

from __future__ import annotations

import numpy as np

from .._checks import check_positive

__all__ = [
    "CMH2O_PER_MMHG", "J_PER_L_CMH2O", "time_constant", "trapped_volume_volume_control",
    "pressure_control_volumes", "intrinsic_peep", "mean_airway_pressure",
    "mechanical_power_gattinoni", "mechanical_power_simplified", "mechanical_power_pressure_control",
    "mechanical_power_giosa",
]

#: 1 mmHg in cmH2O.
CMH2O_PER_MMHG = 1.35951
#: 1 L x 1 cmH2O in joules (0.098 J).
J_PER_L_CMH2O = 0.098


def time_constant(resistance, compliance):
    """Expiratory time constant ``tau = Rrs Crs`` [s].

    Parameters
    ----------
    resistance : float or array  [cmH2O/L/s]
    compliance : float or array  [L/cmH2O]
    """
    return check_positive("resistance", resistance, "cmH2O/L/s") * check_positive("compliance", compliance, "L/cmH2O")


def trapped_volume_volume_control(vt, tau, te):
    """Volume above relaxation at end-expiration in passive volume control [L]: ``VT b / (1 - b)``, ``b = e^(-Te/tau)`` [2].

    Parameters
    ----------
    vt : float or array  Tidal volume [L]
    tau : float or array  Time constant [s]
    te : float or array  Expiratory time [s]
    """
    b = np.exp(-check_positive("expiratory time", te, "s") / check_positive("time constant", tau, "s"))
    return check_positive("VT", vt, "L") * b / (1.0 - b)


def pressure_control_volumes(delta_p, compliance, tau, ti, te):
    """Steady breathing under a square pressure wave: (VT, trapped volume) [L].

    Inspiration fills toward ``C dP``, expiration empties toward relaxation; in the
    periodic state ``Vee = C dP (1 - a) b / (1 - a b)`` with ``a = e^(-Ti/tau)``,
    ``b = e^(-Te/tau)``, and ``VT = Vee (1/b - 1)``. Intrinsic PEEP (Vee/C) so lowers
    the delivered VT, and a short Ti (below ~3 tau) cuts it further.

    Parameters
    ----------
    delta_p : float or array  Inspiratory pressure above PEEP [cmH2O]
    compliance : float or array  [L/cmH2O]
    tau : float or array  [s]
    ti, te : float or array  Inspiratory and expiratory times [s]
    """
    a = np.exp(-np.asarray(ti, dtype=float) / tau)
    b = np.exp(-np.asarray(te, dtype=float) / tau)
    full = np.asarray(compliance, dtype=float) * np.asarray(delta_p, dtype=float)
    v_ee = full * (1.0 - a) * b / (1.0 - a * b)
    v_ei = full * (1.0 - a) / (1.0 - a * b)
    return v_ei - v_ee, v_ee


def intrinsic_peep(vt, resistance, compliance, te):
    """Intrinsic PEEP of passive volume control [cmH2O]: trapped volume / Crs.

    Check (digest 5.1): R 15 cmH2O/L/s, C 0.05 L/cmH2O, VT 0.5 L, Te 1.2 s -> 2.53 cmH2O.

    Parameters
    ----------
    vt : float or array  [L]
    resistance : float or array  [cmH2O/L/s]
    compliance : float or array  [L/cmH2O]
    te : float or array  [s]
    """
    tau = time_constant(resistance, compliance)
    return trapped_volume_volume_control(vt, tau, te) / compliance


def mean_airway_pressure(mode, ppeak, peep, ti, rr):
    """Mean airway pressure [cmH2O].

    Pressure control (square wave): ``(PIP - PEEP) Ti/Ttot + PEEP``; volume control
    with constant flow (triangular wave): ``0.5 (PIP - PEEP) Ti/Ttot + PEEP``
    (common practice). Check: PIP 25, PEEP 10, Ti 1 s, RR 20 -> 15.0 / 12.5.

    Parameters
    ----------
    mode : str  ``"pressure"`` or ``"volume"``
    ppeak : float or array  [cmH2O]
    peep : float or array  [cmH2O]
    ti : float or array  [s]
    rr : float or array  [1/min]
    """
    if mode not in ("pressure", "volume"):
        raise ValueError(f"mode = {mode!r} is not accepted: use 'volume' or 'pressure'")
    duty = np.asarray(ti, dtype=float) * np.asarray(rr, dtype=float) / 60.0
    shape = 1.0 if mode == "pressure" else 0.5
    return shape * (np.asarray(ppeak) - np.asarray(peep)) * duty + np.asarray(peep)


def mechanical_power_gattinoni(rr, vt, elastance, resistance, ie_ratio, peep):
    """Mechanical power, Gattinoni 2016 full equation [J/min] [3].

    ``MP = 0.098 RR {VT^2 [EL/2 + RR (1 + I:E) / (60 I:E) Raw] + VT PEEP}``.

    Parameters
    ----------
    rr : float or array  [1/min]
    vt : float or array  [L]
    elastance : float or array  [cmH2O/L]
    resistance : float or array  [cmH2O/L/s]
    ie_ratio : float or array  Ti/Te [unitless]
    peep : float or array  [cmH2O]
    """
    rr, vt, ie = np.asarray(rr, float), np.asarray(vt, float), np.asarray(ie_ratio, float)
    return J_PER_L_CMH2O * rr * (vt ** 2 * (0.5 * np.asarray(elastance) + rr * (1 + ie) / (60 * ie)
                                            * np.asarray(resistance)) + vt * np.asarray(peep))


def mechanical_power_simplified(rr, vt, ppeak, pplat, peep):
    """Mechanical power, simplified volume-control form [J/min]: ``0.098 RR VT (Ppeak - dP/2)`` [3].

    Parameters
    ----------
    rr : float or array  [1/min]
    vt : float or array  [L]
    ppeak, pplat, peep : float or array  [cmH2O]
    """
    dp = np.asarray(pplat) - np.asarray(peep)
    return J_PER_L_CMH2O * np.asarray(rr) * np.asarray(vt) * (np.asarray(ppeak) - 0.5 * dp)


def mechanical_power_pressure_control(rr, vt, delta_pinsp, peep, compliance, resistance, t_slope=0.0):
    """Mechanical power in pressure control, Becher 2019 [J/min] [4].

    ``MP = 0.098 RR [(dPinsp + PEEP) VT - dPinsp^2 C (0.5 - RC/Ts + (RC/Ts)^2 (1 - e^(-Ts/RC)))]``.

    With no pressure ramp (``t_slope`` 0, a square wave) the bracket tends to 0 (as Ts -> 0,
    ``(RC/Ts)^2 (1 - e^(-Ts/RC)) = RC/Ts - 1/2 + Ts/(6 RC) + ...``), leaving Becher's simplified
    form ``0.098 RR VT (dPinsp + PEEP)``: the airway pressure is PEEP + dPinsp throughout the
    inflation, so the energy of a breath is that pressure times the volume delivered, whether or
    not the lung fills within Ti. With a slow ramp (Ts >> RC) the bracket tends to 1/2. The result
    is never negative for a lung that fills no further than ``C dPinsp``; a negative value (only
    possible with a ramp and a ``compliance`` larger than the delivered volume implies) is refused
    as NaN rather than shown.

    Parameters
    ----------
    rr : float or array  [1/min]
    vt : float or array  [L]
    delta_pinsp : float or array  [cmH2O]
    peep : float or array  [cmH2O]
    compliance : float or array  [L/cmH2O]
    resistance : float or array  [cmH2O/L/s]
    t_slope : float  Pressure rise time [s]
    """
    dp = np.asarray(delta_pinsp, float)
    c = np.asarray(compliance, float)
    if t_slope <= 0:
        bracket = 0.0
    else:
        k = np.asarray(resistance) * c / t_slope
        bracket = 0.5 - k + k ** 2 * (1 - np.exp(-1.0 / k))
    power = J_PER_L_CMH2O * np.asarray(rr) * ((dp + np.asarray(peep)) * np.asarray(vt) - dp ** 2 * c * bracket)
    return np.where(power >= 0, power, np.nan)


def mechanical_power_giosa(ve_l_min, ppeak, peep, flow_l_min):
    """Surrogate mechanical power, Giosa 2019 [J/min]: ``VE (Ppeak + PEEP + F/6) / 20`` [5]."""
    return np.asarray(ve_l_min) * (np.asarray(ppeak) + np.asarray(peep) + np.asarray(flow_l_min) / 6.0) / 20.0
