"""The breathing pattern's fixed point, compiled (numba), one case at a time.

:func:`.ventilator.breathe` closes a loop of two unknowns, the end-expiratory open fraction of the
recruitable lung and the chord compliance of the breath: both set the breath (trapped volume,
total PEEP, plateau), and the breath sets them again. The loop is a Newton iteration on
``x = cycle(x)`` with a forward-difference Jacobian (three cycles per iteration) from a fully open
lung, falling back to the plain step where Newton leaves its bounds. At the fit's batch sizes
(200 cases) the array version spent most of its time in numpy's per-call overhead; here each case
runs alone and stops when it has settled.

The pressure-volume curve, the opening and closing of the recruitable lung, the square-wave
pressure-control breath and the flow-limitation waterfall are written here for one case: the
array forms in :mod:`.recruitment`, :mod:`.motion` and :mod:`.ventilator` are the ones every other
caller uses, and a test holds the two to the same numbers (``tests/test_mechanics.py``). Numba's
cache is invalidated by an edit of this file only; the constants taken from :mod:`.ventilator`
are frozen into the cached code, and the same test fails on a stale cache (delete ``__pycache__``).
"""

from __future__ import annotations

import math

from numba import njit

from .ventilator import WATERFALL_CORNER_CMH2O, WATERFALL_CRITICAL_SHARE

_SQRT_HALF = math.sqrt(0.5)


@njit(cache=True, nogil=True, error_model="numpy")
def aerated_volume(p, c_max, inflection, width):
    """:func:`.recruitment.aerated_volume` for one case [L]."""
    if p <= inflection:
        return c_max * p
    return c_max * inflection + 4.0 * width * c_max * (1.0 / (1.0 + math.exp(-(p - inflection) / width)) - 0.5)


@njit(cache=True, nogil=True, error_model="numpy")
def aerated_pressure(v, c_max, inflection, width):
    """:func:`.recruitment.aerated_pressure` for one case [cmH2O]; ``inf`` beyond the lung's capacity."""
    knee = c_max * inflection
    if v <= knee:
        return v / c_max
    frac = (v - knee) / (4.0 * width * c_max) + 0.5
    if frac >= 1.0:
        return math.inf
    return inflection - width * math.log(1.0 / frac - 1.0)


@njit(cache=True, nogil=True, error_model="numpy")
def ndtr(x):
    """Standard normal distribution function."""
    return 0.5 * math.erfc(-x * _SQRT_HALF)


@njit(cache=True, nogil=True, error_model="numpy")
def waterfall_total_peep(peep, intrinsic_at_zeep, flow_limitation):
    """:func:`.ventilator.waterfall_total_peep` for one case [cmH2O]."""
    x = (peep - WATERFALL_CRITICAL_SHARE * intrinsic_at_zeep) / WATERFALL_CORNER_CMH2O
    softplus = max(x, 0.0) + math.log1p(math.exp(-abs(x))) if math.isfinite(x) else max(x, 0.0)
    limited = intrinsic_at_zeep + WATERFALL_CORNER_CMH2O * softplus
    additive = peep + intrinsic_at_zeep
    if flow_limitation >= 1.0:
        return limited
    if flow_limitation <= 0.0:
        return additive
    return (1.0 - flow_limitation) * additive + flow_limitation * limited


