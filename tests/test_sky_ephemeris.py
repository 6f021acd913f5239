"""Sky grid against PyEphem (independent library) and a direct astropy transform; the cache.

Sites are invented. PyEphem is set to pressure 0 so both sides give true (unrefracted),
topocentric, apparent positions.
"""

from datetime import date, datetime, timezone

import ephem
import numpy as np
import pytest

from scheduler.model.config import Site
from scheduler.model.errors import InputError
from scheduler.sky import ephemeris as eph_mod
from scheduler.sky.airmass import kasten_young_1989
from scheduler.sky.ephemeris import SkyCache, compute_sky
from scheduler.sky.night import compute_night, earth_location, night_date_for

# Invented sites, each placed a few degrees from any real observatory we know of.
SOUTH = Site("Cerro Inventado (fictional)", -34.0, -66.0, 700.0, "America/Argentina/San_Luis")
EQUATOR = Site("Colina Ecuatorial (fictional)", 0.3, 34.9, 1900.0, "Africa/Nairobi")
NORTH = Site("Nordhang (fictional)", 52.0, -110.5, 700.0, "America/Edmonton")

RA = np.array([10.68, 83.82, 201.30, 279.23, 0.0, 359.99, 150.0, 45.0])
DEC = np.array([41.27, -5.39, -43.02, 38.78, 89.9, -89.9, 0.0, -60.0])


def _observer(site: Site, unix: float) -> ephem.Observer:
    o = ephem.Observer()
    o.lat, o.lon, o.elevation, o.pressure = str(site.latitude_deg), str(site.longitude_deg), site.elevation_m, 0
    o.date = ephem.Date(datetime.fromtimestamp(unix, timezone.utc).replace(tzinfo=None))
    return o


def _star(ra, dec):
    s = ephem.FixedBody()
    s._ra, s._dec, s._epoch = np.radians(ra), np.radians(dec), ephem.J2000
    return s


# (site, night) pairs: south/equator/north, bright and dark Moon.
NIGHTS = [(SOUTH, date(2026, 12, 1)), (EQUATOR, date(2027, 1, 20)), (NORTH, date(2027, 3, 20))]


@pytest.fixture(scope="module", params=NIGHTS, ids=lambda p: p[0].name.split()[0])
def grid(request):
    site, d = request.param
    night = compute_night(site, d)
    return site, compute_sky(site, night, RA, DEC)


def test_shapes_and_dtypes(grid):
    _, g = grid
    n_t = g.night.n_times
    for a in (g.alt_deg, g.az_deg, g.airmass, g.sun_sep_deg, g.moon_sep_deg):
        assert a.shape == (RA.size, n_t) and a.dtype == np.float32
    for a in (g.sun_alt_deg, g.moon_alt_deg, g.moon_illum, g.moon_phase_angle_deg):
        assert a.shape == (n_t,) and a.dtype == np.float64
    assert g.n_targets == RA.size
    assert np.all((g.az_deg >= 0) & (g.az_deg < 360))


