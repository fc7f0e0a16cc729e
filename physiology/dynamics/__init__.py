"""Time course after a setting change: lung gas stores, body O2 and CO2 stores, recruitment."""
