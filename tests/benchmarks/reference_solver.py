"""A deliberately straightforward reference for the steady-state V/Q lung.

Same published equations as ``physiology.gasexchange.compartments`` but written
independently and plainly: scalar ``math`` blood chemistry (Severinghaus 1979
Eq. 1 on Kelman's virtual PO2, Kelman 1967 CO2, West/Wagner buffer line with
the S-pH loop closed by fixed-point iteration), one ``scipy.optimize.fsolve``
per unit for its O2/CO2 balance, and an outer ``fsolve`` over the two
mixed-venous contents (Fick). Used by the tests to check the fast solver and by
the benchmark to measure the speed ratio. Not for production use: slow.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import fsolve

from ventcast.physiology.gasexchange.compartments import LungParameters, N_HIGH_UNITS, N_MAIN_UNITS


def _antoine(t):
    return 10.0 ** (8.07131 - 1730.63 / (233.426 + t))


def _sat(x):
    q = x ** 3 + 150.0 * x
    return q / (q + 23400.0)


def contents(po2, pco2, hb, t, offset, hufner):
    """O2 and CO2 contents [mL/dL] of blood at (po2, pco2) [mmHg]; plain scalar code."""
    po2 = max(po2, 1e-9)
    pco2 = max(pco2, 1e-9)
    s = 0.9
    for _ in range(60):
        ph = 7.59 + offset + 0.003 * hb * (1.0 - s) - 0.2741 * math.log(pco2 / 20.0)
        x = po2 * 10.0 ** (0.024 * (37.0 - t) + 0.40 * (ph - 7.40) + 0.06 * math.log10(40.0 / pco2))
        s_new = _sat(x)
        if abs(s_new - s) < 1e-14:
            s = s_new
            break
        s = s_new
    ph = 7.59 + offset + 0.003 * hb * (1.0 - s) - 0.2741 * math.log(pco2 / 20.0)
    o2 = hufner * hb * s + 0.003 * po2
    p = 7.4 - ph
    pk = 6.086 + 0.042 * p + (38.0 - t) * (0.00472 + 0.00139 * p)
    sol = 0.0307 + 0.00057 * (37.0 - t) + 0.00002 * (37.0 - t) ** 2
    dox = 0.590 + 0.2913 * p - 0.0844 * p * p
    dr = 0.664 + 0.2275 * p - 0.0938 * p * p
    ddd = dox + (dr - dox) * (1.0 - s)
    cp = sol * pco2 * (1.0 + 10.0 ** (ph - pk))
    hct = hb / 33.3
    co2 = (hct * ddd * cp + (1.0 - hct) * cp) * 2.22
    return o2, co2, s


def _distribution(prm: dict):
    z = np.linspace(-3.5, 3.5, N_MAIN_UNITS)
    w = np.exp(-0.5 * z * z)
    w /= w.sum()
    shape = np.exp(prm["log_sd"] * z)
    if prm["high_vq_fraction"] > 0:
        z2 = np.linspace(-3.0, 3.0, N_HIGH_UNITS)
        w2 = np.exp(-0.5 * z2 * z2)
        w2 /= w2.sum()
        w = np.concatenate([(1 - prm["high_vq_fraction"]) * w, prm["high_vq_fraction"] * w2])
        shape = np.concatenate([shape, prm["high_vq_ratio"] * np.exp(prm["high_vq_log_sd"] * z2)])
    q_perf = (1 - prm["shunt"]) * prm["cardiac_output"]
    va_perf = (1 - prm["dead_space_fraction"]) * prm["alveolar_ventilation"]
    vq = shape * va_perf / (q_perf * np.sum(w * shape))
    return vq, w


def solve_reference(params: LungParameters) -> dict:
    """Solve one case (scalar parameters); returns PaO2, PaCO2, PvO2, PvCO2 [mmHg] and ``success``."""
    prm = {k: float(np.asarray(v)) for k, v in params.__dict__.items()}
    t, hb, huf = prm["temperature"], prm["hb"], prm["hufner"]
    if prm["base_excess"] != 0:
        raise NotImplementedError("the reference solver covers base excess 0 only")
    offset = 0.0
    k_flux = 10.0 * 760.0 * (273.15 + t) / 273.15 / 1000.0
    pdry = prm["barometric"] - _antoine(t)
    f = prm["fio2"]
    pio2 = f * pdry
    vq, w = _distribution(prm)
    guesses = [None] * len(vq)

    def unit(i, cvo2, cvco2):
        r = vq[i]

        def eqs(x):
            p, c = x
            o2, co2, _ = contents(p, c, hb, t, offset, huf)
            e1 = r * c - k_flux * (cvco2 - co2)
            e2 = pio2 * (1 - (p + c) / pdry) - (1 - f) * p - (1 - f) * (k_flux / r) * (o2 - cvo2)
            return [e1 / (1 + r * c), e2 / (1 + pio2)]

        plain = [40.0 + (pio2 - 40.0) * r / (r + 1.0), 46.0 / (1.0 + 0.5 * r)]
        starts = [guesses[i], plain] if guesses[i] is not None else [plain]
        for start in starts:
            sol, info, ier, _msg = fsolve(eqs, start, full_output=True, xtol=1e-12)
            if ier == 1 and sol[0] > 0 and sol[1] > 0:
                guesses[i] = sol
                return sol, True
        return sol, False

    def outer(v):
        cvo2, cvco2 = v
        o2_sum = co2_sum = 0.0
        for i in range(len(vq)):
            (p, c), _ok = unit(i, cvo2, cvco2)
            o2, co2, _ = contents(p, c, hb, t, offset, huf)
            o2_sum += w[i] * o2
            co2_sum += w[i] * co2
        ns = 1 - prm["shunt"]
        return [ns * (o2_sum - cvo2) - prm["vo2"] / (10 * prm["cardiac_output"]),
                ns * (cvco2 - co2_sum) - prm["vco2"] / (10 * prm["cardiac_output"])]

    cv0 = contents(40.0, 46.0, hb, t, offset, huf)[:2]
    v, info, ier, msg = fsolve(outer, cv0, full_output=True, xtol=1e-11)
    ok = ier == 1
    # Units at the solution, then arterial mix and inversion of contents.
    o2s, co2s = [], []
    for i in range(len(vq)):
        (p, c), uok = unit(i, v[0], v[1])
        ok = ok and uok
        o2, co2, _ = contents(p, c, hb, t, offset, huf)
        o2s.append(o2)
        co2s.append(co2)
    ns = 1 - prm["shunt"]
    ca_o2 = ns * float(np.dot(w, o2s)) + prm["shunt"] * v[0]
    ca_co2 = ns * float(np.dot(w, co2s)) + prm["shunt"] * v[1]

    def invert(target, start):
        def eqs(x):
            o2, co2, _ = contents(x[0], x[1], hb, t, offset, huf)
            return [o2 - target[0], co2 - target[1]]
        sol, info, ier, _m = fsolve(eqs, start, full_output=True, xtol=1e-13)
        return sol, ier == 1

    (pa_o2, pa_co2), ok_a = invert((ca_o2, ca_co2), [90.0, 40.0])
    (pv_o2, pv_co2), ok_v = invert((v[0], v[1]), [40.0, 46.0])
    return {"success": bool(ok and ok_a and ok_v), "pao2": pa_o2, "paco2": pa_co2,
            "pvo2": pv_o2, "pvco2": pv_co2, "cvo2": v[0], "cvco2": v[1], "message": msg}
