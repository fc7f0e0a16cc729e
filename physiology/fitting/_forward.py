"""The fit's forward model, compiled (numba): parameter draws and observed settings -> the observed
quantities, one case at a time.

The posterior sampler asks about 50-75 times per fit for the model's values of every observation at 200
parameter draws (:meth:`.fit._Problem.model_outputs`). Through :func:`physiology.forecast.predict` each
ask cost about 1.4 ms of numpy and Python overhead (some 250 array operations, dataclasses, checks)
before any arithmetic, plus the arithmetic of (batch x units) temporaries: most of a fit. Here the
same steps run as loops over one case at a time, between the two compiled loops the forecast uses
itself (the breathing pattern, :func:`physiology.mechanics._breath.settle`, and the lung's Newton
iteration, :func:`physiology.gasexchange._newton.newton`, both called from :func:`forward` unchanged):

1. ``_breath_rows``: the settings and mechanics of each case in the breathing loop's row form
   (:func:`physiology.mechanics.ventilator.breathe`);
2. ``_lung_rows``: what ``breathe`` derives from the settled breath (Pplat, Ppeak, mean airway pressure,
   overdistension, ventilation), the couplings of ``predict`` (shunt of collapsed lung, dead space of
   overdistended lung, cardiac output with mean airway pressure), the V/Q distribution and the Newton
   start of :func:`physiology.gasexchange.compartments._solve_arrays` (or the warm start);
3. ``_finish_rows``: the last step's correction of the blood columns, the failure rules, pH and the
   end-tidal PCO2 of ``_solve_arrays`` and ``predict``, as the fit's observation table (``_quantities``).

This is a second form of those steps, kept for speed only: ``tests/test_fitting.py`` holds it to
``predict`` over random draws of every condition's priors and draws at the parameters' bounds, in both
ventilator modes, at the sampler's and the optimiser's tolerances, cold and warm started, failures
included (the same cases fail; the rest, and the warm-start states, agree within 1e-6; measured about
5e-12). A change to the equations of ``breathe``, ``predict`` or ``_solve_arrays`` must be made here
too, or that test fails. The equations of blood chemistry are not repeated: the kernels compile the
array code's own functions (blood contents, Severinghaus and Ellis, in-vivo pH; see ``_OPTIONS``
below). Numba's cache of this file is invalidated by an edit of this file only; the constants and the
functions it takes from other modules are frozen into the cached code, and the same test fails on a
stale cache (delete ``__pycache__``). Imported at the first fit, not with the engine.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..bloodgas import acidbase, oxygen
from ..bloodgas.oxygen import O2_SOLUBILITY
from ..gasexchange._newton import _clip, content_terms
from ..gasexchange.compartments import _BOHR, _LN10, _LN20, _LN40, _PH40_SBE0, MIN_MIXED_VENOUS_PO2
from ..mechanics.recruitment import MMHG_PER_CMH2O

#: Columns of the per-case parameter array ``par`` (one row per case: draw x observation).
PAR = ("shunt_fixed", "recruitable", "log_sd", "dead_space_fraction", "vo2", "vco2", "cardiac_output_ref",
       "c_max", "resistance", "base_excess", "anatomic_dead_space", "inflection", "overdistension_dead_space",
       "low_vq_fraction")
#: Columns of the per-case settings array ``st`` (after ``Settings.validated`` and ``_fill_optional``).
SET = ("fio2", "peep", "vt_ml", "inspiratory_pressure", "rr", "ti", "apparatus_dead_space_ml", "pause")
#: The patient's constants ``const`` (the same for every case of a fit).
CONST = ("pbw_kg", "hb", "temperature", "barometric", "hufner", "recruitable_shunt_ratio", "low_vq_ratio",
         "mean_paw_ref", "preload_dependence", "end_tidal_share", "width", "mu_open", "sd_open", "mu_close",
         "sd_close", "pressure_history", "flow_limitation")
#: Columns of the output table: the fit's observation quantities (``fit._quantities``), NaN where a case
#: failed (VCO2 excepted: it is the parameter itself, as there).
OUT = ("pao2", "paco2", "ph", "sao2", "petco2", "petco2_gap", "pplat", "ppeak", "vte_ml", "ve_l_min", "vco2",
       "cardiac_output")

# Column numbers by name (numba takes module-level integers as constants).
(_P_SHUNT_FIXED, _P_RECRUITABLE, _P_LOG_SD, _P_DEAD_SPACE_FRACTION, _P_VO2, _P_VCO2, _P_CARDIAC_OUTPUT_REF,
 _P_C_MAX, _P_RESISTANCE, _P_BASE_EXCESS, _P_ANATOMIC_DEAD_SPACE, _P_INFLECTION, _P_OVERDISTENSION_DEAD_SPACE,
 _P_LOW_VQ_FRACTION) = range(len(PAR))
(_S_FIO2, _S_PEEP, _S_VT_ML, _S_INSPIRATORY_PRESSURE, _S_RR, _S_TI, _S_APPARATUS_DEAD_SPACE_ML,
 _S_PAUSE) = range(len(SET))
(_C_PBW_KG, _C_HB, _C_TEMPERATURE, _C_BAROMETRIC, _C_HUFNER, _C_RECRUITABLE_SHUNT_RATIO, _C_LOW_VQ_RATIO,
 _C_MEAN_PAW_REF, _C_PRELOAD_DEPENDENCE, _C_END_TIDAL_SHARE, _C_WIDTH, _C_MU_OPEN, _C_SD_OPEN, _C_MU_CLOSE,
 _C_SD_CLOSE, _C_PRESSURE_HISTORY, _C_FLOW_LIMITATION) = range(len(CONST))
(_O_PAO2, _O_PACO2, _O_PH, _O_SAO2, _O_PETCO2, _O_PETCO2_GAP, _O_PPLAT, _O_PPEAK, _O_VTE_ML, _O_VE_L_MIN,
 _O_VCO2, _O_CARDIAC_OUTPUT) = range(len(OUT))

# Per-case values handed from _lung_rows to _finish_rows.
_K_OK_BREATH, _K_PPLAT, _K_PPEAK, _K_VT_ML, _K_VE, _K_CO, _K_VA, _K_SBE = range(8)
_KEEP = 8


# The equations these kernels share with the array code, not repeated: the blood contents
# (physiology.gasexchange._newton.content_terms), Severinghaus's saturation and Ellis's inverse
# (physiology.bloodgas.oxygen), the in-vivo pH at a fixed standard base excess (physiology.bloodgas.acidbase),
# compiled into this file's kernels. Numba does not see an edit of those files from here: after one, this
# file's cache is stale until it is deleted (tests/test_fitting.py fails on it, as on a frozen constant).
_OPTIONS = dict(cache=True, nogil=True, inline="always", error_model="numpy")
_contents = njit(**_OPTIONS)(content_terms)
_sev = njit(**_OPTIONS)(oxygen._sev)
_ellis = njit(**_OPTIONS)(oxygen._ellis)
_ph_invivo = njit(**_OPTIONS)(acidbase._ph_invivo)


@njit(cache=True, nogil=True, error_model="numpy")
def _breath_rows(volume_mode, st, par, const, case):
    """Rows of the breathing loop's input (:func:`physiology.mechanics._breath.settle`), as ``breathe``
    builds them."""
    for i in range(st.shape[0]):
        rr, ti = st[i, _S_RR], st[i, _S_TI]
        ttot = 60.0 / rr
        case[i, 0] = st[i, _S_VT_ML] / 1000.0 if volume_mode else 0.0
        case[i, 1] = 0.0 if volume_mode else st[i, _S_INSPIRATORY_PRESSURE]
        case[i, 2] = st[i, _S_PEEP]
        case[i, 3] = ti
        case[i, 4] = ttot - ti
        case[i, 5] = ti / ttot
        case[i, 6] = par[i, _P_RESISTANCE]
        case[i, 7] = par[i, _P_C_MAX] / 1000.0
        case[i, 8] = par[i, _P_INFLECTION]
        case[i, 9] = const[_C_WIDTH]
        case[i, 10] = par[i, _P_RECRUITABLE]
        case[i, 11] = const[_C_PRESSURE_HISTORY]
        case[i, 12] = const[_C_MU_OPEN]
        case[i, 13] = const[_C_SD_OPEN]
        case[i, 14] = const[_C_MU_CLOSE]
        case[i, 15] = const[_C_SD_CLOSE]
        case[i, 16] = const[_C_FLOW_LIMITATION]


@njit(cache=True, nogil=True, error_model="numpy")
def _lung_rows(volume_mode, st, par, const, loop, z, state_p, state_c, state_cv,
               vq, w, vent, lcase, chem, p, c, cvo2, cvco2, s_lag, keep):
    """From the settled breath to the lung's Newton start, case by case (see the module notes)."""
    n, nu = vq.shape
    hb, temp, baro, hufner = const[_C_HB], const[_C_TEMPERATURE], const[_C_BAROMETRIC], const[_C_HUFNER]
    rsr, low_ratio = const[_C_RECRUITABLE_SHUNT_RATIO], const[_C_LOW_VQ_RATIO]
    paw_ref, preload = const[_C_MEAN_PAW_REF], const[_C_PRELOAD_DEPENDENCE]
    width = const[_C_WIDTH]
    w_main = np.exp(-0.5 * z * z)
    w_main = w_main / w_main.sum()
    w_low = np.empty(nu)
    shape = np.empty(nu)
    # Blood constants (compartments._Blood) and the gas constants of the temperature.
    hct = hb / 33.3
    cap = hufner * hb
    dt = 37.0 - temp
    sol = 0.0307 + 0.00057 * dt + 0.00002 * dt * dt
    lkt = _LN10 * 0.024 * dt
    dpk = 0.042 + 0.00139 * (38.0 - temp)
    k_btps = 760.0 * (273.15 + temp) / 273.15 / 1000.0
    k_flux = 10.0 * k_btps
    pdry = baro - 10.0 ** (8.07131 - 1730.63 / (233.426 + temp))
    beta = 0.45 * hb / 15.0 + 0.1
    b_o2 = 0.05 * hb / 15.0
    for i in range(n):
        fio2, peep, rr, ti = st[i, _S_FIO2], st[i, _S_PEEP], st[i, _S_RR], st[i, _S_TI]
        app_ds, pause = st[i, _S_APPARATUS_DEAD_SPACE_ML], st[i, _S_PAUSE]
        r, infl = par[i, _P_RESISTANCE], par[i, _P_INFLECTION]
        vt, pplat, f_eff = loop[i, 2], loop[i, 5], loop[i, 6]
        converged = loop[i, 7] == 1.0
        # breathe: the quantities derived from the settled breath, and whether it failed.
        if volume_mode:
            ppeak = pplat + r * (vt / (ti - pause))
        else:
            ppeak = peep + st[i, _S_INSPIRATORY_PRESSURE]
        mean_paw = (1.0 if not volume_mode else 0.5) * (ppeak - peep) * (ti * rr / 60.0) + peep
        over = _clip(2.0 / (1.0 + math.exp(-(pplat - infl) / width)) - 1.0, 0.0, 1.0)
        ve = rr * vt
        va = ve - rr * (par[i, _P_ANATOMIC_DEAD_SPACE] + app_ds) / 1000.0
        ok_breath = converged and math.isfinite(pplat) and not (va <= 0.05)
        if not ok_breath:
            # predict's stand-ins where the mechanics failed (that case's numbers are NaN in the end).
            f_eff, over, mean_paw, va = 1.0, 0.0, paw_ref, 1.0
        # predict: shunt of the collapsed recruitable lung, dead space of the overdistended lung,
        # cardiac output with mean airway pressure (recruitment.cardiac_output_with_paw).
        shunt = _clip(par[i, _P_SHUNT_FIXED] + rsr * par[i, _P_RECRUITABLE] * (1.0 - f_eff), 0.0, 0.8)
        ads = _clip(par[i, _P_DEAD_SPACE_FRACTION] + par[i, _P_OVERDISTENSION_DEAD_SPACE] * over, 0.0, 0.8)
        drop = preload * 0.25 * MMHG_PER_CMH2O * (mean_paw - paw_ref) / 12.0
        co = par[i, _P_CARDIAC_OUTPUT_REF] * _clip(1.0 - drop, 0.2, 2.0)
        co_lung = _clip(co, 1.0, 20.0)
        va_lung = _clip(va, 0.5, 30.0)
        keep[i, _K_OK_BREATH] = 1.0 if ok_breath else 0.0
        keep[i, _K_PPLAT], keep[i, _K_PPEAK], keep[i, _K_VT_ML] = pplat, ppeak, 1000.0 * vt
        keep[i, _K_VE], keep[i, _K_CO], keep[i, _K_VA] = ve, co, va_lung
        sbe = par[i, _P_BASE_EXCESS]
        keep[i, _K_SBE] = sbe
        # compartments._distribution: the log-normal perfusion over the unit grid, with a low-V/Q mode.
        sd = par[i, _P_LOG_SD]
        f_low = par[i, _P_LOW_VQ_FRACTION]
        if f_low > 0.0:
            z_low = _clip(math.log(low_ratio) / max(sd, 0.05), -3.0, 0.0)
            total = 0.0
            for j in range(nu):
                w_low[j] = math.exp(-0.5 * ((z[j] - z_low) / 0.5) ** 2)
                total += w_low[j]
            for j in range(nu):
                w[i, j] = (1.0 - f_low) * w_main[j] + f_low * (w_low[j] / total)
        else:
            for j in range(nu):
                w[i, j] = w_main[j]
        ws = 0.0
        for j in range(nu):
            shape[j] = math.exp(sd * z[j])
            ws += w[i, j] * shape[j]
        ns = 1.0 - shunt
        q_perfused = ns * co_lung
        va_perfused = (1.0 - ads) * va_lung
        scale = va_perfused / (q_perfused * ws)
        for j in range(nu):
            vq[i, j] = scale * shape[j]
            vent[i, j] = (q_perfused * w[i, j]) * vq[i, j]
        # compartments._solve_arrays: the Newton start, from the warm start where it is complete (the
        # sampler's proposals, nearly always), else from the standard guesses (computed only then).
        offset = (_ph_invivo(40.0, sbe) - _PH40_SBE0) if sbe != 0.0 else 0.0
        vo2, vco2 = par[i, _P_VO2], par[i, _P_VCO2]
        fick_o2 = vo2 / (10.0 * co_lung)
        fick_co2 = vco2 / (10.0 * co_lung)
        warm = math.isfinite(state_cv[i, 0]) and math.isfinite(state_cv[i, 1])
        for j in range(nu + 2):
            if not (math.isfinite(state_p[i, j]) and state_p[i, j] > 0.0
                    and math.isfinite(state_c[i, j]) and state_c[i, j] > 0.0):
                warm = False
        if warm:
            for j in range(nu + 2):
                p[i, j], c[i, j] = state_p[i, j], state_c[i, j]
                # compartments._Blood.saturation_guess
                lnc = math.log(c[i, j])
                ph = 7.59 + offset + 0.003 * hb * 0.25 - 0.2741 * (lnc - _LN20)
                s_lag[i, j] = _sev(p[i, j] * math.exp(lkt + _BOHR * (ph - 7.4) + 0.06 * (_LN40 - lnc)))
            cvo2[i], cvco2[i] = state_cv[i, 0], state_cv[i, 1]
        else:
            pio2 = fio2 * pdry
            pa_co2_guess = _clip(k_btps * vco2 / va_perfused, 15.0, 150.0)
            r_guess = _clip(vco2 / vo2, 0.5, 1.5)
            pa_ideal = max(pio2 - pa_co2_guess * (fio2 + (1.0 - fio2) / r_guess), 30.0)
            cc_ideal = cap * _sev(pa_ideal) + O2_SOLUBILITY * pa_ideal
            cv_guess = cc_ideal - fick_o2 / max(ns, 0.2)
            sv_guess = _clip((cv_guess - O2_SOLUBILITY * 35.0) / cap, 0.2, 0.9)
            pv_o2 = _ellis(sv_guess)
            pv_co2 = pa_co2_guess + fick_co2 / beta
            cv1, cv2, _s, _ph = _contents(pv_o2, pv_co2, 0.75, hb, hct, temp, offset, cap, sol, lkt, dpk, True)
            mean_p = 0.0
            mean_c = 0.0
            for j in range(nu):
                ko2 = (1.0 - fio2) * (k_flux / vq[i, j])
                cu = k_flux * beta * pv_co2 / (vq[i, j] + k_flux * beta)
                num = pio2 * (1.0 - cu / pdry) + ko2 * b_o2 * pv_o2
                den = pio2 / pdry + (1.0 - fio2) + ko2 * b_o2
                pu = _clip(num / den, pv_o2, max(pio2 - cu, pv_o2 + 1.0))
                cu = max(cu, 0.5)
                p[i, j] = pu
                c[i, j] = cu
                mean_p += w[i, j] * pu
                mean_c += w[i, j] * cu
            p[i, nu], p[i, nu + 1] = mean_p, pv_o2
            c[i, nu], c[i, nu + 1] = mean_c, pv_co2
            cvo2[i], cvco2[i] = cv1, cv2
            for j in range(nu + 2):
                s_lag[i, j] = 0.9
        lcase[i, 0], lcase[i, 1], lcase[i, 2], lcase[i, 3] = k_flux, pdry, fio2, ns
        lcase[i, 4], lcase[i, 5], lcase[i, 6], lcase[i, 7] = shunt, fick_o2, fick_co2, 0.02 * cap
        chem[i, 0], chem[i, 1], chem[i, 2], chem[i, 3] = hb, hct, temp, offset
        chem[i, 4], chem[i, 5], chem[i, 6], chem[i, 7] = cap, sol, lkt, dpk


