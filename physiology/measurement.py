"""Measurement-error model: one standard deviation of each measured quantity.

Used by the fit (the likelihood) and by the time-course model (a change smaller than the
measurement error of a quantity cannot be seen in a blood gas, so it does not set a re-check time).

Values (from memory, informed by blood-gas analyser performance limits and short-term
within-patient variation): PaO2 2 mmHg + 5 %; PaCO2 1.5 mmHg + 2 %; pH 0.01; SaO2 0.015;
PetCO2 2 mmHg; Pplat 1.5 cmH2O; Ppeak 2 cmH2O; exhaled VT 10 mL + 5 %; VE 0.2 L/min + 5 %;
VCO2 8 %; cardiac output 10 % (thermodilution).
"""

from __future__ import annotations

import numpy as np

__all__ = ["SD", "measurement_sd"]

#: quantity: (absolute SD, relative SD) in the quantity's unit.
SD = {"pao2": (2.0, 0.05), "paco2": (1.5, 0.02), "ph": (0.01, 0.0), "sao2": (0.015, 0.0),
      "petco2": (2.0, 0.0), "pplat": (1.5, 0.0), "ppeak": (2.0, 0.0), "vte_ml": (10.0, 0.05),
      "ve_l_min": (0.2, 0.05), "vco2": (0.0, 0.08), "cardiac_output": (0.0, 0.10)}


def measurement_sd(key: str, value):
    """One SD of measurement error of ``key`` at ``value`` (scalar or array)."""
    a, r = SD[key]
    return a + r * np.abs(value)
