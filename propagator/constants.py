"""Physical constants used by longarc, each with its source.

All values are SI (m, s, kg, rad) unless the name says otherwise.  This is the
only module that defines physical constants; everything else imports from here.
"""

from __future__ import annotations

import math

# --- Earth: WGS84 (NIMA TR8350.2, 3rd ed., 2000, Table 3.1 and 3.3) -----------------
WGS84_A: float = 6378137.0
"""WGS84 semi-major axis [m] (NIMA TR8350.2 Table 3.1)."""
WGS84_INV_F: float = 298.257223563
"""WGS84 inverse flattening [-] (NIMA TR8350.2 Table 3.1)."""
WGS84_F: float = 1.0 / WGS84_INV_F
WGS84_E2: float = WGS84_F * (2.0 - WGS84_F)
"""WGS84 first eccentricity squared [-] (derived from a and f, NIMA TR8350.2 eq. 3-..)."""
WGS84_GM: float = 3.986004418e14
"""WGS84 geocentric gravitational constant incl. atmosphere [m^3/s^2] (NIMA TR8350.2 Table 3.1)."""
WGS84_OMEGA: float = 7.292115e-5
"""WGS84 nominal mean angular velocity of the Earth [rad/s] (NIMA TR8350.2 Table 3.1)."""

# --- IERS Conventions 2010 (IERS Technical Note 36), Table 1.1 ------------------------
GM_EARTH: float = 3.986004418e14
"""Geocentric gravitational constant, TT-compatible [m^3/s^2] (IERS Conventions 2010, Table 1.1)."""
R_EARTH_EQ: float = 6378136.6
"""Equatorial radius of the Earth [m] (IERS Conventions 2010, Table 1.1)."""
J2_EARTH: float = 1.0826359e-3
"""Dynamical form factor J2 (unnormalised), zero-tide [-] (IERS Conventions 2010, Table 1.1)."""
OMEGA_EARTH: float = 7.292115e-5
"""Nominal mean angular velocity of the Earth [rad/s] (IERS Conventions 2010, Table 1.1)."""
L_G: float = 6.969290134e-10
"""1 - d(TT)/d(TCG) [-] (IERS Conventions 2010, Table 1.1; IAU 2000 Resolution B1.9)."""
L_B: float = 1.550519768e-8
"""1 - d(TDB)/d(TCB) [-] (IERS Conventions 2010, Table 1.1; IAU 2006 Resolution B3)."""
TT_MINUS_TAI_S: float = 32.184
"""TT - TAI [s] (IERS Conventions 2010, section 10.1; IAU 1991 Resolution A4)."""
GPS_MINUS_TAI_S: float = -19.0
"""GPS time - TAI [s] (IS-GPS-200, section 3.3.4: GPS time = TAI - 19 s)."""

# --- GPS broadcast-ephemeris user algorithm (IS-GPS-200, 20.3.3.4.3, Table 20-IV) ------
GPS_BROADCAST_MU: float = 3.986005e14
"""WGS 84 value of the Earth's gravitational constant for GPS user [m^3/s^2] (IS-GPS-200, Table 20-IV)."""
GPS_BROADCAST_OMEGA_E_DOT: float = 7.2921151467e-5
"""WGS 84 value of the Earth's rotation rate for the GPS user algorithm [rad/s] (IS-GPS-200, Table 20-IV)."""
GPS_PI: float = 3.1415926535898
"""Value of pi the GPS user algorithms use to convert semicircles [-] (IS-GPS-200, Table 20-IV; from memory)."""
# CNAV user algorithm (IS-GPS-200, section 30.3.3.1.3, Table 30-II; table number from memory); it
# uses the same mu and OMEGA_e-dot as Table 20-IV.
GPS_CNAV_A_REF: float = 26_559_710.0
"""Reference semi-major axis A_REF of the CNAV ephemeris, A0 = A_REF + Delta A [m] (IS-GPS-200, Table 30-II)."""
GPS_CNAV_OMEGA_DOT_REF: float = -2.6e-9 * GPS_PI
"""Reference rate of right ascension OMEGA-dot_REF = -2.6e-9 semicircles/s, in [rad/s] (IS-GPS-200, Table 30-II)."""

