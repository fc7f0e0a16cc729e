"""Ventcast engine: gas exchange and mechanics models (numpy/scipy only, no Qt).

Internal units are the trade's own: mmHg, cmH2O, mL and L/min, mL/dL, g/dL,
fractions 0-1 for FiO2 and saturations, degC.
"""
