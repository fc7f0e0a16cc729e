"""Ventilator and respiratory-system mechanics: settings, equation of motion, recruitment, PEEP and circulation."""
