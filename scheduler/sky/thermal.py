"""The thermal sky in the mid-infrared: the atmosphere's own emission sets the noise.

At 10 and 20 um the sky glows: by Kirchhoff's law a layer that transmits a fraction t emits
(1 - t) times the blackbody radiance at its temperature. A wetter sky is both less transparent
and brighter. For a background-limited exposure of fixed length the signal-to-noise ratio goes
as signal / sqrt(background) (Poisson noise of the background photons), so relative to the
band's best sky (zenith, no water vapour, no cloud):

  SNR / SNR_best = (t / t_best) * sqrt(B_best / B),   B = (1 - t) B_lambda(T_air)

The merit's transmission factor already carries t / t_best; ``background_factor`` is the
second factor. Plain floats or numpy arrays; everything broadcasts.
"""

from __future__ import annotations

import numpy as np

from scheduler.model.config import Band
from scheduler.sky.physics import transmission

# SI defining constants (exact since the 2019 redefinition)
H_PLANCK = 6.62607015e-34  # J s
C_LIGHT = 299_792_458.0  # m / s
K_BOLTZMANN = 1.380649e-23  # J / K
ZERO_CELSIUS_K = 273.15


def planck_radiance_um(wavelength_um, temperature_k):
    """Blackbody spectral radiance per unit wavelength, W m^-2 sr^-1 um^-1 (Planck 1901).

    B_lambda = 2 h c^2 / lambda^5 / (exp(h c / (lambda k T)) - 1).
    """
    lam = np.asarray(wavelength_um, dtype=np.float64) * 1e-6
    t = np.asarray(temperature_k, dtype=np.float64)
    x = H_PLANCK * C_LIGHT / (lam * K_BOLTZMANN * t)
    return (2.0 * H_PLANCK * C_LIGHT**2 / lam**5 / np.expm1(x) * 1e-6)[()]


def sky_emissivity(band: Band, pwv_mm, airmass, cloud_mag):
    """1 - t along the line of sight (Kirchhoff): extinction, water vapour and cloud all emit. 1 below the horizon."""
    return (1.0 - np.asarray(transmission(band, pwv_mm, airmass, cloud_mag)))[()]


def sky_radiance(band: Band, pwv_mm, airmass, cloud_mag, air_temperature_c):
    """Thermal sky radiance in the band, W m^-2 sr^-1 um^-1: emissivity times B_lambda(T_air)."""
    t_k = np.asarray(air_temperature_c, dtype=np.float64) + ZERO_CELSIUS_K
    return (sky_emissivity(band, pwv_mm, airmass, cloud_mag) * planck_radiance_um(band.wavelength_um, t_k))[()]


def best_emissivity(band: Band) -> float:
    """The band's darkest thermal sky: zenith, no water vapour, no cloud."""
    return float(sky_emissivity(band, 0.0, 1.0, 0.0))


def background_factor(band: Band, pwv_mm, airmass, cloud_mag):
    """sqrt(B_best / B) in (0, 1]: the background-limited sensitivity relative to the best sky.

    The air temperature cancels (one temperature for both). 1 for bands not marked thermal.
    """
    eps = np.asarray(sky_emissivity(band, pwv_mm, airmass, cloud_mag), dtype=np.float64)
    if not band.thermal:
        return np.ones(eps.shape)[()]
    best = best_emissivity(band)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.sqrt(best / eps)
    return np.clip(np.where(np.isfinite(f), f, 0.0), 0.0, 1.0)[()]
