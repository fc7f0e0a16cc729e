"""Time course of blood gases after a setting change or a patient event.

State of one case (2N + 8 numbers):

* each lung unit's alveolar PO2 and PCO2 (N = 50 units, the same units as the
  steady-state engine): the **lung gas stores**. Unit i holds gas volume
  ``V_i = V_lung VI_i / sum(VI)`` (volume shared in proportion to ventilation), where
  ``V_lung`` is the end-expiratory lung volume at the current PEEP plus half a tidal
  volume; N2 is the remainder of the dry-gas pressure, and expired alveolar
  ventilation follows from the total-gas balance, ``VA_i = VI_i - (10 k Q_i / Pdry)
  (O2 uptake - CO2 output per unit of blood)``, so FiO2 = 1.0 needs no special case.
* **body stores** in two tissue compartments (fast: blood-rich organs; slow: muscle
  and the rest), each with its venous-blood PO2 and PCO2; CO2 stored in tissue
  (capacity per kg and mmHg) and in venous blood, O2 in venous blood (Farhi & Rahn
  1955; Cherniack et al. 1966);
* the **mixed-venous blood in transit** to the lung (O2 and CO2 contents; a
  well-mixed volume, so a circulation delay of ``V_transit / Qt``);
* the **open fraction** of the recruitable lung, relaxing to its new value with
  separate time constants for recruitment and derecruitment;
* cumulative **exhaled CO2** (for the CO2 balance).

Arterial blood is the perfusion-weighted mix of unit end-capillary blood and shunt;
it reaches the tissues without delay. Within one segment (constant settings and
patient) the inputs are those of the target steady state: per-unit inspired
ventilation and perfusion shares, cardiac output, VO2 and VCO2. At equilibrium the
balances are exactly those of :mod:`physiology.gasexchange.compartments`, so a long
course ends at the steady-state engine's answer.

Slow and fast units: real lungs do not turn their gas over at one rate. Unit i's share of the lung
volume is its share of inspired ventilation times ``exp(sd z_i - sd^2/2)`` (normalised), where
``sd`` is the patient's ``specific_ventilation_sd`` and ``z_i`` are standard-normal quantiles paired
with the V/Q units in a fixed scrambled order (independent of V/Q: a unit of any V/Q ratio can be
slow). Obstructive lungs have the wider spread (multiple-breath washout: a large lung clearance
index). With sd = 0 every unit has the time constant V_lung / VA.

Simplifications (documented, not hidden): the lung volume, cardiac output and the
mechanics move with a setting change at once (they settle within breaths and beats);
recruitment changes the shunt over minutes but the tidal mechanics shown are those of
the new steady state; arterial transit to the tissues is instantaneous.

References
----------
[1] Farhi LE, Rahn H. Gas stores of the body and the unsteady state. J Appl Physiol
    1955;7:472-484 (total CO2 store ~1.5 mL/kg/mmHg in dogs, about two thirds in tissue).
[2] Cherniack NS, Longobardo GS, Staw I, Heymann M. Dynamics of carbon dioxide stores
    changes following an alteration in ventilation. J Appl Physiol 1966;21:785-793
    (fast and slow stores).
[3] Cakar N, Tugrul M, Demirarslan A, et al. Time required for partial pressure of
    arterial oxygen equilibration during mechanical ventilation after a step change in
    fractional inspired oxygen concentration. Intensive Care Med 2001;27:655-659.
[4] Katz JA et al. Anesthesiology 1981;54:9-16; Garnero A et al. Crit Care 2015;19:340
    (recruitment over minutes after a PEEP step; time constants from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from scipy.integrate import BDF, solve_ivp
from scipy.sparse.linalg import splu
from scipy.special import erfinv

from ..bloodgas.acidbase import _ph_invivo
from ..forecast import PatientModel, Prediction, predict
from ..gasexchange.alveolar import btps_factor, water_vapour_pressure_antoine
from ..gasexchange.compartments import N_MAIN_UNITS, blood_chemistry, invert_contents
from ..measurement import measurement_sd
from ..mechanics.ventilator import Settings

__all__ = ["BodyStores", "Course", "rhs", "simulate", "Change", "time_to_fraction"]

N = N_MAIN_UNITS
#: Standard-normal quantiles of the units' specific-ventilation factors, in a fixed scrambled order
#: (seeded permutation) so that the factor is independent of the unit's V/Q ratio.
_Z_SPECIFIC = np.sqrt(2.0) * erfinv(
    2.0 * (np.arange(N) + 0.5) / N - 1.0)[np.random.default_rng(20261203).permutation(N)]
S = 2 * N + 8  # state length of one case
I_TP, I_TC, I_CVO2, I_CVCO2, I_OPEN, I_EXH = 2 * N, 2 * N + 2, 2 * N + 4, 2 * N + 5, 2 * N + 6, 2 * N + 7


@dataclass(frozen=True)
class BodyStores:
    """Body-store constants (per kg of body weight unless stated).

    fast_flow_fraction, fast_metabolic_fraction : share of cardiac output and of VO2/VCO2 of the fast
        compartment [fraction] (blood-rich organs take about three quarters of resting output; from memory)
    fast_tissue_co2, slow_tissue_co2 : tissue CO2 capacity [mL/kg/mmHg]; together ~1.0, the tissue part
        of Farhi & Rahn's 1.5 mL/kg/mmHg [1], split to give Cherniack's fast and slow phases [2]
    fast_venous_blood, slow_venous_blood, transit_blood : venous blood volumes [L/kg] (~70 mL/kg in all,
        two thirds venous; from memory)
    recruitment_tau, derecruitment_tau : open-fraction time constants [min] (3 and 1; from memory, [4])
    lung_volume_zeep_l : end-expiratory lung volume at zero PEEP of fully aerated lung [L] (supine,
        sedated adult ~1.8 L; ARDS lower; from memory)
    """

    fast_flow_fraction: float = 0.70
    fast_metabolic_fraction: float = 0.6
    fast_tissue_co2: float = 0.10
    slow_tissue_co2: float = 0.25
    fast_venous_blood: float = 0.035
    slow_venous_blood: float = 0.015
    transit_blood: float = 0.008
    recruitment_tau: float = 3.0
    derecruitment_tau: float = 1.0
    lung_volume_zeep_l: float = 1.8


@dataclass(frozen=True)
class Change:
    """A change at ``minute``: new ``settings`` and/or patient-model changes (``patient`` dict),
    or ``apnoea=True`` (no ventilation; the airway stays open to the inspired gas)."""

    minute: float
    settings: Settings | None = None
    patient: dict | None = None
    apnoea: bool = False
    label: str = ""


@dataclass(frozen=True)
class Course:
    """Result of :func:`simulate`; arrays are (T,) for one case or (B, T) for a batch.

    minutes [min]; pao2, paco2, pvo2, petco2 [mmHg]; ph [pH units]; sao2 [fraction]; vd_vt [fraction];
    shunt, open_fraction [fraction]; cardiac_output [L/min]; t90_pao2, t90_paco2 [min] (time to 90 % of the
    change of the last segment); recheck_after_min [min] (the later 90 % time of PaO2 and PaCO2, counting
    only a change larger than one measurement SD of the quantity); co2_balance_error [fraction of CO2 moved];
    final : the steady-state Prediction of the last segment; success, message.
    """

    success: np.ndarray
    message: str
    minutes: np.ndarray
    pao2: np.ndarray
    paco2: np.ndarray
    ph: np.ndarray
    sao2: np.ndarray
    pvo2: np.ndarray
    petco2: np.ndarray
    vd_vt: np.ndarray
    shunt: np.ndarray
    open_fraction: np.ndarray
    cardiac_output: np.ndarray
    t90_pao2: np.ndarray
    t90_paco2: np.ndarray
    recheck_after_min: np.ndarray
    co2_balance_error: np.ndarray
    final: Prediction = field(repr=False)
    states: np.ndarray = field(repr=False)


# --- segment parameters ---------------------------------------------------------------------------

def _segment(pred: Prediction, patient: PatientModel, body: BodyStores, weight_kg, apnoea: bool) -> dict:
    """Inputs of one constant segment, from its target steady state; arrays shaped (B, 1) or (B, N)."""
    g = pred.gas
    b = np.atleast_1d(np.asarray(g.pao2)).shape[0]

    def col(x):
        return np.broadcast_to(np.asarray(x, dtype=float), (b,)).reshape(b, 1).copy()

    t = col(patient.temperature)
    k = btps_factor(t)
    pdry = col(patient.barometric) - water_vapour_pressure_antoine(t)
    fio2 = col(pred.settings.fio2)
    blood = blood_chemistry(col(patient.hb), t, col(patient.base_excess))
    q_unit = np.atleast_2d(g.unit_perfusion)[:, :N]
    va_unit = np.atleast_2d(g.unit_ventilation)[:, :N]
    p_unit, c_unit = np.atleast_2d(g.unit_po2)[:, :N], np.atleast_2d(g.unit_pco2)[:, :N]
    o2, co2, _s, _ph = blood.contents_exact(p_unit, c_unit, derivatives=False)
    cvo2, cvco2 = col(g.cvo2), col(g.cvco2)
    gfac = 10.0 * k * q_unit / pdry
    vi_unit = va_unit + gfac * ((o2 - cvo2) - (cvco2 - co2))
    co = col(pred.cardiac_output)
    shunt_now = col(pred.shunt)
    ns = 1.0 - shunt_now
    w = q_unit / (ns * co)  # perfusion shares of the units (sum 1)
    br = pred.breathing
    v_lung = (body.lung_volume_zeep_l * col(br.aerated_fraction) + col(br.end_expiratory_volume_ml) / 1000.0
              + 0.5 * col(br.vt_ml) / 1000.0)
    sv_sd = col(patient.specific_ventilation_sd)
    share = vi_unit * np.exp(sv_sd * _Z_SPECIFIC[None, :] - 0.5 * sv_sd ** 2)
    v_unit = np.maximum(v_lung * share / np.sum(share, axis=1, keepdims=True), 1e-6)
    mech = patient.mechanics
    shunt_closed = col(np.asarray(patient.recruitable_shunt_ratio) * np.asarray(mech.recruitable))
    wt = col(weight_kg)
    qf = body.fast_flow_fraction
    mf = body.fast_metabolic_fraction
    return {
        "b": b, "k": k, "pdry": pdry, "pio2": fio2 * pdry, "blood": blood,
        "w": w, "vi": vi_unit, "v": v_unit, "co": co,
        "shunt_open": shunt_now - shunt_closed * (1.0 - col(br.open_fraction)),  # shunt with all open
        "shunt_closed": shunt_closed,
        "f_target": col(br.open_fraction),
        "q": np.concatenate([qf * co, (1 - qf) * co], axis=1),
        "vo2": np.concatenate([mf * col(patient.vo2), (1 - mf) * col(patient.vo2)], axis=1),
        "vco2": np.concatenate([mf * col(patient.vco2), (1 - mf) * col(patient.vco2)], axis=1),
        "ktis": np.concatenate([body.fast_tissue_co2 * wt, body.slow_tissue_co2 * wt], axis=1),
        "vb": np.concatenate([body.fast_venous_blood * wt, body.slow_venous_blood * wt], axis=1),
        "vd": body.transit_blood * wt,
        "tau_up": body.recruitment_tau, "tau_down": body.derecruitment_tau,
        "apnoea": apnoea, "dead_space_va": col(g.parameters.alveolar_ventilation) * col(
            g.parameters.dead_space_fraction) * (0.0 if apnoea else 1.0),
        "ve": col(pred.breathing.minute_ventilation) * (0.0 if apnoea else 1.0),
        "et_share": col(patient.end_tidal_share),
    }


def _unpack(x, b):
    X = x.reshape(b, S)
    return (X[:, :N], X[:, N:2 * N], X[:, I_TP:I_TP + 2], X[:, I_TC:I_TC + 2], X[:, I_CVO2:I_CVO2 + 1],
            X[:, I_CVCO2:I_CVCO2 + 1], X[:, I_OPEN:I_OPEN + 1])


def _fluxes(x, u, derivatives):
    """Everything the right-hand side and its Jacobian share."""
    b = u["b"]
    P, C, TP, TC, cvo2, cvco2, f = _unpack(x, b)
    shunt = u["shunt_open"] + u["shunt_closed"] * (1.0 - f)
    ns = 1.0 - shunt
    q = ns * u["co"] * u["w"]
    blood = u["blood"]
    # The units' contents (their derivatives only for the Jacobian) and the two tissue compartments'
    # (always with derivatives: their mass matrix sets the tissue rates).
    uo = blood.contents_from_scratch(P, C, derivatives)
    to = blood.contents_from_scratch(TP, TC, True)
    o2, co2 = uo[0], uo[1]
    g = 10.0 * u["k"] * q / u["pdry"]
    d_o2 = o2 - cvo2
    d_co2 = cvco2 - co2
    if u["apnoea"]:
        va = np.zeros_like(P)
        vi = np.maximum(g * (d_o2 - d_co2), 0.0)
    else:
        vi = u["vi"]
        va = vi - g * (d_o2 - d_co2)
    return P, C, TP, TC, cvo2, cvco2, f, shunt, ns, q, uo, to, g, d_o2, d_co2, va, vi


def rhs(t, x, u, params=None):
    """Right-hand side dx/dt [per min] of the course model for a batch of cases (see module notes).

    Parameters
    ----------
    t : float  Time [min] (the model is autonomous within a segment)
    x : array  Flattened states of shape (B * (2N + 8),)
    u : dict  Segment inputs from the target steady state (:func:`_segment`)
    params : unused, kept for the ``(t, x, u, params)`` convention
    """
    P, C, TP, TC, cvo2, cvco2, f, shunt, ns, q, uo, to, g, d_o2, d_co2, va, vi = _fluxes(x, u, False)
    k = u["k"]
    v = u["v"]
    dP = (vi * u["pio2"] - va * P - 10.0 * k * q * d_o2) / v
    dC = (-va * C + 10.0 * k * q * d_co2) / v
    w = u["w"]
    ca_o2 = ns * np.sum(w * uo[0], axis=1, keepdims=True) + shunt * cvo2
    ca_co2 = ns * np.sum(w * uo[1], axis=1, keepdims=True) + shunt * cvco2
    dTP, dTC = _tissue_rates(to, ca_o2, ca_co2, u)
    mix_o2 = np.sum(u["q"] * to[0], axis=1, keepdims=True) / u["co"]
    mix_co2 = np.sum(u["q"] * to[1], axis=1, keepdims=True) / u["co"]
    rate = u["co"] / u["vd"]
    dcv_o2 = (mix_o2 - cvo2) * rate  # contents [mL/dL] relax with Qt / V_transit
    dcv_co2 = (mix_co2 - cvco2) * rate
    tau = np.where(u["f_target"] > f, u["tau_up"], u["tau_down"])
    df = (u["f_target"] - f) / tau
    dexh = np.sum(va * C, axis=1, keepdims=True) / k
    return np.concatenate([dP, dC, dTP, dTC, dcv_o2, dcv_co2, df, dexh], axis=1).ravel()


def _tissue_rates(to, ca_o2, ca_co2, u):
    """Tissue venous PO2/PCO2 rates from O2 and CO2 mass balances through the 2x2 mass matrix."""
    o2, co2, _s, _ph, a, bb, c, d = to
    fo2 = 10.0 * u["q"] * (ca_o2 - o2) - u["vo2"]
    fco2 = u["vco2"] + 10.0 * u["q"] * (ca_co2 - co2)
    vb10 = 10.0 * u["vb"]
    m11, m12, m21, m22 = vb10 * a, vb10 * bb, vb10 * c, u["ktis"] + vb10 * d
    det = m11 * m22 - m12 * m21
    return (m22 * fo2 - m12 * fco2) / det, (-m21 * fo2 + m11 * fco2) / det


def _jacobian_structure(b):
    """Row and column indices of the sparse Jacobian (fixed for a segment)."""
    rows, cols = [], []
    base = np.arange(b)[:, None] * S
    i = np.arange(N)[None, :]
    # Unit 2x2 blocks and their dependence on the transit contents.
    for r_off, c_off in ((0, 0), (0, N), (N, 0), (N, N)):
        rows.append(base + r_off + i)
        cols.append(base + c_off + i)
    for r_off in (0, N):
        for cidx in (I_CVO2, I_CVCO2):
            rows.append(base + r_off + i)
            cols.append(base + cidx + 0 * i)
    # Tissue rows: the transit contents (through the shunted blood) and their own states. Their
    # dependence on every unit (through arterial blood) acts on the slow body-store time scale and is
    # left out: BDF needs the stiff part right, and a dense row per unit would make the LU costly.
    for tr in range(4):
        r = base + I_TP + tr
        for cidx in (I_CVO2, I_CVCO2, I_TP + tr % 2, I_TC + tr % 2):
            rows.append(r)
            cols.append(base + cidx)
    # Transit rows: own and tissue states.
    for tr in (I_CVO2, I_CVCO2):
        for cidx in (I_TP, I_TP + 1, I_TC, I_TC + 1, tr):
            rows.append(base + tr)
            cols.append(base + cidx)
    rows.append(base + I_OPEN)
    cols.append(base + I_OPEN)
    return np.concatenate([r.ravel() for r in rows]), np.concatenate([c.ravel() for c in cols])


def _jacobian(x, u, structure):
    """Analytic Jacobian (sparse CSC) of :func:`rhs`; couplings through recruitment are left out."""
    b = u["b"]
    P, C, TP, TC, cvo2, cvco2, f, shunt, ns, q, uo, to, g, d_o2, d_co2, va, vi = _fluxes(x, u, True)
    k, v, pio2 = u["k"], u["v"], u["pio2"]
    a, bb, c, d = uo[4], uo[5], uo[6], uo[7]
    kq = 10.0 * k * q
    if u["apnoea"]:
        dvi_dp, dvi_dc = g * (a + c), g * (bb + d)
        j_pp = (dvi_dp * pio2 - kq * a) / v
        j_pc = (dvi_dc * pio2 - kq * bb) / v
        j_cp = (-kq * c) / v
        j_cc = (-kq * d) / v
        j_p_cvo2 = (-g * pio2 + kq) / v
        j_p_cvco2 = (-g * pio2) / v
        j_c_cvo2 = np.zeros_like(P)
        j_c_cvco2 = kq / v
    else:
        dva_dp, dva_dc = -g * (a + c), -g * (bb + d)
        j_pp = (-dva_dp * P - va - kq * a) / v
        j_pc = (-dva_dc * P - kq * bb) / v
        j_cp = (-dva_dp * C - kq * c) / v
        j_cc = (-dva_dc * C - va - kq * d) / v
        j_p_cvo2 = (-g * P + kq) / v
        j_p_cvco2 = (-g * P) / v
        j_c_cvo2 = (-g * C) / v
        j_c_cvco2 = (-g * C + kq) / v
    # Tissue rows: d(rates)/d(arterial contents) through the mass matrix; arterial contents depend on
    # units (ns w dC/dP) and on the transit contents (shunt).
    ta, tb, tc, td = to[4], to[5], to[6], to[7]
    vb10 = 10.0 * u["vb"]
    m11, m12, m21, m22 = vb10 * ta, vb10 * tb, vb10 * tc, u["ktis"] + vb10 * td
    det = m11 * m22 - m12 * m21
    i11, i12, i21, i22 = m22 / det, -m12 / det, -m21 / det, m11 / det
    qq = 10.0 * u["q"]
    # rates = Minv @ [qq (CaO2 - o2) - vo2, vco2 + qq (CaCO2 - co2)]
    # d rates / d CaO2 = Minv[:, 0] qq ; d / d CaCO2 = Minv[:, 1] qq
    dtp_dcao2, dtp_dcaco2 = i11 * qq, i12 * qq
    dtc_dcao2, dtc_dcaco2 = i21 * qq, i22 * qq
    tissue_other = []
    for dr_o2, dr_co2 in ((dtp_dcao2, dtp_dcaco2), (dtc_dcao2, dtc_dcaco2)):
        for j in range(2):
            e_o2, e_co2 = dr_o2[:, j:j + 1], dr_co2[:, j:j + 1]
            own_p = -(e_o2 * ta[:, j:j + 1] + e_co2 * tc[:, j:j + 1])
            own_c = -(e_o2 * tb[:, j:j + 1] + e_co2 * td[:, j:j + 1])
            tissue_other.append((e_o2 * shunt, e_co2 * shunt, own_p, own_c))
    # order of tissue rows in the structure: TP_f, TP_s, TC_f, TC_s
    rate = u["co"] / u["vd"]
    qf = u["q"] / u["co"]
    vals = [j_pp, j_pc, j_cp, j_cc, j_p_cvo2, j_p_cvco2, j_c_cvo2, j_c_cvco2]
    for tr in range(4):
        vals.extend(tissue_other[tr])
    for row in range(2):  # transit O2, then CO2
        da = ta if row == 0 else tc
        db = tb if row == 0 else td
        vals.extend([rate * qf[:, 0:1] * da[:, 0:1], rate * qf[:, 1:2] * da[:, 1:2],
                     rate * qf[:, 0:1] * db[:, 0:1], rate * qf[:, 1:2] * db[:, 1:2], -rate])
    tau = np.where(u["f_target"] > f, u["tau_up"], u["tau_down"])
    vals.append(-1.0 / tau)
    data = np.concatenate([np.broadcast_to(vv, (b, np.shape(vv)[1])).ravel() for vv in vals])
    rows, cols = structure
    return sparse.csc_matrix((data, (rows, cols)), shape=(b * S, b * S))


class _BlockLU:
    """Exact solves of the stiff solver's Newton matrix ``A = I - c J`` by its block structure.

    Within a case the Jacobian (:func:`_jacobian_structure`) couples each unit's PO2 and PCO2 only to
    each other and to the two transit contents, and the six body-store and transit states only to each
    other; the open fraction and the exhaled CO2 stand alone. So ``A y = r`` is solved exactly by a
    6 x 6 solve per case (tissue and transit), then a 2 x 2 solve per unit with the transit part moved
    to the right-hand side: O(B N) work, where a general sparse LU (SuperLU) spent most of a batch
    course's time. Any entry of ``A`` outside these blocks (a Jacobian of another shape) sends the
    factorisation to SuperLU, so the answer never rests on the assumption.
    """

    GLOBAL = np.arange(I_TP, I_CVCO2 + 1)  # TP fast, TP slow, TC fast, TC slow, transit O2, transit CO2

    def __init__(self, b):
        self.b = b
        base = (np.arange(b) * S)[:, None]
        units = np.arange(N)[None, :]
        p_rows, c_rows = base + units, base + N + units
        pos = [(p_rows, p_rows), (p_rows, c_rows), (c_rows, p_rows), (c_rows, c_rows),
               (p_rows, base + I_CVO2), (p_rows, base + I_CVCO2), (c_rows, base + I_CVO2), (c_rows, base + I_CVCO2)]
        g = np.broadcast_to(base[:, :, None] + self.GLOBAL[None, :, None], (b, self.GLOBAL.size, self.GLOBAL.size))
        pos.append((g, np.swapaxes(g, 1, 2)))  # (b, 6, 6): row i, column j
        pos += [(base + I_OPEN, base + I_OPEN), (base + I_EXH, base + I_EXH)]
        self.shapes = [np.broadcast_shapes(r.shape, c.shape) for r, c in pos]
        self.rows = np.concatenate([np.broadcast_to(r, sh).ravel() for (r, _c), sh in zip(pos, self.shapes)])
        self.cols = np.concatenate([np.broadcast_to(c, sh).ravel() for (_r, c), sh in zip(pos, self.shapes)])
        self.pattern = None

    def _gather(self, A):
        """The block entries of CSC ``A`` (zero where ``A`` has none), or None if ``A`` has others."""
        A = A.tocsc()
        if not A.has_sorted_indices:
            A.sort_indices()
        n = A.shape[0]
        if (self.pattern is None or not np.array_equal(self.pattern[0], A.indptr)
                or not np.array_equal(self.pattern[1], A.indices)):
            keys = np.repeat(np.arange(n, dtype=np.int64), np.diff(A.indptr)) * n + A.indices
            want = self.cols.astype(np.int64) * n + self.rows
            at = np.minimum(np.searchsorted(keys, want), max(keys.size - 1, 0))
            found = keys[at] == want if keys.size else np.zeros(want.size, dtype=bool)
            complete = int(np.count_nonzero(found)) == A.nnz
            self.pattern = (A.indptr.copy(), A.indices.copy(), at, found, complete)
        _ip, _ix, at, found, complete = self.pattern
        if not complete:
            return None
        return np.where(found, A.data[at], 0.0)

    def factor(self, A):
        vals = self._gather(A)
        if vals is None:
            return ("superlu", splu(sparse.csc_matrix(A)))
        parts, start = [], 0
        for shape in self.shapes:
            size = int(np.prod(shape))
            parts.append(vals[start:start + size].reshape(shape))
            start += size
        pp, pc, cp, cc, p_o2, p_co2, c_o2, c_co2, g, a_open, a_exh = parts
        det = pp * cc - pc * cp
        if not (np.all(np.isfinite(det)) and np.all(det != 0) and np.all(a_open != 0) and np.all(a_exh != 0)):
            raise np.linalg.LinAlgError("the stiff solver's Newton matrix is singular in a lung unit")
        return ("blocks", (pp / det, pc / det, cp / det, cc / det, p_o2, p_co2, c_o2, c_co2, np.linalg.inv(g),
                           a_open, a_exh))

    def solve(self, lu, r):
        kind, f = lu
        if kind == "superlu":
            return f.solve(r)
        ipp, ipc, icp, icc, p_o2, p_co2, c_o2, c_co2, ginv, a_open, a_exh = f
        R = r.reshape(self.b, S)
        y = np.empty_like(R)
        yg = np.einsum("kij,kj->ki", ginv, R[:, I_TP:I_CVCO2 + 1])
        y[:, I_TP:I_CVCO2 + 1] = yg
        y_o2, y_co2 = yg[:, 4:5], yg[:, 5:6]
        rp = R[:, :N] - p_o2 * y_o2 - p_co2 * y_co2
        rc = R[:, N:2 * N] - c_o2 * y_o2 - c_co2 * y_co2
        y[:, :N] = icc * rp - ipc * rc
        y[:, N:2 * N] = -icp * rp + ipp * rc
        y[:, I_OPEN:I_OPEN + 1] = R[:, I_OPEN:I_OPEN + 1] / a_open
        y[:, I_EXH:I_EXH + 1] = R[:, I_EXH:I_EXH + 1] / a_exh
        return y.ravel()


def _block_bdf(b):
    """scipy's BDF with its sparse LU replaced by :class:`_BlockLU` (same steps, same Newton iteration)."""
    blocks = _BlockLU(b)

    class BlockBDF(BDF):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)

            def lu(A):
                self.nlu += 1
                return blocks.factor(A)

            self.lu, self.solve_lu = lu, blocks.solve

    return BlockBDF


