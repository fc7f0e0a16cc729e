"""Bedside indices of a case's latest observation (no model fit involved)."""

from __future__ import annotations

from ventcast.physiology.bloodgas.acidbase import base_excess_van_slyke
from ventcast.physiology.gasexchange.alveolar import alveolar_po2
from ventcast.physiology.mechanics.spontaneous import effort_from_occlusion
from ventcast.physiology import indices

#: Respiratory exchange ratio assumed for the ideal alveolar PO2 when VCO2/VO2 are unknown.
ASSUMED_R = 0.8


def bedside_indices(case: dict, observation_index: int = -1) -> dict:
    """Indices of one observation, units in the key names; ``None`` where data are missing."""
    patient = case["patient"]
    obs = case["observations"][observation_index]
    s = obs["settings"]
    pbw = float(indices.predicted_body_weight(patient["height_cm"], patient["sex"]))
    fio2, peep = s["fio2"], s["peep_cmh2o"]
    pa_o2 = float(alveolar_po2(fio2, obs["paco2_mmhg"], ASSUMED_R, patient["barometric_mmhg"],
                               patient["temperature_c"]))
    pf = float(indices.pf_ratio(obs["pao2_mmhg"], fio2))
    vt = obs.get("vte_ml") or s.get("vt_ml")
    pplat = obs.get("pplat_cmh2o")
    dp = (pplat - peep) if pplat is not None else None
    crs = (vt / dp) if (vt and dp and dp > 0) else None
    # On pressure support or CPAP the rate is the patient's own (the set rate is only the backup).
    rr = obs.get("spontaneous_rr_per_min") or s["rr_per_min"]
    ve = obs.get("ve_l_min") or (vt * rr / 1000.0 if vt else None)
    sao2 = obs.get("sao2")
    spontaneous = obs.get("spontaneous_rr_per_min")
    pocc = obs.get("delta_pocc_cmh2o")
    return {
        "spontaneous_rr_per_min": spontaneous,
        # Yang & Tobin 1991: f / VT, of a patient breathing on their own (pressure support or CPAP).
        "rsbi": (spontaneous / (vt / 1000.0)) if (spontaneous and vt) else None,
        "p01_cmh2o": obs.get("p01_cmh2o"),
        "delta_pocc_cmh2o": pocc,
        "pmus_from_pocc_cmh2o": effort_from_occlusion(pocc)["pmus_cmh2o"] if pocc is not None else None,
        "pf_ratio_mmhg": pf,
        "alveolar_po2_mmhg": pa_o2,
        "aa_gradient_mmhg": pa_o2 - obs["pao2_mmhg"],
        "pbw_kg": pbw,
        "vt_ml_per_kg_pbw": (vt / pbw) if vt else None,
        "driving_pressure_cmh2o": dp,
        "compliance_ml_per_cmh2o": crs,
        "ventilatory_ratio": float(indices.ventilatory_ratio(ve, obs["paco2_mmhg"], pbw)) if ve else None,
        # The Berlin definition grades ARDS only; for any other condition the P/F ratio stands alone.
        "berlin_category": (indices.berlin_category(pf, peep) if patient.get("condition") == "ards"
                            else f"not graded (condition: {patient.get('condition') or 'other'})"),
        "base_excess_mmol_l": float(base_excess_van_slyke(obs["ph"], obs["paco2_mmhg"], patient["hb_g_dl"],
                                                          sao2 if sao2 is not None else 1.0)),
    }
