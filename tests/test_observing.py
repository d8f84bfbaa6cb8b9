"""Tests of pipeline.core.observing: coordinates, times, airmass, velocity corrections.

Check values come from outside the module: astropy's own AltAz transformation
computed here, formulas of published sources re-derived here (named beside each),
and worked values of published sources (marked "from memory" where so).
"""

import math
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import AltAz, EarthLocation, SkyCoord
from astropy.time import Time
from astropy.utils import iers

from pipeline.core import observing as obs

# an invented site (the demo's Tarn Ridge values)
SITE = {"latitude_deg": -27.81, "longitude_deg": -69.44, "height_m": 2650.0}
LOCATION = EarthLocation.from_geodetic(lon=-69.44 * u.deg, lat=-27.81 * u.deg, height=2650 * u.m)


def astropy_altaz(coord, times):
    with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None):
        return coord.transform_to(AltAz(obstime=times, location=LOCATION))


def hardie(sec_z):
    """Hardie (1962) airmass, written out again here from the published polynomial (from memory)."""
    s1 = sec_z - 1.0
    return sec_z - 0.0018167 * s1 - 0.002875 * s1 ** 2 - 0.0008083 * s1 ** 3


# -- coordinates --------------------------------------------------------------------
@pytest.mark.parametrize("ra, dec, ra_deg, dec_deg", [
    (157.5, -20.0, 157.5, -20.0),                       # floats: degrees
    ("157.5", "-20.0", 157.5, -20.0),                   # numeric text: degrees
    ("10:30:00", "-20:00:00", 157.5, -20.0),            # sexagesimal: RA hours
    ("10 30 00.0", "-20 00 00", 157.5, -20.0),
    ("10h30m00s", "-20d00m00s", 157.5, -20.0),
    ("00:00:36", "+00:00:36", 0.15, 0.01),              # 36 s of time = 0.15 deg; 36" = 0.01 deg
    ("23:59:59.9", "-89:59:59.9", 359.999583333, -89.999972222),
    (-10.0, 5, 350.0, 5.0),                             # negative RA wraps
])
def test_parse_coordinates_degrees_and_sexagesimal(ra, dec, ra_deg, dec_deg):
    c = obs.parse_coordinates(ra, dec)
    assert c.ra.deg == pytest.approx(ra_deg, abs=1e-8)
    assert c.dec.deg == pytest.approx(dec_deg, abs=1e-8)


@pytest.mark.parametrize("ra, dec, keyword, value", [
    ("ten thirty", "-20", "OBJRA", "ten thirty"),
    ("10:30:00", "south", "OBJDEC", "south"),
    ("10:30:00", "-95:00:00", "OBJDEC", "-95:00:00"),
    ("400.0", "0", "OBJRA", "400.0"),
    (None, "0", "OBJRA", "None"),
    (True, "0", "OBJRA", "True"),
])
def test_parse_coordinates_errors_name_keyword_and_value(ra, dec, keyword, value):
    with pytest.raises(ValueError) as err:
        obs.parse_coordinates(ra, dec, ra_keyword="OBJRA", dec_keyword="OBJDEC")
    message = str(err.value)
    assert keyword in message and value in message and "expected" in message


def test_parse_coordinates_fk5_equinox():
    # FK5 J1950 -> ICRS: precession over 50 yr moves RA by ~0.7 deg near the equator
    c = obs.parse_coordinates(150.0, 10.0, equinox=1950.0)
    truth = SkyCoord(150.0 * u.deg, 10.0 * u.deg, frame="fk5", equinox="J1950").icrs
    assert c.separation(truth).arcsec < 1e-6
    assert abs(c.ra.deg - 150.0) > 0.5


# -- times --------------------------------------------------------------------------
def test_exposure_start_and_middle():
    assert obs.exposure_start("2026-03-14T01:02:03.5").isot == "2026-03-14T01:02:03.500"
    # a date alone completed by a separate time keyword (UT / TIME-OBS convention)
    assert obs.exposure_start("2026-03-14", time_obs="01:02:03.5").isot == "2026-03-14T01:02:03.500"
    # the separate time is ignored when DATE-OBS holds one already
    assert obs.exposure_start("2026-03-14T05:00:00", time_obs="01:00:00").isot \
        == "2026-03-14T05:00:00.000"
    mid = obs.mid_exposure_time("2026-03-14T23:50:00", 1200.0)
    assert mid.isot == "2026-03-15T00:00:00.000"


