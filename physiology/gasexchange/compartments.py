"""Multi-compartment V/Q lung solved to a whole-body steady state.

The lung is true shunt (V/Q = 0), N perfused units carrying a log-normal
distribution of perfusion over V/Q (dispersion ``log_sd`` on the natural-log
scale, 50 units over +/-3.5 SD), an optional low-V/Q mode on the same 50 units
(obstructive lungs: perfusion of poorly ventilated units with little true shunt, the
bimodal pattern of MIGET studies in COPD and asthma), an optional second high-V/Q
mode (20 units; overdistended lung), and alveolar dead space (V/Q = infinity). Series dead space
(anatomic + apparatus) enters only the mixed-expired gas.

Each unit's end-capillary gas equals its alveolar gas. Its O2 and CO2 mass
balances are those of West 1969, with inspired ventilation from the N2 balance:

    CO2:  (VA/Q) PCO2 = K (CvCO2 - Cc'CO2)
    O2:   PIO2 (1 - (PO2 + PCO2)/Pdry) - (1 - FiO2) PO2 = (1 - FiO2) (K / (VA/Q)) (Cc'O2 - CvO2)

with ``K = 10 k`` (k = 0.863 mmHg L/mL at 37 degC, see :func:`btps_factor`) and
``Pdry = PB - PH2O``. The O2 balance is written multiplied through by
``(1 - FiO2)`` so that FiO2 = 1.0 needs no special case: it reduces to
``PO2 + PCO2 = Pdry`` (no N2 in the lung). Mixed-venous contents close the loop
by Fick with VO2, VCO2 and cardiac output given.

Numerics: one Newton iteration updates every unit's (PO2, PCO2) and the two
mixed-venous contents together. The Jacobian is block-diagonal per unit with a
two-column border for the mixed-venous unknowns; the border is eliminated by a
Schur complement, so each iteration costs a few operations per unit. The loop is
compiled (numba, :mod:`._newton`) and runs case by case, each case stopping as soon
as it has settled; the set-up before it and the results after it are vectorised
numpy. Content derivatives are analytic. The small dependence of capillary pH on
saturation (oxylabile term) is lagged one iteration; at convergence it is
exact.

Blood chemistry: Severinghaus 1979 curve on Kelman's virtual PO2 (O2), Kelman
1967 (CO2, Haldane effect), West/Wagner whole-blood buffer line for capillary
pH; the arterial pH reported is the in-vivo curve at fixed standard base excess
(:func:`physiology.bloodgas.acidbase.ph_invivo`).

References
----------
[1] West JB. Ventilation-perfusion inequality and overall gas exchange in
    computer models of the lung. Respir Physiol 1969;7:88-110 (from memory).
[2] Wagner PD, Saltzman HA, West JB. Measurement of continuous distributions of
    ventilation-perfusion ratios: theory. J Appl Physiol 1974;36:588-599.
[3] Riley RL, Cournand A. J Appl Physiol 1949;1:825-847 (ideal alveolar air).
[4] Berggren SM. Acta Physiol Scand 1942;4(Suppl 11):1-92 (shunt equation).
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, fields

import numpy as np

from .._checks import check_fio2, check_range
from ..bloodgas.acidbase import _ph_invivo
from ..bloodgas.oxygen import HUFNER_DEFAULT, O2_SOLUBILITY, _ellis, _sev
from .alveolar import btps_factor, water_vapour_pressure_antoine

__all__ = ["LungParameters", "SteadyState", "solve_steady_state", "DOMAIN",
           "N_MAIN_UNITS", "N_HIGH_UNITS", "blood_chemistry", "invert_contents", "warm_start"]

N_MAIN_UNITS = 50
N_HIGH_UNITS = 20
#: Unit grids over the standard-normal coordinate z of ln(V/Q), (main mode, high-V/Q mode). "full" is
#: the model (every forecast and the time course use it); "coarse" has a third of the units and is
#: used only inside the posterior sampler's tempering stages, whose draws are then corrected to the
#: full model's posterior (physiology.fitting.fit._posterior_draws), so it sets only how cheap that
#: correction is. Over 4,000 random cases of the domain the coarse grid's PaO2 and PaCO2 differ from the
#: full grid's by a median 0.01 and 0.04 measurement SD, 99th centiles 0.27 and 0.70 SD
#: (tests/test_gasexchange.py).
UNIT_GRIDS = {
    "full": (np.linspace(-3.5, 3.5, N_MAIN_UNITS), np.linspace(-3.0, 3.0, N_HIGH_UNITS)),
    "coarse": (np.linspace(-3.5, 3.5, 15), np.linspace(-3.0, 3.0, 9)),
}

#: Below this mixed-venous PO2 [mmHg] a fixed VO2 can no longer be extracted by tissue, so the
#: model's fixed-VO2 steady state is not physiological (critical PvO2 of roughly 15-25 mmHg;
#: from memory, chosen at the low end so that only clearly unsurvivable states are refused).
MIN_MIXED_VENOUS_PO2 = 15.0

#: Documented input domain: (low, high, unit). Values outside are refused.
DOMAIN = {
    "fio2": (0.21, 1.0, ""),
    "shunt": (0.0, 0.8, ""),
    "log_sd": (0.0, 2.5, ""),
    "alveolar_ventilation": (0.5, 30.0, "L/min"),
    "dead_space_fraction": (0.0, 0.8, ""),
    "cardiac_output": (1.0, 20.0, "L/min"),
    "vo2": (50.0, 800.0, "mL/min"),
    "vco2": (40.0, 700.0, "mL/min"),
    "hb": (3.0, 22.0, "g/dL"),
    "temperature": (30.0, 42.0, "degC"),
    "barometric": (450.0, 800.0, "mmHg"),
    "base_excess": (-30.0, 30.0, "mmol/L"),
    "series_ventilation": (0.0, 30.0, "L/min"),
    "high_vq_fraction": (0.0, 0.5, ""),
    "high_vq_ratio": (2.0, 100.0, ""),
    "high_vq_log_sd": (0.0, 1.5, ""),
    "hufner": (1.30, 1.40, "mL/g"),
    "low_vq_fraction": (0.0, 0.6, ""),
    "low_vq_ratio": (0.005, 0.5, ""),
}


@dataclass(frozen=True)
class LungParameters:
    """Inputs of the steady-state lung; each field a scalar or an array of shape (B,).

    Attributes
    ----------
    fio2 : inspired O2 fraction [fraction 0.21-1.0]
    shunt : true shunt, fraction of cardiac output [fraction]
    log_sd : dispersion of the perfusion distribution over ln(V/Q) [unitless]
    alveolar_ventilation : VA, all ventilation reaching alveoli incl. alveolar dead space [L/min BTPS]
    dead_space_fraction : share of VA going to unperfused alveoli [fraction]
    cardiac_output : Qt [L/min]
    vo2 : O2 consumption [mL/min STPD]
    vco2 : CO2 production [mL/min STPD]
    hb : haemoglobin [g/dL]
    temperature : body temperature [degC]
    barometric : barometric pressure [mmHg]
    base_excess : standard base excess, the metabolic state [mmol/L]
    series_ventilation : RR x series dead space (anatomic + apparatus) [L/min]
    high_vq_fraction : share of non-shunt perfusion in the high-V/Q mode [fraction]
    high_vq_ratio : centre of the high mode relative to the main mode [unitless]
    high_vq_log_sd : dispersion of the high mode [unitless]
    hufner : O2 per g Hb [mL/g]
    low_vq_fraction : share of non-shunt perfusion in a low-V/Q mode (obstructive lungs) [fraction]
    low_vq_ratio : centre of the low mode relative to the main mode [unitless]
    """

    fio2: object = 0.21
    shunt: object = 0.0
    log_sd: object = 0.0
    alveolar_ventilation: object = 4.3
    dead_space_fraction: object = 0.0
    cardiac_output: object = 5.0
    vo2: object = 250.0
    vco2: object = 200.0
    hb: object = 15.0
    temperature: object = 37.0
    barometric: object = 760.0
    base_excess: object = 0.0
    series_ventilation: object = 0.0
    high_vq_fraction: object = 0.0
    high_vq_ratio: object = 10.0
    high_vq_log_sd: object = 0.4
    hufner: object = HUFNER_DEFAULT
    low_vq_fraction: object = 0.0
    low_vq_ratio: object = 0.1

    def arrays(self) -> dict:
        """Validated inputs broadcast to a common 1-D batch shape (B,)."""
        values = [getattr(self, name) for name in _FIELD_NAMES]
        if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
            # Fast path for one case: check every bound at once; on any failure fall through to
            # the field-by-field checks, which word the message.
            x = np.array(values, dtype=float)
            if np.all(np.isfinite(x) & (x >= _LOW) & (x <= _HIGH)):
                return {name: x[i:i + 1].copy() for i, name in enumerate(_FIELD_NAMES)}, ()
        else:
            # Fast path for a batch: every field broadcast into one (fields, B) array and checked at once
            # (NaN fails both comparisons); on any failure, the field-by-field checks below word the message.
            try:
                columns = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in values))
            except (TypeError, ValueError):
                columns = None
            if columns is not None and columns[0].ndim == 1:
                x = np.stack(columns)
                if np.all((x >= _LOW[:, None]) & (x <= _HIGH[:, None])):
                    return dict(zip(_FIELD_NAMES, x)), columns[0].shape
        out = {}
        for f in fields(self):
            lo, hi, unit = DOMAIN[f.name]
            v = getattr(self, f.name)
            if f.name == "fio2":
                out[f.name] = check_fio2(v)
            else:
                out[f.name] = check_range(f.name, v, lo, hi, unit)
        shapes = [np.shape(v) for v in out.values()]
        try:
            shape = np.broadcast_shapes(*shapes)
        except ValueError:
            raise ValueError(f"LungParameters fields have incompatible shapes: {shapes}") from None
        if len(shape) > 1:
            raise ValueError(f"LungParameters fields must be scalars or 1-D arrays, got shape {shape}")
        n = shape[0] if shape else 1
        return {k: np.broadcast_to(v, (n,)).astype(float) for k, v in out.items()}, shape

    @property
    def is_batch(self) -> bool:
        return any(np.ndim(getattr(self, f.name)) > 0 for f in fields(self))


_FIELD_NAMES = tuple(f.name for f in fields(LungParameters))
_LOW = np.array([DOMAIN[k][0] for k in _FIELD_NAMES])
_HIGH = np.array([DOMAIN[k][1] for k in _FIELD_NAMES])


@dataclass(frozen=True)
class SteadyState:
    """Result of :func:`solve_steady_state`. Arrays have the batch shape of the inputs.

    Attributes (units in brackets)
    ------------------------------
    success : converged to a physiological steady state [bool]
    message : summary; ``reasons`` holds one per case ('' when it succeeded)
    pao2, paco2 [mmHg]; ph [pH units]; sao2 [fraction]
    pvo2, pvco2 [mmHg]; svo2 [fraction]
    cao2, cvo2, caco2, cvco2 [mL/dL]
    pe_co2 : mixed-expired PCO2 incl. series dead space [mmHg]
    petco2 : mixed alveolar PCO2, ventilation-weighted over all alveoli incl. alveolar dead space [mmHg];
        :func:`physiology.forecast.predict` places end-tidal PCO2 between it and PaCO2
    vd_vt : physiological dead-space fraction, Bohr-Enghoff from the model's expired gas [fraction]
    shunt : true shunt Qs/Qt [fraction]
    venous_admixture : Berggren at this FiO2, from ideal alveolar gas [fraction]
    overall_vq : VA / Qt [unitless]
    pf_ratio [mmHg]; alveolar_po2 : ideal, full alveolar gas equation [mmHg]; aa_gradient [mmHg]
    o2_uptake, co2_output : summed over units [mL/min STPD]
    unit_vq [unitless], unit_ventilation [L/min], unit_perfusion [L/min],
    unit_po2, unit_pco2 [mmHg] : the distribution, shape (..., units)
    iterations : Newton iterations used
    parameters : the inputs
    """

    success: np.ndarray
    message: str
    reasons: np.ndarray
    pao2: np.ndarray
    paco2: np.ndarray
    ph: np.ndarray
    sao2: np.ndarray
    pvo2: np.ndarray
    pvco2: np.ndarray
    svo2: np.ndarray
    cao2: np.ndarray
    cvo2: np.ndarray
    caco2: np.ndarray
    cvco2: np.ndarray
    pe_co2: np.ndarray
    petco2: np.ndarray
    vd_vt: np.ndarray
    shunt: np.ndarray
    venous_admixture: np.ndarray
    overall_vq: np.ndarray
    pf_ratio: np.ndarray
    alveolar_po2: np.ndarray
    aa_gradient: np.ndarray
    o2_uptake: np.ndarray
    co2_output: np.ndarray
    unit_vq: np.ndarray
    unit_ventilation: np.ndarray
    unit_perfusion: np.ndarray
    unit_po2: np.ndarray
    unit_pco2: np.ndarray
    iterations: int
    parameters: LungParameters = field(repr=False)


_PH40_SBE0 = float(_ph_invivo(np.array(40.0), np.array(0.0)))

# --- blood contents with analytic derivatives --------------------------------------------

_LN10 = np.log(10.0)
_LN20 = np.log(20.0)
_LN40 = np.log(40.0)
_BOHR = 0.40 * _LN10  # Kelman: d ln(virtual PO2) / d pH


class _Blood:
    """Per-case blood constants, shaped (B, 1) to broadcast over units."""

    def __init__(self, hb, temperature, offset, hufner):
        self.hb = hb
        self.hct = hb / 33.3
        self.t = temperature
        self.offset = offset
        self.cap = hufner * hb
        dt = 37.0 - temperature
        self.sol = 0.0307 + 0.00057 * dt + 0.00002 * dt * dt
        self.log_kelman_t = _LN10 * 0.024 * dt
        self.dpk_dp = 0.042 + 0.00139 * (38.0 - temperature)

    def contents(self, p, c, s_guess, derivatives=True):
        """O2 and CO2 contents [mL/dL] at PO2 ``p``, PCO2 ``c`` [mmHg]: (O2, CO2, S, pH), then with
        ``derivatives`` dO2/dp, dO2/dc, dCO2/dp, dCO2/dc (:func:`._newton.content_terms`, the same
        equations the compiled Newton loop uses)."""
        from ._newton import content_terms  # numba comes with it: at the first solve, not with the engine

        return content_terms(p, c, s_guess, self.hb, self.hct, self.t, self.offset, self.cap, self.sol,
                             self.log_kelman_t, self.dpk_dp, values_only=None if derivatives else True)

    def saturation_guess(self, p, c):
        """Saturation from the buffer line at S = 0.75 (within ~1e-2 of the coupled value)."""
        lnc = np.log(c)
        ph = 7.59 + self.offset + 0.003 * self.hb * 0.25 - 0.2741 * (lnc - _LN20)
        return _sev(p * np.exp(self.log_kelman_t + _BOHR * (ph - 7.4) + 0.06 * (_LN40 - lnc)))

    def contents_from_scratch(self, p, c, derivatives=True):
        """:meth:`contents` from the buffer-line saturation guess (one correction; relative error ~1e-7)."""
        return self.contents(p, c, self.saturation_guess(p, c), derivatives)

    def contents_exact(self, p, c, derivatives=True):
        """:meth:`contents` with the S-pH loop closed from scratch (two corrections, error ~1e-10)."""
        _o2, _co2, s, _ph = self.contents(p, c, self.saturation_guess(p, c), derivatives=False)
        return self.contents(p, c, s, derivatives)


# --- public helpers for the time-course model -----------------------------------------------------

def blood_chemistry(hb, temperature=37.0, base_excess=0.0, hufner=HUFNER_DEFAULT) -> _Blood:
    """Blood-content evaluator (same chemistry as the steady solver) for arrays of cases.

    Parameters broadcast against the arrays later passed to ``contents`` [g/dL, degC, mmol/L, mL/g].
    """
    hb = np.asarray(hb, dtype=float)
    sbe = np.asarray(base_excess, dtype=float)
    offset = np.where(sbe != 0, _ph_invivo(np.full(sbe.shape, 40.0), sbe) - _PH40_SBE0, 0.0)
    return _Blood(hb, np.asarray(temperature, dtype=float), offset, np.asarray(hufner, dtype=float))


def invert_contents(blood: _Blood, o2_target, co2_target, po2_guess, pco2_guess, tol=1e-9, max_iter=60):
    """PO2 and PCO2 [mmHg] of blood whose O2 and CO2 contents [mL/dL] are the targets.

    Vectorised Newton on the joint content functions (Bohr-Haldane coupling). Returns
    ``(po2, pco2, so2, converged)``.
    """
    p = np.array(po2_guess, dtype=float)
    c = np.array(pco2_guess, dtype=float)
    s = blood.saturation_guess(p, c)
    ok = np.zeros(p.shape, dtype=bool)
    for _ in range(max_iter):
        o2, co2, s_new, _ph, a, b, cc, d = blood.contents(p, c, s)
        r1, r2 = o2 - o2_target, co2 - co2_target
        s = s_new
        ok = (np.abs(r1) < tol * (1.0 + np.abs(o2_target))) & (np.abs(r2) < tol * (1.0 + np.abs(co2_target)))
        if np.all(ok):
            break
        det = a * d - b * cc
        p = np.clip(p - (d * r1 - b * r2) / det, 0.25 * p, 4.0 * p + 50.0)
        c = np.clip(c - (-cc * r1 + a * r2) / det, 0.25 * c, 4.0 * c + 20.0)
    return p, c, s, ok


def _distribution(a, units="full"):
    """Unit V/Q, perfusion and ventilation, each (B, N); N = 50, or 70 with a high-V/Q mode (on the
    full grid; 15 or 24 on the coarse one)."""
    n = a["fio2"].shape[0]
    z_main, z_high = UNIT_GRIDS[units]
    sd = a["log_sd"][:, None]
    w_main = np.exp(-0.5 * z_main ** 2)
    w_main = np.broadcast_to(w_main / w_main.sum(), (n, z_main.size))
    if np.any(a["low_vq_fraction"] > 0):
        # A low-V/Q mode on the same units (so the time-course model, which follows these 50 units, sees
        # it too): extra perfusion centred at low_vq_ratio x the main mode's centre, half the main mode's
        # dispersion wide, its centre kept on the grid (at most 3 SD below the main mode).
        z_low = np.clip(np.log(a["low_vq_ratio"]) / np.maximum(sd[:, 0], 0.05), -3.0, 0.0)[:, None]
        w_low = np.exp(-0.5 * ((z_main - z_low) / 0.5) ** 2)
        w_low = w_low / w_low.sum(axis=1, keepdims=True)
        f_low = a["low_vq_fraction"][:, None]
        w_main = (1.0 - f_low) * w_main + f_low * w_low
    shape_main = np.exp(sd * z_main)
    if np.any(a["high_vq_fraction"] > 0):
        f2 = a["high_vq_fraction"][:, None]
        w_high = np.exp(-0.5 * z_high ** 2)
        w_high = w_high / w_high.sum()
        weights = np.concatenate([(1.0 - f2) * w_main, f2 * w_high], axis=1)
        shape = np.concatenate([shape_main, a["high_vq_ratio"][:, None]
                                * np.exp(a["high_vq_log_sd"][:, None] * z_high)], axis=1)
    else:
        weights = np.array(w_main)
        shape = shape_main
    q_perfused = (1.0 - a["shunt"]) * a["cardiac_output"]
    va_perfused = (1.0 - a["dead_space_fraction"]) * a["alveolar_ventilation"]
    scale = va_perfused / (q_perfused * np.sum(weights * shape, axis=1))
    vq = scale[:, None] * shape
    perfusion = q_perfused[:, None] * weights
    return vq, weights, perfusion, perfusion * vq


def _solve_arrays(a: dict, tol: float, max_iter: int, start: dict | None = None, units: str = "full") -> dict:
    """Solve one chunk of validated, broadcast inputs; return per-case arrays.

    Work arrays have N + 2 columns: the N units, then the arterial and the mixed-venous
    blood, whose PO2/PCO2 are found by inverting their contents inside the same Newton
    loop (so one content evaluation per iteration serves all three jobs).

    ``start`` (optional) holds a Newton state to start from instead of the standard guesses:
    ``p``, ``c`` (n, N + 2) [mmHg], ``cvo2``, ``cvco2`` (n,) [mL/dL]; rows with any non-finite
    value start from the standard guesses. The returned ``"_state"`` is the last iterate in that
    form (a case not yet converged can be continued from it). The iterations are
    :func:`._newton.newton`'s: each case stops as soon as it has settled (converged or failed).
    """
    n = a["fio2"].shape[0]
    t = a["temperature"]
    k_btps = btps_factor(t)
    k_flux = (10.0 * k_btps)[:, None]
    pdry = (a["barometric"] - water_vapour_pressure_antoine(t))[:, None]
    fio2 = a["fio2"][:, None]
    pio2 = fio2 * pdry
    sbe = a["base_excess"]
    offset = (_ph_invivo(np.full(n, 40.0), sbe) - _PH40_SBE0) if np.any(sbe != 0) else np.zeros(n)
    blood = _Blood(a["hb"][:, None], t[:, None], offset[:, None], a["hufner"][:, None])

    vq, w, perfusion, ventilation = _distribution(a, units)
    nu = vq.shape[1]
    ns = 1.0 - a["shunt"]
    shunt = a["shunt"]
    fick_o2 = a["vo2"] / (10.0 * a["cardiac_output"])
    fick_co2 = a["vco2"] / (10.0 * a["cardiac_output"])
    ko2 = (1.0 - fio2) * (k_flux / vq)

    # Start: arterial PCO2 from the alveolar ventilation equation; mixed venous from a Riley
    # (ideal alveolus + shunt) estimate through Fick, on the standard curves.
    va_perf = ((1.0 - a["dead_space_fraction"]) * a["alveolar_ventilation"])[:, None]
    pa_co2_guess = np.clip(k_btps[:, None] * a["vco2"][:, None] / va_perf, 15.0, 150.0)
    r_guess = np.clip(a["vco2"] / a["vo2"], 0.5, 1.5)[:, None]
    pa_ideal = np.maximum(pio2 - pa_co2_guess * (fio2 + (1.0 - fio2) / r_guess), 30.0)
    cc_ideal = blood.cap * _sev(pa_ideal) + O2_SOLUBILITY * pa_ideal
    cv_guess = cc_ideal - (fick_o2 / np.maximum(ns, 0.2))[:, None]
    sv_guess = np.clip((cv_guess - O2_SOLUBILITY * 35.0) / blood.cap, 0.2, 0.9)
    pv_o2 = _ellis(sv_guess)
    pv_co2 = pa_co2_guess + (fick_co2[:, None] / (0.45 * blood.hb / 15.0 + 0.1))
    cvo2, cvco2, _s, _ph = blood.contents(pv_o2, pv_co2, np.full((n, 1), 0.75), derivatives=False)
    cvo2, cvco2 = cvo2[:, 0], cvco2[:, 0]
    # Units start from linearised dissociation curves (CO2 slope 0.45, O2 slope 0.05 mL/dL/mmHg).
    beta = 0.45 * blood.hb / 15.0 + 0.1
    cu = k_flux * beta * pv_co2 / (vq + k_flux * beta)
    b_o2 = 0.05 * blood.hb / 15.0
    num = pio2 * (1.0 - cu / pdry) + ko2 * b_o2 * pv_o2
    den = pio2 / pdry + (1.0 - fio2) + ko2 * b_o2
    pu = np.clip(num / den, pv_o2, np.maximum(pio2 - cu, pv_o2 + 1.0))
    cu = np.maximum(cu, 0.5)
    p = np.concatenate([pu, np.sum(w * pu, axis=1, keepdims=True), pv_o2], axis=1)
    c = np.concatenate([cu, np.sum(w * cu, axis=1, keepdims=True), pv_co2], axis=1)
    with_high = sum(z.size for z in UNIT_GRIDS[units]) + 2
    if (start is not None and start["p"].shape[0] == p.shape[0] and start["p"].shape[1] == with_high
            and with_high > p.shape[1]):
        # A state from a batch with the high-V/Q mode, continued without it: its main units and blood.
        start = dict(start, p=np.concatenate([start["p"][:, :nu], start["p"][:, -2:]], axis=1),
                     c=np.concatenate([start["c"][:, :nu], start["c"][:, -2:]], axis=1))
    if start is not None and start["p"].shape == p.shape:
        warm = (np.all(np.isfinite(start["p"]) & (start["p"] > 0), axis=1)
                & np.all(np.isfinite(start["c"]) & (start["c"] > 0), axis=1)
                & np.isfinite(start["cvo2"]) & np.isfinite(start["cvco2"]))
        p = np.where(warm[:, None], start["p"], p)
        c = np.where(warm[:, None], start["c"], c)
        cvo2 = np.where(warm, start["cvo2"], cvo2)
        cvco2 = np.where(warm, start["cvco2"], cvco2)
        s_lag = np.where(warm[:, None], blood.saturation_guess(p, c), 0.9)
    else:
        s_lag = np.full_like(p, 0.9)
    o2 = np.empty_like(p)
    co2 = np.empty_like(p)
    s = np.empty_like(p)
    dpu = np.empty_like(vq)
    dcu = np.empty_like(vq)
    deriv = np.empty((n, 4, nu))
    bderiv = np.empty((n, 4, 2))
    flags = np.zeros((n, 7))
    case = np.stack([k_flux[:, 0], pdry[:, 0], a["fio2"], ns, shunt, fick_o2, fick_co2, 0.02 * blood.cap[:, 0]],
                    axis=1)
    chem = np.concatenate([np.broadcast_to(x, (n, 1)) for x in (blood.hb, blood.hct, blood.t, blood.offset,
                                                                blood.cap, blood.sol, blood.log_kelman_t,
                                                                blood.dpk_dp)], axis=1)
    p, c = np.ascontiguousarray(p, dtype=float), np.ascontiguousarray(c, dtype=float)
    cvo2, cvco2 = np.array(cvo2, dtype=float), np.array(cvco2, dtype=float)
    s_lag = np.ascontiguousarray(s_lag, dtype=float)
    _newton_rows(np.ascontiguousarray(vq), np.ascontiguousarray(w), case, chem, p, c, cvo2, cvco2, s_lag,
                 float(tol), int(max_iter), o2, co2, s, dpu, dcu, deriv, bderiv, flags)
    dv1, dv2 = flags[:, 0], flags[:, 1]
    it = int(flags[:, 3].max()) if n else 0
    converged, collapsed = flags[:, 4] == 1.0, flags[:, 6] == 1.0
    uo2p, uo2c, uco2p, uco2c = deriv[:, 0], deriv[:, 1], deriv[:, 2], deriv[:, 3]
    b11, b12, b21, b22 = bderiv[:, 0], bderiv[:, 1], bderiv[:, 2], bderiv[:, 3]

    # The accepted state is the one reached by the last (small, full) Newton step, whose start had small
    # residuals (_newton.RESIDUAL_MAX).
    last_iterate = {"p": p, "c": c, "cvo2": cvo2, "cvco2": cvco2}
    # Contents at the accepted state, to first order from the last derivatives (error ~ step^2).
    uo2 = o2[:, :nu] + uo2p * dpu + uo2c * dcu
    uco2 = co2[:, :nu] + uco2p * dpu + uco2c * dcu
    ca_o2 = ns * np.sum(w * uo2, axis=1) + shunt * cvo2
    ca_co2 = ns * np.sum(w * uco2, axis=1) + shunt * cvco2
    # The arterial and venous Newton steps aimed at the previous targets; move them to the new ones.
    t1 = np.stack([ns * np.sum(w * (uo2p * dpu + uo2c * dcu), axis=1) + shunt * dv1, dv1], axis=1)
    t2 = np.stack([ns * np.sum(w * (uco2p * dpu + uco2c * dcu), axis=1) + shunt * dv2, dv2], axis=1)
    bdet = b11 * b22 - b12 * b21
    p = p.copy()
    c = c.copy()
    p[:, nu:] += (b22 * t1 - b12 * t2) / bdet
    c[:, nu:] += (-b21 * t1 + b11 * t2) / bdet
    cu = c[:, :nu]
    pa_o2, pv_o2 = p[:, nu], p[:, nu + 1]
    pa_co2, pv_co2 = c[:, nu], c[:, nu + 1]
    s = s + 0.0
    sa, sv = s[:, nu], s[:, nu + 1]

    reasons = np.full(n, "", dtype=object)
    reasons[~converged] = _NOT_CONVERGED
    reasons[collapsed & ~converged] = ("no physiological steady state: the lung cannot deliver this VO2 "
                                       "(mixed-venous O2 content falls to zero)")
    ok = converged.copy()
    hypoxic = ok & (pv_o2 < MIN_MIXED_VENOUS_PO2)
    reasons[hypoxic] = (f"no physiological steady state: VO2 cannot be delivered (mixed-venous PO2 would fall "
                        f"below {MIN_MIXED_VENOUS_PO2:g} mmHg)")
    ok &= ~hypoxic
    very_high_co2 = ok & (pa_co2 > 250.0)
    reasons[very_high_co2] = "no physiological steady state: CO2 cannot be cleared (PaCO2 above 250 mmHg)"
    ok &= ~very_high_co2

    va = a["alveolar_ventilation"]
    ve = va + a["series_ventilation"]
    alveolar_co2_flow = np.sum(ventilation * cu, axis=1)  # L/min x mmHg
    pe_co2 = alveolar_co2_flow / ve
    petco2 = alveolar_co2_flow / va
    ph_a = _ph_invivo(np.where(ok, pa_co2, 40.0), sbe)
    r_exchange = np.clip(a["vco2"] / a["vo2"], 0.5, 1.5)
    f = a["fio2"]
    pa_ideal = f * pdry[:, 0] - pa_co2 * (f + (1.0 - f) / r_exchange)
    blood1 = _Blood(a["hb"], t, offset, a["hufner"])
    cc_ideal, _cco2, _si, _phi = blood1.contents(np.maximum(pa_ideal, 1.0), np.maximum(pa_co2, 1.0), sa,
                                                derivatives=False)
    with np.errstate(divide="ignore", invalid="ignore"):
        admixture = (cc_ideal - ca_o2) / (cc_ideal - cvo2)
    o2_uptake = 10.0 * np.sum(perfusion * (uo2 - cvo2[:, None]), axis=1)
    co2_output = 10.0 * np.sum(perfusion * (cvco2[:, None] - uco2), axis=1)
    return {
        "ok": ok, "reasons": reasons, "it": np.int64(it),
        "pao2": pa_o2, "paco2": pa_co2, "ph": ph_a, "sao2": sa, "pvo2": pv_o2, "pvco2": pv_co2, "svo2": sv,
        "cao2": ca_o2, "cvo2": cvo2, "caco2": ca_co2, "cvco2": cvco2, "pe_co2": pe_co2, "petco2": petco2,
        "shunt": shunt, "venous_admixture": admixture, "overall_vq": va / a["cardiac_output"],
        "fio2": f, "alveolar_po2": pa_ideal, "o2_uptake": o2_uptake, "co2_output": co2_output,
        "unit_vq": vq, "unit_ventilation": ventilation, "unit_perfusion": perfusion,
        "unit_po2": p[:, :nu], "unit_pco2": cu, "_state": last_iterate,
    }


_NOT_CONVERGED = "did not converge within the iteration limit"

#: Rows from which a batch's Newton loop is split between this thread and one helper thread (when the
#: process may run on two or more cores). The compiled loop releases the interpreter lock and its rows
#: are independent, so the halves run at once and give the same numbers; below this size the hand-over
#: (~0.1 ms) would cost more than it saves.
PARALLEL_MIN_ROWS = 64
_helper = []
_helper_lock = threading.Lock()


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # not on Linux
        return os.cpu_count() or 1


def _newton_rows(vq, w, case, chem, p, c, cvo2, cvco2, s_lag, tol, max_iter,
                 o2, co2, s, dpu, dcu, deriv, bderiv, flags):
    """:func:`._newton.newton` on every row; a large batch's second half on the helper thread."""
    from ._newton import newton  # numba: imported at the first solve, not with the engine (DEVELOPERS.md)

    rows = (vq, w, case, chem, p, c, cvo2, cvco2, s_lag)
    outs = (o2, co2, s, dpu, dcu, deriv, bderiv, flags)
    n = vq.shape[0]
    split_rows(lambda lo, hi: newton(*(x[lo:hi] for x in rows), tol, max_iter, *(x[lo:hi] for x in outs)), n)


