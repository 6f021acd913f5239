"""Moving targets: planets against PyEphem (an independent ephemeris), PI ephemeris tables, the sky grid.

PyEphem computes planets from its own series (VSOP87, truncated; Pluto from its own fit);
ours come from astropy's built-in ERFA series (Simon et al. 1994, "plan94") and, for Pluto,
JPL's approximate Keplerian elements. Sites and comet orbits are invented.
"""

from datetime import date, datetime, timezone

import ephem
import numpy as np
import pytest

from scheduler.model.config import Site
from scheduler.model.errors import InputError
from scheduler.sky.bodies import (BODIES, EphemerisTable, body_astrometric, check_body, parse_ephemeris_csv,
                                  radec_deg, track_key, track_radec)
from scheduler.sky.ephemeris import SkyCache, compute_sky
from scheduler.sky.night import compute_night

SITE = Site("Loma Inventada (fictional)", -26.6, -67.6, 3870.0, "America/Argentina/Catamarca")
NORTH = Site("Nordhang (fictional)", 52.0, -110.5, 700.0, "America/Edmonton")


def _edate(unix: float):
    return ephem.Date(datetime.fromtimestamp(unix, timezone.utc).replace(tzinfo=None))


def _sep_arcsec(ra1, dec1, ra2, dec2):
    r1, d1, r2, d2 = map(np.radians, (ra1, dec1, ra2, dec2))
    c = np.sin(d1) * np.sin(d2) + np.cos(d1) * np.cos(d2) * np.cos(r1 - r2)
    return np.degrees(np.arccos(np.clip(c, -1, 1))) * 3600


# Tolerances, arcsec. Planets: ERFA's plan94 documents maximum errors against JPL's DE200 over
# 1800-2050 of a few arcsec for Mercury and Venus, 17" heliocentric for Mars (more seen from
# the Earth near opposition), up to about 1.5 arcmin for Saturn and Uranus (from memory);
# PyEphem's truncated VSOP87 adds about 1". Measured here: <= 70" (Mars <= 33").
# Pluto: approximate elements, measured <= 34" over 1950-2045.
TOL_ARCSEC = {b: 120.0 for b in BODIES} | {"mercury": 15.0, "venus": 15.0, "mars": 60.0, "pluto": 60.0}


@pytest.mark.parametrize("body", BODIES)
def test_astrometric_positions_against_pyephem(body):
    times = np.array([datetime(2001 + 4 * k, 1 + k, 3 + k, 4, tzinfo=timezone.utc).timestamp() for k in range(11)])
    vec, delta = body_astrometric(body, times)
    ra, dec = radec_deg(vec)
    for i, t in enumerate(times):
        e = getattr(ephem, body.capitalize())(_edate(t))
        # a_ra/a_dec: PyEphem's geocentric astrometric J2000 position (light time included)
        sep = _sep_arcsec(ra[i], dec[i], np.degrees(float(e.a_ra)), np.degrees(float(e.a_dec)))
        assert sep < TOL_ARCSEC[body], f"{body} at {t}: {sep:.1f} arcsec"
        assert delta[i] == pytest.approx(e.earth_distance, rel=5e-4)


def test_body_names():
    assert check_body(" Jupiter ") == "jupiter"
    with pytest.raises(InputError, match=r"^body: 'Moon': the Moon .* not offered"):
        check_body("Moon")
    with pytest.raises(InputError, match=r"^body: unknown body 'vulcan'; allowed: mercury venus"):
        check_body("vulcan")


def _observer(site: Site, unix: float) -> ephem.Observer:
    o = ephem.Observer()
    o.lat, o.lon, o.elevation, o.pressure = str(site.latitude_deg), str(site.longitude_deg), site.elevation_m, 0
    o.date = _edate(unix)
    return o


