"""Physical constants and internal units of the numerical core.

Internal units are the astronomical unit, the day and the solar mass, with
G = k**2 where k is the Gaussian gravitational constant.
"""

# Gaussian gravitational constant, au^(3/2) d^-1 Msun^-1/2: the defining value of
# the IAU (1976) system of astronomical constants (IAU 2012 Resolution B2, which
# fixed the au as a length, took k out of the system of constants: from memory).
GAUSS_K = 0.01720209895
# Gravitational constant in internal units, au^3 d^-2 Msun^-1.
G = GAUSS_K * GAUSS_K
# Astronomical unit in metres, exact (IAU 2012 Resolution B2).
AU_M = 149_597_870_700.0
# Speed of light in m/s (SI definition).
C_M_PER_S = 299_792_458.0
# Day in seconds.
DAY_S = 86_400.0
# Speed of light in au/day.
C_AU_PER_DAY = C_M_PER_S * DAY_S / AU_M
# Julian year in days.
YEAR_D = 365.25
# IAU 2015 Resolution B3 nominal solar radius, in au.
SUN_RADIUS_AU = 6.957e8 / AU_M
# Two pi, used where the kernels need whole periods.
TWO_PI = 6.283185307179586
