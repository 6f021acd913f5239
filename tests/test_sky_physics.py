"""Band physics against trade facts, published formulas and internal consistency."""

import math

import numpy as np
import pytest

from scheduler.model.config import Band, Instrument, starter_config
from scheduler.sky import physics as ph

CFG = starter_config()


def _inst(**kw):
    base = dict(name="cam", bands=("X",), setup_s=0.0, filter_change_s=0.0, instrument_change_s=0.0)
    base.update(kw)
    return Instrument(**base)


# --------------------------------------------------------------------------- resolution

def test_diffraction_trade_facts():
    # Fact of the trade: a 2.4 m aperture in visible light resolves about 0.047 arcsec (lambda/D).
    lam_over_d = ph.diffraction_fwhm_arcsec(0.55, 2.4) / 1.03
    assert lam_over_d == pytest.approx(0.047, abs=0.001)
    # Fact of the trade: a 100 m dish at 21 cm: about 525 arcsec (1.22 lambda/D).
    assert ph.diffraction_limit_arcsec(21e4, 100.0) == pytest.approx(525, rel=0.01)
    # ... and at 1 m wavelength about 2000 arcsec (lambda/D).
    assert ph.diffraction_limit_arcsec(1e6, 100.0) / 1.22 == pytest.approx(2000, rel=0.04)


def test_diffraction_ratio_is_airy_constants():
    # Born & Wolf: first dark ring 1.22 lambda/D, core FWHM 1.03 lambda/D.
    r = ph.diffraction_limit_arcsec(1.65, 3.8) / ph.diffraction_fwhm_arcsec(1.65, 3.8)
    assert r == pytest.approx(1.22 / 1.03, rel=1e-12)


def test_config_diffraction_limit_agrees():
    # The config's own helper and this module must give the same number.
    assert ph.diffraction_limit_arcsec(CFG.band("K").wavelength_um, CFG.telescope.aperture_m) == pytest.approx(
        CFG.diffraction_limit_arcsec("K"), rel=1e-12)


def test_seeing_exponents_kolmogorov():
    # Kolmogorov (Fried 1966): FWHM ~ lambda^(-1/5) X^(3/5). Measure the log-log slopes.
    s0 = ph.seeing_fwhm_arcsec(0.8, 0.5, 1.0)
    assert s0 == pytest.approx(0.8)  # reference: 500 nm at zenith
    lam_slope = math.log(ph.seeing_fwhm_arcsec(0.8, 2.2, 1.0) / s0) / math.log(2.2 / 0.5)
    x_slope = math.log(ph.seeing_fwhm_arcsec(0.8, 0.5, 2.0) / s0) / math.log(2.0)
    assert lam_slope == pytest.approx(-0.2, abs=1e-12)
    assert x_slope == pytest.approx(0.6, abs=1e-12)
    # Familiar numbers: 1.0" at 500 nm is about 0.74" in K (2.2 um) at zenith.
    assert ph.seeing_fwhm_arcsec(1.0, 2.2, 1.0) == pytest.approx(0.744, abs=0.002)


def test_delivered_fwhm_quadrature_and_broadcast():
    v = CFG.band("V")
    opt = CFG.instrument_for("V")
    seeing = np.array([0.5, 1.0, 2.0])
    x = np.array([[1.0], [1.5]])
    d = ph.delivered_fwhm_arcsec(seeing, x, v, opt, 3.8)
    assert d.shape == (2, 3)
    expect = np.sqrt(ph.seeing_fwhm_arcsec(seeing, v.wavelength_um, x) ** 2
                     + ph.diffraction_fwhm_arcsec(v.wavelength_um, 3.8) ** 2 + opt.fwhm_arcsec**2)
    np.testing.assert_allclose(d, expect, rtol=1e-12)
    assert np.all(d > ph.seeing_fwhm_arcsec(seeing, v.wavelength_um, x))


def test_not_seeing_limited_is_diffraction_only():
    # An invented 12 m submillimetre dish at 1.3 mm: the beam is the diffraction pattern.
    mm = Band(name="mm", wavelength_um=1300.0, extinction_mag=0.0, tau_dry=0.017, tau_per_mm_pwv=0.04,
              twilight="day", seeing_limited=False)
    d = ph.delivered_fwhm_arcsec(np.array([0.5, 3.0]), np.array([1.0, 2.5]), mm, _inst(), 12.0)
    np.testing.assert_allclose(d, ph.diffraction_fwhm_arcsec(1300.0, 12.0))
    assert d[0] == pytest.approx(23.0, rel=0.01)  # 1.03 * 1.3e-3 / 12 rad


