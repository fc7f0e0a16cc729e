"""Gas exchange: alveolar equations and the multi-compartment V/Q lung."""
