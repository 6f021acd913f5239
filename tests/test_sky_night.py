"""Night events and grid against PyEphem, an independent ephemeris library; offline astropy.

Sites are invented (not real observatories). Reference: PyEphem (`ephem`), Sun centre at the
given altitude, no refraction (pressure 0), same convention as compute_night.
"""

import socket
import warnings
from datetime import date, datetime, timedelta, timezone

import ephem
import numpy as np
import pytest

from scheduler.model.config import Site
from scheduler.model.errors import InputError
from scheduler.sky.night import compute_night, night_date_for, sun_alt_deg
from scheduler.sky.offline import configure_offline, iers_table_end_mjd

# Invented sites, each placed a few degrees from any real observatory we know of.
SOUTH = Site("Cerro Inventado (fictional)", -34.0, -66.0, 700.0, "America/Argentina/San_Luis")
EQUATOR = Site("Colina Ecuatorial (fictional)", 0.3, 34.9, 1900.0, "Africa/Nairobi")
NORTH = Site("Nordhang (fictional)", 52.0, -110.5, 700.0, "America/Edmonton")
ARCTIC = Site("Polarkamm (fictional)", 69.0, 140.0, 400.0, "Asia/Vladivostok")


def _ephem_event(site: Site, start: datetime, horizon_deg: float, setting: bool):
    """Next Sun setting/rising (centre at horizon_deg) after ``start``; None if never."""
    o = ephem.Observer()
    o.lat, o.lon, o.elevation = str(site.latitude_deg), str(site.longitude_deg), site.elevation_m
    o.pressure = 0  # true altitudes, like ours
    o.horizon = str(horizon_deg)
    o.date = ephem.Date(start.astimezone(timezone.utc).replace(tzinfo=None))
    try:
        f = o.next_setting if setting else o.next_rising
        return f(ephem.Sun(), use_center=True).datetime().replace(tzinfo=timezone.utc)
    except (ephem.AlwaysUpError, ephem.NeverUpError):
        return None


CASES = [(s, d) for s in (SOUTH, EQUATOR, NORTH) for d in (date(2026, 6, 21), date(2026, 12, 1), date(2027, 3, 20))]


@pytest.mark.parametrize("site,d", CASES, ids=[f"{s.name.split()[0]}-{d}" for s, d in CASES])
def test_events_match_pyephem(site, d):
    n = compute_night(site, d)
    before = n.sunset - timedelta(hours=1)
    pairs = [(-0.833, n.sunset, n.sunrise), (-6, n.civil_dusk, n.civil_dawn),
             (-12, n.nautical_dusk, n.nautical_dawn), (-18, n.astronomical_dusk, n.astronomical_dawn)]
    for h, dusk, dawn in pairs:
        ref_dusk = _ephem_event(site, before, h, setting=True)
        if ref_dusk is None or ref_dusk > n.sunrise:
            assert dusk is None and dawn is None, (h, dusk)  # never that dark tonight
            continue
        ref_dawn = _ephem_event(site, ref_dusk, h, setting=False)
        # Our tolerance: 1 minute (we typically agree to about a second).
        assert abs((dusk - ref_dusk).total_seconds()) < 60, (h, dusk, ref_dusk)
        assert abs((dawn - ref_dawn).total_seconds()) < 60, (h, dawn, ref_dawn)


def test_high_latitude_summer_has_no_astronomical_night():
    # Geometry: at 52.0 N on the June solstice the Sun's lowest altitude is 52.0 + 23.44 - 90
    # = -14.6 deg, above -18 (PyEphem agrees: it never sets below that horizon) but below -12.
    n = compute_night(NORTH, date(2026, 6, 21))
    assert n.astronomical_dusk is None and n.astronomical_dawn is None
    assert n.nautical_dusk is not None
    assert _ephem_event(NORTH, n.sunset, -18, setting=True) is None


def test_polar_day_is_an_input_error():
    with pytest.raises(InputError) as e:
        compute_night(ARCTIC, date(2026, 6, 21))
    assert e.value.field == "night"