def split_rows(work, n: int) -> None:
    """``work(lo, hi)`` on rows ``[0, n)``: the second half on the helper thread when ``n`` reaches
    :data:`PARALLEL_MIN_ROWS` and the process may use two cores, else all here. ``work`` must write only
    its own rows and release the interpreter lock for most of its time (compiled ``nogil`` loops). If
    this thread's half fails, the helper's half finishes before the error goes up."""
    if n < PARALLEL_MIN_ROWS or _cores() < 2:
        work(0, n)
        return
    with _helper_lock:
        if not _helper:
            _helper.append(ThreadPoolExecutor(max_workers=1, thread_name_prefix="ventcast-lung"))
    h = n // 2
    second = _helper[0].submit(work, h, n)
    try:
        work(0, h)
    except BaseException:
        second.exception()  # the helper still writes into these arrays: let it finish first
        raise
    second.result()


def _concatenate(parts: list) -> dict:
    """Join chunk results; a chunk without a high-V/Q mode has fewer unit columns, pad it with zeros."""
    width = max(pt["unit_vq"].shape[1] for pt in parts)
    out = {}
    for k in parts[0]:
        if k == "it":
            out[k] = max(pt["it"] for pt in parts)
        elif k == "_state":
            out[k] = {j: (np.concatenate([_widen_state(pt[k][j], width) for pt in parts])
                          if parts[0][k][j].ndim == 2 else np.concatenate([pt[k][j] for pt in parts]))
                      for j in parts[0][k]}
        elif parts[0][k].ndim == 2:
            out[k] = np.concatenate([np.pad(pt[k], ((0, 0), (0, width - pt[k].shape[1]))) for pt in parts])
        else:
            out[k] = np.concatenate([pt[k] for pt in parts])
    return out


