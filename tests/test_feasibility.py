"""Feasibility and merit on hand-built sky and conditions grids (exact, fast)."""

from __future__ import annotations

import math
from datetime import date, datetime, timedelta, timezone

import numpy as np
import pytest

from scheduler.conditions.grid import ConditionsGrid
from scheduler.constraints.catalog import names
from scheduler.model.config import starter_config
from scheduler.constraints.feasibility import (
    TRANSMISSION_FLOOR, Reason, evaluate, start_windows, static_layer,
)
from scheduler.model.request import RequestSpec
from scheduler.sky.airmass import kasten_young_1989
from scheduler.sky.ephemeris import SkyGrid
from scheduler.sky.night import Night

CFG = starter_config()  # min alt 20, max alt 87, sun avoidance 45, wind 15 m/s, humidity 85 %
LAT = CFG.site.latitude_deg
STEP = 60
T0 = datetime(2026, 3, 10, 0, 0, tzinfo=timezone.utc)


# --------------------------------------------------------------------------- hand-built grids

def night(n_t: int) -> Night:
    times = T0.timestamp() + np.arange(n_t, dtype=np.float64) * STEP
    end = T0 + timedelta(seconds=n_t * STEP)
    return Night(date=date(2026, 3, 9), sunset=T0, sunrise=end, civil_dusk=None, civil_dawn=None,
                 nautical_dusk=None, nautical_dawn=None, astronomical_dusk=None, astronomical_dawn=None,
                 step_s=STEP, times_unix=times)


def sky(alt, *, sun_alt=-30.0, moon_alt=-10.0, moon_sep=90.0, sun_sep=120.0, illum=0.5, phase=90.0,
        az=180.0) -> SkyGrid:
    """A SkyGrid from target altitudes [n_tg, n_t]; everything else constant unless given per time."""
    alt = np.atleast_2d(np.asarray(alt, dtype=np.float64))
    n_tg, n_t = alt.shape

    def per_t(v):
        return np.broadcast_to(np.asarray(v, dtype=np.float64), (n_t,)).copy()

    def per_tg(v):
        return np.broadcast_to(np.asarray(v, dtype=np.float64), (n_tg, n_t)).copy()

    return SkyGrid(night=night(n_t), ra_deg=np.zeros(n_tg), dec_deg=np.zeros(n_tg), alt_deg=alt,
                   az_deg=per_tg(az), airmass=kasten_young_1989(alt), sun_alt_deg=per_t(sun_alt),
                   sun_sep_deg=per_tg(sun_sep), moon_alt_deg=per_t(moon_alt), moon_illum=per_t(illum),
                   moon_phase_angle_deg=per_t(phase), moon_sep_deg=per_tg(moon_sep))


def cond(n_t: int, *, seeing=0.8, pwv=2.0, cloud=0.0, wind=5.0, humidity=40.0, dome=True) -> ConditionsGrid:
    def per_t(v, dtype=np.float64):
        return np.broadcast_to(np.asarray(v, dtype=dtype), (n_t,)).copy()

    return ConditionsGrid(seeing_arcsec=per_t(seeing), pwv_mm=per_t(pwv), cloud_mag=per_t(cloud),
                          wind_ms=per_t(wind), humidity_pct=per_t(humidity), dome_open=per_t(dome, bool),
                          covered=np.ones(n_t, bool))


def req(band: str = "R", exposure_s: float = 300.0, **kw) -> RequestSpec:
    return RequestSpec(program="P1", target=kw.pop("target", "T"), ra_deg=0.0, dec_deg=0.0, band=band,
                       exposure_s=exposure_s, **kw)


def why(f, r):
    """Reasons of row r without NIGHT_END (short test grids cannot fit a whole exposure at the end)."""
    return f.reasons[r] & ~np.uint16(Reason.NIGHT_END)


def run(requests, sk, cd, rows=None):
    rows = np.zeros(len(requests), dtype=np.int64) if rows is None else np.asarray(rows)
    return evaluate(requests, rows, sk, cd, CFG)