def test_polar_night_spans_noon_to_noon():
    n = compute_night(ARCTIC, date(2026, 12, 21))
    assert _ephem_event(ARCTIC, n.sunset, -0.833, setting=False) is None  # PyEphem: the Sun never rises
    assert (n.sunrise - n.sunset) == timedelta(hours=24)
    assert n.astronomical_dusk is not None  # the Sun still dips below -18 around midnight
    assert n.n_times == 24 * 60


def test_grid_layout():
    n = compute_night(SOUTH, date(2026, 12, 1), step_s=300)
    t = n.times_unix
    assert t.dtype == np.float64 and np.all(np.diff(t) == 300)
    assert t[0] % 60 == 0 and 0 <= t[0] - n.sunset.timestamp() < 60  # first whole minute after sunset
    assert t[-1] + 300 <= n.sunrise.timestamp() < t[-1] + 600  # last step ends before sunrise
    assert n.sunset.tzinfo is not None and n.sunset.utcoffset() == timedelta(0)
    # Sun altitude on the grid: below -0.833 throughout, as PyEphem says between the events.
    assert np.all(sun_alt_deg(SOUTH, t) < -0.8)
    assert n.step_of(n.sunset + timedelta(minutes=17)) == 4  # rounds up: 17 min into a 5-min grid is the 4th boundary
    with pytest.raises(InputError):
        compute_night(SOUTH, date(2026, 12, 1), step_s=5)


def test_sun_altitude_matches_pyephem():
    n = compute_night(EQUATOR, date(2026, 12, 1))
    t = n.times_unix[::97]
    ours = sun_alt_deg(EQUATOR, t)
    o = ephem.Observer()
    o.lat, o.lon, o.elevation, o.pressure = str(EQUATOR.latitude_deg), str(EQUATOR.longitude_deg), EQUATOR.elevation_m, 0
    for ti, a in zip(t, ours):
        o.date = ephem.Date(datetime.fromtimestamp(ti, timezone.utc).replace(tzinfo=None))
        s = ephem.Sun(o)
        assert a == pytest.approx(np.degrees(float(s.alt)), abs=0.02)


def test_night_date_for():
    # San_Luis is UTC-3 all year: local noon 15:00 UTC.
    assert night_date_for(SOUTH, datetime(2026, 12, 2, 3, 0, tzinfo=timezone.utc)) == date(2026, 12, 1)
    assert night_date_for(SOUTH, datetime(2026, 12, 1, 14, 59, tzinfo=timezone.utc)) == date(2026, 11, 30)
    assert night_date_for(SOUTH, datetime(2026, 12, 1, 15, 0, tzinfo=timezone.utc)) == date(2026, 12, 1)
    assert night_date_for(SOUTH, datetime(2026, 12, 2, 3, 0)) == date(2026, 12, 1)  # naive = UTC
    # Every grid time of a night maps back to that night.
    n = compute_night(NORTH, date(2027, 3, 13))  # daylight saving starts in Canada that night
    for ti in n.times_unix[[0, n.n_times // 2, -1]]:
        assert night_date_for(NORTH, datetime.fromtimestamp(ti, timezone.utc)) == date(2027, 3, 13)


def test_offline_far_beyond_iers_table(monkeypatch):
    """No network, stale predictive table: still computes, silently (a plan must never fail offline)."""
    import astropy.utils.data as aud
    from astropy.utils import iers

    def no_download(*a, **k):
        raise AssertionError("astropy tried to download")

    def no_connect(*a, **k):
        raise AssertionError("network access attempted")

    monkeypatch.setattr(aud, "download_file", no_download)
    monkeypatch.setattr(socket.socket, "connect", no_connect)
    configure_offline()
    assert iers.conf.auto_download is False and iers.conf.auto_max_age is None
    far = date(2031, 9, 10)
    assert (datetime(2031, 9, 10) - datetime(1858, 11, 17)).days > iers_table_end_mjd() + 365
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any warning would fail the test
        configure_offline()  # re-applies the targeted filters after simplefilter
        n = compute_night(SOUTH, far)
    ref = _ephem_event(SOUTH, n.sunset - timedelta(hours=1), -0.833, setting=True)
    assert abs((n.sunset - ref).total_seconds()) < 60  # still right to the minute