# --- initial state and outputs ---------------------------------------------------------------------

def _steady_state_vector(pred: Prediction, u: dict) -> np.ndarray:
    """State vector of a case sitting at the steady state ``pred`` (with segment inputs ``u``)."""
    g = pred.gas
    b = u["b"]

    def col(z):
        return np.broadcast_to(np.asarray(z, dtype=float), (b,)).reshape(b, 1)

    ca_o2, ca_co2 = col(g.cao2), col(g.caco2)
    cv_o2 = ca_o2 - u["vo2"] / (10.0 * u["q"])
    cv_co2 = ca_co2 + u["vco2"] / (10.0 * u["q"])
    tp, tc, _s, ok = invert_contents(u["blood"], cv_o2, cv_co2, np.full((b, 2), 40.0), np.full((b, 2), 46.0))
    if not np.all(ok):
        raise ArithmeticError("tissue venous blood gases could not be recovered from the steady state")
    x = np.concatenate([np.atleast_2d(g.unit_po2)[:, :N], np.atleast_2d(g.unit_pco2)[:, :N], tp, tc,
                        col(g.cvo2), col(g.cvco2), u["f_target"], np.zeros((b, 1))], axis=1)
    return x.ravel()


#: Rows (draws x output times) per block of the output pass. Its elementwise passes over (rows x units)
#: arrays slow down several-fold once their temporaries no longer fit the processor's cache: the unit
#: contents of 24,200 rows x 54 units took 230-510 ms in one pass (10-21 us a row), of 200 or 2,000 rows
#: 1.6-1.8 us a row. Blocks give the same numbers (each row is computed alone; the contents' inversion
#: stops per block instead of per batch, within its 1e-9 tolerance).
OUTPUT_BLOCK_ROWS = 2048