def test_adaptive_optics_switch_fallback():
    # The fallback for instruments without turbulence parameters (the starter's NIR camera has
    # them: tests/test_sky_adaptive_optics.py covers that model).
    k = CFG.band("K")
    nir = _inst(bands=("J", "H", "K"), fwhm_arcsec=0.10, ao_seeing_limit_arcsec=0.9)  # AO below 0.9" (LOS, 500 nm)
    diff = ph.diffraction_fwhm_arcsec(k.wavelength_um, 3.8)
    good = ph.delivered_fwhm_arcsec(0.6, 1.0, k, nir, 3.8)
    assert good == pytest.approx(math.hypot(diff, nir.fwhm_arcsec))  # corrected: near diffraction
    # Same seeing at high airmass exceeds the limit along the line of sight: no correction.
    bad = ph.delivered_fwhm_arcsec(0.6, 2.2, k, nir, 3.8)
    assert bad > 3 * good
    # Seeing above the limit: plain seeing-limited image.
    poor = ph.delivered_fwhm_arcsec(1.2, 1.0, k, nir, 3.8)
    assert poor == pytest.approx(math.sqrt(ph.seeing_fwhm_arcsec(1.2, 2.2, 1.0) ** 2 + diff**2 + nir.fwhm_arcsec**2))
    # Below the AO system's minimum wavelength: never corrected.
    vis = Band(name="X", wavelength_um=0.7, extinction_mag=0.1, tau_dry=0, tau_per_mm_pwv=0, twilight="astronomical")
    assert ph.delivered_fwhm_arcsec(0.3, 1.0, vis, nir, 3.8) > 0.25
    np.testing.assert_array_equal(ph.ao_active(np.array([0.5, 0.95]), 1.0, k, nir), [True, False])


# --------------------------------------------------------------------------- transmission

def test_225ghz_opacity_relation():
    # Invented submillimetre dish band at 225 GHz (1.33 mm) configured with the published
    # relation tau(225 GHz) ~ 0.04 PWV + 0.017 (high dry site; from memory).
    b = Band(name="b225", wavelength_um=1332.0, extinction_mag=0.0, tau_dry=0.017, tau_per_mm_pwv=0.04,
             twilight="day", seeing_limited=False)
    pwv = np.array([0.5, 1.0, 2.0, 4.0])
    np.testing.assert_allclose(ph.zenith_opacity(b, pwv), 0.04 * pwv + 0.017)
    # tau = 0.057 at 1 mm PWV: zenith transmission ~ 94.5 %, at X = 2 ~ 89 % (Beer-Lambert).
    assert ph.transmission(b, 1.0, 1.0, 0.0) == pytest.approx(math.exp(-0.057), rel=1e-12)
    assert ph.transmission(b, 1.0, 2.0, 0.0) == pytest.approx(0.892, abs=0.001)


def test_transmission_combines_extinction_cloud_and_water():
    v, q = CFG.band("V"), CFG.band("Q")
    # 0.13 mag/airmass at X = 1.5 plus 0.5 mag of cloud: 10^(-0.4 * 0.695).
    assert ph.transmission(v, 5.0, 1.5, 0.5) == pytest.approx(10 ** (-0.4 * (0.13 * 1.5 + 0.5)), rel=1e-12)
    # Fact of the trade: the 20 um (Q) window is set by water vapour, the visible hardly at all
    # (from memory). Our thresholds: Q loses > 60 % from 1 to 5 mm PWV, V is unchanged.
    tq = ph.transmission(q, np.array([1.0, 5.0]), 1.2, 0.0)
    tv = ph.transmission(v, np.array([1.0, 5.0]), 1.2, 0.0)
    assert tq[1] / tq[0] < 0.4 and tv[1] == pytest.approx(tv[0])
    t = ph.transmission(v, 1.0, np.array([1.0, np.inf]), 0.0)
    assert t[1] == 0.0 and 0 < t[0] < 1


# --------------------------------------------------------------------------- sky brightness

def test_nl_mag_conversion_from_photometric_units():
    # Independent derivation: 1 nL = 1e-9 * 1e4/pi cd/m^2; per arcsec^2 that gives an
    # illuminance compared with a V = 0 star's 2.54e-6 lux (Allen, from memory): 26.33 mag.
    lux = 1e-9 * 1e4 / math.pi * (math.radians(1 / 3600)) ** 2
    v_of_1nl = -2.5 * math.log10(lux / 2.54e-6)
    assert ph.nl_to_mag(1.0) == pytest.approx(v_of_1nl, abs=0.02)
    # Krisciunas & Schaefer 1991 (PASP 103, 1033): their dark zenith sky V = 21.587 is 79.0 nL (from memory).
    assert ph.mag_to_nl(21.587) == pytest.approx(79.0, rel=0.002)
    m = np.array([15.0, 20.0, 22.5])
    np.testing.assert_allclose(ph.nl_to_mag(ph.mag_to_nl(m)), m, rtol=1e-12)


