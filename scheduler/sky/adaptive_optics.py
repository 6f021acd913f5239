"""Adaptive optics from the turbulence: Fried parameter, residual wavefront error, Strehl ratio.

Plain floats or numpy arrays in (arcsec, micrometres, metres, milliseconds); everything
broadcasts. Sources beside each formula; docs/physics.md collects them.

The chain, for a band at wavelength lambda and airmass X, from the site's 500 nm zenith seeing s:
  r0(500 nm, zenith) = 0.98 * 500 nm / s                    (Fried 1966; Roddier 1981)
  r0(lambda, X) = r0(500) (lambda / 0.5 um)^(6/5) X^(-3/5)   (Kolmogorov scaling)
  sigma^2 = a_F (d / r0)^(5/3)                               fitting (d: actuator pitch)
          + (theta / theta0)^(5/3)                           anisoplanatism (theta: guide star distance)
          + (tau / tau0)^(5/3)                               servo lag, where a coherence time is known
  theta0 = 0.314 r0 / (h_bar X)                              (isoplanatic angle; the layer at mean
                                                              height h_bar is X times farther away)
  tau0(lambda, X) = tau0(500, zenith) (lambda / 0.5 um)^(6/5) X^(-3/5)   (tau0 = 0.314 r0 / v, so it scales as r0)
  Strehl S = exp(-sigma^2)                                   (extended Marechal approximation)
The three variance terms are the standard Kolmogorov forms (Fried 1966, 1982; Greenwood 1977;
a_F ~ 0.3 for a continuous-facesheet mirror, from memory). Omitted: wavefront-sensor noise
(guide star brightness), aliasing, non-common-path errors; so the Strehl is an upper bound and
the instrument's Strehl threshold is where the site's own experience enters.

Resolution rule (our choice, documented in docs/physics.md): where the Strehl ratio reaches the
instrument's threshold ``ao_strehl_min`` the delivered image is the corrected core, the
diffraction FWHM combined in quadrature with the instrument's blur; below it the light is in the
seeing halo and the image is the seeing-limited one.
"""

from __future__ import annotations

import numpy as np

from scheduler.model.config import Band, Instrument

RAD_TO_ARCSEC = 180.0 / np.pi * 3600.0
REF_WAVELENGTH_UM = 0.5  # site seeing and coherence time are quoted at 500 nm, zenith (trade convention)


def _f(x) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def fried_parameter_m(seeing500_arcsec, wavelength_um=REF_WAVELENGTH_UM, airmass=1.0):
    """Fried parameter r0 (m) at a wavelength along a line of sight at the airmass.

    FWHM = 0.98 lambda / r0 (Fried 1966; Roddier 1981) inverted at 500 nm, then
    r0 ~ lambda^(6/5) X^(-3/5). 1.0 arcsec at 500 nm gives 0.101 m; at 2.2 um 0.60 m.
    """
    s = _f(seeing500_arcsec) / RAD_TO_ARCSEC
    r0_500 = 0.98 * REF_WAVELENGTH_UM * 1e-6 / s
    return (r0_500 * (_f(wavelength_um) / REF_WAVELENGTH_UM) ** 1.2 * _f(airmass) ** -0.6)[()]


def isoplanatic_angle_arcsec(r0_m, turbulence_height_m, airmass=1.0):
    """theta0 = 0.314 r0 / (h_bar X) (Fried 1982 form with the mean turbulence height; r0 along
    the line of sight). The layer's distance along a slanted path is h_bar X."""
    return (0.314 * _f(r0_m) / (_f(turbulence_height_m) * _f(airmass)) * RAD_TO_ARCSEC)[()]


def coherence_time_ms(tau0_500_ms, wavelength_um, airmass=1.0):
    """Coherence time at a wavelength and airmass from the 500 nm zenith value: tau0 ~ r0."""
    return (_f(tau0_500_ms) * (_f(wavelength_um) / REF_WAVELENGTH_UM) ** 1.2 * _f(airmass) ** -0.6)[()]


