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

#: Range of surface elevation on Earth, m: the Challenger Deep, about -10.9 km (Gardner et al. 2014,
#: Marine Geodesy 37; from memory), and Everest, 8848.86 m (Nepal-China survey 2020), rounded
#: outwards. Topography outside it is a units or fill-value mistake.
ELEVATION_RANGE = (-11_000.0, 9_000.0)

#: Viscosities a crustal channel model may be given, Pa s. Published lower-crustal channel estimates
#: span about 1e16-1e21 Pa s (Clark & Royden 2000, Geology 28; Copley & McKenzie 2007;
#: Bendick et al. 2008) and weak salt about 1e17-1e19 (Urai et al. 2008, Salt tectonics; from memory);
#: a decade or more of margin each side. Outside it the flux is either negligible or the model's
#: strain rates are unphysical, and values over ~3e38 would overflow the float32 outputs.
VISCOSITY_RANGE = (1e15, 1e25)
