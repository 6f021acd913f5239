"""Thermal sky and dish surface accuracy, against astropy's blackbody model and Ruze's relation."""

import math
from dataclasses import replace

import numpy as np
import pytest
from astropy import units as u
from astropy.modeling.models import BlackBody

from scheduler.model.config import Band, Telescope, starter_config
from scheduler.sky import physics as ph
from scheduler.sky import thermal as th

CFG = starter_config()
N_BAND = replace(CFG.band("N"), thermal=True)
Q_BAND = replace(CFG.band("Q"), thermal=True)


# --------------------------------------------------------------------------- Planck

@pytest.mark.parametrize("lam_um, temp_k", [(10.5, 280.0), (20.0, 250.0), (2.2, 300.0), (850.0, 270.0), (0.55, 5772.0)])
def test_planck_against_astropy_blackbody(lam_um, temp_k):
    # astropy's BlackBody (independent implementation) with a per-wavelength scale returns B_lambda.
    bb = BlackBody(temperature=temp_k * u.K, scale=1.0 * u.W / (u.m**2 * u.um * u.sr))
    ref = bb(lam_um * u.um).to_value(u.W / (u.m**2 * u.um * u.sr))
    assert th.planck_radiance_um(lam_um, temp_k) == pytest.approx(ref, rel=1e-9)


def test_planck_peak_follows_wien():
    # Wien's displacement law: lambda_max T = 2897.77 um K (CODATA b).
    lam = np.linspace(5.0, 20.0, 30001)
    b = th.planck_radiance_um(lam, 280.0)
    assert lam[np.argmax(b)] == pytest.approx(2897.77 / 280.0, abs=0.002)


# --------------------------------------------------------------------------- thermal sky

def test_emissivity_is_one_minus_transmission():
    t = ph.transmission(N_BAND, 3.0, 1.4, 0.2)
    assert th.sky_emissivity(N_BAND, 3.0, 1.4, 0.2) == pytest.approx(1.0 - t)
    # Kirchhoff: radiance = emissivity * B_lambda(T_air)
    rad = th.sky_radiance(N_BAND, 3.0, 1.4, 0.2, 5.0)
    assert rad == pytest.approx((1.0 - t) * th.planck_radiance_um(10.5, 278.15), rel=1e-12)


def test_n_band_merit_falls_faster_than_transmission():
    # Background-limited SNR for a fixed exposure ~ t / sqrt(background): with everything else
    # fixed a wetter sky costs both transmission and background.
    pwv = np.array([0.5, 1.0, 2.0, 4.0, 8.0])
    t = ph.transmission(N_BAND, pwv, 1.2, 0.0)
    snr = (t / ph.transmission(N_BAND, 0.0, 1.0, 0.0)) * th.background_factor(N_BAND, pwv, 1.2, 0.0)
    t_rel = t / t[0]
    snr_rel = snr / snr[0]
    assert np.all(np.diff(snr) < 0) and np.all(np.diff(t) < 0)
    assert np.all(snr_rel[1:] < t_rel[1:])  # falls faster than transmission alone
    # and the background factor is the square root of the emissivity ratio, <= 1
    eps = 1.0 - t
    eps_best = 1.0 - ph.transmission(N_BAND, 0.0, 1.0, 0.0)
    np.testing.assert_allclose(th.background_factor(N_BAND, pwv, 1.2, 0.0), np.sqrt(eps_best / eps))
    assert th.background_factor(N_BAND, 0.0, 1.0, 0.0) == pytest.approx(1.0)


def test_background_factor_only_for_thermal_bands():
    k = CFG.band("K")
    np.testing.assert_array_equal(th.background_factor(k, np.array([1.0, 5.0]), 1.3, 0.0), [1.0, 1.0])
    # Q is more water-sensitive than N (common practice): the same PWV rise costs it more
    # sensitivity (transmission and background together)
    def snr(b, pwv):
        return ph.transmission(b, pwv, 1.2, 0.0) * th.background_factor(b, pwv, 1.2, 0.0)
    assert snr(Q_BAND, 5.0) / snr(Q_BAND, 1.0) < snr(N_BAND, 5.0) / snr(N_BAND, 1.0) < 1.0
    assert th.background_factor(N_BAND, 1.0, np.inf, 0.0) < 1.0  # below the horizon: no worse than opaque


# --------------------------------------------------------------------------- Ruze

def test_ruze_check_value():
    # Ruze (1966): sigma = lambda/16 -> exp(-(4 pi / 16)^2) = exp(-(pi/4)^2) ~ 0.54
    assert ph.ruze_efficiency(870.0 / 16, 870.0) == pytest.approx(math.exp(-((math.pi / 4) ** 2)), rel=1e-12)
    assert ph.ruze_efficiency(870.0 / 16, 870.0) == pytest.approx(0.54, abs=0.005)
    assert ph.ruze_efficiency(0.0, 870.0) == 1.0
    # steeper toward short wavelengths: 25 um rms keeps 0.878 at 870 um and 0.943 at 1.3 mm
    # (computed from the formula)
    assert ph.ruze_efficiency(25.0, np.array([870.0, 1300.0])) == pytest.approx([0.878, 0.943], abs=0.001)


DISH = Telescope(name="invented 12 m dish", aperture_m=12.0, min_altitude_deg=15.0, max_altitude_deg=88.0,
                 slew_rate_az_deg_s=3.0, slew_rate_alt_deg_s=1.5, settle_s=5.0,
                 surface_rms_um=20.0, surface_rms_day_um=30.0, surface_efficiency_floor=0.3)
SMM = Band(name="smm870", wavelength_um=870.0, extinction_mag=0.0, tau_dry=0.07, tau_per_mm_pwv=0.18,
           twilight="day", seeing_limited=False)


def test_sunlit_dish_is_less_efficient():
    sun = np.array([-30.0, -1.0, 0.5, 40.0])
    eff = ph.surface_efficiency(SMM, DISH, sun)
    np.testing.assert_allclose(eff, ph.ruze_efficiency(np.array([20.0, 20.0, 30.0, 30.0]), 870.0))
    assert eff[3] < eff[0]
    assert ph.night_surface_efficiency(SMM, DISH) == pytest.approx(eff[0])
    # seeing-limited bands and telescopes without a surface error: Ruze does not apply
    np.testing.assert_array_equal(ph.surface_efficiency(CFG.band("K"), DISH, sun), 1.0)
    assert ph.night_surface_efficiency(SMM, CFG.telescope) == 1.0