def test_exposure_start_errors():
    with pytest.raises(ValueError, match=r"UTSTART = '14/03/26'.*ISO 8601"):
        obs.exposure_start("14/03/26", keyword="UTSTART")
    with pytest.raises(ValueError, match="DATE-OBS missing"):
        obs.exposure_start("")
    with pytest.raises(ValueError, match="seconds >= 0"):
        obs.mid_exposure_time("2026-03-14T00:00:00", -5)


# -- airmass ------------------------------------------------------------------------
def test_airmass_formula_against_published_values():
    # zenith: 1 exactly; z = 60 deg: Hardie's polynomial at sec z = 2 gives
    # 2 - 0.0018167 - 0.002875 - 0.0008083 = 1.9945 (arithmetic of the published formula)
    assert obs.airmass_from_altitude(90.0) == pytest.approx(1.0, abs=1e-12)
    assert obs.airmass_from_altitude(30.0) == pytest.approx(1.9945, abs=1e-4)
    # Kasten & Young (1989, Applied Optics 28, 4735), X = 1/(cos z + 0.50572 (96.07995 - z)^-1.6364)
    # (formula from memory): relative air mass of a model atmosphere; 5.60 at z = 80 deg in their
    # table (from memory).
    for z in (0.0, 30.0, 45.0, 60.0, 70.0, 75.0, 80.0):
        kasten_young = 1.0 / (math.cos(math.radians(z)) + 0.50572 * (96.07995 - z) ** -1.6364)
        tol = 0.002 if z <= 70 else 0.015
        assert obs.airmass_from_altitude(90.0 - z) == pytest.approx(kasten_young, abs=tol)
    assert obs.airmass_from_altitude(10.0) == pytest.approx(5.60, abs=0.02)


def test_airmass_below_limit_raises():
    with pytest.raises(ValueError, match="below 5 deg"):
        obs.airmass_from_altitude(-3.0)
    with pytest.raises(ValueError, match="below 5 deg"):
        obs.airmass_from_altitude(np.array([30.0, 4.0]))


def setting_target(start, hours_west=3.6):
    """A target whose hour angle at ``start`` is ``hours_west`` (setting), Dec -5 deg."""
    with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None):
        lst = start.sidereal_time("apparent", longitude=LOCATION.lon)
    return SkyCoord(ra=(lst.deg - 15.0 * hours_west) % 360.0 * u.deg, dec=-5.0 * u.deg)


def test_effective_airmass_against_astropy_altaz():
    start = Time("2026-03-14T03:00:00", scale="utc")
    coord = setting_target(start)
    exptime = 1200.0
    result = obs.effective_airmass(coord, start, exptime, LOCATION)
    # independent: astropy AltAz at 401 times, Hardie airmass, trapezoid mean
    t = np.linspace(0.0, exptime, 401)
    alt = astropy_altaz(coord, start + t * u.s).alt
    x = hardie(1.0 / np.sin(alt.radian))
    mean = np.trapezoid(x, t) / exptime
    assert result.value == pytest.approx(mean, abs=2e-5)
    assert result.start == pytest.approx(x[0], abs=1e-9)
    assert result.middle == pytest.approx(x[200], abs=1e-9)
    assert result.end == pytest.approx(x[-1], abs=1e-9)
    # the scenario of the issue: a setting target at X ~ 1.8 at the start of a 20-min exposure
    assert 1.7 < result.start < 1.9
    assert result.value - result.start > 0.05          # the start airmass is far off
    assert result.start < result.middle < result.value < result.end   # convex in time
    assert "Simpson" in result.method and result.iers_table.startswith("astropy-iers-data")


