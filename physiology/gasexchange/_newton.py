"""The steady-state lung's Newton loop, compiled (numba), one case at a time.

The same equations and safeguards as the vectorised description in :mod:`.compartments` (its module
notes): each iteration evaluates every unit's and the two blood columns' contents with their
analytic derivatives, solves the unit blocks in closed form, eliminates the two mixed-venous border
unknowns by a Schur complement, and steps. Written as loops over one case's units so that a case
stops as soon as it has settled and no (batch x units) temporaries are made: at the sampler's batch
sizes (200 cases, 17 or 52 columns) the array version spent most of its time in numpy's per-call
overhead. ``nogil``: the window's worker thread does not hold the interpreter lock while it solves.

Compiled on first use and cached beside this file (``cache=True``), so only the first run after an
install pays the compile (a few seconds; see DEVELOPERS.md). Numba's cache is invalidated by an edit of
this file only: everything it compiles lives here, and the constants it takes from other modules
(Severinghaus's, O2 solubility, the CO2 unit factor, Kelman's Bohr factor) are frozen into the cached code, so a test checks
the compiled contents against :func:`content_terms` run by numpy (a stale cache fails it; delete
``__pycache__``). Imported by ``compartments`` at the first solve, so the engine imports without numba.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..bloodgas.carbon_dioxide import MMOL_TO_ML_DL
from ..bloodgas.oxygen import _SEV_A, _SEV_B, O2_SOLUBILITY
from .compartments import _BOHR, _LN10, _LN20, _LN40

#: Largest scaled residual (unit balances, Fick) at the start of the accepted step.
RESIDUAL_MAX = 1e-3
_DLNX_DC = _BOHR * 0.2741 + 0.06  # -d ln(virtual PO2) / d ln PCO2 along the buffer line


def content_terms(p, c, s_guess, hb, hct, t, offset, cap, sol, log_kelman_t, dpk_dp, values_only=None):
    """O2 and CO2 contents [mL/dL] of blood at PO2 ``p``, PCO2 ``c`` [mmHg], with their derivatives.

    Returns (O2, CO2, saturation, pH, dO2/dp, dO2/dc, dCO2/dp, dCO2/dc), or the first four alone when
    ``values_only`` is given (the ``is None`` test lets numba drop that branch). Works on scalars (compiled,
    inside :func:`newton`) and on numpy arrays (``compartments._Blood.contents``): one set of
    equations for both. Capillary pH depends on saturation (oxylabile term) and saturation on pH
    (Bohr): this loop is closed by one Newton correction from ``s_guess`` (contraction ~0.03, so the
    remaining error is ~1e-3 of the guess error); the derivatives are implicit, so the outer Newton
    stays quadratic. Blood constants: see ``compartments._Blood``.

    Severinghaus 1979 saturation on Kelman's virtual PO2; Kelman 1967 CO2 content (Haldane effect).
    """
    lnc = np.log(c)
    oxy = 0.003 * hb
    ph_base = 7.59 + offset + oxy - 0.2741 * (lnc - _LN20)
    ph = ph_base - oxy * s_guess
    lx = np.log(p) + log_kelman_t + _BOHR * (ph - 7.4) + 0.06 * (_LN40 - lnc)
    x = np.exp(lx)
    x2 = x * x
    q = x * (x2 + _SEV_B)
    den = q + _SEV_A
    fx = _SEV_A * (3.0 * x2 + _SEV_B) * x / (den * den)
    kappa = fx * _BOHR * oxy
    s_new = s_guess + (q / den - s_guess) / (1.0 + kappa)
    ph = ph_base - oxy * s_new
    x = x * (1.0 - _BOHR * oxy * (s_new - s_guess))
    x2 = x * x
    q = x * (x2 + _SEV_B)
    den = q + _SEV_A
    s = q / den
    o2 = cap * s + O2_SOLUBILITY * p
    pp = 7.4 - ph
    pk = 6.086 + 0.042 * pp + (38.0 - t) * (0.00472 + 0.00139 * pp)
    dox = 0.590 + 0.2913 * pp - 0.0844 * pp * pp
    dr = 0.664 + 0.2275 * pp - 0.0938 * pp * pp
    ddd = dox + (dr - dox) * (1.0 - s)
    e = np.exp(_LN10 * (ph - pk))
    cp = sol * c * (1.0 + e)
    mix = hct * ddd + (1.0 - hct)
    co2 = MMOL_TO_ML_DL * mix * cp
    if values_only is not None:
        return o2, co2, s, ph
    fx = _SEV_A * (3.0 * x2 + _SEV_B) * x / (den * den)
    inv = 1.0 / (1.0 + fx * _BOHR * oxy)
    ds_dp = fx * inv / p
    ds_dc = -fx * inv * _DLNX_DC / c
    do2_dp = cap * ds_dp + O2_SOLUBILITY
    do2_dc = cap * ds_dc
    dpp_dp = oxy * ds_dp
    dpp_dc = 0.2741 / c + oxy * ds_dc
    ddox = 0.2913 - 0.1688 * pp
    dddd_dpp = ddox + ((0.2275 - 0.1876 * pp) - ddox) * (1.0 - s)
    dddd_ds = -(dr - dox)
    dcp_dpp = -sol * c * e * _LN10 * (1.0 + dpk_dp)
    hcp = hct * cp
    dco2_dp = MMOL_TO_ML_DL * (hcp * (dddd_dpp * dpp_dp + dddd_ds * ds_dp) + mix * dcp_dpp * dpp_dp)
    dco2_dc = MMOL_TO_ML_DL * (hcp * (dddd_dpp * dpp_dc + dddd_ds * ds_dc)
                               + mix * (sol * (1.0 + e) + dcp_dpp * dpp_dc))
    return o2, co2, s, ph, do2_dp, do2_dc, dco2_dp, dco2_dc


_contents = njit(cache=True, nogil=True, inline="always", error_model="numpy")(content_terms)


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _clip(x, lo, hi):
    """``np.clip``'s order (the upper bound wins), NaN kept."""
    if x < lo:
        x = lo
    if x > hi:
        x = hi
    return x


