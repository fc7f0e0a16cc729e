"""Options (goal search over a grid of settings) and step-down plans."""
