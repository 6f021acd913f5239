"""Night events and target altitudes against astroplan, an independent library; offline.

Reference: astroplan's Observer (sun_set_time, sun_rise_time, twilight_evening_* and
twilight_morning_*, altaz). It finds Sun crossings by its own method (a grid over 24 h with
interpolation) on top of astropy, so it checks our root finding and our rotation-matrix sky
grid rather than repeating them. Both sides use the Sun's centre, pressure 0 (no refraction),
-0.833 deg for sunset/sunrise and -6/-12/-18 deg for the twilights.
Our tolerances: 1 minute for events, 0.1 deg for altitudes (measured: about 2 s and 0.4 arcsec).
Sites are invented, each placed a few degrees from any real observatory we know of.
"""

import socket
import warnings
from datetime import date

import numpy as np
import pytest

from scheduler.model.config import Site
from scheduler.sky.offline import configure_offline

configure_offline()  # before astroplan touches astropy's IERS tables: no download, stale table accepted

import astroplan  # noqa: E402
import astropy.units as u  # noqa: E402
from astropy.coordinates import SkyCoord  # noqa: E402
from astropy.time import Time  # noqa: E402

from scheduler.sky.ephemeris import compute_sky  # noqa: E402
from scheduler.sky.night import compute_night  # noqa: E402

SOUTH = Site("Cerro Inventado (fictional)", -34.0, -66.0, 700.0, "America/Argentina/San_Luis")
NORTH = Site("Nordhang (fictional)", 52.0, -110.5, 700.0, "America/Edmonton")

RA = np.array([10.68, 83.82, 201.30, 279.23, 150.0, 45.0])
DEC = np.array([41.27, -5.39, -43.02, 38.78, 0.0, -60.0])

CASES = [(SOUTH, date(2026, 12, 1)), (SOUTH, date(2027, 6, 10)), (NORTH, date(2027, 1, 15)), (NORTH, date(2026, 9, 20))]
IDS = [f"{s.name.split()[0]}-{d}" for s, d in CASES]


@pytest.fixture(autouse=True)
def _no_network(monkeypatch):
    """Any download attempt by astropy or astroplan fails the test."""
    import astropy.utils.data as aud

    def refuse(*a, **k):
        raise AssertionError("network access attempted")

    monkeypatch.setattr(aud, "download_file", refuse)
    monkeypatch.setattr(socket.socket, "connect", refuse)
    configure_offline()


def _observer(site: Site) -> astroplan.Observer:
    return astroplan.Observer(latitude=site.latitude_deg * u.deg, longitude=site.longitude_deg * u.deg,
                              elevation=site.elevation_m * u.m, pressure=0 * u.bar)


def _seconds(ours, ref: Time) -> float:
    assert ours is not None and not np.ma.is_masked(ref.jd)
    return abs(ours.timestamp() - ref.unix)


@pytest.mark.parametrize("site,d", CASES, ids=IDS)
def test_events_match_astroplan(site, d):
    n = compute_night(site, d)
    obs = _observer(site)
    before = Time(n.sunset) - 1 * u.hour  # astroplan searches the 24 h after this
    set_ref = obs.sun_set_time(before, which="next", horizon=-0.833 * u.deg)
    rise_ref = obs.sun_rise_time(set_ref, which="next", horizon=-0.833 * u.deg)
    assert _seconds(n.sunset, set_ref) < 60
    assert _seconds(n.sunrise, rise_ref) < 60
    for kind in ("civil", "nautical", "astronomical"):
        dusk_ref = getattr(obs, f"twilight_evening_{kind}")(before, which="next")
        dawn_ref = getattr(obs, f"twilight_morning_{kind}")(dusk_ref, which="next")
        assert _seconds(getattr(n, f"{kind}_dusk"), dusk_ref) < 60, kind
        assert _seconds(getattr(n, f"{kind}_dawn"), dawn_ref) < 60, kind


def test_no_astronomical_night_agrees_with_astroplan():
    # Geometry: at 52.0 N on the June solstice the Sun gets no lower than 52.0 + 23.44 - 90
    # = -14.6 deg. astroplan finds no -18 deg crossing (masked time); we give None.
    n = compute_night(NORTH, date(2026, 6, 21))
    obs = _observer(NORTH)
    before = Time(n.sunset) - 1 * u.hour
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # astroplan warns that the Sun never crosses -18 deg
        ref = obs.twilight_evening_astronomical(before, which="next")
    assert np.ma.is_masked(ref.jd)
    assert n.astronomical_dusk is None and n.astronomical_dawn is None
    assert _seconds(n.nautical_dusk, obs.twilight_evening_nautical(before, which="next")) < 60


@pytest.mark.parametrize("site,d", CASES[::2], ids=IDS[::2])
def test_target_altitudes_match_astroplan(site, d):
    n = compute_night(site, d)
    g = compute_sky(site, n, RA, DEC)
    j = np.arange(0, n.n_times, 37)
    targets = [astroplan.FixedTarget(SkyCoord(ra=r * u.deg, dec=c * u.deg)) for r, c in zip(RA, DEC)]
    ref = _observer(site).altaz(Time(n.times_unix[j], format="unix"), targets, grid_times_targets=True)
    assert ref.alt.shape == (RA.size, j.size)
    np.testing.assert_allclose(g.alt_deg[:, j], ref.alt.deg, atol=0.1)
    # Targets below and above the horizon both occur, so the comparison covers the whole sky.
    assert (ref.alt.deg < 0).any() and (ref.alt.deg > 30).any()