def _widen_state(x, width: int):
    """A Newton state (units, then arterial and mixed-venous columns) widened to ``width`` units: the
    missing units (a chunk without a high-V/Q mode beside one with it) are NaN, the blood stays last."""
    missing = width + 2 - x.shape[1]
    if missing <= 0:
        return x
    return np.concatenate([x[:, :-2], np.full((x.shape[0], missing), np.nan), x[:, -2:]], axis=1)


def _solve_batch(a: dict, tol: float, max_iter: int, start: dict | None, units: str = "full") -> dict:
    """Chunks of at most CHUNK cases (bounded work arrays), joined."""
    n = a["fio2"].shape[0]
    parts = [_solve_arrays({k: v[lo:lo + CHUNK] for k, v in a.items()}, tol, max_iter,
                           None if start is None else {k: v[lo:lo + CHUNK] for k, v in start.items()}, units)
             for lo in range(0, n, CHUNK)]
    return parts[0] if len(parts) == 1 else _concatenate(parts)


def warm_start(previous: "SteadyState") -> dict:
    """A Newton starting state from an earlier solution of a batch of the same shape (for
    :func:`solve_steady_state`'s ``start``): unit, arterial and mixed-venous gas tensions and the
    mixed-venous contents. Failed cases (NaN) start from the standard guesses."""
    unit_p, unit_c = np.atleast_2d(previous.unit_po2), np.atleast_2d(previous.unit_pco2)
    col = lambda x: np.atleast_1d(np.asarray(x, dtype=float))[:, None]  # noqa: E731
    return {"p": np.concatenate([unit_p, col(previous.pao2), col(previous.pvo2)], axis=1),
            "c": np.concatenate([unit_c, col(previous.paco2), col(previous.pvco2)], axis=1),
            "cvo2": np.atleast_1d(np.asarray(previous.cvo2, dtype=float)),
            "cvco2": np.atleast_1d(np.asarray(previous.cvco2, dtype=float))}


