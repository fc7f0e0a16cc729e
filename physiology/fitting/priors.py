"""Population priors of the patient fit, by condition, with their sources.

A case names its ``condition``: ``ards``, ``obstructive`` (COPD exacerbation or acute severe
asthma), ``post-operative`` (atelectasis after anaesthesia) or ``other`` (the default, with wide
priors). The condition moves the centre and spread of the gas-exchange priors, adds a low-V/Q mode
for obstructive lungs, and sets two structural assumptions the data of one or two blood gases cannot
inform: expiratory flow limitation (obstructive lungs) and the spread of specific ventilation (how
slowly the slowest lung units wash in and out).

Means are on the natural scale; SDs on the fit's transformed scale (logit for fractions, log for
positive quantities, linear for base excess). Values read from a source say so; recalled values are
marked "from memory".

Sources
-------
Shunt and V/Q dispersion by condition, MIGET (multiple inert gas elimination):
  [D] Dantzker DR, Brook CJ, Dehart P, Lynch JP, Weg JG. Ventilation-perfusion distributions in the
      adult respiratory distress syndrome. Am Rev Respir Dis 1979;120:1039-1052: shunt 0.1-0.5 with
      little low-V/Q, wide main mode (from memory).
  [W] Wagner PD, Dantzker DR, Dueck R, Clausen JL, West JB. Ventilation-perfusion inequality in
      chronic obstructive pulmonary disease. J Clin Invest 1977;59:203-216: little shunt; a low-V/Q
      mode ("type B") or a high-V/Q mode ("type A") beside the main one (from memory).
  [R] Rodriguez-Roisin R, Ballester E, Roca J, Torres A, Wagner PD. Mechanisms of hypoxemia in
      patients with status asthmaticus requiring mechanical ventilation. Am Rev Respir Dis
      1989;139:732-739: shunt near zero, bimodal blood flow with a low-V/Q mode carrying about a
      quarter of it (from memory).
  [T] Tokics L, Hedenstierna G, Strandberg A, Brismar B, Lundquist H. Lung collapse and gas exchange
      during general anesthesia. Anesthesiology 1987;66:157-167: shunt about 0.05-0.10 with
      atelectasis after induction, V/Q dispersion mildly raised (from memory).
  [G] Gattinoni L, Caironi P, Cressoni M, et al. Lung recruitment in patients with the acute
      respiratory distress syndrome. N Engl J Med 2006;354:1775-1786: recruitable lung 13 +/- 11 %
      of lung weight (from memory).
  [C] Cardus J, Burgos F, Diaz O, et al. Am J Respir Crit Care Med 1997;156:648-653: V/Q log SD
      0.3-0.6 in healthy people (from memory).
Dead space: Nuckton TJ, Alonso JA, Kallet RH, et al. Pulmonary dead-space fraction as a risk factor
  for death in ARDS. N Engl J Med 2002;346:1281-1286: physiological VD/VT 0.58 +/- 0.09 early in
  ARDS (from memory); series dead space is separate here.
Respiratory quotient: McClave SA, Lowen CC, Kleber MJ, et al. Clinical use of the respiratory quotient
  obtained from indirect calorimetry. JPEN 2003;27:21-26: physiological range 0.67-1.3, values in fed
  or fasting ICU patients mostly 0.7-1.0 (from memory). The fit's warning range is 0.65-1.2.
Series dead space (below the Y-piece, incl. the tube): Radford EP. Ventilation standards for use in
  artificial respiration. J Appl Physiol 1955;7:451-460: anatomic dead space ~1 mL per lb body weight
  (2.2 mL/kg), of which the tube bypasses the upper airway, about half (from memory): prior 1.1 mL/kg
  PBW.
Upper inflection of the pressure-volume curve: 20-30 cmH2O in ARDS (Roupie E, Dambrosio M, Servillo
  G, et al. Am J Respir Crit Care Med 1995;152:121-128; from memory): prior 26 cmH2O.
Flow limitation: most ventilated patients with COPD exacerbations are flow-limited at zero PEEP
  (common practice); the waterfall is in :func:`physiology.mechanics.ventilator.waterfall_total_peep`.
Specific ventilation spread (log SD of ventilation per unit volume): about 0.5 without airway
  disease, about 1.0 with obstruction (multiple-breath washout; from memory).
"""

from __future__ import annotations

__all__ = ["CONDITIONS", "CONDITION_LABELS", "condition_priors", "structure", "RQ_WARNING_RANGE",
           "ANATOMIC_DEAD_SPACE_ML_PER_KG", "parameter_names", "check_condition"]

CONDITIONS = ("ards", "obstructive", "post-operative", "other")
CONDITION_LABELS = {"ards": "ARDS", "obstructive": "obstructive lung disease (COPD, asthma)",
                    "post-operative": "post-operative (atelectasis after anaesthesia)",
                    "other": "other or not known (wide priors)"}