def _outputs(X, u):
    """Arterial and mixed-venous gases etc. from states X of shape (B, T, S)."""
    b, nt = X.shape[0], X.shape[1]
    blood = u["blood"]
    flat = X.reshape(b * nt, S)
    rep = {}
    for key in ("k", "pdry", "pio2", "co", "shunt_open", "shunt_closed", "dead_space_va", "ve", "et_share"):
        rep[key] = np.repeat(u[key], nt, axis=0)
    for key in ("w", "vi"):
        rep[key] = np.repeat(u[key], nt, axis=0)
    hb, temp, offset = (np.repeat(x, nt, axis=0) for x in (blood.hb, blood.t, blood.offset))
    blocks = []
    for lo in range(0, b * nt, OUTPUT_BLOCK_ROWS):
        hi = min(lo + OUTPUT_BLOCK_ROWS, b * nt)
        block_blood = blood_chemistry(hb[lo:hi], temp[lo:hi], 0.0)
        block_blood.offset = offset[lo:hi]
        uu = {**u, **{k: v[lo:hi] for k, v in rep.items()}, "blood": block_blood, "b": hi - lo}
        blocks.append(_output_rows(flat[lo:hi], uu))
    out = {k: np.concatenate([blk[k] for blk in blocks]) for k in blocks[0]}
    out = {k: v.reshape(b, nt) for k, v in out.items()}
    out["ok"] = out["ok"].astype(bool)
    return out