@pytest.fixture(scope="module")
def mars_night():
    # Mars near its 2027 opposition (about 0.68 AU): its diurnal parallax is about 13".
    night = compute_night(SITE, date(2027, 2, 19))
    sky = compute_sky(SITE, night, np.array([10.0, 0.0, 0.0]), np.array([-20.0, 0.0, 0.0]), [None, "mars", "saturn"])
    return night, sky


def test_grid_topocentric_positions_against_pyephem(mars_night):
    night, sky = mars_night
    np.testing.assert_array_equal(sky.moving_rows, [1, 2])
    assert not sky.is_moving(0) and sky.is_moving(1)
    for row, name, tol in ((1, "Mars", 30.0), (2, "Saturn", 120.0)):
        for j in range(0, night.n_times, 40):
            b = getattr(ephem, name)(_observer(SITE, night.times_unix[j]))
            alt, az = np.degrees(float(b.alt)), np.degrees(float(b.az))
            if alt < -5:
                continue
            d_alt = (sky.alt_deg[row, j] - alt) * 3600
            d_az = ((sky.az_deg[row, j] - az + 180) % 360 - 180) * np.cos(np.radians(alt)) * 3600
            assert np.hypot(d_alt, d_az) < tol, f"{name} step {j}"
        # exported position at a step: the astrometric position at that time
        ra, dec = sky.position_deg(row, 100)
        e = getattr(ephem, name)(_edate(night.times_unix[100]))
        assert _sep_arcsec(ra, dec, np.degrees(float(e.a_ra)), np.degrees(float(e.a_dec))) < tol
    # Mars moves: its position differs between the first and last step (~0.4 deg/day retrograde)
    r0, d0 = sky.position_deg(1, 0)
    r1, d1 = sky.position_deg(1, night.n_times - 1)
    assert 30 < _sep_arcsec(r0, d0, r1, d1) < 3600


def _pyephem_table(name: str, t0: float, t1: float, step_s: float) -> EphemerisTable:
    ts = np.arange(t0, t1 + step_s, step_s)
    rows = [getattr(ephem, name)(_edate(t)) for t in ts]
    return EphemerisTable(tuple(ts.tolist()), tuple(np.degrees(float(b.a_ra)) for b in rows),
                          tuple(np.degrees(float(b.a_dec)) for b in rows), tuple(b.earth_distance for b in rows))


def test_pyephem_sampled_table_reproduces_builtin_position(mars_night):
    night, _ = mars_night
    tab = _pyephem_table("Mars", night.times_unix[0] - 3 * 3600, night.times_unix[-1] + 3 * 3600, 2 * 3600)
    cache = SkyCache()
    sky = cache.get(SITE, night, np.array([0.0, 0.0]), np.array([0.0, 0.0]), ["mars", tab])
    d_alt = (sky.alt_deg[0] - sky.alt_deg[1]) * 3600
    d_az = ((sky.az_deg[0] - sky.az_deg[1] + 180) % 360 - 180) * np.cos(np.radians(sky.alt_deg[0])) * 3600
    # Same object, two independent sources (plan94 vs VSOP87) and 2-hour cubic interpolation:
    # the Mars tolerance above applies; measured about 5".
    assert np.max(np.hypot(d_alt, d_az)) < TOL_ARCSEC["mars"]
    assert sky.track_covered.all()


def _comet_truth(hours):
    """An invented comet-like motion crossing RA 0/360: 1.2 deg/h in RA, accelerating in Dec."""
    ra = (358.2 + 1.2 * hours + 0.01 * hours**2) % 360.0
    dec = 12.0 + 0.3 * hours - 0.004 * hours**2
    return ra, dec


