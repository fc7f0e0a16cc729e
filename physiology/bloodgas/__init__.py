"""Blood O2 and CO2 chemistry and acid-base balance."""
