"""Physical constants and unit factors, each with its unit in the name and its source beside it."""

# WGS-84 ellipsoid (NIMA TR8350.2, 3rd ed., 2000, table 3.1)
WGS84_A_km = 6378.137
WGS84_F = 1.0 / 298.257223563
WGS84_E2 = WGS84_F * (2.0 - WGS84_F)

# Earth's gravitational parameter (WGS-84, NIMA TR8350.2 table 3.1, 3.986004418e14 m^3/s^2)
MU_EARTH_km3_s2 = 398600.4418
MU_EARTH_m3_s2 = 3.986004418e14

# Mean Earth radius used by IGRF for its reference sphere (IGRF-14, Alken et al. 2025: a = 6371.2 km)
IGRF_REFERENCE_RADIUS_km = 6371.2

# Earth rotation rate (IERS Conventions 2010, nominal 7.292115e-5 rad/s)
OMEGA_EARTH_rad_s = 7.292115e-5

# Unit factors into recon's internal units (exact by definition of the units)
NT_PER_UNIT = {"nT": 1.0, "uT": 1.0e3, "mG": 100.0, "G": 1.0e5, "T": 1.0e9}  # 1 G = 1e-4 T, 1 mG = 100 nT
RAD_S_PER_UNIT = {"rad/s": 1.0, "deg/s": 3.141592653589793 / 180.0}
A_PER_UNIT = {"A": 1.0, "mA": 1.0e-3}  # "duty" is handled in load: duty x max_current_A

NT_PER_T = 1.0e9
# Angles: one name per direction, so that a module never has to guess what "_DEG" meant
DEG_PER_RAD = 180.0 / 3.141592653589793
RAD_PER_DEG = 3.141592653589793 / 180.0
# Time stamps are datetime64[ns]: nanoseconds per second
NS_PER_S = 1_000_000_000
# Julian year (IAU: 365.25 days of 86400 s), the unit of every rate of change across a season
DAYS_PER_JULIAN_YEAR = 365.25

# GPS time origin (ICD-GPS-200: 1980-01-06T00:00:00 UTC, when GPS - UTC = 0)
GPS_EPOCH_UTC = "1980-01-06T00:00:00"
