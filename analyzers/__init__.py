"""Pure computation on geometry: layout model, flattening, extraction, rules."""
