"""Steady-state forecast: patient model + ventilator settings -> mechanics and blood gases (batched).

The patient model couples the pieces: ventilator settings and mechanics give the
delivered VT, pressures, intrinsic PEEP, the open fraction of the recruitable lung,
overdistension and alveolar ventilation (:mod:`physiology.mechanics.ventilator`);
mean airway pressure sets cardiac output through venous return
(:func:`physiology.mechanics.recruitment.cardiac_output_with_paw`); collapsed
recruitable lung adds shunt and overdistended lung adds alveolar dead space; the
V/Q lung (:mod:`physiology.gasexchange.compartments`) then gives the blood gases.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields, replace

import numpy as np

from .gasexchange.compartments import LungParameters, SteadyState, solve_steady_state
from .mechanics.recruitment import cardiac_output_with_paw
from .mechanics.ventilator import Breathing, Mechanics, Settings, breathe

__all__ = ["PatientModel", "Prediction", "predict"]


@dataclass(frozen=True)
class PatientModel:
    """One patient (scalars) or a batch of parameter draws (arrays of shape (B,)).

    Attributes
    ----------
    pbw_kg : predicted body weight [kg]
    shunt_fixed : non-recruitable shunt [fraction of cardiac output]
    recruitable_shunt_ratio : shunt carried by collapsed recruitable lung per unit of its lung fraction
        [unitless]; 1 = perfused in proportion to its share (hypoxic vasoconstriction ignored)
    log_sd : V/Q dispersion of the perfused lung [unitless]
    low_vq_fraction : share of the perfused lung's blood flow in a low-V/Q mode [fraction]
    low_vq_ratio : centre of that mode relative to the main mode's V/Q [unitless]
    dead_space_fraction : alveolar dead space at no overdistension [fraction of alveolar ventilation]
    overdistension_dead_space : extra alveolar dead space of fully overdistended lung [fraction]
    vo2, vco2 : [mL/min STPD]
    hb : [g/dL]; temperature [degC]; barometric [mmHg]; base_excess : standard BE [mmol/L]
    cardiac_output_ref : cardiac output at ``mean_paw_ref`` [L/min]
    mean_paw_ref : mean airway pressure at which ``cardiac_output_ref`` holds [cmH2O]
    preload_dependence : how much PEEP lowers cardiac output [unitless] (0 none, 1 typical, 2 hypovolaemic)
    specific_ventilation_sd : spread of ventilation per unit of gas volume between lung units, SD on the
        natural-log scale [unitless]; sets how slowly the slowest units wash in or out after an FiO2
        change (time-course model only; 0 = every unit turns over at the same rate)
    end_tidal_share : where end-tidal PCO2 sits between the mixed alveolar PCO2 (0) and the arterial (1)
        [fraction]; 0.25 with parallel emptying, higher with the sequential emptying of obstructed lungs
    mechanics : :class:`Mechanics`
    """

    pbw_kg: object = 70.0
    shunt_fixed: object = 0.05
    recruitable_shunt_ratio: object = 1.0
    log_sd: object = 0.5
    low_vq_fraction: object = 0.0
    low_vq_ratio: object = 0.1
    dead_space_fraction: object = 0.1
    overdistension_dead_space: object = 0.3
    vo2: object = 250.0
    vco2: object = 200.0
    hb: object = 13.0
    temperature: object = 37.0
    barometric: object = 760.0
    base_excess: object = 0.0
    cardiac_output_ref: object = 5.0
    mean_paw_ref: object = 10.0
    preload_dependence: object = 1.0
    specific_ventilation_sd: object = 0.5
    end_tidal_share: object = 0.25
    mechanics: Mechanics = field(default_factory=Mechanics)

    def replace(self, **changes) -> "PatientModel":
        """A copy with some fields (or mechanics fields, by their own names) changed."""
        mech_names = {f.name for f in fields(Mechanics)}
        mech = {k: v for k, v in changes.items() if k in mech_names}
        own = {k: v for k, v in changes.items() if k not in mech_names}
        unknown = set(own) - {f.name for f in fields(PatientModel)}
        if unknown:
            raise ValueError(f"unknown patient-model field(s): {sorted(unknown)}")
        if mech:
            own["mechanics"] = replace(self.mechanics, **mech)
        return replace(self, **own)


@dataclass(frozen=True)
class Prediction:
    """A steady-state forecast: ``breathing`` (mechanics), ``gas`` (V/Q lung), and the couplings.

    success, message; shunt [fraction] and alveolar_dead_space [fraction] handed to the lung;
    cardiac_output [L/min]; vt_per_kg_pbw [mL/kg]; mixed_alveolar_pco2 [mmHg] (``gas.petco2`` is end-tidal).
    """

    success: np.ndarray
    message: str
    breathing: Breathing
    gas: SteadyState
    shunt: np.ndarray
    alveolar_dead_space: np.ndarray
    cardiac_output: np.ndarray
    vt_per_kg_pbw: np.ndarray
    mixed_alveolar_pco2: np.ndarray
    settings: Settings = field(repr=False)
    patient: PatientModel = field(repr=False)


def _masked(result, ok):
    """A copy of a frozen result whose numeric arrays are NaN (and ``success`` False) where ``ok`` is False."""
    ok = np.asarray(ok, dtype=bool)
    changes = {}
    for f in fields(result):
        value = getattr(result, f.name)
        if f.name == "success":
            changes[f.name] = np.asarray(value, dtype=bool) & ok if np.ndim(ok) else np.bool_(bool(value) and bool(ok))
        elif isinstance(value, (np.ndarray, np.floating, float)) and not isinstance(value, bool):
            arr = np.asarray(value)
            if arr.dtype.kind != "f":
                continue
            mask = ok.reshape(ok.shape + (1,) * (arr.ndim - ok.ndim)) if arr.ndim >= ok.ndim else ok
            changes[f.name] = np.where(mask, arr, np.nan) if arr.ndim else (float(arr) if ok else np.nan)
    return replace(result, **changes)


def predict(patient: PatientModel, settings: Settings, start: dict | None = None,
            tol: float = 1e-4, units: str = "full", mechanics_tol: float = 1e-10) -> Prediction:
    """Steady-state mechanics and blood gases for ``settings`` in ``patient`` (batched).

    A case fails (``success`` False, NaN numbers, a reason in ``message``) when its mechanics do
    not settle, the tidal volume does not fit, or the lung has no physiological steady state.
    ``start``: a Newton starting state for the lung (:func:`physiology.gasexchange.compartments.warm_start`
    of an earlier prediction's ``gas`` with the same batch shape); it changes the work, not the answer.
    ``tol``: the lung solver's Newton-step tolerance (:func:`physiology.gasexchange.compartments.solve_steady_state`);
    ``mechanics_tol``: the mechanics loop's, on the open fraction (:func:`physiology.mechanics.ventilator.breathe`).
    """
    br = breathe(settings, patient.mechanics, pbw_kg=patient.pbw_kg, tol=mechanics_tol)
    recruitable = np.asarray(patient.mechanics.recruitable, dtype=float)
    closed = np.nan_to_num(1.0 - br.open_fraction, nan=0.0)
    shunt = np.clip(np.asarray(patient.shunt_fixed) + np.asarray(patient.recruitable_shunt_ratio)
                    * recruitable * closed, 0.0, 0.8)
    ads = np.clip(np.asarray(patient.dead_space_fraction) + np.asarray(patient.overdistension_dead_space)
                  * np.nan_to_num(br.overdistended_fraction, nan=0.0), 0.0, 0.8)
    mean_paw = np.nan_to_num(br.mean_paw, nan=float(np.mean(patient.mean_paw_ref)))
    co = cardiac_output_with_paw(patient.cardiac_output_ref, mean_paw, patient.mean_paw_ref,
                                 patient.preload_dependence)
    va = np.nan_to_num(br.alveolar_ventilation, nan=1.0)
    lung = LungParameters(
        fio2=settings.fio2, shunt=shunt, log_sd=patient.log_sd, low_vq_fraction=patient.low_vq_fraction,
        low_vq_ratio=patient.low_vq_ratio, alveolar_ventilation=np.clip(va, 0.5, 30.0),
        dead_space_fraction=ads, cardiac_output=np.clip(co, 1.0, 20.0), vo2=patient.vo2, vco2=patient.vco2,
        hb=patient.hb, temperature=patient.temperature, barometric=patient.barometric,
        base_excess=patient.base_excess, series_ventilation=np.nan_to_num(br.series_ventilation, nan=0.0),
    )
    gas = solve_steady_state(lung, tol=tol, start=start, units=units)
    # End-tidal PCO2: the engine gives the mixed alveolar PCO2 (alveolar dead space included); end-tidal
    # gas sits between it and the arterial by the patient's end-tidal share.
    mixed_alveolar = gas.petco2
    gas = replace(gas, petco2=mixed_alveolar + np.asarray(patient.end_tidal_share) * (gas.paco2 - mixed_alveolar))
    ok = np.asarray(br.success) & np.asarray(gas.success)
    if np.all(ok):
        message = "forecast computed"
    elif np.ndim(ok) == 0:
        message = br.message if not br.success else gas.message
    else:
        reasons = sorted(set(list(np.asarray(br.reasons)[~np.asarray(br.success)])
                             + list(np.asarray(gas.reasons)[~np.asarray(gas.success)])) - {""})
        message = f"{int((~ok).sum())} of {ok.size} cases failed: " + "; ".join(reasons)
    nan = np.where(ok, 1.0, np.nan)
    # A case that failed in either part carries NaN in both: the lung was solved with stand-in values
    # where the mechanics failed (and vice versa), and those numbers must never be read as a forecast.
    if not np.all(ok):
        br, gas = _masked(br, ok), _masked(gas, ok)
    return Prediction(success=ok, message=message, breathing=br, gas=gas, shunt=shunt * nan,
                      alveolar_dead_space=ads * nan, cardiac_output=co * nan,
                      vt_per_kg_pbw=br.vt_ml / np.asarray(patient.pbw_kg) * nan,
                      mixed_alveolar_pco2=mixed_alveolar * nan, settings=settings, patient=patient)