def _output_rows(flat, uu):
    """:func:`_outputs` for rows of states ``flat`` (rows, S) and their inputs ``uu`` (one row each)."""
    n = flat.shape[0]
    P, C, TP, TC, cvo2, cvco2, f, shunt, ns, q, uo, to, g, d_o2, d_co2, va, vi = _fluxes(flat.ravel(), uu, False)
    ca_o2 = ns * np.sum(uu["w"] * uo[0], axis=1, keepdims=True) + shunt * cvo2
    ca_co2 = ns * np.sum(uu["w"] * uo[1], axis=1, keepdims=True) + shunt * cvco2
    # Start the inversion from the unit whose O2 content is nearest the arterial one.
    near = np.argmin(np.abs(uo[0] - ca_o2), axis=1)
    rows = np.arange(n)
    blood = uu["blood"]
    pa_o2, pa_co2, sa, ok_a = invert_contents(blood, ca_o2, ca_co2, P[rows, near][:, None], C[rows, near][:, None])
    pv_o2, _pv_co2, _sv, ok_v = invert_contents(blood, cvo2, cvco2, np.full_like(cvo2, 40.0),
                                                np.full_like(cvo2, 46.0))
    co2_flow = np.sum(va * C, axis=1, keepdims=True)
    va_total = np.sum(va, axis=1, keepdims=True) + uu["dead_space_va"]
    with np.errstate(invalid="ignore", divide="ignore"):
        mixed = np.where(va_total > 0, co2_flow / np.where(va_total > 0, va_total, 1.0), np.nan)
        petco2 = mixed + uu["et_share"] * (pa_co2 - mixed)  # end-tidal, as in physiology.forecast.predict
        pe_co2 = np.where(uu["ve"] > 0, co2_flow / np.where(uu["ve"] > 0, uu["ve"], 1.0), np.nan)
    return {"pao2": pa_o2.ravel(), "paco2": pa_co2.ravel(), "sao2": sa.ravel(), "pvo2": pv_o2.ravel(),
            "petco2": petco2.ravel(), "vd_vt": ((pa_co2 - pe_co2) / pa_co2).ravel(), "shunt": shunt.ravel(),
            "open_fraction": f.ravel(), "cardiac_output": (uu["co"] * np.ones_like(f)).ravel(),
            "ok": (ok_a & ok_v).ravel()}