def altitude_track(dec_deg: float, n_t: int) -> np.ndarray:
    """Altitude over hour angles -6 h .. +6 h from sin h = sin(phi) sin(dec) + cos(phi) cos(dec) cos(H)
    (standard spherical astronomy, e.g. Meeus, Astronomical Algorithms, eq. 13.6)."""
    ha = np.radians(np.linspace(-90.0, 90.0, n_t))
    phi, dec = math.radians(LAT), math.radians(dec_deg)
    return np.degrees(np.arcsin(np.sin(phi) * np.sin(dec) + np.cos(phi) * np.cos(dec) * np.cos(ha)))


# --------------------------------------------------------------------------- geometry

def test_target_never_below_airmass_limit_is_never_feasible():
    n_t = 361
    # dec +30 at latitude -26.65: culminates at 90 - |phi - dec| = 33.35 deg, airmass ~1.8 > 1.5
    high = altitude_track(30.0, n_t)
    low = altitude_track(-30.0, n_t)  # culminates at 86.65 deg, just under the 87 deg blind spot
    assert high.max() == pytest.approx(90.0 - abs(LAT - 30.0), abs=1e-6)
    f = run([req(max_airmass=1.5), req(max_airmass=1.5)], sky([high, low]), cond(n_t), rows=[0, 1])
    assert not f.ok[0].any() and not f.start_ok[0].any()
    assert np.all(f.reasons[0] & Reason.ALTITUDE)
    assert f.ok[1].any()
    # the southern target is allowed exactly where its airmass is within 1.5 (Kasten & Young 1989)
    np.testing.assert_array_equal(f.ok[1], kasten_young_1989(low) <= 1.5)


def test_altitude_limits_and_zenith_blind_spot():
    alt = np.array([-5.0, 0.0, 19.9, 20.0, 45.0, 86.9, 87.0, 87.1, 89.5])
    f = run([req()], sky(alt), cond(alt.size))
    np.testing.assert_array_equal(f.ok[0], [False, False, False, True, True, True, True, False, False])
    assert all(why(f, 0)[i] == Reason.ALTITUDE for i in (0, 1, 2, 7, 8))


def test_twilight_by_band_sun_and_moon():
    n_t = 5
    sun_alt = np.array([-5.0, -10.0, -15.0, -20.0, -25.0])
    # V needs astronomical darkness (Sun below -18), J nautical (-12), N civil (-6)
    f = run([req("V"), req("J"), req("N")], sky([60.0] * n_t, sun_alt=sun_alt), cond(n_t, pwv=1.0))
    np.testing.assert_array_equal(f.ok[0], [False, False, False, True, True])
    np.testing.assert_array_equal(f.ok[1], [False, False, True, True, True])
    np.testing.assert_array_equal(f.ok[2], [False, True, True, True, True])
    assert why(f, 0)[2] == Reason.TWILIGHT

    sun_sep = np.array([[30.0, 44.9, 45.0, 90.0]])
    f = run([req("N")], sky([60.0] * 4, sun_sep=sun_sep, sun_alt=0.0), cond(4, pwv=1.0))
    assert [bool(x & Reason.SUN) for x in f.reasons[0]] == [True, True, False, False]

    moon_alt = np.array([20.0, 20.0, -5.0, 20.0])
    moon_sep = np.array([[10.0, 40.0, 10.0, 40.0]])
    illum = np.array([0.3, 0.3, 0.9, 0.9])
    sk = sky([60.0] * 4, moon_alt=moon_alt, moon_sep=moon_sep, illum=illum)
    f = run([req(min_moon_sep_deg=30.0), req(max_moon_illum=0.5)], sk, cond(4))
    np.testing.assert_array_equal(f.reasons[0] & Reason.MOON_SEP > 0, [True, False, False, False])
    np.testing.assert_array_equal(f.reasons[1] & Reason.SKY_BRIGHTNESS > 0, [False, False, False, True])