@njit(cache=True, nogil=True, error_model="numpy")
def _finish_rows(par, const, w, vent, lcase, p, c, cvo2, cvco2, s, dpu, dcu, deriv, bderiv, flags,
                 keep, out, state_p, state_c, state_cv):
    """The accepted state, the failure rules and the observation table, case by case (see the module
    notes); the warm-start state of each case (NaN where it failed)."""
    n, nu = w.shape
    share = const[_C_END_TIDAL_SHARE]
    for i in range(n):
        ns, shunt = lcase[i, 3], lcase[i, 4]
        dv1, dv2 = flags[i, 0], flags[i, 1]
        converged = flags[i, 4] == 1.0
        so2 = 0.0
        sco2 = 0.0
        flow = 0.0
        for j in range(nu):
            uo2p, uo2c, uco2p, uco2c = deriv[i, 0, j], deriv[i, 1, j], deriv[i, 2, j], deriv[i, 3, j]
            do2 = uo2p * dpu[i, j] + uo2c * dcu[i, j]
            dco2 = uco2p * dpu[i, j] + uco2c * dcu[i, j]
            so2 += w[i, j] * do2
            sco2 += w[i, j] * dco2
            flow += vent[i, j] * c[i, j]
        t1 = (ns * so2 + shunt * dv1, dv1)
        t2 = (ns * sco2 + shunt * dv2, dv2)
        for b in range(2):
            b11, b12, b21, b22 = bderiv[i, 0, b], bderiv[i, 1, b], bderiv[i, 2, b], bderiv[i, 3, b]
            bdet = b11 * b22 - b12 * b21
            p[i, nu + b] += (b22 * t1[b] - b12 * t2[b]) / bdet
            c[i, nu + b] += (-b21 * t1[b] + b11 * t2[b]) / bdet
        pa_o2, pv_o2 = p[i, nu], p[i, nu + 1]
        pa_co2 = c[i, nu]
        ok = converged and not (pv_o2 < MIN_MIXED_VENOUS_PO2)
        ok = ok and not (pa_co2 > 250.0)
        ok = ok and keep[i, _K_OK_BREATH] == 1.0
        mixed = flow / keep[i, _K_VA]
        ph = _ph_invivo(pa_co2 if ok else 40.0, keep[i, _K_SBE])
        nan = 1.0 if ok else math.nan
        out[i, _O_PAO2] = pa_o2 * nan
        out[i, _O_PACO2] = pa_co2 * nan
        out[i, _O_PH] = ph * nan
        out[i, _O_SAO2] = s[i, nu] * nan
        out[i, _O_PETCO2] = (mixed + share * (pa_co2 - mixed)) * nan
        out[i, _O_PETCO2_GAP] = (pa_co2 - mixed) * nan
        out[i, _O_PPLAT] = keep[i, _K_PPLAT] * nan
        out[i, _O_PPEAK] = keep[i, _K_PPEAK] * nan
        out[i, _O_VTE_ML] = keep[i, _K_VT_ML] * nan
        out[i, _O_VE_L_MIN] = keep[i, _K_VE] * nan
        out[i, _O_VCO2] = par[i, _P_VCO2]
        out[i, _O_CARDIAC_OUTPUT] = keep[i, _K_CO] * nan
        for j in range(nu + 2):
            state_p[i, j] = p[i, j] * nan
            state_c[i, j] = c[i, j] * nan
        state_cv[i, 0] = cvo2[i] * nan
        state_cv[i, 1] = cvco2[i] * nan