def time_to_fraction(minutes, values, start, end, fraction=0.9):
    """First time after which ``values`` stay within (1 - fraction) of the change ``start -> end`` [min].

    Returns 0 where the change is below 0.5 (in the values' unit) and NaN if never reached.
    """
    minutes = np.asarray(minutes)
    values = np.atleast_2d(values)
    start = np.atleast_1d(start)[:, None]
    end = np.atleast_1d(end)[:, None]
    band = (1.0 - fraction) * np.abs(end - start)
    outside = np.abs(values - end) > band
    out = np.full(values.shape[0], np.nan)
    for i in range(values.shape[0]):
        if abs(float(end[i, 0] - start[i, 0])) < 0.5:
            out[i] = 0.0
            continue
        idx = np.flatnonzero(outside[i])
        if idx.size == 0:
            out[i] = minutes[0]
        elif idx[-1] < minutes.size - 1:
            # Interpolate the last crossing into the band.
            j = idx[-1]
            v0, v1 = abs(values[i, j] - end[i, 0]), abs(values[i, j + 1] - end[i, 0])
            frac = (v0 - band[i, 0]) / max(v0 - v1, 1e-12)
            out[i] = minutes[j] + frac * (minutes[j + 1] - minutes[j])
    return out


# --- the wrapper -----------------------------------------------------------------------------------