def test_against_pyephem(grid):
    site, g = grid
    for j in range(0, g.night.n_times, max(1, g.night.n_times // 6)):
        o = _observer(site, g.night.times_unix[j])
        sun, moon = ephem.Sun(o), ephem.Moon(o)
        # Sun and Moon altitude: our tolerance 0.05 deg; we measure ~0.01.
        assert g.sun_alt_deg[j] == pytest.approx(np.degrees(float(sun.alt)), abs=0.05)
        assert g.moon_alt_deg[j] == pytest.approx(np.degrees(float(moon.alt)), abs=0.05)
        # Illuminated fraction (geocentric): PyEphem's moon_phase.
        assert g.moon_illum[j] == pytest.approx(moon.moon_phase, abs=0.002)
        for i in range(RA.size):
            s = _star(RA[i], DEC[i])
            s.compute(o)
            alt, az = np.degrees(float(s.alt)), np.degrees(float(s.az))
            assert g.alt_deg[i, j] == pytest.approx(alt, abs=10 / 3600)  # within 10 arcsec
            daz = (g.az_deg[i, j] - az + 180) % 360 - 180
            assert abs(daz) * np.cos(np.radians(alt)) < 10 / 3600
            assert g.sun_sep_deg[i, j] == pytest.approx(np.degrees(float(ephem.separation(s, sun))), abs=0.02)
            assert g.moon_sep_deg[i, j] == pytest.approx(np.degrees(float(ephem.separation(s, moon))), abs=0.05)


def test_against_direct_astropy_transform(grid):
    """The rotation-matrix shortcut vs astropy's full ICRS -> AltAz per target and time."""
    from astropy import units as u
    from astropy.coordinates import AltAz, SkyCoord
    from astropy.time import Time

    site, g = grid
    j = np.arange(0, g.night.n_times, 53)
    t = Time(g.night.times_unix[j], format="unix")
    ref = SkyCoord(ra=RA[:, None] * u.deg, dec=DEC[:, None] * u.deg).transform_to(
        AltAz(obstime=t[None, :], location=earth_location(site)))
    dalt = (g.alt_deg[:, j] - ref.alt.deg) * 3600
    daz = ((g.az_deg[:, j] - ref.az.deg + 180) % 360 - 180) * 3600 * np.cos(ref.alt.rad)
    assert np.abs(dalt).max() < 1.0  # arcsec; measured 0.3-0.5
    assert np.abs(daz).max() < 1.0


def test_airmass_and_phase_relations(grid):
    _, g = grid
    np.testing.assert_allclose(g.airmass, kasten_young_1989(g.alt_deg.astype(np.float64)), rtol=1e-5)
    assert np.all(np.isinf(g.airmass[g.alt_deg <= 0]))
    # Illuminated fraction = (1 + cos phase angle) / 2 (geometry of a sphere lit from one side).
    np.testing.assert_allclose(g.moon_illum, (1 + np.cos(np.radians(g.moon_phase_angle_deg))) / 2, atol=1e-12)
    assert np.all((g.moon_phase_angle_deg >= 0) & (g.moon_phase_angle_deg <= 180))


def test_full_and_new_moon_phase_angles():
    # Dates of full and new Moon from PyEphem itself (independent of our code).
    full = ephem.next_full_moon("2026/11/15").datetime().replace(tzinfo=timezone.utc)
    new = ephem.next_new_moon("2026/11/15").datetime().replace(tzinfo=timezone.utc)
    # Up to 12 h from the event (it may fall in daytime) and the Moon's ecliptic latitude
    # (up to 5.1 deg) keep the phase angle a few degrees from 0 / 180.
    for when, lo, hi in ((full, 0.0, 12.0), (new, 168.0, 180.0)):
        night = compute_night(EQUATOR, night_date_for(EQUATOR, when))
        g = compute_sky(EQUATOR, night, RA[:1], DEC[:1])
        k = np.argmin(np.abs(night.times_unix - when.timestamp()))
        assert lo <= g.moon_phase_angle_deg[k] <= hi


def test_bad_coordinates_are_input_errors():
    night = compute_night(SOUTH, date(2026, 12, 1), step_s=600)
    with pytest.raises(InputError) as e:
        compute_sky(SOUTH, night, [10.0], [95.0])
    assert e.value.field == "dec_deg"
    with pytest.raises(InputError):
        compute_sky(SOUTH, night, [360.0], [0.0])
    with pytest.raises(InputError):
        compute_sky(SOUTH, night, [1.0, 2.0], [0.0])


def test_cache_computes_only_new_targets(monkeypatch):
    night = compute_night(SOUTH, date(2026, 12, 1), step_s=120)
    seen = []
    real = eph_mod._targets_cirs

    def counting(ra, dec, *rest):
        seen.append(len(ra))
        return real(ra, dec, *rest)

    monkeypatch.setattr(eph_mod, "_targets_cirs", counting)
    cache = SkyCache()
    g1 = cache.get(SOUTH, night, RA[:5], DEC[:5])
    assert seen == [5] and cache.targets_computed == 5 and cache.nights_computed == 1
    # Re-plan with the same queue plus two new targets, in another order: only 2 computed.
    order = np.array([6, 0, 5, 3, 1, 2, 4])
    g2 = cache.get(SOUTH, night, RA[order], DEC[order])
    assert seen == [5, 2] and cache.targets_computed == 7 and cache.nights_computed == 1
    # Same request again: nothing computed.
    cache.get(SOUTH, night, RA[order], DEC[order])
    assert seen == [5, 2]
    # Rows follow the requested order and equal a fresh computation.
    ref = compute_sky(SOUTH, night, RA[order], DEC[order])
    for name in ("alt_deg", "az_deg", "airmass", "sun_sep_deg", "moon_sep_deg"):
        np.testing.assert_allclose(getattr(g2, name), getattr(ref, name), atol=1e-4)
    np.testing.assert_array_equal(g2.alt_deg[1], g1.alt_deg[0])
    np.testing.assert_array_equal(g2.ra_deg, RA[order])
    # Duplicate targets are computed once.
    cache.get(SOUTH, night, [RA[7], RA[7]], [DEC[7], DEC[7]])
    assert seen[-1] == 1
    # Another night is a new entry.
    cache.get(SOUTH, compute_night(SOUTH, date(2026, 12, 2), step_s=120), RA[:1], DEC[:1])
    assert cache.nights_computed == 2