def test_effective_airmass_sampling_converges():
    start = Time("2026-03-14T03:00:00", scale="utc")
    coord = setting_target(start, hours_west=4.7)      # X ~ 3 at the start
    dense = obs.effective_airmass(coord, start, 1200.0, LOCATION, n_samples=201)
    nine = obs.effective_airmass(coord, start, 1200.0, LOCATION, n_samples=9)
    three = obs.effective_airmass(coord, start, 1200.0, LOCATION, n_samples=3)
    assert 2.8 < dense.start and dense.end < 3.8
    assert abs(nine.value - dense.value) < 1e-5          # the claim in the docstring
    assert abs(three.value - dense.value) < 2e-3
    assert obs.effective_airmass(coord, start, 1200.0, LOCATION, n_samples=4).n_samples == 5
    zero = obs.effective_airmass(coord, start, 0.0, LOCATION)
    assert zero.value == pytest.approx(dense.start, abs=1e-9)


def test_choose_airmass_prefers_computed_and_flags_a_start_of_exposure_header():
    start = Time("2026-03-14T03:00:00", scale="utc")
    coord = setting_target(start)
    ra, dec = coord.ra.to_string(unit=u.hourangle, sep=":"), coord.dec.to_string(sep=":")
    start_airmass = float(hardie(1.0 / np.sin(astropy_altaz(coord, start).alt.radian)))
    choice = obs.choose_airmass(header_airmass=start_airmass, ra=ra, dec=dec,
                                date_obs=start.isot, exptime_s=1200.0, site=SITE)
    assert choice.source == "computed"
    assert choice.value == pytest.approx(obs.effective_airmass(
        coord, start, 1200.0, LOCATION).value, abs=1e-6)     # sexagesimal round trip
    assert choice.difference > 0.05
    assert any("differs from the exposure-mean" in n and "AIRMASS" in n for n in choice.notes)
    cards = choice.cards()
    assert cards["AIRMSRC"][0] == "computed" and cards["AIRMUSED"][0] == round(choice.value, 5)
    assert cards["AIRMHDR"][0] == round(start_airmass, 5)

    header = obs.choose_airmass(header_airmass=start_airmass, ra=ra, dec=dec, date_obs=start.isot,
                                exptime_s=1200.0, site=SITE, policy="header")
    assert header.source == "header" and header.value == start_airmass
    assert math.isfinite(header.computed)          # still computed, for the comparison

    agree = obs.choose_airmass(header_airmass=choice.computed + 0.005, ra=ra, dec=dec,
                               date_obs=start.isot, exptime_s=1200.0, site=SITE)
    assert agree.notes == ()


def test_choose_airmass_fallbacks_say_why():
    no_coords = obs.choose_airmass(header_airmass=1.31, ra=None, dec="-20", date_obs="2026-03-14",
                                   exptime_s=10.0, site=SITE, keywords={"ra_deg": "OBJRA"})
    assert no_coords.source == "header" and no_coords.value == 1.31
    assert any("OBJRA missing" in n for n in no_coords.notes)
    bad = obs.choose_airmass(header_airmass=None, ra="xx", dec="-20", date_obs="2026-03-14T00:00:00",
                             exptime_s=10.0, site=SITE)
    assert bad.source == "none" and math.isnan(bad.value)
    assert any("RA = 'xx'" in n for n in bad.notes)
    assert bad.cards()["AIRMUSED"][0] == "none"
    with pytest.raises(ValueError, match="policy"):
        obs.choose_airmass(header_airmass=1.0, policy="trust")


# -- velocity corrections -----------------------------------------------------------
def test_velocity_corrections_published_example():
    # The example of astropy's SkyCoord.radial_velocity_correction documentation (from memory):
    # Keck (lat 19.8283, lon -155.4783, 4160 m), RA 4.88375, Dec 35.0436389, 2016-06-04:
    # barycentric 20.077135 km/s, heliocentric 20.070039 km/s.
    keck = EarthLocation.from_geodetic(lat=19.8283 * u.deg, lon=-155.4783 * u.deg,
                                       height=4160 * u.m)
    sc = SkyCoord(ra=4.88375 * u.deg, dec=35.0436389 * u.deg)
    v = obs.velocity_corrections(sc, Time("2016-6-4"), keck)
    assert v.barycentric_km_s == pytest.approx(20.077135, abs=2e-5)
    assert v.heliocentric_km_s == pytest.approx(20.070039, abs=2e-5)
    assert v.ephemeris == "builtin" and v.iers_table.startswith("astropy-iers-data")