#: Newton iteration limit of a steady-state solve (the forecast's, and the fit's compiled forward model's).
NEWTON_MAX_ITER = 80

#: Cases per chunk: bounds the (chunk x units) work arrays of a large batch (a plan screens tens of
#: thousands of settings). 2048 holds a six-gas fit's 1,200 sampler rows in one chunk: joining chunks
#: cost more than it saved (six-gas fit 1.36 -> 1.06 s, medians of 5 interleaved runs against 512; a
#: batch of 10,000 cases 0.31 -> 0.28 s).
CHUNK = 2048


def solve_steady_state(params: LungParameters, tol: float = 1e-4, max_iter: int = NEWTON_MAX_ITER,
                       start: dict | None = None, units: str = "full") -> SteadyState:
    """Solve the V/Q lung and body to steady state for one case or a batch.

    Parameters
    ----------
    params : LungParameters
        Scalars (one case) or arrays of shape (B,) (a batch).
    tol : float
        Newton-step acceptance [unitless]: the iteration stops after a full (undamped,
        unclipped) step smaller than ``tol`` relative to 1 + each unknown; in the
        quadratic regime the state reached is accurate to about ``tol**2``.
    max_iter : int
        Newton iteration limit; a case that has not converged by then fails.
    start : dict, optional
        Newton starting state from :func:`warm_start` of an earlier solution with the same batch
        shape and units (e.g. the current draws of a sampler, whose proposals lie close): the same
        solution is reached, to the accuracy above, in fewer iterations.
    units : {"full", "coarse"}
        The unit grid (:data:`UNIT_GRIDS`). "coarse" is an approximation for the posterior sampler's
        tempering stages only; every forecast uses "full".

    Returns
    -------
    SteadyState
        Failed cases have ``success`` False, a reason, and NaN in every number:
        never a plausible-looking value.
    """
    a, shape = params.arrays()
    n = a["fio2"].shape[0]
    if start is not None and np.atleast_1d(start["cvo2"]).shape[0] != n:
        raise ValueError(f"warm start has {np.atleast_1d(start['cvo2']).shape[0]} cases for a batch of {n}")
    if units not in UNIT_GRIDS:
        raise ValueError(f"units must be one of {sorted(UNIT_GRIDS)}, not {units!r}")
    r = _solve_batch(a, tol, max_iter, start, units=units)
    ok, reasons, it = r["ok"], r["reasons"], r["it"]
    safe = np.where(ok, 1.0, np.nan)
    n_fail = int(np.sum(~ok))
    if n_fail == 0:
        message = f"converged in {it} iterations"
    elif n == 1:
        message = str(reasons[0])
    else:
        kinds = sorted(set(reasons[~ok]))
        message = f"{n_fail} of {n} cases failed: " + "; ".join(kinds)

    def out(x):
        x = np.asarray(x, dtype=float) * (safe if np.ndim(x) == 1 else safe[:, None])
        return x.reshape(shape + x.shape[1:]) if shape else x[0]

    return SteadyState(
        success=ok.reshape(shape) if shape else np.bool_(ok[0]),
        message=message,
        reasons=reasons.reshape(shape) if shape else reasons[0],
        pao2=out(r["pao2"]), paco2=out(r["paco2"]), ph=out(r["ph"]), sao2=out(r["sao2"]),
        pvo2=out(r["pvo2"]), pvco2=out(r["pvco2"]), svo2=out(r["svo2"]),
        cao2=out(r["cao2"]), cvo2=out(r["cvo2"]), caco2=out(r["caco2"]), cvco2=out(r["cvco2"]),
        pe_co2=out(r["pe_co2"]), petco2=out(r["petco2"]),
        vd_vt=out((r["paco2"] - r["pe_co2"]) / r["paco2"]),
        shunt=out(r["shunt"]), venous_admixture=out(r["venous_admixture"]), overall_vq=out(r["overall_vq"]),
        pf_ratio=out(r["pao2"] / r["fio2"]), alveolar_po2=out(r["alveolar_po2"]),
        aa_gradient=out(r["alveolar_po2"] - r["pao2"]),
        o2_uptake=out(r["o2_uptake"]), co2_output=out(r["co2_output"]),
        unit_vq=out(r["unit_vq"]), unit_ventilation=out(r["unit_ventilation"]),
        unit_perfusion=out(r["unit_perfusion"]), unit_po2=out(r["unit_po2"]), unit_pco2=out(r["unit_pco2"]),
        iterations=int(it), parameters=params,
    )

