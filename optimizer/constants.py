"""Physical constants, each with its published source.

Units: km, s, km^3/s^2.  Values marked "from memory" were written down from the cited source
without the document at hand; the tests cross-check the ones that can be checked against a
registry library (the DE421 file itself fixes the Earth-Moon geometry the GMs must match).

One job: the numbers.  May import: the standard library only; it is the bottom of the layers, every
module may import it.
"""

from __future__ import annotations

import math

# --- Gravitational parameters -----------------------------------------------------------------
# JPL DE421 (Folkner, Williams & Boggs 2008, IPN Progress Report 42-178, Table 4), from memory:
# GM(Sun) = 132712440040.944 km^3/s^2, GM(Earth-Moon barycentre) = 403503.236310 km^3/s^2,
# Earth/Moon mass ratio EMRAT = 81.30056.  GM(Earth) and GM(Moon) follow from those two.
GM_SUN = 132712440040.944
GM_EMB = 403503.236310
EARTH_MOON_MASS_RATIO = 81.30056
GM_EARTH = GM_EMB * EARTH_MOON_MASS_RATIO / (1.0 + EARTH_MOON_MASS_RATIO)  # 398600.43569 km^3/s^2
GM_MOON = GM_EMB / (1.0 + EARTH_MOON_MASS_RATIO)  # 4902.80062 km^3/s^2

# --- Radii and shape ---------------------------------------------------------------------------
# WGS 84 (NIMA TR8350.2, 3rd ed.), semi-major axis of the ellipsoid.
R_EARTH = 6378.137  # km
# Earth J2 (unnormalised), EGM96 / WGS 84 value C20 = -4.84165371736e-4 normalised, from memory.
J2_EARTH = 1.08262668e-3
# Mean lunar radius, IAU Working Group on Cartographic Coordinates and Rotational Elements
# (Archinal et al. 2011, Celest. Mech. Dyn. Astr. 109, Table 5), from memory.
R_MOON = 1737.4  # km

# --- Trade values (common practice) ------------------------------------------------------------
# Entry interface altitude of 400,000 ft (common practice for lunar-return entry).
ENTRY_INTERFACE_ALT = 121.92  # km

# --- Time --------------------------------------------------------------------------------------
SECONDS_PER_DAY = 86400.0
# J2000.0 = JD 2451545.0 TDB (IAU 1976/2000 convention).
JD_J2000 = 2451545.0
# Sidereal month, 27.321661 days (Astronomical Almanac, mean value), from memory.
SIDEREAL_MONTH = 27.321661 * SECONDS_PER_DAY  # s
# Mean Earth-Moon distance (semi-major axis of the lunar orbit), 384400 km, from memory
# (the DE421 checks in the tests bound the real distance).
EARTH_MOON_DISTANCE = 384400.0  # km

# --- Standard gravity --------------------------------------------------------------------------
G0 = 9.80665e-3  # km/s^2, 3rd CGPM (1901)

# --- CR3BP Earth-Moon mass parameter -----------------------------------------------------------
MU_EARTH_MOON = GM_MOON / (GM_EARTH + GM_MOON)  # 0.01215058561
# Characteristic length and time of the CR3BP units (length = mean distance, time so that G*M=1).
CR3BP_LENGTH = EARTH_MOON_DISTANCE
CR3BP_TIME = math.sqrt(CR3BP_LENGTH**3 / (GM_EARTH + GM_MOON))  # 375190.26 s = 4.3425 days (period / 2 pi)

CAUTION = (
    "Results are for design studies only. They are not flight-certified; any flight use must go "
    "through the mission's own independent verification and licensed practice."
)