def simulate(patient: PatientModel, settings_now: Settings, changes=(), minutes: float = 60.0,
             step_s: float = 15.0, body: BodyStores | None = None, weight_kg=None,
             method: str = "BDF", **solver_options) -> Course:
    """Course of blood gases from the steady state at ``settings_now`` through a schedule of changes.

    Parameters
    ----------
    patient : PatientModel
        One patient, or a batch of parameter draws (arrays of shape (B,)).
    settings_now : Settings
        Settings in force before time 0; the course starts from their steady state.
    changes : Change or Settings or sequence of Change
        A Settings alone means "change to these at minute 0".
    minutes : float
        Length of the course [min].
    step_s : float
        Output grid spacing [s], at most 15.
    body : BodyStores
        Body-store constants (defaults documented in :class:`BodyStores`).
    weight_kg : float or array
        Body weight for the stores [kg]; defaults to the patient's PBW.
    method : str
        ``solve_ivp`` method; a stiff-capable one (BDF, Radau, LSODA) is expected. "BDF" (the default)
        solves its Newton systems by the Jacobian's blocks (:class:`_BlockLU`).
    **solver_options
        Passed straight to ``scipy.integrate.solve_ivp`` (rtol, atol, max_step, ...).
    """
    if step_s <= 0 or step_s > 15:
        raise ValueError(f"step_s = {step_s:g} s is outside the accepted range above 0 to 15 s")
    if not 0 < minutes <= 24 * 60:
        raise ValueError(f"minutes = {minutes:g} is outside the accepted range above 0 to 1440 min")
    body = body or BodyStores()
    weight = patient.pbw_kg if weight_kg is None else weight_kg
    if isinstance(changes, Settings):
        changes = [Change(0.0, settings=changes)]
    elif isinstance(changes, Change):
        changes = [changes]
    changes = sorted(changes, key=lambda ch: ch.minute)
    for ch in changes:
        if not 0 <= ch.minute < minutes:
            raise ValueError(f"change at minute {ch.minute:g} is outside the course 0 to {minutes:g} min")

    start = predict(patient, settings_now)
    if not np.all(start.success):
        return _failed(start, f"no steady state at the current settings: {start.message}")
    u0 = _segment(start, patient, body, weight, False)
    x = _steady_state_vector(start, u0)
    b = u0["b"]
    n_out = int(round(minutes * 60.0 / step_s))
    grid = np.linspace(0.0, minutes, n_out + 1)
    structure = _jacobian_structure(b)
    if b > 1:
        # A batch of draws is evaluated on the output grid near each change (fast transients) and
        # every minute elsewhere, then interpolated onto the output grid (the draws give a band).
        since = np.min([np.where(grid >= ch.minute, grid - ch.minute, np.inf) for ch in changes] +
                       [grid], axis=0)
        solve_grid = grid[(since < 10.0) | np.isclose(np.round(grid), grid) | (grid == grid[-1])]
    else:
        solve_grid = grid

    seg_patient, seg_settings, seg_apnoea = patient, settings_now, False
    bounds = [0.0] + [ch.minute for ch in changes] + [minutes]
    pieces, outs, target = [], [], start
    u = u0
    first_change_t = None
    # rtol 1e-3: measured against rtol 1e-6 on a PEEP/FiO2/mode change, the course differs by at most
    # 0.08 mmHg (PaO2) and 0.01 mmHg (PaCO2) and the re-check time by 0.02 min; 1e-4 cost 30 % more time.
    opts = {"rtol": 1e-3, "atol": _atol(b), **solver_options}
    stepper = _block_bdf(b) if method == "BDF" else method  # one block solver for every segment of the course
    for s_i in range(len(bounds) - 1):
        t0, t1 = bounds[s_i], bounds[s_i + 1]
        if s_i > 0:
            ch = changes[s_i - 1]
            if ch.settings is not None:
                seg_settings = ch.settings
            if ch.patient:
                seg_patient = seg_patient.replace(**ch.patient)
            seg_apnoea = ch.apnoea
            target = predict(seg_patient, seg_settings)
            if not np.all(target.success):
                return _failed(target, f"no steady state after the change at minute {t0:g}: {target.message}")
            u = _segment(target, seg_patient, body, weight, seg_apnoea)
            first_change_t = t0 if first_change_t is None else first_change_t
        if t1 <= t0:
            continue
        t_eval = solve_grid[(solve_grid >= t0) & (solve_grid <= t1)]
        if t_eval.size == 0 or t_eval[0] > t0:
            t_eval = np.concatenate([[t0], t_eval])
        try:
            sol = solve_ivp(lambda t, y, u=u: rhs(t, y, u), (t0, t1), x, t_eval=t_eval,
                            method=stepper,
                            jac=(lambda t, y, u=u: _jacobian(y, u, structure)) if method in ("BDF", "Radau") else None,
                            **opts)
        except (RuntimeError, np.linalg.LinAlgError) as exc:  # e.g. a singular Newton matrix in the stiff solver
            return _failed(target, f"the time-course integration failed between minute {t0:g} and {t1:g}: {exc}")
        if not sol.success:
            return _failed(target, f"the time-course integration failed at minute {sol.t[-1]:.2f}: {sol.message}")
        x = sol.y[:, -1]
        keep = np.ones(sol.t.size, dtype=bool)
        if pieces:
            keep[0] = False  # the segment start is the previous segment's end
        Y = sol.y[:, keep].T.reshape(-1, b, S).transpose(1, 0, 2)
        pieces.append((sol.t[keep], Y))
        outs.append(_outputs(Y, u))
    t_all = np.concatenate([p[0] for p in pieces])
    X = np.concatenate([p[1] for p in pieces], axis=1)
    o = {k: np.concatenate([oo[k] for oo in outs], axis=1) for k in outs[0]}
    if t_all.size != grid.size:
        o = {k: (_interp_rows(grid, t_all, v) if k != "ok" else v) for k, v in o.items()}
        X_ends = X
        t_all = grid
    else:
        X_ends = X
    ok_all = np.all(o.pop("ok"), axis=1) & np.all(np.isfinite(o["pao2"]), axis=1)

    ph = _ph_invivo(np.where(np.isfinite(o["paco2"]), o["paco2"], 40.0),
                    np.broadcast_to(np.asarray(seg_patient.base_excess, dtype=float), (b,))[:, None])
    # Time to 90 % of the change of the last segment that changed something.
    t_ref = first_change_t if first_change_t is not None else 0.0
    sel = t_all >= t_ref
    end_pao2 = np.broadcast_to(np.atleast_1d(target.gas.pao2), (b,))
    end_paco2 = np.broadcast_to(np.atleast_1d(target.gas.paco2), (b,))
    start_pao2, start_paco2 = o["pao2"][:, sel][:, 0], o["paco2"][:, sel][:, 0]
    t90_o2 = time_to_fraction(t_all[sel] - t_ref, o["pao2"][:, sel], start_pao2, end_pao2)
    t90_co2 = time_to_fraction(t_all[sel] - t_ref, o["paco2"][:, sel], start_paco2, end_paco2)
    # Re-check: only a change larger than the measurement error of the quantity can be seen in a blood
    # gas (physiology.measurement), so smaller drifts (e.g. a Haldane shift of PaCO2) do not set it.
    seen_o2 = np.where(np.abs(end_pao2 - start_pao2) < measurement_sd("pao2", end_pao2), 0.0, t90_o2)
    seen_co2 = np.where(np.abs(end_paco2 - start_paco2) < measurement_sd("paco2", end_paco2), 0.0, t90_co2)
    recheck = np.fmax(seen_o2, seen_co2)
    # CO2 balance over the course: stores + exhaled - produced.
    co2_err = _co2_balance(X_ends, t_all, u0, u, patient, seg_patient)
    single = not _is_batch(patient, settings_now, changes)

    def shape(z):
        return z[0] if single else z

    message = "course computed" if np.all(ok_all) else "blood gases could not be recovered at some times"
    return Course(
        success=shape(ok_all), message=message, minutes=t_all,
        pao2=shape(o["pao2"]), paco2=shape(o["paco2"]), ph=shape(ph), sao2=shape(o["sao2"]),
        pvo2=shape(o["pvo2"]), petco2=shape(o["petco2"]), vd_vt=shape(o["vd_vt"]), shunt=shape(o["shunt"]),
        open_fraction=shape(o["open_fraction"]), cardiac_output=shape(o["cardiac_output"]),
        t90_pao2=shape(t90_o2), t90_paco2=shape(t90_co2), recheck_after_min=shape(recheck),
        co2_balance_error=shape(co2_err), final=target, states=X,
    )


