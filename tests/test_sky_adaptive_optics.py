"""Adaptive optics from the turbulence, against the published formulas and their worked values.

Outside references: the Fried parameter from FWHM = 0.98 lambda / r0 with r0 ~ lambda^(6/5)
(Fried 1966; Roddier 1981); the Strehl ratio from the extended Marechal approximation
exp(-sigma^2) and Marechal's small-error form 1 - sigma^2 (Born & Wolf, "Principles of
Optics", section on the Strehl criterion; from memory); the isoplanatic angle 0.314 r0 / h
(Fried 1982; from memory). Telescopes and instruments here are invented.
"""

import math

import numpy as np
import pytest

from scheduler.model.config import Band, Instrument
from scheduler.sky import adaptive_optics as ao
from scheduler.sky import physics as ph

K = Band(name="K", wavelength_um=2.2, extinction_mag=0.07, tau_dry=0.01, tau_per_mm_pwv=0.012, twilight="nautical")
J = Band(name="J", wavelength_um=1.25, extinction_mag=0.1, tau_dry=0.01, tau_per_mm_pwv=0.01, twilight="nautical")
V = Band(name="V", wavelength_um=0.55, extinction_mag=0.13, tau_dry=0.0, tau_per_mm_pwv=0.0, twilight="astronomical")
# An invented AO camera on an invented 8 m telescope: 40 actuators across the pupil.
AO_CAM = Instrument(name="ao_cam", bands=("J", "K"), setup_s=300, filter_change_s=30, instrument_change_s=0,
                    fwhm_arcsec=0.03, ao_actuator_pitch_m=0.2, ao_fitting_coeff=0.3, ao_strehl_min=0.3,
                    ao_min_wavelength_um=1.0)
APERTURE = 8.0
H_BAR = 5000.0  # mean turbulence height, a few km at good sites (from memory)


def test_fried_parameter_check_values():
    # From FWHM = 0.98 lambda / r0: 1.0" at 500 nm -> 0.98 * 5e-7 / 4.848e-6 = 0.101 m (fact of the trade: ~0.10 m)
    assert ao.fried_parameter_m(1.0) == pytest.approx(0.101, abs=0.001)
    # r0 ~ lambda^(6/5): at 2.2 um, 0.101 * 4.4^1.2 = 0.60 m
    assert ao.fried_parameter_m(1.0, 2.2) == pytest.approx(0.60, abs=0.01)
    # and X^(-3/5) along the line of sight
    assert ao.fried_parameter_m(1.0, 0.5, 2.0) == pytest.approx(0.101 * 2 ** -0.6, rel=0.01)
    # consistency with the seeing model: 0.98 lambda / r0 at 2.2 um equals the scaled seeing
    r0 = ao.fried_parameter_m(0.8, 2.2, 1.3)
    assert 0.98 * 2.2e-6 / r0 * ao.RAD_TO_ARCSEC == pytest.approx(ph.seeing_fwhm_arcsec(0.8, 2.2, 1.3), rel=1e-12)


def test_strehl_forms():
    # Extended Marechal approximation: sigma = 1 rad -> exp(-1)
    assert ao.strehl_extended_marechal(1.0) == pytest.approx(math.exp(-1.0), rel=1e-15)
    # Marechal's published small-error form S = 1 - sigma^2; the two agree to second order:
    # |exp(-s) - (1 - s)| <= s^2 / 2 for small s.
    for var in (0.01, 0.05, 0.1):
        assert ao.strehl_marechal(var) == pytest.approx(1.0 - var)
        assert abs(ao.strehl_extended_marechal(var) - ao.strehl_marechal(var)) <= var**2 / 2 + 1e-15
    # Marechal criterion (Born & Wolf): S = 0.8 at an rms wavefront error of lambda/14 (sigma = 2 pi / 14)
    assert ao.strehl_marechal((2 * math.pi / 14) ** 2) == pytest.approx(0.80, abs=0.005)


def test_variance_terms_are_kolmogorov_powers():
    # Each term goes as the 5/3 power of its ratio (Kolmogorov structure function).
    assert ao.fitting_variance(1.0, 0.5, 0.3) == pytest.approx(0.3 * 0.5 ** (5 / 3))
    assert ao.anisoplanatic_variance(20.0, 10.0) == pytest.approx(2 ** (5 / 3))
    assert ao.temporal_variance(3.0, 6.0) == pytest.approx(0.5 ** (5 / 3))
    # theta0 = 0.314 r0 / h: r0 = 0.6 m, h = 5 km -> 3.77e-5 rad = 7.8"
    assert ao.isoplanatic_angle_arcsec(0.6, 5000.0) == pytest.approx(0.314 * 0.6 / 5000 * 206264.806, rel=1e-8)
    assert ao.isoplanatic_angle_arcsec(0.6, 5000.0) == pytest.approx(7.77, abs=0.01)
    # coherence time scales like r0
    assert ao.coherence_time_ms(3.0, 2.2, 1.5) / 3.0 == pytest.approx(ao.fried_parameter_m(1.0, 2.2, 1.5)
                                                                      / ao.fried_parameter_m(1.0), rel=1e-12)


def test_strehl_k_exceeds_j_for_the_same_seeing():
    # r0 grows as lambda^(6/5) and the phase error of a given path difference shrinks as 1/lambda.
    for seeing in (0.5, 0.8, 1.2):
        for x in (1.0, 1.5):
            sk = ao.strehl(seeing, x, K, AO_CAM, H_BAR)
            sj = ao.strehl(seeing, x, J, AO_CAM, H_BAR)
            assert sk > sj
    # and better seeing, lower airmass, nearer guide star all raise it
    assert ao.strehl(0.5, 1.0, K, AO_CAM, H_BAR) > ao.strehl(1.0, 1.0, K, AO_CAM, H_BAR)
    assert ao.strehl(0.7, 1.0, K, AO_CAM, H_BAR) > ao.strehl(0.7, 1.8, K, AO_CAM, H_BAR)
    s = ao.strehl(0.7, 1.2, K, AO_CAM, H_BAR, np.array([0.0, 10.0, 20.0, 40.0]))
    assert np.all(np.diff(s) < 0)