def forward(volume_mode: bool, st, par, const, z, tol: float, max_iter: int, mechanics_tol: float,
            mechanics_max_iter: int, state_p, state_c, state_cv, out):
    """The observation table ``out`` (n, len(OUT)) for cases ``st`` (n, len(SET)), ``par`` (n, len(PAR)) of
    one patient ``const`` (len(CONST)), on the unit grid ``z``; the lung solved to ``tol`` (Newton step,
    at most ``max_iter`` iterations), the breath to ``mechanics_tol``. ``state_p``, ``state_c`` (n, N + 2)
    and ``state_cv`` (n, 2): the warm start on entry (NaN rows start from the standard guesses), each
    case's solved state on return (NaN where it failed). Releases the interpreter lock in its loops."""
    from ..gasexchange._newton import newton
    from ..mechanics._breath import settle

    n, nu = st.shape[0], z.size
    case = np.empty((n, 17))
    _breath_rows(volume_mode, st, par, const, case)
    loop = np.empty((n, 8))
    settle(volume_mode, case, float(mechanics_tol), int(mechanics_max_iter), loop)
    vq, w, vent = np.empty((n, nu)), np.empty((n, nu)), np.empty((n, nu))
    lcase, chem, keep = np.empty((n, 8)), np.empty((n, 8)), np.empty((n, _KEEP))
    p, c, s_lag = np.empty((n, nu + 2)), np.empty((n, nu + 2)), np.empty((n, nu + 2))
    cvo2, cvco2 = np.empty(n), np.empty(n)
    _lung_rows(volume_mode, st, par, const, loop, z, state_p, state_c, state_cv,
               vq, w, vent, lcase, chem, p, c, cvo2, cvco2, s_lag, keep)
    o2, co2, s = np.empty_like(p), np.empty_like(p), np.empty_like(p)
    dpu, dcu = np.empty((n, nu)), np.empty((n, nu))
    deriv, bderiv, flags = np.empty((n, 4, nu)), np.empty((n, 4, 2)), np.zeros((n, 7))
    newton(vq, w, lcase, chem, p, c, cvo2, cvco2, s_lag, float(tol), int(max_iter),
           o2, co2, s, dpu, dcu, deriv, bderiv, flags)
    _finish_rows(par, const, w, vent, lcase, p, c, cvo2, cvco2, s, dpu, dcu, deriv, bderiv, flags,
                 keep, out, state_p, state_c, state_cv)