def test_sky_brightness_limit_follows_the_moon():
    # V band, bright Moon (phase angle 20 deg) 15 deg from the target: far brighter than 21 mag/arcsec^2.
    moon_alt = np.array([-20.0, 50.0])
    f = run([req("V", min_sky_mag=21.0)], sky([60.0, 60.0], moon_alt=moon_alt, moon_sep=15.0, phase=20.0), cond(2))
    assert f.sky_mag[0, 0] > 21.0 > f.sky_mag[0, 1]
    np.testing.assert_array_equal(f.ok[0], [True, False])
    assert why(f, 0)[1] == Reason.SKY_BRIGHTNESS
    # thermal band: no sky model -> nan, and no refusal on that ground
    f = run([req("N", min_sky_mag=21.0)], sky([60.0, 60.0], moon_alt=moon_alt, moon_sep=15.0, phase=20.0),
            cond(2, pwv=1.0))
    assert np.isnan(f.sky_mag).all() and f.ok.all()


# --------------------------------------------------------------------------- conditions

def test_pwv_limited_request_only_where_dry_enough():
    n_t = 11
    pwv = np.linspace(0.5, 5.5, n_t)  # 0.5, 1.0, ... 5.5 mm
    f = run([req("Q", max_pwv_mm=2.0), req("R")], sky([70.0] * n_t), cond(n_t, pwv=pwv))
    np.testing.assert_array_equal(f.ok[0], pwv <= 2.0)
    assert np.all(f.reasons[0][pwv > 2.0] & Reason.PWV)
    assert f.ok[1].all()  # the optical request does not care


def test_transmission_floor_refuses_opaque_sky():
    # Q band: tau = 0.20 + 0.30 PWV (band table); at zenith-ish airmass and 8 mm, T = exp(-2.6 X) < 0.1
    n_t = 3
    pwv = np.array([1.0, 4.0, 8.0])
    f = run([req("Q")], sky([80.0] * n_t), cond(n_t, pwv=pwv))
    x = kasten_young_1989(80.0)
    expect = np.exp(-(0.20 + 0.30 * pwv) * x)  # Beer-Lambert, no broadband extinction in the Q table
    np.testing.assert_allclose(f.transmission[0], expect, rtol=1e-5)
    np.testing.assert_array_equal(f.ok[0], expect >= TRANSMISSION_FLOOR)
    assert f.reasons[0, 2] & Reason.TRANSMISSION and not f.reasons[0, 2] & Reason.ALTITUDE


def test_seeing_cloud_and_closure():
    n_t = 6
    seeing = np.array([0.5, 0.9, 0.5, 0.5, 0.5, 0.5])
    cloud = np.array([0.0, 0.0, 0.8, 0.0, 0.0, 0.0])
    wind = np.array([5.0, 5.0, 5.0, 16.0, 5.0, 5.0])
    hum = np.array([40.0, 40.0, 40.0, 40.0, 90.0, 40.0])
    dome = np.array([True, True, True, True, True, False])
    f = run([req(max_seeing_arcsec=0.8, max_cloud_mag=0.5)], sky([60.0] * n_t),
            cond(n_t, seeing=seeing, cloud=cloud, wind=wind, humidity=hum, dome=dome))
    assert [names(b) for b in why(f, 0)] == [[], ["SEEING"], ["CLOUD"], ["CLOSURE"], ["CLOSURE"], ["CLOSURE"]]
    assert all("NIGHT_END" in names(b) for b in f.reasons[0])  # 8-step duration, 6-step grid
    np.testing.assert_array_equal(f.ok[0], [True, False, False, False, False, False])