def test_moon_phase_term_is_moon_magnitude_law():
    # The I* term of Krisciunas & Schaefer 1991 (PASP 103, 1033) follows the Moon's V magnitude vs phase angle,
    # m = -12.73 + 0.026|a| + 4e-9 a^4 (Allen's Astrophysical Quantities, from memory):
    # at fixed geometry, brightness ratios between phases must match that law.
    a = np.array([0.0, 60.0, 90.0, 120.0])
    b = ph.moon_sky_nl(a, 60.0, 40.0, 30.0, 0.172)
    dm = -2.5 * np.log10(b / b[0])
    np.testing.assert_allclose(dm, 0.026 * a + 4e-9 * a**4, atol=1e-9)


def test_moon_scattering_shape():
    # Krisciunas & Schaefer 1991 (PASP 103, 1033) f(rho): strong forward (Mie) peak, Rayleigh minimum near 90 deg, rising again.
    rho = np.array([5.0, 15.0, 30.0, 60.0, 90.0, 120.0, 150.0])
    b = ph.moon_sky_nl(0.0, rho, 45.0, 45.0, 0.172)
    assert b[0] > b[1] > b[2] > b[3] > b[4]
    assert b[6] > b[5] > b[4]
    # The paper's small-angle Mie form (6.2e7 rho^-2 below 10 deg) joins the wide-angle one
    # within 15 %, and stays finite at zero separation.
    lo, hi = ph.moon_sky_nl(0.0, np.array([9.999, 10.001]), 45.0, 45.0, 0.172)
    assert 0.85 < lo / hi < 1.15
    assert np.isfinite(ph.moon_sky_nl(0.0, 0.0, 45.0, 45.0, 0.172))


def test_moon_below_horizon_contributes_nothing():
    assert ph.moon_sky_nl(0.0, 40.0, 90.5, 20.0, 0.172) == 0.0
    v = CFG.band("V")
    dark = ph.sky_brightness_mag(v, 0.0, 40.0, -1.0, 70.0, -30.0)
    assert dark == pytest.approx(ph.nl_to_mag(ph.dark_sky_nl(21.8, 20.0, v.extinction_mag)), abs=1e-9)


def test_full_moon_brightens_v_by_magnitudes_not_k():
    # Common practice: a full Moon 30-60 deg away brightens the V sky by several mag
    # (to about 17.5-19 mag/arcsec^2 at a dark site, from memory) and barely changes K.
    v, k = CFG.band("V"), CFG.band("K")
    for sep in (30.0, 45.0, 60.0):
        mv_dark = ph.sky_brightness_mag(v, 0.0, sep, -10.0, 60.0, -30.0)
        mv_moon = ph.sky_brightness_mag(v, 0.0, sep, 45.0, 60.0, -30.0)
        mk_dark = ph.sky_brightness_mag(k, 0.0, sep, -10.0, 60.0, -30.0)
        mk_moon = ph.sky_brightness_mag(k, 0.0, sep, 45.0, 60.0, -30.0)
        assert mv_dark - mv_moon > 2.5
        assert 17.0 < mv_moon < 19.5
        assert mk_dark - mk_moon < 0.3
    # New Moon: negligible.
    assert ph.sky_brightness_mag(v, 180.0, 45.0, 45.0, 60.0, -30.0) == pytest.approx(
        ph.sky_brightness_mag(v, 180.0, 45.0, -10.0, 60.0, -30.0), abs=0.02)
    # Blue suffers more than red from the Moon (common practice).
    db = [CFG.band(n).dark_sky_mag - ph.sky_brightness_mag(CFG.band(n), 20.0, 45.0, 45.0, 90.0, -30.0) for n in "BRK"]
    assert db[0] > db[1] > db[2]


def test_twilight_term():
    v, k = CFG.band("V"), CFG.band("K")
    sun = np.array([-25.0, -18.0, -15.0, -12.0, -6.0, 5.0])
    mv = ph.sky_brightness_mag(v, 180.0, 90.0, -20.0, 90.0, sun)
    mk = ph.sky_brightness_mag(k, 180.0, 90.0, -20.0, 90.0, sun)
    assert mv[0] == pytest.approx(21.8, abs=1e-6) and mv[1] == pytest.approx(21.8, abs=1e-6)
    assert np.all(np.diff(mv[1:]) < 0)  # brighter as the Sun rises
    assert mv[3] == pytest.approx(18.0, abs=0.1)  # our model: ~18 mag at Sun -12 (common practice)
    assert 2 < mv[-1] < 6  # clear daytime sky, a few mag/arcsec^2 (from memory)
    # The infrared stays near its dark level into nautical twilight; the visible does not.
    assert 21.8 - mv[3] > 3 and 13.0 - mk[3] < 0.2


def test_thermal_band_sky_is_nan():
    n = CFG.band("N")
    out = ph.sky_brightness_mag(n, np.zeros(3), 40.0, 30.0, 50.0, -20.0)
    assert out.shape == (3,) and np.isnan(out).all()