# --- Sun and Moon ----------------------------------------------------------------------
AU: float = 149597870700.0
"""Astronomical unit [m] (IAU 2012 Resolution B2; IERS Conventions 2010 Table 1.1)."""
GM_SUN: float = 1.32712442099e20
"""Heliocentric gravitational constant, TDB-compatible [m^3/s^2] (IERS Conventions 2010, Table 1.1)."""
MOON_EARTH_MASS_RATIO: float = 0.0123000371
"""Moon-to-Earth mass ratio [-] (IERS Conventions 2010, Table 1.1)."""
GM_MOON: float = GM_EARTH * MOON_EARTH_MASS_RATIO
"""Selenocentric gravitational constant [m^3/s^2] (derived: GM_EARTH x mass ratio, IERS Conventions 2010)."""
R_SUN: float = 6.957e8
"""Nominal solar radius [m] (IAU 2015 Resolution B3)."""
R_MOON: float = 1737400.0
"""Mean lunar radius [m] (IAU WG on Cartographic Coordinates and Rotational Elements, 2009 report)."""
OBLIQUITY_J2000_IAU1976_ARCSEC: float = 84381.448
"""Mean obliquity of the ecliptic at J2000.0 [arcsec] (IAU 1976 system; = 23.43929111 deg as in
Montenbruck & Gill, Satellite Orbits, 2000, sec. 3.3.2; used by the low-precision Sun/Moon series)."""

# --- Light and radiation ---------------------------------------------------------------
C_LIGHT: float = 299792458.0
"""Speed of light in vacuum [m/s] (exact; SI definition, IERS Conventions 2010 Table 1.1)."""
SOLAR_IRRADIANCE_1AU: float = 1361.0
"""Total solar irradiance at 1 au [W/m^2] (IAU 2015 Resolution B3 nominal value 1361 W/m^2)."""
SOLAR_PRESSURE_1AU: float = SOLAR_IRRADIANCE_1AU / C_LIGHT
"""Solar radiation pressure on a perfect absorber at 1 au [N/m^2] (derived, ~4.54e-6)."""

# --- Time ---------------------------------------------------------------------------
SECONDS_PER_DAY: float = 86400.0
DAYS_PER_JULIAN_CENTURY: float = 36525.0
MJD_ZERO: float = 2400000.5
"""JD of MJD 0 [d] (common practice)."""
J2000_JD: float = 2451545.0
"""JD of the J2000.0 epoch, TT [d] (IAU 1976; IERS Conventions 2010 section 5)."""

TWO_PI: float = 2.0 * math.pi
ARCSEC_TO_RAD: float = math.pi / (180.0 * 3600.0)

# --- Earth rotation angle (IERS Conventions 2010, eq. 5.15) ---------------------------
ERA_J2000_TURNS: float = 0.7790572732640
"""Earth rotation angle at JD(UT1) 2451545.0 [turns] (IERS Conventions 2010, eq. 5.15)."""
ERA_RATE_TURNS_PER_UT1_DAY: float = 1.00273781191135448
"""Rate of the Earth rotation angle [turns per UT1 day] (IERS Conventions 2010, eq. 5.15)."""
ERA_RATE_EXCESS_TURNS_PER_UT1_DAY: float = 0.00273781191135448
"""ERA rate minus one turn per day [turns per UT1 day] (IERS Conventions 2010, eq. 5.15).
Written out because 1.00273781191135448 - 1.0 in binary loses ~1e-16 turn/day, i.e.
~6e-12 rad of ERA 25 years from J2000 (ERFA era00 uses this split too)."""