#: A fitted RQ outside this range is named in a warning (McClave 2003: physiological 0.67-1.3).
RQ_WARNING_RANGE = (0.65, 1.2)
#: Prior mean of the series dead space below the Y-piece [mL per kg PBW] (Radford 1955, halved).
ANATOMIC_DEAD_SPACE_ML_PER_KG = 1.1

# (mean, sd) per condition for the gas-exchange parameters; shared parameters below.
_BY_CONDITION = {
    "other": {"shunt_fixed": (0.10, 1.0), "recruitable": (0.10, 1.0), "log_sd": (0.8, 0.4),
              "dead_space_fraction": (0.20, 0.8)},
    "ards": {"shunt_fixed": (0.20, 0.8), "recruitable": (0.13, 0.9), "log_sd": (1.0, 0.35),
             "dead_space_fraction": (0.25, 0.6)},
    "obstructive": {"shunt_fixed": (0.03, 0.8), "recruitable": (0.03, 0.8), "log_sd": (1.1, 0.3),
                    "dead_space_fraction": (0.30, 0.6), "low_vq_fraction": (0.15, 0.9),
                    "resistance": (20.0, 0.4)},
    "post-operative": {"shunt_fixed": (0.06, 0.8), "recruitable": (0.06, 0.8), "log_sd": (0.7, 0.35),
                       "dead_space_fraction": (0.15, 0.7)},
}

#: Structural assumptions by condition: expiratory flow limitation [0-1]; specific-ventilation log SD;
#: the centre of the low-V/Q mode relative to the main mode; the end-tidal relation: PetCO2 = mixed
#: alveolar PCO2 + share x (PaCO2 - mixed alveolar PCO2), the share uncertain by ``end_tidal_sd``.
#: End-tidal gas comes from the units that empty last; with parallel emptying it is close to the mixed
#: alveolar gas (alveolar dead space dilutes it), with the sequential emptying of obstructed lungs it
#: approaches the gas of the perfused units, i.e. arterial (common practice: a steep phase III of the
#: capnogram in obstruction; shares ours, from memory).
_STRUCTURE = {
    "other": {"flow_limitation": 0.0, "specific_ventilation_sd": 0.5, "end_tidal_share": 0.25,
              "end_tidal_sd": 0.2},
    "ards": {"flow_limitation": 0.0, "specific_ventilation_sd": 0.5, "end_tidal_share": 0.25,
             "end_tidal_sd": 0.2},
    "obstructive": {"flow_limitation": 1.0, "specific_ventilation_sd": 1.0, "low_vq_ratio": 0.1,
                    "end_tidal_share": 0.6, "end_tidal_sd": 0.3},
    "post-operative": {"flow_limitation": 0.0, "specific_ventilation_sd": 0.5, "end_tidal_share": 0.25,
                       "end_tidal_sd": 0.2},
}


def check_condition(condition: str) -> str:
    if condition not in CONDITIONS:
        raise ValueError(f"condition = {condition!r} is not accepted: use one of {', '.join(CONDITIONS)}")
    return condition


def structure(condition: str) -> dict:
    """Fixed structural assumptions of a condition (see module notes)."""
    return dict(_STRUCTURE[check_condition(condition)])


def condition_priors(condition: str, pbw_kg: float, bsa_m2: float, temperature_c: float) -> dict:
    """Prior means (natural scale) and SDs (transformed scale) of every fitted parameter."""
    vo2 = 125.0 * bsa_m2 * (1.0 + 0.10 * (temperature_c - 37.0))
    mean = {"rq": 0.83, "vo2": vo2, "cardiac_output_ref": 3.2 * bsa_m2, "c_max": 0.8 * pbw_kg,
            "resistance": 12.0, "base_excess": 0.0,
            "anatomic_dead_space": ANATOMIC_DEAD_SPACE_ML_PER_KG * pbw_kg, "inflection": 26.0,
            "overdistension_dead_space": 0.3}
    sd = {"rq": 0.12, "vo2": 0.15, "cardiac_output_ref": 0.25, "c_max": 0.45, "resistance": 0.45,
          "base_excess": 8.0, "anatomic_dead_space": 0.25, "inflection": 0.2, "overdistension_dead_space": 0.7}
    for name, (m, s) in _BY_CONDITION[check_condition(condition)].items():
        mean[name], sd[name] = m, s
    return {"mean": mean, "sd": sd}


def parameter_names(condition: str) -> tuple:
    """The fitted parameters for a condition: the common ones, plus the low-V/Q mode for obstructive lungs."""
    from .fit import PARAMETERS
    return PARAMETERS + (("low_vq_fraction",) if "low_vq_fraction" in _BY_CONDITION[check_condition(condition)]
                         else ())