def test_resolution_limited_request_only_where_delivered_fwhm_is_small_enough():
    n_t = 8
    alt = np.full(n_t, 60.0)
    seeing = np.array([0.3, 0.5, 0.6, 0.7, 0.8, 1.0, 1.3, 2.0])
    f = run([req("R", resolution_arcsec=0.7)], sky(alt), cond(n_t, seeing=seeing))
    # Independent: Kolmogorov scaling FWHM = s (lambda/0.5um)^-1/5 X^3/5 (Fried 1966), Airy FWHM 1.03 lambda/D,
    # instrument 0.15" in quadrature (physics sheet; optical_imager in the starter config).
    x = kasten_young_1989(60.0)
    lam = 0.64
    see = seeing * (lam / 0.5) ** -0.2 * x**0.6
    diff = 1.03 * lam * 1e-6 / 3.8 * 206264.806
    expect = np.sqrt(see**2 + diff**2 + 0.15**2)
    np.testing.assert_allclose(f.fwhm_arcsec[0], expect, rtol=1e-5)
    assert not np.any(np.abs(expect - 0.7) < 1e-3)  # no case sits on the boundary
    np.testing.assert_array_equal(f.ok[0], expect <= 0.7)
    assert f.ok[0].any() and not f.ok[0].all()
    assert all(b == Reason.RESOLUTION for b in why(f, 0)[~f.ok[0]])


def test_resolution_depends_on_airmass():
    alt = np.array([85.0, 60.0, 40.0, 25.0])
    f = run([req("R", resolution_arcsec=0.7)], sky(alt), cond(4, seeing=0.6))
    assert np.all(np.diff(f.fwhm_arcsec[0]) > 0)  # worse image lower down (X^3/5)
    assert f.ok[0, 0] and not f.ok[0, -1]


# --------------------------------------------------------------------------- duration

def test_duration_steps_and_start_ok_require_the_whole_duration():
    n_t = 30
    dome = np.ones(n_t, bool)
    dome[12] = False  # one closed minute
    # optical_imager setup 180 s + 250 s = 430 s -> ceil(7.17) = 8 steps
    f = run([req("R", exposure_s=250.0)], sky([60.0] * n_t), cond(n_t, dome=dome))
    assert f.duration_steps[0] == 8
    d = 8
    for t in range(n_t):
        # both ends: the instant the exposure ends (t + d) must be allowed too
        expect = t + d <= n_t and bool(f.ok[0, t:t + d + 1].all())
        assert f.start_ok[0, t] == expect, t
    assert f.start_ok[0, 3] and not f.start_ok[0, 4] and not f.start_ok[0, 12] and f.start_ok[0, 13]
    assert f.start_ok[0, n_t - d] and not f.start_ok[0, n_t - d + 1:].any()
    # NIGHT_END marks exactly the starts that cannot fit before the grid ends; ok itself is untouched
    night_end = (f.reasons[0] & Reason.NIGHT_END) > 0
    np.testing.assert_array_equal(night_end, np.arange(n_t) + d > n_t)
    assert f.ok[0, -1]


def test_partial_exposure_shortens_the_duration():
    r = req("K", exposure_s=600.0, partial_exposure_s=400.0)  # nir_camera setup 240 s + 200 s left
    f = run([r], sky([60.0] * 20), cond(20, pwv=1.0))
    assert f.duration_steps[0] == math.ceil(440 / 60)


def test_start_windows_random_against_brute_force():
    rng = np.random.default_rng(1)
    ok = rng.random((7, 50)) < 0.8
    d = np.array([1, 2, 3, 5, 8, 50, 51])
    start_ok, fits = start_windows(ok, d)
    for r in range(7):
        for t in range(50):
            assert start_ok[r, t] == (t + d[r] <= 50 and ok[r, t:t + d[r] + 1].all())
            assert fits[r, t] == (t + d[r] <= 50)


# --------------------------------------------------------------------------- windows

def test_absolute_window():
    n_t = 20
    nb = T0 + timedelta(minutes=5)
    na = T0 + timedelta(minutes=12, seconds=30)
    f = run([req(not_before=nb, not_after=na)], sky([60.0] * n_t), cond(n_t))
    # step t covers [t, t+1 min): inside the window for t = 5 .. 11 (11:00-12:00 ends before 12:30)
    np.testing.assert_array_equal(np.flatnonzero(f.ok[0]), np.arange(5, 12))
    assert f.reasons[0, 4] == Reason.WINDOW and f.reasons[0, 12] == Reason.WINDOW