@njit(cache=True, nogil=True, error_model="numpy")
def newton(vq, w, case, blood, p, c, cvo2, cvco2, s_lag, tol, max_iter,
           o2, co2, s, dpu, dcu, deriv, bderiv, out):
    """Newton iterations for every case (rows), each until it settles or fails.

    Inputs: ``vq``, ``w`` (n, N) unit V/Q and perfusion weights; ``case`` (n, 8) k_flux, pdry, fio2,
    non-shunt share, shunt, Fick O2, Fick CO2 [mL/dL] and the collapse threshold of mixed-venous O2
    content; ``blood`` (n, 8) hb, hct, temperature, pH offset, O2 capacity, CO2 solubility, Kelman's
    temperature term and dpK/dpH. State, updated in place: ``p``, ``c`` (n, N + 2) [mmHg], ``cvo2``,
    ``cvco2`` (n,) [mL/dL], ``s_lag`` (n, N + 2).

    Outputs, written in place, at each case's last iteration: ``o2``, ``co2``, ``s`` (n, N + 2) at
    the iterate the last step started from; ``dpu``, ``dcu`` (n, N) that step; ``deriv`` (n, 4, N)
    the units' content derivatives; ``bderiv`` (n, 4, 2) the blood columns'; ``out`` (n, 7): last
    mixed-venous steps dv1, dv2, the residual at the step's start, iterations used, and flags
    converged, non-finite numbers, collapsed (1.0 or 0.0). On return ``p``, ``c``, ``cvo2``,
    ``cvco2`` hold the state the last step reached.
    """
    n, nu = vq.shape
    ncol = nu + 2
    m1p = np.empty(nu)
    m1c = np.empty(nu)
    m2p = np.empty(nu)
    m2c = np.empty(nu)
    uep = np.empty(nu)
    uec = np.empty(nu)
    dp = np.empty(ncol)
    dc = np.empty(ncol)
    for i in range(n):
        k_flux, pdry, fio2 = case[i, 0], case[i, 1], case[i, 2]
        ns, shunt, fick_o2, fick_co2, cv_floor = case[i, 3], case[i, 4], case[i, 5], case[i, 6], case[i, 7]
        hb, hct, t, offset = blood[i, 0], blood[i, 1], blood[i, 2], blood[i, 3]
        cap, sol, lkt, dpk = blood[i, 4], blood[i, 5], blood[i, 6], blood[i, 7]
        pio2 = fio2 * pdry
        a21_const = -pio2 / pdry - (1.0 - fio2)
        a22_const = -pio2 / pdry
        p_cap = pio2 + 1.0
        collapse_count = 0
        converged = False
        bad = False
        collapsed = False
        it = 0
        for it in range(1, max_iter + 1):
            for j in range(ncol):
                (o2[i, j], co2[i, j], s[i, j], _ph, d1, d2, d3, d4) = _contents(
                    p[i, j], c[i, j], s_lag[i, j], hb, hct, t, offset, cap, sol, lkt, dpk)
                if j < nu:
                    deriv[i, 0, j], deriv[i, 1, j], deriv[i, 2, j], deriv[i, 3, j] = d1, d2, d3, d4
                else:
                    bderiv[i, 0, j - nu], bderiv[i, 1, j - nu] = d1, d2
                    bderiv[i, 2, j - nu], bderiv[i, 3, j - nu] = d3, d4
            cv1, cv2 = cvo2[i], cvco2[i]
            mean_o2 = 0.0
            mean_co2 = 0.0
            for j in range(nu):
                mean_o2 += w[i, j] * o2[i, j]
                mean_co2 += w[i, j] * co2[i, j]
            g1 = ns * (mean_o2 - cv1) - fick_o2
            g2 = ns * (cv2 - mean_co2) - fick_co2
            s11 = -ns
            s12 = 0.0
            s21 = 0.0
            s22 = ns
            r1 = -g1
            r2 = -g2
            resid = 0.0
            for j in range(nu):
                v = vq[i, j]
                ko2 = (1.0 - fio2) * (k_flux / v)
                pu, cu = p[i, j], c[i, j]
                e1 = v * cu - k_flux * (cv2 - co2[i, j])
                e2 = pio2 * (1.0 - (pu + cu) / pdry) - (1.0 - fio2) * pu - ko2 * (o2[i, j] - cv1)
                uo2p, uo2c, uco2p, uco2c = deriv[i, 0, j], deriv[i, 1, j], deriv[i, 2, j], deriv[i, 3, j]
                a11 = k_flux * uco2p
                a12 = v + k_flux * uco2c
                a21 = a21_const - ko2 * uo2p
                a22 = a22_const - ko2 * uo2c
                inv_det = 1.0 / (a11 * a22 - a12 * a21)
                i11, i12, i21, i22 = a22 * inv_det, -a12 * inv_det, -a21 * inv_det, a11 * inv_det
                m1p[j] = i12 * ko2
                m1c[j] = i22 * ko2
                m2p[j] = -k_flux * i11
                m2c[j] = -k_flux * i21
                uep[j] = i11 * e1 + i12 * e2
                uec[j] = i21 * e1 + i22 * e2
                wn = w[i, j] * ns
                c1p, c1c, c2p, c2c = wn * uo2p, wn * uo2c, wn * uco2p, wn * uco2c
                s11 -= c1p * m1p[j] + c1c * m1c[j]
                s12 -= c1p * m2p[j] + c1c * m2c[j]
                s21 += c2p * m1p[j] + c2c * m1c[j]
                s22 += c2p * m2p[j] + c2c * m2c[j]
                r1 += c1p * uep[j] + c1c * uec[j]
                r2 -= c2p * uep[j] + c2c * uec[j]
                resid = max(resid, abs(e1) / (1.0 + v * cu), abs(e2) / (1.0 + pio2))
            resid = max(resid, abs(g1) + abs(g2))
            sdet = s11 * s22 - s12 * s21
            dv1 = (s22 * r1 - s12 * r2) / sdet
            dv2 = (-s21 * r1 + s11 * r2) / sdet
            # Damp the whole step of a case whose mixed-venous contents would fall below 30 %.
            lam = 1.0
            if dv1 < -0.7 * cv1:
                lam = min(lam, -0.7 * cv1 / dv1)
            if dv2 < -0.7 * cv2:
                lam = min(lam, -0.7 * cv2 / dv2)
            dv1 *= lam
            dv2 *= lam
            for j in range(nu):
                dpu[i, j] = -(lam * uep[j] + m1p[j] * dv1 + m2p[j] * dv2)
                dcu[i, j] = -(lam * uec[j] + m1c[j] * dv1 + m2c[j] * dv2)
                dp[j] = dpu[i, j]
                dc[j] = dcu[i, j]
            # Arterial and mixed-venous blood: Newton on their content equations (targets held).
            targets_o2 = (ns * mean_o2 + shunt * cv1, cv1)
            targets_co2 = (ns * mean_co2 + shunt * cv2, cv2)
            for b in range(2):
                rb1 = o2[i, nu + b] - targets_o2[b]
                rb2 = co2[i, nu + b] - targets_co2[b]
                b11, b12, b21, b22 = bderiv[i, 0, b], bderiv[i, 1, b], bderiv[i, 2, b], bderiv[i, 3, b]
                bdet = b11 * b22 - b12 * b21
                dp[nu + b] = -(b22 * rb1 - b12 * rb2) / bdet
                dc[nu + b] = -(-b21 * rb1 + b11 * rb2) / bdet
            # Safeguards: stay positive and below inspired PO2; limit large jumps.
            full_step = lam == 1.0
            step = 0.0
            finite = math.isfinite(dv1) and math.isfinite(dv2)
            ds = 0.0
            for j in range(ncol):
                pj, cj = p[i, j], c[i, j]
                p_try = pj + dp[j]
                c_try = cj + dc[j]
                p_new = _clip(p_try, 0.3 * pj, min(2.5 * pj + 30.0, p_cap))
                c_new = _clip(c_try, 0.3 * cj, 2.5 * cj + 20.0)
                if p_new != p_try or c_new != c_try:
                    full_step = False
                if not (math.isfinite(dp[j]) and math.isfinite(dc[j])):
                    finite = False
                step = max(step, abs(dp[j]) / (1.0 + pj), abs(dc[j]) / (1.0 + cj))
                ds = max(ds, abs(s[i, j] - s_lag[i, j]))
                p[i, j] = p_new
                c[i, j] = c_new
                s_lag[i, j] = s[i, j]
            step_v = max(abs(dv1), abs(dv2)) / (1.0 + max(cv1, cv2))
            cvo2[i] = cv1 + dv1
            cvco2[i] = cv2 + dv2
            out[i, 0] = dv1
            out[i, 1] = dv2
            out[i, 2] = resid
            bad = not (finite and math.isfinite(step_v))
            # Stop after a full Newton step below tol: in the quadratic regime the state it reaches is
            # accurate to about tol squared. The residuals at its start must be small too (the
            # safeguarded steps must not hide a non-solution): otherwise go on.
            converged = (full_step and step < tol and step_v < tol and ds < max(1e-4, tol) and resid < RESIDUAL_MAX
                         and not bad)
            # Mixed-venous O2 content driven towards zero for three iterations running: VO2 cannot be
            # delivered, there is no physiological steady state.
            collapse_count = collapse_count + 1 if cvo2[i] < cv_floor else 0
            collapsed = collapse_count >= 3
            if converged or bad or collapsed:
                break
        out[i, 3] = it
        out[i, 4] = 1.0 if converged else 0.0
        out[i, 5] = 1.0 if bad else 0.0
        out[i, 6] = 1.0 if collapsed else 0.0