def low_precision_heliocentric(ra_deg, dec_deg, time, lat_deg, lon_deg):
    """Heliocentric correction from the low-precision solar coordinates of the Astronomical
    Almanac (section C, 'low-precision formulae for the Sun', from memory) and the Earth's
    rotation (GMST from the USNO formula, from memory); agrees to ~0.01 km/s."""
    def earth_helio_xyz_au(jd):
        n = jd - 2451545.0
        g = math.radians((357.528 + 0.9856003 * n) % 360.0)
        # apparent longitude of date, less the general precession (50.29"/yr, from memory)
        # to refer it to the J2000 equinox of the ICRS target coordinates
        lam = math.radians((280.460 + 0.9856474 * n) % 360.0 + 1.915 * math.sin(g)
                           + 0.020 * math.sin(2 * g) - 50.29 / 3600.0 * n / 365.25)
        r = 1.00014 - 0.01671 * math.cos(g) - 0.00014 * math.cos(2 * g)
        eps = math.radians(23.439)
        sun = np.array([r * math.cos(lam), r * math.cos(eps) * math.sin(lam),
                        r * math.sin(eps) * math.sin(lam)])
        return -sun
    jd = time.utc.jd
    dt = 0.01
    v_au_per_day = (earth_helio_xyz_au(jd + dt) - earth_helio_xyz_au(jd - dt)) / (2 * dt)
    v_orbit = v_au_per_day * 149597870.7 / 86400.0
    ra, dec = math.radians(ra_deg), math.radians(dec_deg)
    n_hat = np.array([math.cos(dec) * math.cos(ra), math.cos(dec) * math.sin(ra), math.sin(dec)])
    gmst_h = (18.697374558 + 24.06570982441908 * (jd - 2451545.0)) % 24.0
    hour_angle = math.radians(gmst_h * 15.0 + lon_deg) - ra
    v_rot = -0.4651 * math.cos(math.radians(lat_deg)) * math.cos(dec) * math.sin(hour_angle)
    return float(v_orbit @ n_hat + v_rot)


@pytest.mark.parametrize("ra_deg, dec_deg, iso", [
    (157.5, -20.0, "2026-03-14T03:00:00"),
    (270.0, 66.56, "2026-06-21T06:00:00"),    # near the ecliptic pole: tiny orbital part
    (0.0, 0.0, "2026-09-23T02:00:00"),
    (90.0, 23.4, "2026-12-21T04:30:00"),
])
def test_velocity_corrections_against_low_precision_solar_motion(ra_deg, dec_deg, iso):
    time = Time(iso, scale="utc")
    v = obs.velocity_corrections(SkyCoord(ra_deg * u.deg, dec_deg * u.deg), time, LOCATION)
    approx = low_precision_heliocentric(ra_deg, dec_deg, time, SITE["latitude_deg"],
                                        SITE["longitude_deg"])
    assert v.heliocentric_km_s == pytest.approx(approx, abs=0.03)
    # barycentre - Sun: the Sun moves ~0.013 km/s about the barycentre (Jupiter; from memory)
    assert abs(v.barycentric_km_s - v.heliocentric_km_s) < 0.02


def test_velocity_corrections_do_not_depend_on_todays_date(monkeypatch):
    # an observation after the bundled table's predictions: no download, no error about its
    # age; the same value with the age check on or off (what the function sets itself)
    time = Time("2029-01-10T05:00:00", scale="utc")
    coord = SkyCoord(157.5 * u.deg, -20.0 * u.deg)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with iers.conf.set_temp("auto_max_age", 30.0):
            first = obs.velocity_corrections(coord, time, LOCATION)
        second = obs.velocity_corrections(coord, time, LOCATION)
    assert first == second
    assert abs(first.heliocentric_km_s) < 31.0
