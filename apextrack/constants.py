"""Published constants of phyllotaxis, defined once for the whole package."""

import math

#: The golden ratio φ = (1 + √5) / 2.
PHI = (1.0 + math.sqrt(5.0)) / 2.0

#: The golden angle 360·(2 − φ) = 137.5077640…° (Vogel 1979, Math. Biosci. 44).
GOLDEN_ANGLE_DEG = 360.0 * (2.0 - PHI)