def test_table_crossing_ra_zero_interpolates_correctly():
    t0 = datetime(2027, 5, 1, tzinfo=timezone.utc).timestamp()
    hours = np.arange(0.0, 6.5, 1.0)
    ra, dec = _comet_truth(hours)
    assert ra[1] > 359 and ra[2] < 1  # the rows do cross 0/360
    tab = EphemerisTable(tuple(t0 + hours * 3600), tuple(ra), tuple(dec))
    q = np.arange(0.0, 6.0, 0.125)
    got_ra, got_dec, covered = track_radec(tab, t0 + q * 3600)
    want_ra, want_dec = _comet_truth(q)
    assert covered.all()
    # within an arcsecond of the smooth motion; a naive interpolation of RA would swing ~180 deg
    assert np.max(_sep_arcsec(got_ra, got_dec, want_ra, want_dec)) < 1.0
    crossing = (q >= 1.0) & (q <= 2.0)  # between the rows at RA 359.4 and 0.6
    assert np.all((got_ra[crossing] < 0.7) | (got_ra[crossing] > 359.3))
    # the rows themselves are reproduced exactly
    r, d, _ = track_radec(tab, t0 + hours * 3600)
    assert np.max(_sep_arcsec(r, d, ra, dec)) < 0.01  # arccos resolves ~0.003" near 0


def test_table_outside_its_span_is_not_covered():
    tab = EphemerisTable((1000.0, 2000.0, 3000.0), (10.0, 10.1, 10.2), (5.0, 5.0, 5.0))
    _, _, covered = track_radec(tab, [999.0, 1000.0, 2500.0, 3000.0, 3001.0])
    np.testing.assert_array_equal(covered, [False, True, True, True, False])


def test_table_parallax_of_a_near_comet():
    # A comet 0.05 AU away shows a diurnal parallax of 8.794"/0.05 = 176" (horizontal); in
    # altitude it lowers the object by pi_h * cos(alt) (textbook spherical astronomy, from memory).
    # The textbook form uses the geocentric vertical, ours the geodetic one (0.15 deg apart at
    # this latitude: up to 0.5" of the shift) and a spherical Earth (0.2 % in the radius).
    night = compute_night(SITE, date(2027, 5, 1))
    t = night.times_unix
    ts = np.arange(t[0] - 7200, t[-1] + 7200, 3600.0)
    far = EphemerisTable(tuple(ts), tuple(np.full(ts.size, 200.0)), tuple(np.full(ts.size, -30.0)))
    near = EphemerisTable(far.times_unix, far.ra_deg, far.dec_deg, tuple(np.full(ts.size, 0.05)))
    sky = compute_sky(SITE, night, np.zeros(2), np.zeros(2), [far, near])
    up = sky.alt_deg[0] > 15
    drop = (sky.alt_deg[0] - sky.alt_deg[1])[up] * 3600
    expect = 8.794 / 0.05 * np.cos(np.radians(sky.alt_deg[0][up]))
    np.testing.assert_allclose(drop, expect, rtol=0.01, atol=0.6)