def fitting_variance(r0_m, pitch_m, fitting_coeff):
    """a_F (d / r0)^(5/3), rad^2: turbulence finer than the actuator pitch is not corrected."""
    return (_f(fitting_coeff) * (_f(pitch_m) / _f(r0_m)) ** (5.0 / 3.0))[()]


def anisoplanatic_variance(sep_arcsec, theta0_arcsec):
    """(theta / theta0)^(5/3), rad^2: the guide star samples a different column of air."""
    return ((_f(sep_arcsec) / _f(theta0_arcsec)) ** (5.0 / 3.0))[()]


def temporal_variance(lag_ms, tau0_ms):
    """(tau / tau0)^(5/3), rad^2: the turbulence changes during the loop's delay."""
    return ((_f(lag_ms) / _f(tau0_ms)) ** (5.0 / 3.0))[()]


def strehl_extended_marechal(variance_rad2):
    """S = exp(-sigma^2): the extended Marechal approximation (good to S ~ 0.1)."""
    return np.exp(-_f(variance_rad2))[()]


def strehl_marechal(variance_rad2):
    """S = 1 - sigma^2: Marechal's small-error form (the first-order expansion of exp(-sigma^2))."""
    return (1.0 - _f(variance_rad2))[()]


def uses_turbulence_model(band: Band, instrument: Instrument) -> bool:
    """True when the instrument's AO is modelled from the turbulence in this band."""
    return (instrument.ao_turbulence_model and band.seeing_limited
            and band.wavelength_um >= instrument.ao_min_wavelength_um)


def residual_variance(seeing500_arcsec, airmass, band: Band, instrument: Instrument, turbulence_height_m: float,
                      guide_sep_arcsec=0.0, coherence_time_500_ms=None):
    """Residual wavefront variance (rad^2) at the band's wavelength; inf below the horizon.

    coherence_time_500_ms: nan or None where unknown (no temporal term there); the temporal
    term also needs the instrument's ao_servo_lag_ms.
    """
    lam = band.wavelength_um
    x = _f(airmass)
    finite = np.isfinite(x)
    xf = np.where(finite, x, 1.0)
    r0 = fried_parameter_m(seeing500_arcsec, lam, xf)
    var = fitting_variance(r0, instrument.ao_actuator_pitch_m, instrument.ao_fitting_coeff)
    theta0 = isoplanatic_angle_arcsec(r0, turbulence_height_m, xf)
    var = var + anisoplanatic_variance(guide_sep_arcsec, theta0)
    if instrument.ao_servo_lag_ms is not None and coherence_time_500_ms is not None:
        tau = coherence_time_ms(coherence_time_500_ms, lam, xf)
        with np.errstate(invalid="ignore", divide="ignore"):
            temp = temporal_variance(instrument.ao_servo_lag_ms, tau)
        var = var + np.where(np.isfinite(temp), temp, 0.0)  # unknown coherence time: no term
    return np.where(finite, var, np.inf)[()]


def strehl(seeing500_arcsec, airmass, band: Band, instrument: Instrument, turbulence_height_m: float | None,
           guide_sep_arcsec=0.0, coherence_time_500_ms=None):
    """Predicted Strehl ratio in the band (0..1), or nan where the turbulence model does not apply."""
    shape = np.broadcast(_f(seeing500_arcsec), _f(airmass), _f(guide_sep_arcsec)).shape
    if not uses_turbulence_model(band, instrument):
        return np.full(shape, np.nan)[()]
    if turbulence_height_m is None:
        raise ValueError(f"instrument {instrument.name!r} models AO from the turbulence: "
                         "the site's turbulence_height_m is needed")
    var = residual_variance(seeing500_arcsec, airmass, band, instrument, turbulence_height_m, guide_sep_arcsec,
                            coherence_time_500_ms)
    return np.broadcast_to(strehl_extended_marechal(var), shape).copy()[()]