def test_temporal_term_only_with_a_coherence_time():
    cam = Instrument(**{**AO_CAM.__dict__, "ao_servo_lag_ms": 2.0})
    base = ao.strehl(0.7, 1.2, K, cam, H_BAR)
    assert ao.strehl(0.7, 1.2, K, cam, H_BAR, 0.0, np.nan) == pytest.approx(base)  # unknown: no term
    fast = ao.strehl(0.7, 1.2, K, cam, H_BAR, 0.0, 1.0)  # tau0 = 1 ms at 500 nm: fast turbulence
    slow = ao.strehl(0.7, 1.2, K, cam, H_BAR, 0.0, 10.0)
    assert fast < slow < base
    # the temporal term in isolation: (lag / tau0(K, X))^(5/3)
    tau = ao.coherence_time_ms(10.0, 2.2, 1.2)
    var_base = -math.log(base)
    assert -math.log(slow) == pytest.approx(var_base + (2.0 / tau) ** (5 / 3), rel=1e-9)


def test_point08_arcsec_in_k_on_axis_but_not_40_arcsec_off_axis():
    # 0.08" in K is above 1.22 lambda/D = 0.069" of 8 m, so the telescope can deliver it with
    # the corrected core (1.03 lambda/D = 0.058" with the camera's 0.03" -> 0.066").
    assert ph.diffraction_limit_arcsec(2.2, APERTURE) < 0.08
    good_seeing, x = 0.5, 1.1
    on = ph.delivered_fwhm_arcsec(good_seeing, x, K, AO_CAM, APERTURE, turbulence_height_m=H_BAR,
                                  guide_sep_arcsec=0.0)
    off = ph.delivered_fwhm_arcsec(good_seeing, x, K, AO_CAM, APERTURE, turbulence_height_m=H_BAR,
                                   guide_sep_arcsec=40.0)
    assert ao.strehl(good_seeing, x, K, AO_CAM, H_BAR, 0.0) >= AO_CAM.ao_strehl_min
    assert ao.strehl(good_seeing, x, K, AO_CAM, H_BAR, 40.0) < AO_CAM.ao_strehl_min
    assert on <= 0.08 < off
    assert on == pytest.approx(math.hypot(ph.diffraction_fwhm_arcsec(2.2, APERTURE), 0.03))
    # off-axis the image is the seeing halo
    assert off == pytest.approx(math.sqrt(ph.seeing_fwhm_arcsec(good_seeing, 2.2, x) ** 2
                                          + ph.diffraction_fwhm_arcsec(2.2, APERTURE) ** 2 + 0.03**2))
    # fast turbulence (tau0 = 1 ms at 500 nm) against an 8 ms loop loses the core even on axis
    slow_loop = Instrument(**{**AO_CAM.__dict__, "ao_servo_lag_ms": 8.0})
    assert ph.delivered_fwhm_arcsec(good_seeing, x, K, slow_loop, APERTURE, turbulence_height_m=H_BAR,
                                    coherence_time_500_ms=1.0) > 0.08


def test_turbulence_model_scope_and_fallback():
    # below the AO system's shortest wavelength and for bands without seeing: no Strehl
    assert np.isnan(ao.strehl(0.5, 1.0, V, AO_CAM, H_BAR))
    mm = Band(name="mm", wavelength_um=1300.0, extinction_mag=0, tau_dry=0.02, tau_per_mm_pwv=0.04,
              twilight="day", seeing_limited=False)
    assert np.isnan(ao.strehl(0.5, 1.0, mm, AO_CAM, H_BAR))
    # below the horizon: no light in the core
    assert ao.strehl(0.5, np.inf, K, AO_CAM, H_BAR) == 0.0
    # the model needs the site's turbulence height
    with pytest.raises(ValueError, match="turbulence_height_m"):
        ao.strehl(0.5, 1.0, K, AO_CAM, None)
    # an instrument with only the seeing-limit switch keeps the switch behaviour
    switch = Instrument(name="sw", bands=("K",), setup_s=0, filter_change_s=0, instrument_change_s=0,
                        fwhm_arcsec=0.03, ao_seeing_limit_arcsec=0.9)
    assert not ao.uses_turbulence_model(K, switch)
    corrected = ph.delivered_fwhm_arcsec(0.6, 1.0, K, switch, APERTURE)
    assert corrected == pytest.approx(math.hypot(ph.diffraction_fwhm_arcsec(2.2, APERTURE), 0.03))


def test_broadcasting_over_requests_and_times():
    seeing = np.array([0.4, 0.7, 1.0, 1.3])[None, :]  # [1, n_t]
    x = np.array([[1.0, 1.1, 1.2, 1.3], [1.5, 1.6, 1.7, 1.8]])  # [n_r, n_t]
    sep = np.array([[0.0], [25.0]])  # [n_r, 1]
    s = ao.strehl(seeing, x, K, AO_CAM, H_BAR, sep)
    fw = ph.delivered_fwhm_arcsec(seeing, x, K, AO_CAM, APERTURE, turbulence_height_m=H_BAR,
                                  guide_sep_arcsec=sep, strehl=s)
    assert s.shape == fw.shape == (2, 4)
    for i in range(2):
        for j in range(4):
            assert s[i, j] == pytest.approx(float(ao.strehl(seeing[0, j], x[i, j], K, AO_CAM, H_BAR, sep[i, 0])))