def _interp_rows(t_new, t_old, values):
    """Row-wise linear interpolation of ``values`` (B, T_old) onto ``t_new``."""
    idx = np.clip(np.searchsorted(t_old, t_new, side="right") - 1, 0, t_old.size - 2)
    w = (t_new - t_old[idx]) / (t_old[idx + 1] - t_old[idx])
    return values[:, idx] * (1.0 - w) + values[:, idx + 1] * w


def _atol(b):
    one = np.concatenate([np.full(2 * N, 1e-3), np.full(4, 1e-3), [1e-5, 1e-5, 1e-6, 1e-2]])
    return np.tile(one, b)


def _is_batch(patient, settings, changes) -> bool:
    from dataclasses import fields as dfields
    vals = [getattr(patient, f.name) for f in dfields(patient) if f.name != "mechanics"]
    vals += [getattr(patient.mechanics, f.name) for f in dfields(patient.mechanics)]
    vals += [getattr(settings, f.name) for f in dfields(settings) if f.name != "mode"]
    for ch in changes:
        if ch.settings is not None:
            vals += [getattr(ch.settings, f.name) for f in dfields(ch.settings) if f.name != "mode"]
    return any(np.ndim(v) > 0 for v in vals)


def _co2_balance(X, t, u0, u_last, patient0, patient_last):
    """Relative CO2 balance error: (change in stores + exhaled - produced) / CO2 moved."""

    def stores(x, u):
        P, C, TP, TC, cvo2, cvco2, f = _unpack(x.ravel(), u["b"])
        lung = np.sum(u["v"] * C, axis=1) / u["k"][:, 0]
        _o2, tco2, _s, _ph = u["blood"].contents_exact(TP, TC, derivatives=False)
        tissue = np.sum(u["ktis"] * TC + 10.0 * u["vb"] * tco2, axis=1)
        transit = 10.0 * u["vd"][:, 0] * cvco2[:, 0]
        return lung + tissue + transit

    # Lung CO2 content uses each segment's unit volumes; compare like with like at the two ends.
    s0 = stores(X[:, 0, :], u0)
    s1 = stores(X[:, -1, :], u_last)
    # A change of lung volume itself moves gas at the change; count it at the new volumes.
    s0_at_last = stores(X[:, 0, :], u_last) if u_last is not u0 else s0
    exhaled = X[:, -1, I_EXH] - X[:, 0, I_EXH]
    produced = np.asarray(u_last["vco2"]).sum(axis=1) * (t[-1] - t[0])
    produced = np.where(np.isclose(np.asarray(u0["vco2"]).sum(axis=1), np.asarray(u_last["vco2"]).sum(axis=1)),
                        produced, np.nan)
    moved = np.abs(s1 - s0_at_last) + exhaled + produced
    # A course too short to move any CO2 (or one whose VCO2 changed) has no balance to check: NaN.
    err = s1 - s0_at_last + exhaled - produced
    return np.divide(err, moved, out=np.full_like(err, np.nan, dtype=float), where=np.isfinite(moved) & (moved > 0))


def _failed(pred: Prediction, message: str) -> Course:
    nan = np.array(np.nan)
    return Course(success=np.False_, message=message, minutes=np.array([]), pao2=nan, paco2=nan, ph=nan,
                  sao2=nan, pvo2=nan, petco2=nan, vd_vt=nan, shunt=nan, open_fraction=nan, cardiac_output=nan,
                  t90_pao2=nan, t90_paco2=nan, recheck_after_min=nan, co2_balance_error=nan, final=pred,
                  states=np.empty((0,)))
