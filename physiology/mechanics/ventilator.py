"""Ventilator settings and the respiratory system's response to them (batched).

:class:`Settings` holds what the clinician sets; :class:`Mechanics` the patient's
mechanical parameters; :func:`breathe` solves the steady breathing pattern:
delivered VT (pressure control), intrinsic PEEP and trapped volume, Pplat, Ppeak,
driving pressure, mean airway pressure, mechanical power, the open and aerated
lung fractions, overdistension, the recruitment-dependent shunt, and minute and
alveolar ventilation for the gas-exchange engine.

The nonlinear loop (compliance depends on recruitment and on the plateau, the
plateau on compliance, intrinsic PEEP on the time constant) is closed by
a Newton iteration, compiled and case by case (:mod:`._breath`); a case that does not
settle, or whose tidal volume would not fit into the lung, fails with a reason.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields

import numpy as np

from .._checks import check_fio2, check_range
from .motion import (mean_airway_pressure, mechanical_power_gattinoni, mechanical_power_pressure_control,
                     mechanical_power_simplified)
from .recruitment import aerated_volume

__all__ = ["Settings", "Mechanics", "Breathing", "breathe", "SETTING_LIMITS"]

#: Accepted settings: (low, high, unit). VT is also checked against 2-20 mL/kg PBW.
SETTING_LIMITS = {
    "fio2": (0.21, 1.0, ""),
    "peep": (0.0, 30.0, "cmH2O"),
    "vt_ml": (100.0, 2000.0, "mL"),
    "inspiratory_pressure": (1.0, 50.0, "cmH2O"),
    "rr": (1.0, 60.0, "/min"),
    "ti": (0.2, 5.0, "s"),
    "apparatus_dead_space_ml": (0.0, 300.0, "mL"),
    "pause": (0.0, 2.0, "s"),
}
VT_PER_KG_LIMITS = (2.0, 20.0)
#: Iteration limit of the breathing loop (the forecast's, and the fit's compiled forward model's).
BREATH_MAX_ITER = 60


@dataclass(frozen=True)
class Settings:
    """Ventilator settings; numeric fields are scalars or arrays of shape (B,).

    Attributes
    ----------
    mode : ``"volume"`` (constant flow) or ``"pressure"`` (square pressure wave)
    fio2 : [fraction 0.21-1.0]
    peep : set PEEP [cmH2O]
    vt_ml : tidal volume, volume control [mL]
    inspiratory_pressure : pressure above PEEP, pressure control [cmH2O]
    rr : rate [1/min], above 0 and at most 60
    ti : inspiratory time [s], shorter than the breath
    apparatus_dead_space_ml : circuit dead space beyond the Y-piece [mL]
    pause : end-inspiratory pause within Ti, volume control [s]
    """

    mode: str = "volume"
    fio2: object = 0.5
    peep: object = 5.0
    vt_ml: object = None
    inspiratory_pressure: object = None
    rr: object = 16.0
    ti: object = 1.0
    apparatus_dead_space_ml: object = 0.0
    pause: object = 0.0

    def validated(self, pbw_kg=None) -> dict:
        """Arrays of the numeric settings after range checks (messages name setting, value, range)."""
        if self.mode not in ("volume", "pressure"):
            raise ValueError(f"mode = {self.mode!r} is not accepted: use 'volume' or 'pressure'")
        out = {"fio2": check_fio2(self.fio2)}
        for name in ("peep", "rr", "ti", "apparatus_dead_space_ml", "pause"):
            lo, hi, unit = SETTING_LIMITS[name]
            out[name] = check_range(_LABEL[name], getattr(self, name), lo, hi, unit)
        if self.mode == "volume":
            if self.vt_ml is None:
                raise ValueError("VT is required in volume control")
            vt = check_range("VT", self.vt_ml, *SETTING_LIMITS["vt_ml"])
            if pbw_kg is not None:
                lo, hi = VT_PER_KG_LIMITS
                per_kg = vt / pbw_kg
                bad = (per_kg < lo) | (per_kg > hi)
                if np.any(bad):
                    v = float(np.asarray(vt)[bad].ravel()[0]) if np.ndim(vt) else float(vt)
                    raise ValueError(f"VT = {v:g} mL ({v / float(np.mean(pbw_kg)):.1f} mL/kg PBW) is outside the "
                                     f"accepted range {lo:g} to {hi:g} mL/kg PBW "
                                     f"({lo * float(np.mean(pbw_kg)):.0f} to {hi * float(np.mean(pbw_kg)):.0f} mL)")
            out["vt_ml"] = vt
        else:
            if self.inspiratory_pressure is None:
                raise ValueError("inspiratory pressure is required in pressure control")
            out["inspiratory_pressure"] = check_range("inspiratory pressure", self.inspiratory_pressure,
                                                      *SETTING_LIMITS["inspiratory_pressure"])
        breath = 60.0 / out["rr"]
        bad = out["ti"] >= breath
        if np.any(bad):
            ti = float(np.broadcast_to(out["ti"], bad.shape)[bad].ravel()[0]) if np.ndim(bad) else float(out["ti"])
            b = float(np.broadcast_to(breath, bad.shape)[bad].ravel()[0]) if np.ndim(bad) else float(breath)
            raise ValueError(f"Ti = {ti:g} s leaves no time to breathe out (breath {b:.2f} s at this RR); "
                             f"accepted range 0.2 to below {b:.2f} s")
        bad = out["pause"] >= out["ti"]
        if np.any(bad):
            raise ValueError("pause must be shorter than Ti")
        return out


_LABEL = {"peep": "PEEP", "rr": "RR", "ti": "Ti", "apparatus_dead_space_ml": "apparatus dead space",
          "pause": "pause"}


@dataclass(frozen=True)
class Mechanics:
    """Patient mechanics; scalars or arrays of shape (B,).

    Attributes
    ----------
    resistance : inspiratory/expiratory resistance incl. tube [cmH2O/L/s]
    c_max : compliance of the fully aerated lung below its inflection [mL/cmH2O]
    inflection : pressure where the aerated lung starts to stiffen [cmH2O]
    width : width of the stiffening (upper corner at inflection + 2 width) [cmH2O]
    recruitable : fraction of the lung that is recruitable (collapses and reopens) [fraction]
    mu_open, sd_open : opening-pressure distribution [cmH2O] (Crotti 2001)
    mu_close, sd_close : closing-pressure distribution [cmH2O] (Crotti 2001)
    pressure_history : highest recent airway pressure, e.g. a recruitment manoeuvre [cmH2O];
        0 means "the current plateau"
    anatomic_dead_space_ml : series dead space below the Y-piece incl. tube [mL]
    flow_limitation : expiratory flow limitation [fraction 0-1]: 0, external PEEP adds to the trapped
        volume; 1, the "waterfall" of flow-limited lungs (see :func:`waterfall_total_peep`)
    """

    resistance: object = 10.0
    c_max: object = 50.0
    inflection: object = 26.0
    width: object = 6.0
    recruitable: object = 0.0
    mu_open: object = 20.0
    sd_open: object = 5.0
    mu_close: object = 5.0
    sd_close: object = 3.0
    pressure_history: object = 0.0
    anatomic_dead_space_ml: object = 80.0
    flow_limitation: object = 0.0


#: Waterfall of flow-limited lungs: external PEEP below about 80-85 % of intrinsic PEEP does not raise
#: total PEEP or end-expiratory lung volume; above it, total PEEP follows external PEEP (Tobin MJ,
#: Lodato RF. PEEP, auto-PEEP, and waterfalls. Chest 1989;96:449-451; Ranieri VM et al. Am Rev Respir
#: Dis 1993;147:5-13: critical external PEEP ~85 % of intrinsic PEEP; both from memory).
WATERFALL_CRITICAL_SHARE = 0.8
#: Smoothing width of the waterfall's corner [cmH2O] (ours: a smooth corner keeps Newton quadratic).
WATERFALL_CORNER_CMH2O = 1.0


def waterfall_total_peep(peep, intrinsic_at_zeep, flow_limitation=1.0):
    """Total PEEP [cmH2O] from set PEEP and the intrinsic PEEP the lung would have at zero PEEP.

    Flow-limited (``flow_limitation`` 1): total = PEEPi0 + w softplus((PEEP - 0.8 PEEPi0) / w), i.e.
    PEEPi0 while external PEEP stays below 80 % of it, then rising one-for-one. Not flow-limited (0):
    PEEP + PEEPi0 (the pressures add). Values in between blend the two.
    """
    w = WATERFALL_CORNER_CMH2O
    # An infinite intrinsic PEEP (trapped volume beyond capacity; that case fails) stays infinite, quietly.
    with np.errstate(invalid="ignore", over="ignore"):
        x = (np.asarray(peep, dtype=float) - WATERFALL_CRITICAL_SHARE * intrinsic_at_zeep) / w
        limited = intrinsic_at_zeep + w * np.logaddexp(0.0, x)
        additive = peep + intrinsic_at_zeep
        blend = (1.0 - flow_limitation) * additive + flow_limitation * limited
    return np.where(np.asarray(flow_limitation) >= 1.0, limited,
                    np.where(np.asarray(flow_limitation) <= 0.0, additive, blend))


#: Reasons a breath fails because of the settings themselves (callers compare against these).
BEYOND_CAPACITY = "the tidal volume does not fit into the aerated lung at this PEEP (beyond total capacity)"
NO_ALVEOLAR_VENTILATION = "the tidal volume does not exceed the series dead space: no alveolar ventilation"


_MECH_LIMITS = {
    "resistance": (2.0, 60.0, "cmH2O/L/s"), "c_max": (5.0, 200.0, "mL/cmH2O"), "inflection": (8.0, 45.0, "cmH2O"),
    "width": (1.0, 20.0, "cmH2O"), "recruitable": (0.0, 0.7, ""), "mu_open": (5.0, 45.0, "cmH2O"),
    "sd_open": (0.5, 20.0, "cmH2O"), "mu_close": (-5.0, 30.0, "cmH2O"), "sd_close": (0.5, 20.0, "cmH2O"),
    "pressure_history": (0.0, 70.0, "cmH2O"), "anatomic_dead_space_ml": (10.0, 400.0, "mL"),
    "flow_limitation": (0.0, 1.0, ""),
}


@dataclass(frozen=True)
class Breathing:
    """Result of :func:`breathe`; arrays of the batch shape (units in brackets).

    success, message, reasons; vt_ml [mL]; pplat, ppeak, peep_total, intrinsic_peep, driving_pressure,
    mean_paw [cmH2O]; trapped_volume_ml [mL]; compliance [mL/cmH2O] (chord, VT / driving pressure);
    tau [s]; mechanical_power [J/min] (Gattinoni full form in volume control, Becher in pressure
    control); mechanical_power_simplified [J/min]; inspiratory_filling
    [fraction] (pressure control: share of the equilibrium volume delivered within Ti; 1 in volume
    control); open_fraction, open_fraction_end_expiration,
    aerated_fraction, overdistended_fraction [fraction]; minute_ventilation, alveolar_ventilation,
    series_ventilation [L/min]; series_dead_space_ml [mL]; flow [L/s]; ie_ratio [unitless];
    end_expiratory_volume_ml : aerated volume above relaxation at end-expiration (PEEP + trapped) [mL].
    """

    success: np.ndarray
    message: str
    reasons: np.ndarray
    vt_ml: np.ndarray
    pplat: np.ndarray
    ppeak: np.ndarray
    peep_total: np.ndarray
    intrinsic_peep: np.ndarray
    driving_pressure: np.ndarray
    mean_paw: np.ndarray
    trapped_volume_ml: np.ndarray
    compliance: np.ndarray
    tau: np.ndarray
    mechanical_power: np.ndarray
    mechanical_power_simplified: np.ndarray
    inspiratory_filling: np.ndarray
    open_fraction: np.ndarray
    open_fraction_end_expiration: np.ndarray
    aerated_fraction: np.ndarray
    overdistended_fraction: np.ndarray
    minute_ventilation: np.ndarray
    alveolar_ventilation: np.ndarray
    series_ventilation: np.ndarray
    series_dead_space_ml: np.ndarray
    flow: np.ndarray
    ie_ratio: np.ndarray
    end_expiratory_volume_ml: np.ndarray
    settings: Settings = field(repr=False)
    mechanics: Mechanics = field(repr=False)


def breathe(settings: Settings, mechanics: Mechanics, pbw_kg=None, max_iter: int = BREATH_MAX_ITER,
            tol: float = 1e-10) -> Breathing:
    """Steady breathing pattern for the settings and patient mechanics (batched).

    Parameters
    ----------
    settings : Settings
    mechanics : Mechanics
    pbw_kg : float or array, optional
        Predicted body weight [kg], for the 2-20 mL/kg PBW check of VT.
    max_iter : int
        Newton iteration limit for the recruitment/compliance loop.
    tol : float
        Convergence tolerance on the open fraction [fraction] (and 1e-3 of it on the chord
        compliance [L/cmH2O]).
    """
    s = settings.validated(pbw_kg)
    m = {f.name: check_range(f.name, getattr(mechanics, f.name), *_MECH_LIMITS[f.name]) for f in fields(mechanics)}
    arrays = list(s.values()) + list(m.values())
    shape = np.broadcast_shapes(*[np.shape(v) for v in arrays])
    if len(shape) > 1:
        raise ValueError(f"settings and mechanics must be scalars or 1-D arrays, got shape {shape}")
    n = shape[0] if shape else 1
    b = {k: (v if type(v) is np.ndarray and v.shape == (n,) and v.dtype == np.float64 else
             np.broadcast_to(v, (n,)).astype(float)) for k, v in {**s, **m}.items()}  # read only below

    ttot = 60.0 / b["rr"]
    ti, te = b["ti"], ttot - b["ti"]
    duty = ti / ttot
    r = b["resistance"]
    cmax = b["c_max"] / 1000.0  # L/cmH2O
    infl, width, peep = b["inflection"], b["width"], b["peep"]
    lr = b["recruitable"]
    volume_mode = settings.mode == "volume"

    def volume(p, aer):
        return aer * aerated_volume(p, cmax, infl, width)

    # The loop (open fraction and chord compliance set the breath, the breath sets them): compiled, case by
    # case (physiology/mechanics/_breath.py, where its equations and the Newton iteration are described).
    from ._breath import settle  # numba: imported at the first breath, not with the engine

    zeros = np.zeros(n)
    case = np.stack([b["vt_ml"] / 1000.0 if volume_mode else zeros,
                     zeros if volume_mode else b["inspiratory_pressure"],
                     peep, ti, te, duty, r, cmax, infl, width, lr, b["pressure_history"], b["mu_open"],
                     b["sd_open"], b["mu_close"], b["sd_close"], b["flow_limitation"]], axis=1)
    loop = np.empty((n, 8))
    settle(volume_mode, case, float(tol), int(max_iter), loop)
    f_ee, aer, vt, trapped, peep_tot, pplat, f_eff = (loop[:, k] for k in range(7))
    converged = loop[:, 7] == 1.0

    reasons = np.full(n, "", dtype=object)
    reasons[~converged] = "the mechanics did not settle within the iteration limit"
    too_big = ~np.isfinite(pplat)
    reasons[too_big] = BEYOND_CAPACITY
    # Arrays may hold inf/NaN for failed cases; they are masked below.
    err = np.seterr(invalid="ignore", divide="ignore", over="ignore")
    driving = pplat - peep_tot
    compliance_ml = 1000.0 * vt / driving
    tau = r * vt / driving
    vt_ml = 1000.0 * vt
    if volume_mode:
        flow = vt / (ti - b["pause"])
        ppeak = pplat + r * flow
    else:
        flow = vt / ti
        ppeak = peep + b["inspiratory_pressure"]
    mean_paw = mean_airway_pressure(settings.mode, ppeak, peep, ti, b["rr"])
    ie = ti / te
    if volume_mode:
        power = mechanical_power_gattinoni(b["rr"], vt, driving / vt, r, ie, peep)
    else:
        power = mechanical_power_pressure_control(b["rr"], vt, b["inspiratory_pressure"], peep, vt / driving, r)
    power_simple = mechanical_power_simplified(b["rr"], vt, ppeak, pplat, peep)
    # Pressure control: the share of the equilibrium volume delivered by the end of Ti (square wave,
    # single compartment: 1 - exp(-Ti/tau)); below ~0.95 flow has not stopped and a longer Ti adds VT.
    filling = np.ones(n) if volume_mode else 1.0 - np.exp(-ti / tau)
    over = np.clip(2.0 / (1.0 + np.exp(-(pplat - infl) / width)) - 1.0, 0.0, 1.0)
    vds_ml = b["anatomic_dead_space_ml"] + b["apparatus_dead_space_ml"]
    ve = b["rr"] * vt
    series = b["rr"] * vds_ml / 1000.0
    va = ve - series
    no_alveolar = converged & ~too_big & (va <= 0.05)
    reasons[no_alveolar] = NO_ALVEOLAR_VENTILATION
    ok = (reasons == "")
    nan = np.where(ok, 1.0, np.nan)
    np.seterr(**err)

    def out(x):
        x = np.asarray(x, dtype=float) * nan
        return x.reshape(shape) if shape else x[0]

    n_fail = int((~ok).sum())
    message = "settled" if n_fail == 0 else (str(reasons[~ok][0]) if n == 1 else
                                             f"{n_fail} of {n} cases failed: " + "; ".join(sorted(set(reasons[~ok]))))
    return Breathing(
        success=ok.reshape(shape) if shape else np.bool_(ok[0]), message=message,
        reasons=reasons.reshape(shape) if shape else reasons[0],
        vt_ml=out(vt_ml), pplat=out(pplat), ppeak=out(ppeak), peep_total=out(peep_tot),
        intrinsic_peep=out(peep_tot - peep), driving_pressure=out(driving), mean_paw=out(mean_paw),
        trapped_volume_ml=out(1000.0 * trapped), compliance=out(compliance_ml), tau=out(tau),
        mechanical_power=out(power), mechanical_power_simplified=out(power_simple),
        inspiratory_filling=out(filling),
        open_fraction=out(f_eff), open_fraction_end_expiration=out(f_ee), aerated_fraction=out(aer),
        overdistended_fraction=out(over), minute_ventilation=out(ve), alveolar_ventilation=out(va),
        series_ventilation=out(series), series_dead_space_ml=out(vds_ml), flow=out(flow), ie_ratio=out(ie),
        end_expiratory_volume_ml=out(1000.0 * volume(peep_tot, aer)),
        settings=settings, mechanics=mechanics,
    )
