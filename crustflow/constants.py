"""Physical constants and defaults, each with its units and source.

Values marked "common practice, no source" are conventional defaults in the crustal-flow literature that a
scenario file may override; they are not measurements.
"""

from __future__ import annotations

#: Seconds in one Julian year (365.25 d), s. IAU convention (Julian year); used for every "yr" in crustflow.
SECONDS_PER_YEAR = 365.25 * 86400.0

#: Default gravitational acceleration, m/s^2. Common practice, no source (WGS84 normal gravity spans
#: 9.780-9.832 m/s^2, NIMA TR8350.2 eq. 4-1).
GRAVITY = 9.81

#: Default density of the crust, kg/m^3. Common practice, no source (Turcotte & Schubert 2002 use 2800).
RHO_CRUST = 2800.0

#: Default density of the mantle, kg/m^3. Common practice, no source (Turcotte & Schubert 2002 use 3300).
RHO_MANTLE = 3300.0

#: Default density of sea water, kg/m^3. Common practice, no source.
RHO_WATER = 1030.0

#: Crustal thickness below which a thickness grid is taken to be in kilometres by mistake, m.
#: Common practice, no source: no continental or oceanic crust is thinner than ~3 km, and a grid whose
#: largest value is below this number is almost certainly written in km.
KILOMETRE_SUSPICION = 1000.0