def test_uncovered_night_times_have_no_position():
    night = compute_night(NORTH, date(2027, 1, 10))
    t = night.times_unix
    half = t[night.n_times // 2]
    tab = EphemerisTable((t[0] - 3600, half), (80.0, 80.5), (30.0, 30.2))
    sky = compute_sky(NORTH, night, np.zeros(1), np.zeros(1), [tab])
    cov = sky.covered([0])[0]
    assert cov[: night.n_times // 2].all() and not cov[night.n_times // 2 + 1:].any()
    assert np.all(np.isnan(sky.alt_deg[0, ~cov])) and np.all(np.isinf(sky.airmass[0, ~cov]))
    assert np.all(np.isfinite(sky.alt_deg[0, cov]))


def test_cache_keys_moving_targets_by_content():
    night = compute_night(NORTH, date(2027, 1, 10))
    t = night.times_unix
    tab = EphemerisTable((t[0] - 3600, t[-1] + 3600), (80.0, 80.5), (30.0, 30.2))
    same = parse_ephemeris_csv(tab.to_csv())
    assert track_key(tab) == track_key(same) and track_key("Jupiter") == ("body", "jupiter")
    cache = SkyCache()
    a = cache.get(NORTH, night, np.array([5.0, 0.0, 0.0]), np.array([5.0, 0.0, 0.0]), [None, tab, "jupiter"])
    assert cache.targets_computed == 3
    b = cache.get(NORTH, night, np.array([0.0, 5.0, 0.0, 7.0]), np.array([0.0, 5.0, 0.0, 7.0]),
                  [same, None, "jupiter", None])
    assert cache.targets_computed == 4  # only the new fixed target
    np.testing.assert_array_equal(b.moving_rows, [0, 2])
    np.testing.assert_array_equal(a.alt_deg[1], b.alt_deg[0])
    np.testing.assert_array_equal(a.alt_deg[2], b.alt_deg[2])
    direct = compute_sky(NORTH, night, np.zeros(1), np.zeros(1), ["jupiter"])
    np.testing.assert_allclose(direct.alt_deg[0], b.alt_deg[2], atol=1e-6)


# --------------------------------------------------------------------------- table parsing

GOOD = """time,ra,dec,delta_au
2027-05-01T00:00:00Z,359.5,10.0,0.8
2027-05-01T06:00:00Z,0.5,10.5,0.8
2027-05-01T12:00:00Z,01:54:00,+11:00:00,0.8
"""


def test_parse_good_table():
    tab = parse_ephemeris_csv(GOOD)
    assert tab.n_rows == 3 and tab.ra_deg[2] == pytest.approx(28.5) and tab.dec_deg[2] == pytest.approx(11.0)
    assert tab.delta_au == (0.8, 0.8, 0.8)
    again = parse_ephemeris_csv(tab.to_csv())
    assert again == tab
    nodist = parse_ephemeris_csv("time,ra,dec\n2027-05-01T00:00Z,1,2\n2027-05-02T00:00Z,1.5,2.5\n")
    assert nodist.delta_au is None


@pytest.mark.parametrize("text, message", [
    ("time,ra\n2027-05-01T00:00Z,1\n", r"no 'dec' column"),
    ("time,ra,dec,mag\n2027-05-01T00:00Z,1,2,5\n", r"unknown column 'mag'"),
    ("time,ra,dec\n2027-05-01T00:00Z,1,2\n", r"1 row\(s\); an ephemeris table needs at least two"),
    ("time,ra,dec\n2027-05-01T06:00Z,1,2\n2027-05-01T03:00Z,1,2\n",
     r"row 2: time 2027-05-01T03:00:00Z is not after row 1's 2027-05-01T06:00:00Z"),
    ("time,ra,dec\n2027-05-01T06:00Z,1,2\n2027-05-01T07:00Z,1,2\n2027-05-01T07:00Z,1,2\n",
     r"row 3: time .* is not after row 2's"),
    ("time,ra,dec\n2027-05-01T06:00Z,1,2\n2027-05-01T07:00Z,361,2\n", r"row 2: ra: '361' is out of range"),
    ("time,ra,dec\n2027-05-01T06:00Z,1,2\nyesterday,1,2\n", r"row 2: time: 'yesterday' is not an ISO-8601"),
    ("time,ra,dec,delta_au\n2027-05-01T06:00Z,1,2,0\n2027-05-01T07:00Z,1,2,1\n", r"row 1: delta_au 0 is out of range"),
    ("", r"empty"),
])
def test_parse_refuses_bad_tables_naming_the_row(text, message):
    with pytest.raises(InputError, match=message):
        parse_ephemeris_csv(text, "comet.csv")


def test_cover_check_names_the_row():
    tab = parse_ephemeris_csv(GOOD)
    tab.require_cover(tab.start_unix, tab.end_unix, "the night")
    with pytest.raises(InputError, match=r"ends at row 3 \(2027-05-01T12:00:00Z\), before the night ends"):
        tab.require_cover(tab.start_unix + 60, tab.end_unix + 60, "the night")
    with pytest.raises(InputError, match=r"starts at row 1 \(2027-05-01T00:00:00Z\), after the night begins"):
        tab.require_cover(tab.start_unix - 60, tab.end_unix, "the night")
