"""Physical constants shared by the steps (bare floats; the unit is in the name)."""

#: speed of light in vacuum, km/s (exact by the SI definition of the metre)
SPEED_OF_LIGHT_KM_S = 299792.458
