"""Spontaneous breathing on pressure support or CPAP: patient effort in the equation of motion.

A single compartment (resistance R, compliance C) driven by the ventilator's pressure above PEEP and
by the patient's inspiratory muscle pressure Pmus(t):

    R dV/dt + V / C = Paw(t) - PEEP + Pmus(t)

V is the volume above the relaxation volume at set PEEP. Each breath is triggered at the onset of the
patient's effort (an ideal trigger); the ventilator then holds PEEP + pressure support until the
inspiratory flow has fallen to ``cycle_off_fraction`` of its peak (flow cycling), and PEEP after it.
CPAP is pressure support 0. Breaths repeat until they are periodic, so intrinsic PEEP (end-expiratory
V / C) follows from the expiratory time left by the patient's rate.

Effort is estimated from bedside measurements (:func:`effort_from_occlusion`: the expiratory occlusion
swing ΔPocc; :func:`effort_from_tidal_volume`: the measured VT at the current support and the fitted
mechanics), and at another support level the patient's answer is bounded by two cases
(:func:`support_bounds`): *effort unchanged* (the same Pmus and rate: VT and alveolar ventilation fall)
and *drive preserved* (the same alveolar ventilation, kept by the rate at the same effort per breath:
with less support, rapid shallow breathing, and more effort per minute).

Units: pressures [cmH2O], volumes [mL] where the name says so, else [L], flow [L/s], resistance
[cmH2O/L/s], compliance [mL/cmH2O] at the interface, times [s], rates [1/min].

References
----------
[1] Equation of motion of the respiratory system with muscle pressure (common practice).
[2] Fresnel E, Muir JF, Letellier C. Realistic human muscle pressure for driving a mechanical lung.
    EPJ Nonlinear Biomed Phys 2014;2:7 (Pmus as the charge and discharge of a capacitor: an
    exponential rise over neural inspiration, an exponential relaxation after it). The two time
    constants below are ours.
[3] Bertoni M, Telias I, Urner M, et al. A novel non-invasive method to detect excessively high
    respiratory effort and dynamic transpulmonary driving pressure during mechanical ventilation.
    Crit Care 2019;23:346: Pmus ~ -3/4 ΔPocc and ΔPL,dyn ~ (Ppeak - PEEP) - 2/3 ΔPocc (coefficients
    from memory); Pmus above 10 and ΔPL,dyn above 15 cmH2O are excessive (abstract).
[4] Yang KL, Tobin MJ. A prospective study of indexes predicting the outcome of trials of weaning from
    mechanical ventilation. N Engl J Med 1991;324:1445-1450: RSBI = f / VT above 105 breaths/min/L
    predicts failure.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .._checks import check_range
from .ventilator import Settings

__all__ = ["SupportedBreath", "ventilation_kept", "volume_stand_in", "NEURAL_DUTY",
            "pmus_waveform", "supported_breath", "effort_from_occlusion",
           "effort_from_tidal_volume", "support_bounds", "rsbi", "RSBI_FAILURE", "PMUS_EXCESSIVE",
           "DPL_DYN_EXCESSIVE", "CYCLE_OFF_DEFAULT"]

#: Rapid shallow breathing index above which a breathing trial is likely to fail [breaths/min/L] [4].
RSBI_FAILURE = 105.0
#: Excessive inspiratory muscle pressure [cmH2O] [3].
PMUS_EXCESSIVE = 10.0
#: Excessive dynamic transpulmonary driving pressure [cmH2O] [3].
DPL_DYN_EXCESSIVE = 15.0
#: Bertoni 2019 conversion factors from ΔPocc (from memory) [3].
PMUS_PER_DELTA_POCC = 0.75
DPL_PER_DELTA_POCC = 2.0 / 3.0
#: Share of a spontaneous breath spent in neural inspiration (Ti/Ttot about 0.35-0.4 in spontaneously
#: breathing patients; common practice). Sets the effort's timing and the inspiratory time of the
#: volume-controlled breath that stands in for a supported one in the lung model.
NEURAL_DUTY = 0.35
#: Flow-cycling criterion: share of peak inspiratory flow at which inspiration ends (a common default).
CYCLE_OFF_DEFAULT = 0.25
#: Pmus waveform time constants as shares of neural inspiration (rise) and of expiration (relaxation);
#: ours, within the family of [2].
RISE_SHARE = 0.5
RELAX_SHARE = 0.1
#: Longest pressure-supported inspiration before the ventilator ends it [s] (a common safety limit).
MAX_SUPPORTED_TI_S = 3.0
#: Integration step [s]; breaths simulated towards the periodic state: at most BREATHS, fewer once a breath
#: repeats the one before it within SETTLED_L [L] (VT and end-expiratory volume).
STEP_S = 0.01
BREATHS = 30
SETTLED_L = 1e-4
#: Breaths averaged where the breathing never became periodic.
AVERAGED = 10
#: Drive preserved beyond what the rate alone can keep: effort levels searched (the effort of now to 40
#: cmH2O), and every how many of the rate grid's 121 rates are tried at each.
EFFORT_LEVELS = 21
RATE_THINNING = 3

#: Accepted inputs of the breath model: (low, high, unit).
INPUT_LIMITS = {
    "pressure_support": (0.0, 40.0, "cmH2O"), "peep": (0.0, 30.0, "cmH2O"), "resistance": (2.0, 60.0, "cmH2O/L/s"),
    "compliance_ml": (5.0, 200.0, "mL/cmH2O"), "pmus": (0.0, 40.0, "cmH2O"), "rr": (4.0, 60.0, "/min"),
    "ti_neural": (0.3, 3.0, "s"), "cycle_off_fraction": (0.05, 0.8, ""),
}


@dataclass(frozen=True)
class SupportedBreath:
    """The periodic breath (arrays of the batch shape).

    vt_ml [mL]; peak_flow [L/s]; ti_s (mechanical inspiration, trigger to cycling) [s]; ppeak, peep_total,
    intrinsic_peep, mean_paw, pmus, dpl_dyn (VT / C: the lung's share of the chest-wall-free single
    compartment) [cmH2O]; ptp_per_min (pressure-time product of Pmus) [cmH2O s/min];
    minute_ventilation [L/min]; rsbi [breaths/min/L]; cycled (False where the inspiration ran to
    MAX_SUPPORTED_TI_S or the breath's end without meeting the flow criterion; for a breath that never
    repeated itself, whether most of its last breaths cycled); periodic (False where the breaths never settled
    to one repeating breath within BREATHS, e.g. alternating large and small breaths when the time constant
    nears the breath's length: every value is then the mean of the last AVERAGED breaths).
    """

    vt_ml: np.ndarray
    peak_flow: np.ndarray
    ti_s: np.ndarray
    ppeak: np.ndarray
    peep_total: np.ndarray
    intrinsic_peep: np.ndarray
    mean_paw: np.ndarray
    pmus: np.ndarray
    dpl_dyn: np.ndarray
    ptp_per_min: np.ndarray
    minute_ventilation: np.ndarray
    rsbi: np.ndarray
    cycled: np.ndarray
    periodic: np.ndarray


def pmus_waveform(t, pmus, ti_neural, t_total):
    """Inspiratory muscle pressure [cmH2O] at time ``t`` [s] from the onset of effort [2].

    Rise: ``Pmus (1 - e^(-t/tc)) / (1 - e^(-Tin/tc))`` up to neural inspiration ``Tin``, reaching the
    peak ``pmus`` there; relaxation: ``Pmus e^(-(t - Tin)/tr)``; ``tc = RISE_SHARE Tin``,
    ``tr = RELAX_SHARE (Ttot - Tin)``. ``t`` is taken modulo the breath ``t_total``.
    """
    t = np.mod(t, t_total)
    tc = RISE_SHARE * ti_neural
    tr = RELAX_SHARE * (t_total - ti_neural)
    rise = pmus * (1.0 - np.exp(-t / tc)) / (1.0 - np.exp(-ti_neural / tc))
    relax = pmus * np.exp(-np.maximum(t - ti_neural, 0.0) / tr)
    return np.where(t <= ti_neural, rise, relax)


#: The inputs' names in refusals.
_LABELS = {"pressure_support": "pressure support", "peep": "PEEP", "resistance": "resistance",
           "compliance_ml": "compliance", "pmus": "Pmus", "rr": "rate", "ti_neural": "neural inspiratory time",
           "cycle_off_fraction": "cycling criterion (cycle_off_fraction)"}


def _checked(name, value):
    lo, hi, unit = INPUT_LIMITS[name]
    return np.asarray(check_range(_LABELS[name], value, lo, hi, unit), dtype=float)


def supported_breath(pressure_support, peep, resistance, compliance_ml, pmus, rr, ti_neural,
                     cycle_off_fraction=CYCLE_OFF_DEFAULT) -> SupportedBreath:
    """The periodic breath on pressure support (0: CPAP) with patient effort (batched; see module doc).

    Parameters
    ----------
    pressure_support : inspiratory pressure above PEEP [cmH2O], 0-40
    peep : set PEEP [cmH2O]
    resistance : [cmH2O/L/s]; compliance_ml : [mL/cmH2O]
    pmus : peak inspiratory muscle pressure [cmH2O], 0 (passive) to 40
    rr : the patient's own rate, every effort triggering a breath [1/min], 4-60
    ti_neural : duration of the effort's rise [s], shorter than the breath
    cycle_off_fraction : flow-cycling criterion, share of peak flow [fraction 0.05-0.8]

    A passive patient (``pmus`` 0) still needs a rate: the breaths are then time-triggered, and the
    breath is pressure control with flow cycling.
    """
    ps, pe = _checked("pressure_support", pressure_support), _checked("peep", peep)
    r, c_ml = _checked("resistance", resistance), _checked("compliance_ml", compliance_ml)
    a, f = _checked("pmus", pmus), _checked("rr", rr)
    tin, cyc = _checked("ti_neural", ti_neural), _checked("cycle_off_fraction", cycle_off_fraction)
    shape = np.broadcast_shapes(*(np.shape(x) for x in (ps, pe, r, c_ml, a, f, tin, cyc)))
    ps, pe, r, c_ml, a, f, tin, cyc = (np.broadcast_to(x, shape).astype(float).ravel()
                                       for x in (ps, pe, r, c_ml, a, f, tin, cyc))
    ttot = 60.0 / f
    if np.any(tin >= ttot):
        i = int(np.flatnonzero(tin >= ttot)[0])
        raise ValueError(f"neural inspiratory time = {tin[i]:g} s is outside the accepted range: shorter than the "
                         f"breath ({ttot[i]:.2f} s at {f[i]:g}/min)")
    c = c_ml / 1000.0
    tau = r * c
    n = ps.size
    v = np.zeros(n)
    t_breath = np.zeros(n)           # time since the onset of the current breath
    inspiring = np.ones(n, dtype=bool)
    peak = np.zeros(n)
    flow_prev = np.zeros(n)
    # Per-breath records, kept from the last complete breath.
    v_start = np.zeros(n)
    v_max = np.zeros(n)
    ti_mech = np.zeros(n)
    cycled = np.ones(n, dtype=bool)
    paw_integral = np.zeros(n)
    ptp = np.zeros(n)
    out = {k: np.full(n, np.nan) for k in ("vt", "peak", "ti", "v_ee", "paw", "ptp", "cycled")}
    decay = np.exp(-STEP_S / tau)
    steps = int(np.ceil((BREATHS + 1) * np.max(ttot) / STEP_S))
    breaths_done = np.zeros(n, dtype=int)
    # The effort at each step of a breath, worked out once: row i, column j is Pmus at (j + 1/2) steps from
    # the onset (a breath restarts its step count at its onset).
    per_breath = int(np.ceil(np.max(ttot) / STEP_S)) + 2
    effort = pmus_waveform((np.arange(per_breath) + 0.5)[None, :] * STEP_S, a[:, None], tin[:, None], ttot[:, None])
    rows = np.arange(n)
    j = np.zeros(n, dtype=int)       # steps since the onset of the current breath
    periodic = np.zeros(n, dtype=bool)
    done = np.zeros(n, dtype=bool)
    tail_sum = {k: np.zeros(n) for k in out}
    for _ in range(steps):
        p_mus = effort[rows, j]
        p_vent = np.where(inspiring, ps, 0.0)
        drive = p_vent + p_mus
        v_inf = c * drive
        v_new = v_inf + (v - v_inf) * decay
        flow = (v_new - v) / STEP_S
        peak = np.where(inspiring, np.maximum(peak, flow), peak)
        v_max = np.maximum(v_max, v_new)
        paw_integral += (pe + p_vent) * STEP_S
        ptp += p_mus * STEP_S
        v = v_new
        t_breath = t_breath + STEP_S
        j += 1
        # Flow cycling: after the flow has peaked, once it falls to the criterion; or the safety limit.
        falling = flow < flow_prev
        end_insp = (inspiring & (ps > 0)
                    & (((flow <= cyc * peak) & falling & (peak > 0)) | (t_breath >= MAX_SUPPORTED_TI_S)))
        timed_out = end_insp & (t_breath >= MAX_SUPPORTED_TI_S) & ~(flow <= cyc * peak)
        ti_mech = np.where(end_insp, t_breath, ti_mech)
        cycled = np.where(end_insp, ~timed_out, cycled)
        inspiring = inspiring & ~end_insp
        flow_prev = flow
        new_breath = t_breath >= ttot - 1e-9
        if new_breath.any():
            # A breath ran its course: record it, start the next at the onset of effort.
            never_cycled = new_breath & inspiring & (ps > 0)
            ti_here = np.where(ps > 0, np.where(never_cycled, ttot, ti_mech), tin)
            # Periodic once a breath repeats the one before it (VT and end-expiratory volume within SETTLED_L).
            record = new_breath & ~done
            here = {"vt": v_max - v_start, "peak": peak, "ti": ti_here, "v_ee": v, "paw": paw_integral / ttot,
                    "ptp": ptp * f, "cycled": (cycled & ~never_cycled).astype(float)}
            same = (np.abs(here["vt"] - out["vt"]) < SETTLED_L) & (np.abs(v - out["v_ee"]) < SETTLED_L)
            periodic |= record & same
            tail = record & (breaths_done >= BREATHS - AVERAGED)
            for k, x in here.items():
                out[k] = np.where(record, x, out[k])
                tail_sum[k] += np.where(tail, x, 0.0)
            breaths_done += new_breath
            t_breath = np.where(new_breath, 0.0, t_breath)
            j = np.where(new_breath, 0, j)
            inspiring = inspiring | new_breath
            peak = np.where(new_breath, 0.0, peak)
            v_start = np.where(new_breath, v, v_start)
            v_max = np.where(new_breath, v, v_max)
            paw_integral = np.where(new_breath, 0.0, paw_integral)
            ptp = np.where(new_breath, 0.0, ptp)
            cycled = np.where(new_breath, True, cycled)
            flow_prev = np.where(new_breath, 0.0, flow_prev)
            done |= periodic | (breaths_done >= BREATHS)
        if np.all(done):
            break
    # A breath that never repeated itself (alternating or irregular breaths, as when the time constant
    # nears the breath's length): the mean of its last AVERAGED breaths.
    for k in out:
        out[k] = np.where(periodic, out[k], tail_sum[k] / AVERAGED)
    vt_l = out["vt"]
    intrinsic = out["v_ee"] / c
    reshape = (lambda x: np.asarray(x).reshape(shape)) if shape else (lambda x: np.asarray(x).ravel()[0])
    return SupportedBreath(
        vt_ml=reshape(1000.0 * vt_l), peak_flow=reshape(out["peak"]), ti_s=reshape(out["ti"]),
        ppeak=reshape(pe + ps), peep_total=reshape(pe + intrinsic), intrinsic_peep=reshape(intrinsic),
        mean_paw=reshape(out["paw"]), pmus=reshape(a), dpl_dyn=reshape(vt_l / c),
        ptp_per_min=reshape(out["ptp"]), minute_ventilation=reshape(f * vt_l), rsbi=reshape(rsbi(f, 1000.0 * vt_l)),
        cycled=reshape(out["cycled"] >= 0.5), periodic=reshape(periodic),
    )


def rsbi(rr, vt_ml):
    """Rapid shallow breathing index f / VT [breaths/min/L] [4]."""
    vt_l = np.asarray(vt_ml, dtype=float) / 1000.0
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(vt_l > 0, np.asarray(rr, dtype=float) / np.where(vt_l > 0, vt_l, 1.0), np.inf)


def effort_from_occlusion(delta_pocc, ppeak=None, peep=None) -> dict:
    """Inspiratory muscle pressure and dynamic transpulmonary driving pressure from the expiratory
    occlusion swing ΔPocc [cmH2O, negative as measured] [3]: ``Pmus = -3/4 ΔPocc`` and, with Ppeak and
    PEEP, ``ΔPL,dyn = (Ppeak - PEEP) - 2/3 ΔPocc``. Returns {"pmus_cmh2o", "dpl_dyn_cmh2o" (or None),
    "basis"}."""
    d = float(delta_pocc)
    if not -60.0 <= d <= 0.0:
        raise ValueError(f"delta_pocc_cmh2o = {d:g} cmH2O is outside the accepted range -60 to 0 cmH2O "
                         f"(a swing below PEEP is negative)")
    pmus = -PMUS_PER_DELTA_POCC * d
    dpl = None if ppeak is None or peep is None else (float(ppeak) - float(peep)) - DPL_PER_DELTA_POCC * d
    return {"pmus_cmh2o": pmus, "dpl_dyn_cmh2o": dpl,
            "basis": f"from the occlusion swing ΔPocc {d:g} cmH2O (Bertoni 2019: Pmus = -3/4 ΔPocc)"}


def effort_from_tidal_volume(vt_ml, pressure_support, peep, resistance, compliance_ml, rr, ti_neural,
                             cycle_off_fraction=CYCLE_OFF_DEFAULT) -> dict:
    """The peak Pmus [cmH2O] at which :func:`supported_breath` delivers the measured VT at the current
    support, rate and mechanics (VT rises with Pmus: one batch over a grid of 0-40 cmH2O, then a finer
    grid around the crossing, interpolated). A VT the support alone already gives yields Pmus 0 (the
    patient is over-assisted, or the mechanics are off); a VT beyond 40 cmH2O of effort is refused.
    Returns {"pmus_cmh2o", "basis", "vt_passive_ml"}."""
    target = float(check_range("measured VT", vt_ml, 50.0, 2000.0, "mL"))
    hi = INPUT_LIMITS["pmus"][1]

    def vts(grid):
        return np.atleast_1d(supported_breath(pressure_support, peep, resistance, compliance_ml, grid, rr, ti_neural,
                                              cycle_off_fraction).vt_ml)

    grid = np.linspace(0.0, hi, 41)
    v = vts(grid)
    basis = (f"from the measured VT {target:.0f} mL at pressure support {float(pressure_support):g} cmH2O and the "
             f"fitted mechanics (compliance {float(compliance_ml):.0f} mL/cmH2O, resistance {float(resistance):.0f})")
    if v[0] >= target:
        return {"pmus_cmh2o": 0.0, "basis": basis + ": the support alone gives this VT", "vt_passive_ml": float(v[0])}
    if v[-1] < target:
        raise ValueError(f"measured VT = {target:.0f} mL is outside what the fitted mechanics allow at this support "
                         f"(at most {v[-1]:.0f} mL with an effort of {hi:g} cmH2O)")
    k = int(np.searchsorted(v, target))
    fine = np.linspace(grid[k - 1], grid[k], 21)
    vf = vts(fine)
    return {"pmus_cmh2o": float(np.interp(target, vf, fine)), "basis": basis, "vt_passive_ml": float(v[0])}


def support_bounds(pressure_support_now, pressure_support_new, peep, resistance, compliance_ml, pmus, rr,
                   ti_neural, series_dead_space_ml, cycle_off_fraction=CYCLE_OFF_DEFAULT, rr_max=60.0) -> dict:
    """The patient's breath at a new support level, bounded by two answers (see module doc).

    ``effort_unchanged``: the same peak Pmus, rate and neural timing; with less support VT and the
    alveolar ventilation fall. ``drive_preserved``: the alveolar ventilation of now, ``rr (VT - VD)``,
    kept by the rate, at the same effort per breath and neural inspiratory time (expiration shortens):
    with less support VT falls and the rate rises, rapid shallow breathing, and the effort per minute
    rises with the rate; where no rate keeps it, the effort per breath rises (:func:`ventilation_kept`).
    Each bound:
    {"breath": SupportedBreath (its ``pmus`` is the bound's effort), "rr" [1/min],
    "alveolar_ventilation" [L/min], "attainable"}; also "now".
    """
    vd = float(check_range("series dead space", series_dead_space_ml, 10.0, 600.0, "mL")) / 1000.0
    rr, tin = float(rr), float(ti_neural)

    def breath(ps, f):
        return supported_breath(ps, peep, resistance, compliance_ml, pmus, f, tin, cycle_off_fraction)

    def va(vt_ml, f):
        return f * np.maximum(np.asarray(vt_ml, dtype=float) / 1000.0 - vd, 0.0)

    def bound(b, f, attainable=True):
        return {"breath": b, "rr": f, "alveolar_ventilation": float(va(b.vt_ml, f)), "attainable": attainable}

    now = breath(pressure_support_now, rr)
    va_now = float(va(now.vt_ml, rr))
    out = {"now": bound(now, rr), "effort_unchanged": bound(breath(pressure_support_new, rr), rr)}
    out["drive_preserved"] = ventilation_kept(va_now, pressure_support_new, peep, resistance, compliance_ml, pmus, rr,
                                              tin, series_dead_space_ml, cycle_off_fraction, rr_max)
    return out


def ventilation_kept(alveolar_ventilation, pressure_support, peep, resistance, compliance_ml, pmus, rr, ti_neural,
                     series_dead_space_ml, cycle_off_fraction=CYCLE_OFF_DEFAULT, rr_max=60.0) -> dict:
    """The breath that keeps ``alveolar_ventilation`` [L/min] at this support: the *drive preserved* answer of
    :func:`support_bounds`. The rate is the lowest on a grid (half ``rr`` to ``rr_max``, leaving at least
    0.3 s of expiration) whose breath at the effort ``pmus`` keeps the ventilation, interpolated; where no
    rate does, the least effort per breath that keeps it, at the rate that ventilates most at that effort
    (interpolated the same way; ``attainable`` False if even 40 cmH2O does not: the effort is then 40).
    Returns {"breath", "rr", "alveolar_ventilation",
    "attainable"}."""
    vd = float(check_range("series dead space", series_dead_space_ml, 10.0, 600.0, "mL")) / 1000.0
    rr, tin, va_now = float(rr), float(ti_neural), float(alveolar_ventilation)

    def va(vt_ml, f):
        return f * np.maximum(np.asarray(vt_ml, dtype=float) / 1000.0 - vd, 0.0)

    top = min(float(rr_max), 60.0 / (tin + 0.3))
    rates = np.linspace(max(4.0, 0.5 * rr), max(top, rr), 121)
    va_grid = va(supported_breath(pressure_support, peep, resistance, compliance_ml, pmus, rates, tin,
                                  cycle_off_fraction).vt_ml, rates)
    enough = np.flatnonzero(va_grid >= va_now)
    effort = float(pmus)
    if enough.size == 0:
        # The rate alone cannot keep it: the least effort per breath that keeps it, at the rate that ventilates
        # most at that effort (efforts x rates in one batch; both interpolated between the effort levels).
        efforts = np.linspace(effort, INPUT_LIMITS["pmus"][1], EFFORT_LEVELS)
        coarse = rates[::RATE_THINNING]
        va2 = va(supported_breath(pressure_support, peep, resistance, compliance_ml, efforts[:, None], coarse[None, :],
                                  tin, cycle_off_fraction).vt_ml, coarse[None, :])
        most, best_rate = va2.max(axis=1), coarse[np.argmax(va2, axis=1)]
        k = np.flatnonzero(most >= va_now)
        attainable = bool(k.size)
        if not attainable:
            effort, f = float(efforts[-1]), float(best_rate[-1])
        elif k[0] == 0:
            effort, f = float(efforts[0]), float(best_rate[0])
        else:
            j = int(k[0])
            effort = float(np.interp(va_now, most[j - 1:j + 1], efforts[j - 1:j + 1]))
            f = float(np.interp(va_now, most[j - 1:j + 1], best_rate[j - 1:j + 1]))
    elif enough[0] == 0:
        f, attainable = float(rates[0]), True
    else:
        k = int(enough[0])
        f = float(np.interp(va_now, va_grid[k - 1:k + 1], rates[k - 1:k + 1]))
        attainable = True
    kept = supported_breath(pressure_support, peep, resistance, compliance_ml, effort, f, tin, cycle_off_fraction)
    return {"breath": kept, "rr": f, "alveolar_ventilation": float(va(kept.vt_ml, f)), "attainable": attainable}


def volume_stand_in(vt_ml, rr, fio2, peep, apparatus_dead_space_ml=0.0) -> Settings:
    """The volume-controlled breath that stands in for a supported one in the lung model: the same VT and
    rate (so the same alveolar ventilation), inspiratory time NEURAL_DUTY of the breath."""
    rr = float(rr)
    return Settings(mode="volume", fio2=float(fio2), peep=float(peep), vt_ml=float(vt_ml), rr=rr,
                    ti=NEURAL_DUTY * 60.0 / rr, apparatus_dead_space_ml=float(apparatus_dead_space_ml or 0.0))