@pytest.mark.parametrize("lo,hi", [(0.25, 0.5), (0.8, 0.1)])  # plain and wrapping through phase 0
def test_periodic_window(lo, hi):
    period_days = 0.2  # 4.8 h: the 4 h grid below runs from phase 0.7 through 0 to about 0.53
    epoch = T0 - timedelta(days=3.7 * period_days)
    n = 240  # 4 hours of minutes
    f = run([req(period_epoch=epoch, period_days=period_days, phase_min=lo, phase_max=hi)],
            sky([60.0] * n), cond(n))

    def inside(p):
        return lo <= p <= hi if lo <= hi else (p >= lo or p <= hi)

    expect = []
    for i in range(n):
        t = T0 + timedelta(seconds=i * STEP)
        p0 = ((t - epoch).total_seconds() / (period_days * 86400)) % 1.0
        p1 = ((t + timedelta(seconds=STEP) - epoch).total_seconds() / (period_days * 86400)) % 1.0
        expect.append(inside(p0) and inside(p1))
    np.testing.assert_array_equal(f.ok[0], expect)
    assert any(expect) and not all(expect)


# --------------------------------------------------------------------------- merit

def test_merit_range_and_zero_where_not_ok():
    n_t = 50
    f = run([req("R"), req("Q", max_pwv_mm=1.0)], sky(np.linspace(80, 10, n_t)),
            cond(n_t, pwv=np.linspace(0.2, 6, n_t)))
    m = f.merit
    assert m.dtype == np.float32
    assert np.all(m[f.ok] > 0) and np.all(m[f.ok] <= 1)
    assert np.all(m[~f.ok] == 0)
    assert f.ok[0].any() and f.ok[1].any()


def test_merit_prefers_lower_airmass():
    alt = np.array([25.0, 35.0, 50.0, 70.0, 86.0])
    f = run([req("R"), req("K")], sky(alt), cond(alt.size, pwv=1.0))
    for r in range(2):
        assert np.all(np.diff(f.merit[r]) > 0)
    # R band, constant seeing and PWV: merit ratio = (X_min/X) times the extinction ratio,
    # transmission 10^(-0.4 k X) with k = 0.09 mag/airmass (band table)
    x = kasten_young_1989(alt)
    expect = (x[-1] / x[0]) * 10 ** (-0.4 * 0.09 * (x[0] - x[-1]))
    assert f.merit[0, 0] / f.merit[0, -1] == pytest.approx(expect, rel=1e-5)


def test_merit_penalises_wasting_rare_seeing():
    seeing = np.array([0.4, 0.8, 1.2])
    n_t = seeing.size
    sk = sky([60.0] * n_t)
    loose, tight = req("R"), req("R", max_seeing_arcsec=0.45)
    f = run([loose, tight], sk, cond(n_t, seeing=seeing, pwv=8.0))
    # no seeing need: excellent seeing scores lower than ordinary seeing
    assert f.merit[0, 0] < f.merit[0, 1] < f.merit[0, 2]
    # a request needing excellent seeing scores higher there than one that does not
    assert f.ok[1, 0] and not f.ok[1, 1:].any()
    assert f.merit[1, 0] > f.merit[0, 0]
    assert f.merit[1, 0] > 0.9 * f.merit[0, 2]  # nearly full marks: the sky gives what it needs
    # a resolution need counts like a seeing need
    res = req("R", resolution_arcsec=0.6)
    f2 = run([res, loose], sk, cond(n_t, seeing=seeing, pwv=8.0))
    assert f2.ok[0, 0] and f2.merit[0, 0] > f2.merit[1, 0]