@njit(cache=True, nogil=True, error_model="numpy")
def _cycle(f_ee, c_chord, volume_mode, row):
    """One pass of the loop (``cycle`` in :func:`.ventilator.breathe`): open fraction and chord compliance
    in, the same out, with the breath: (f_ee, c_chord, aerated, VT, trapped, total PEEP, Pplat,
    effective open fraction). ``row``: one case's inputs (see :func:`settle`)."""
    (vt_set, dpi, peep, ti, te, duty, r, cmax, infl, width, lr, hist0,
     mu_open, sd_open, mu_close, sd_close, flow_limitation) = (
        row[0], row[1], row[2], row[3], row[4], row[5], row[6], row[7], row[8], row[9], row[10], row[11],
        row[12], row[13], row[14], row[15], row[16])
    aer = 1.0 - lr * (1.0 - f_ee)
    v_peep = aer * aerated_volume(peep, cmax, infl, width)
    if volume_mode:
        vt = vt_set
        bexp = math.exp(-te / (r * c_chord))
        trapped = vt * bexp / (1.0 - bexp)
    else:
        v_top = aer * aerated_volume(peep + dpi, cmax, infl, width) - v_peep
        c_top = max(v_top / dpi, 1e-5)
        tau = r * c_top
        a = math.exp(-ti / tau)
        b = math.exp(-te / tau)
        full = c_top * dpi
        v_ee = full * (1.0 - a) * b / (1.0 - a * b)
        vt = full * (1.0 - a) / (1.0 - a * b) - v_ee
        trapped = v_ee
    if flow_limitation > 0.0:
        v0 = aer * aerated_volume(0.0, cmax, infl, width)
        p_i0 = aerated_pressure((v0 + trapped) / aer, cmax, infl, width)
        peep_tot = waterfall_total_peep(peep, p_i0, flow_limitation)
        v_ee = aer * aerated_volume(peep_tot, cmax, infl, width)
    else:
        v_ee = v_peep + trapped
        peep_tot = aerated_pressure(v_ee / aer, cmax, infl, width)
    pplat = aerated_pressure((v_ee + vt) / aer, cmax, infl, width)
    finite = math.isfinite(pplat)
    history = max(hist0, pplat if finite else 0.0)
    opened = ndtr((history - mu_open) / sd_open)
    kept = ndtr((peep_tot - mu_close) / sd_close)
    f_ee_new = opened * kept
    f_eff = f_ee_new + opened * (1.0 - kept) * duty
    c_new = vt / max(pplat - peep_tot, 1e-4) if finite else c_chord
    return f_ee_new, c_new, aer, vt, trapped, peep_tot, pplat, f_eff


@njit(cache=True, nogil=True, error_model="numpy")
def settle(volume_mode, case, tol, max_iter, out):
    """The loop for every case (rows of ``case``: VT [L], pressure above PEEP, PEEP, Ti, Te, Ti/Ttot, R,
    Cmax [L/cmH2O], inflection, width, recruitable share, pressure history, opening mean and SD, closing
    mean and SD, flow limitation). ``out`` rows: end-expiratory open fraction, aerated share, VT [L],
    trapped volume [L], total PEEP, Pplat, effective open fraction, converged (1.0 or 0.0)."""
    for i in range(case.shape[0]):
        row = case[i]
        f_ee = 1.0
        c_chord = row[7]  # Cmax: a fully open lung
        converged = False
        g = _cycle(f_ee, c_chord, volume_mode, row)
        for _ in range(max_iter):
            g1, g2 = g[0], g[1]
            r1, r2 = g1 - f_ee, g2 - c_chord
            finite = math.isfinite(g[6])
            converged = finite and abs(r1) < tol and abs(r2) < tol * 1e-3
            if converged or not finite:
                break
            h1, h2 = 1e-7, 1e-7 * c_chord
            a = _cycle(f_ee + h1, c_chord, volume_mode, row)
            b = _cycle(f_ee, c_chord + h2, volume_mode, row)
            j11, j21 = (a[0] - g1) / h1 - 1.0, (a[1] - g2) / h1
            j12, j22 = (b[0] - g1) / h2, (b[1] - g2) / h2 - 1.0
            det = j11 * j22 - j12 * j21
            d1 = -(j22 * r1 - j12 * r2) / det
            d2 = -(-j21 * r1 + j11 * r2) / det
            if math.isfinite(d1) and math.isfinite(d2):
                f_new, c_new = f_ee + d1, c_chord + d2
            else:
                f_new, c_new = g1, g2
            # Keep within bounds; fall back to the plain step when Newton leaves them.
            if f_new < 0.0 or f_new > 1.0 or c_new <= 0.1 * c_chord or c_new > 10.0 * c_chord:
                f_ee, c_chord = g1, g2
            else:
                f_ee, c_chord = f_new, c_new
            g = _cycle(f_ee, c_chord, volume_mode, row)
        out[i, 0] = g[0]
        for k in range(2, 8):
            out[i, k - 1] = g[k]
        out[i, 7] = 1.0 if converged else 0.0
