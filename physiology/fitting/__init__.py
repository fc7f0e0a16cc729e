"""Patient fit from blood gases: MAP estimate, likely ranges, identifiability, next best measurement."""