def test_merit_rewards_transmission():
    cloud = np.array([0.0, 0.5, 1.0])
    f = run([req("R")], sky([60.0] * 3), cond(3, cloud=cloud, pwv=8.0))
    assert np.all(np.diff(f.merit[0]) < 0)
    # only the transmission factor changes: merit ratio equals the cloud's 10^(-0.4 dm)
    assert f.merit[0, 1] / f.merit[0, 0] == pytest.approx(10 ** (-0.4 * 0.5), rel=1e-5)


# --------------------------------------------------------------------------- static layer reuse

def test_static_layer_reused_and_checked():
    n_t = 40
    reqs = [req("R", id=1), req("K", id=2, max_pwv_mm=2.0), req("V", id=3, max_seeing_arcsec=0.7)]
    sk = sky(np.stack([np.linspace(15, 80, n_t), np.linspace(80, 15, n_t)]))
    rows = np.array([0, 1, 0])
    st = static_layer(reqs, rows, sk, CFG)
    c = cond(n_t, seeing=np.linspace(0.4, 1.2, n_t), pwv=np.linspace(3, 1, n_t))
    a = evaluate(reqs, rows, sk, c, CFG, static=st)
    b = evaluate(reqs, rows, sk, c, CFG)
    for name in ("ok", "reasons", "merit", "start_ok", "fwhm_arcsec", "transmission"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    np.testing.assert_array_equal(a.request_ids, [1, 2, 3])
    np.testing.assert_array_equal(a.target_row, rows)
    assert a.ok[1].any() and not a.ok[1].all()
    with pytest.raises(ValueError):
        evaluate(reqs[:2], rows[:2], sk, c, CFG, static=st)
    with pytest.raises(ValueError):
        evaluate(reqs, rows, sk, cond(n_t - 1), CFG, static=st)


# --------------------------------------------------------------------------- with the real ephemerides

def test_with_computed_sky_against_pyephem():
    """compute_night + compute_sky on the starter (fictional) site; altitudes and Sun checked with PyEphem,
    an independent ephemeris library (true altitudes: pressure 0)."""
    ephem = pytest.importorskip("ephem")
    from scheduler.sky.ephemeris import compute_sky
    from scheduler.sky.night import compute_night

    site = CFG.site
    nt = compute_night(site, date(2026, 6, 15), step_s=300)
    # dec +30 culminates at 33.4 deg here (airmass ~1.8); RA 18h, dec -30 culminates near local midnight in June
    ra, dec = np.array([270.0, 270.0]), np.array([30.0, -30.0])
    sk = compute_sky(site, nt, ra, dec)
    reqs = [req("V", max_airmass=1.5, id=1), req("V", id=2)]
    f = evaluate(reqs, np.array([0, 1]), sk, cond(nt.n_times), CFG)
    assert not f.ok[0].any() and np.all(f.reasons[0] & Reason.ALTITUDE)

    o = ephem.Observer()
    o.lat, o.lon, o.elevation, o.pressure = str(site.latitude_deg), str(site.longitude_deg), site.elevation_m, 0
    star = ephem.FixedBody()
    star._ra, star._dec, star._epoch = ephem.hours("18:00:00"), ephem.degrees("-30:00:00"), ephem.J2000
    checked = 0
    for i in range(0, nt.n_times, 3):
        o.date = ephem.Date(datetime.fromtimestamp(nt.times_unix[i], timezone.utc).replace(tzinfo=None))
        star.compute(o)
        sun = ephem.Sun(o)
        alt, sun_alt = math.degrees(star.alt), math.degrees(sun.alt)
        if abs(alt - 20.0) < 0.2 or abs(alt - 87.0) < 0.2 or abs(sun_alt + 18.0) < 0.2:
            continue  # too close to a limit to judge
        expect = 20.0 <= alt <= 87.0 and sun_alt < -18.0
        assert bool(f.ok[1, i]) == expect, (i, alt, sun_alt)
        checked += 1
    assert checked > 20 and f.ok[1].any() and not f.ok[1].all()
