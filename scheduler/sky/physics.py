"""Band physics: image quality, atmospheric transmission, sky brightness.

Plain floats or numpy arrays in (degrees, arcsec, micrometres, metres, mm, mag); every function
broadcasts over its array arguments. Band and Instrument come from the observatory config.
Sources are named beside each formula; docs/physics.md collects them.
"""

from __future__ import annotations

import numpy as np

from scheduler.model.config import Band, Instrument

RAD_TO_ARCSEC = 180.0 / np.pi * 3600.0
SEEING_REF_WAVELENGTH_UM = 0.5  # sites report seeing at 500 nm, at zenith (trade convention)


# --------------------------------------------------------------------------- image quality

def seeing_fwhm_arcsec(seeing500_arcsec, wavelength_um, airmass):
    """Seeing-limited FWHM at a wavelength and airmass, from the 500 nm zenith seeing.

    Kolmogorov turbulence: FWHM = 0.98 lambda / r0 with r0 ~ lambda^(6/5) X^(-3/5)
    (Fried 1966; Roddier 1981), hence FWHM ~ lambda^(-1/5) X^(3/5). Outer scale ignored
    (conservative: a finite outer scale only narrows the image).
    """
    s = np.asarray(seeing500_arcsec, dtype=np.float64)
    lam = np.asarray(wavelength_um, dtype=np.float64)
    x = np.asarray(airmass, dtype=np.float64)
    return (s * (lam / SEEING_REF_WAVELENGTH_UM) ** -0.2 * x**0.6)[()]


def diffraction_fwhm_arcsec(wavelength_um, aperture_m):
    """FWHM of the Airy core of a filled circular aperture: 1.03 lambda / D (Born & Wolf)."""
    lam = np.asarray(wavelength_um, dtype=np.float64) * 1e-6
    return (1.03 * lam / np.asarray(aperture_m, dtype=np.float64) * RAD_TO_ARCSEC)[()]


def diffraction_limit_arcsec(wavelength_um, aperture_m):
    """Radius of the first dark ring of the Airy pattern, 1.22 lambda / D (Rayleigh criterion)."""
    lam = np.asarray(wavelength_um, dtype=np.float64) * 1e-6
    return (1.22 * lam / np.asarray(aperture_m, dtype=np.float64) * RAD_TO_ARCSEC)[()]


def ao_active(seeing500_arcsec, airmass, band: Band, instrument: Instrument):
    """True where the instrument's adaptive optics corrects the image.

    Model (common practice): correction works at band wavelengths >= ao_min_wavelength_um when
    the seeing along the line of sight (500 nm seeing scaled by X^(3/5): that is the turbulence
    the wavefront sensor has to fight) is below ao_seeing_limit_arcsec. Never for bands that are
    not seeing-limited.
    """
    limit = instrument.ao_seeing_limit_arcsec
    shape = np.broadcast(np.asarray(seeing500_arcsec), np.asarray(airmass)).shape
    if limit is None or not band.seeing_limited or band.wavelength_um < instrument.ao_min_wavelength_um:
        return np.zeros(shape, dtype=bool)[()]
    with np.errstate(invalid="ignore", over="ignore"):
        los = seeing_fwhm_arcsec(seeing500_arcsec, SEEING_REF_WAVELENGTH_UM, airmass)
    return np.broadcast_to(np.asarray(los) < limit, shape).copy()[()]


def delivered_fwhm_arcsec(seeing500_arcsec, airmass, band: Band, instrument: Instrument, aperture_m: float, *,
                          turbulence_height_m: float | None = None, guide_sep_arcsec=0.0,
                          coherence_time_500_ms=None, strehl=None):
    """Delivered image FWHM in the band (arcsec).

    Quadrature sum of seeing, diffraction (Airy FWHM 1.03 lambda/D) and the instrument's own
    blur (common practice). No seeing term where band.seeing_limited is False (radio/submm: the
    beam is the diffraction pattern).

    Adaptive optics, two models:
    - from the turbulence (instrument.ao_actuator_pitch_m set; scheduler/sky/adaptive_optics.py):
      where the predicted Strehl ratio reaches instrument.ao_strehl_min the image is the
      corrected core (no seeing term), otherwise the seeing halo. Needs turbulence_height_m;
      guide_sep_arcsec and coherence_time_500_ms broadcast like the seeing. ``strehl`` may pass
      a Strehl array already computed for the same arguments.
    - the fallback switch (ao_seeing_limit_arcsec, see ao_active): no seeing term where active.
    inf where airmass is inf (below the horizon) and the seeing term applies.
    """
    from scheduler.sky import adaptive_optics as ao

    diff = diffraction_fwhm_arcsec(band.wavelength_um, aperture_m)
    inst = instrument.fwhm_arcsec
    s = np.asarray(seeing500_arcsec, dtype=np.float64)
    x = np.asarray(airmass, dtype=np.float64)
    shape = np.broadcast(s, x, np.asarray(guide_sep_arcsec)).shape
    if not band.seeing_limited:
        return np.full(shape, float(np.hypot(diff, inst)))[()]
    with np.errstate(invalid="ignore", over="ignore"):
        see = seeing_fwhm_arcsec(s, band.wavelength_um, x)
    if ao.uses_turbulence_model(band, instrument):
        if strehl is None:
            strehl = ao.strehl(s, x, band, instrument, turbulence_height_m, guide_sep_arcsec, coherence_time_500_ms)
        corrected = np.asarray(strehl) >= instrument.ao_strehl_min
    else:
        corrected = ao_active(s, x, band, instrument)
    see = np.where(corrected, 0.0, see)
    return np.broadcast_to(np.sqrt(see**2 + diff**2 + inst**2), shape).copy()[()]


def core_fwhm_arcsec(band: Band, instrument: Instrument, aperture_m: float) -> float:
    """The sharpest image: diffraction core (1.03 lambda/D) and instrument blur in quadrature."""
    return float(np.hypot(diffraction_fwhm_arcsec(band.wavelength_um, aperture_m), instrument.fwhm_arcsec))


def seeing_limited_fwhm_arcsec(seeing500_arcsec, airmass, band: Band, instrument: Instrument, aperture_m: float):
    """The image with no adaptive-optics correction (the seeing halo): seeing, diffraction and
    instrument in quadrature; the diffraction pattern alone for bands not seeing-limited."""
    diff = diffraction_fwhm_arcsec(band.wavelength_um, aperture_m)
    s = np.asarray(seeing500_arcsec, dtype=np.float64)
    x = np.asarray(airmass, dtype=np.float64)
    shape = np.broadcast(s, x).shape
    if not band.seeing_limited:
        return np.full(shape, float(np.hypot(diff, instrument.fwhm_arcsec)))[()]
    with np.errstate(invalid="ignore", over="ignore"):
        see = seeing_fwhm_arcsec(s, band.wavelength_um, x)
    return np.sqrt(see**2 + diff**2 + instrument.fwhm_arcsec**2)[()]


# --------------------------------------------------------------------------- dish surface

def ruze_efficiency(surface_rms_um, wavelength_um):
    """Aperture efficiency factor of a reflector with rms surface error sigma: exp(-(4 pi sigma / lambda)^2).

    Ruze (1966), Proc. IEEE 54, 633. sigma = lambda/16 gives exp(-(pi/4)^2) = 0.54.
    """
    r = 4.0 * np.pi * np.asarray(surface_rms_um, dtype=np.float64) / np.asarray(wavelength_um, dtype=np.float64)
    return np.exp(-(r**2))[()]


SUNLIT_SUN_ALT_DEG = 0.0  # the dish counts as sunlit while the Sun's centre is above the horizon (common practice)


def surface_applies(band: Band, telescope) -> bool:
    """Ruze's relation applies to bands that are not seeing-limited, on a telescope with a surface error."""
    return (not band.seeing_limited) and telescope.surface_rms_um is not None


def surface_rms_um(telescope, sun_alt_deg):
    """The dish's rms surface error at each Sun altitude: the daytime value while sunlit."""
    night = telescope.surface_rms_um
    day = telescope.surface_rms_day_um if telescope.surface_rms_day_um is not None else night
    return np.where(np.asarray(sun_alt_deg, dtype=np.float64) > SUNLIT_SUN_ALT_DEG, day, night)[()]


def surface_efficiency(band: Band, telescope, sun_alt_deg):
    """Ruze efficiency of the dish in the band at each Sun altitude; 1 where it does not apply."""
    sun = np.asarray(sun_alt_deg, dtype=np.float64)
    if not surface_applies(band, telescope):
        return np.ones(sun.shape)[()]
    return ruze_efficiency(surface_rms_um(telescope, sun), band.wavelength_um)


def night_surface_efficiency(band: Band, telescope) -> float:
    """The dish's best (night-time) efficiency in the band; 1.0 where Ruze does not apply."""
    if not surface_applies(band, telescope):
        return 1.0
    return float(ruze_efficiency(telescope.surface_rms_um, band.wavelength_um))


# --------------------------------------------------------------------------- transmission

def zenith_opacity(band: Band, pwv_mm):
    """Zenith optical depth: dry part plus a part linear in precipitable water vapour.

    tau = tau_dry + kappa * PWV (linear PWV dependence: e.g. the 225 GHz relation
    tau ~ 0.04 PWV + 0.017 at a high dry site, from memory). Coefficients live in the band table.
    """
    return (band.tau_dry + band.tau_per_mm_pwv * np.asarray(pwv_mm, dtype=np.float64))[()]


def transmission(band: Band, pwv_mm, airmass, cloud_mag):
    """Fraction of the target's light that arrives, 0..1.

    10^(-0.4 (k X + cloud)) * exp(-tau X): broadband extinction k (mag/airmass), grey cloud
    extinction along the line of sight (mag, as measured), water-vapour/dry opacity tau scaled
    by airmass (plane-parallel layers, Beer-Lambert). 0 where the airmass is inf.
    """
    x = np.asarray(airmass, dtype=np.float64)
    tau = np.asarray(zenith_opacity(band, pwv_mm))
    cloud = np.asarray(cloud_mag, dtype=np.float64)
    finite = np.isfinite(x)
    xf = np.where(finite, x, 1.0)
    t = 10.0 ** (-0.4 * (band.extinction_mag * xf + cloud)) * np.exp(-tau * xf)
    return np.where(finite, t, 0.0)[()]


# --------------------------------------------------------------------------- sky brightness

def mag_to_nl(mag):
    """Surface brightness mag/arcsec^2 -> nanolamberts (Krisciunas & Schaefer 1991, eq. 1 form).

    B = 34.08 exp(20.7233 - 0.92104 V); 1 nL is about 26.33 mag/arcsec^2.
    """
    return (34.08 * np.exp(20.7233 - 0.92104 * np.asarray(mag, dtype=np.float64)))[()]


def nl_to_mag(nl):
    """Nanolamberts -> mag/arcsec^2, the inverse of mag_to_nl. inf for 0 nL."""
    b = np.asarray(nl, dtype=np.float64)
    with np.errstate(divide="ignore"):
        return ((20.7233 - np.log(b / 34.08)) / 0.92104)[()]


def _ks_airmass(zd_deg):
    """Krisciunas & Schaefer (1991) eq. 3: X(Z) = (1 - 0.96 sin^2 Z)^(-1/2); finite at Z = 90."""
    z = np.radians(np.minimum(np.asarray(zd_deg, dtype=np.float64), 90.0))
    return 1.0 / np.sqrt(1.0 - 0.96 * np.sin(z) ** 2)


def moon_sky_nl(phase_angle_deg, moon_sep_deg, moon_zd_deg, target_zd_deg, k_ext):
    """Moonlight scattered into the line of sight, V band, nanolamberts.

    Krisciunas & Schaefer (1991), PASP 103, 1033, eqs. 15, 20, 21:
      I* = 10^(-0.4 (3.84 + 0.026 |a| + 4e-9 a^4))          (Moon brightness vs phase angle a)
      f(r) = 10^5.36 (1.06 + cos^2 r) + 10^(6.15 - r/40)     (Rayleigh + Mie scattering)
             Mie term 6.2e7 r^-2 for r < 10 deg              (paper's small-angle form;
             held constant inside 0.25 deg, common practice)
      B = f(r) I* 10^(-0.4 k X(Zm)) (1 - 10^(-0.4 k X(Z)))
    0 where the Moon is below the horizon (Zm >= 90). The 35 % opposition surge within 7 deg
    of full Moon is not modelled.
    """
    a = np.abs(np.asarray(phase_angle_deg, dtype=np.float64))
    r = np.asarray(moon_sep_deg, dtype=np.float64)
    zm = np.asarray(moon_zd_deg, dtype=np.float64)
    z = np.asarray(target_zd_deg, dtype=np.float64)
    istar = 10.0 ** (-0.4 * (3.84 + 0.026 * a + 4e-9 * a**4))
    rr = np.maximum(r, 0.25)  # the r^-2 form diverges at 0 separation; hold it inside 0.25 deg
    rayleigh = 10.0**5.36 * (1.06 + np.cos(np.radians(rr)) ** 2)
    mie = np.where(rr < 10.0, 6.2e7 / rr**2, 10.0 ** (6.15 - rr / 40.0))
    f = rayleigh + mie
    b = f * istar * 10.0 ** (-0.4 * k_ext * _ks_airmass(zm)) * (1.0 - 10.0 ** (-0.4 * k_ext * _ks_airmass(z)))
    return np.where(zm < 90.0, b, 0.0)[()]


def dark_sky_nl(dark_mag_zenith, target_zd_deg, k_ext):
    """Moonless sky at zenith distance Z, nanolamberts (Krisciunas & Schaefer 1991, eq. 2).

    B = B_zen X(Z) 10^(-0.4 k (X(Z) - 1)): airglow brightens toward the horizon (van Rhijn-like
    X(Z)) and is dimmed by extinction.
    """
    x = _ks_airmass(target_zd_deg)
    return (mag_to_nl(dark_mag_zenith) * x * 10.0 ** (-0.4 * k_ext * (x - 1.0)))[()]


# Twilight (common practice, approximate, from memory of published twilight photometry):
# the zenith V sky is about 18 mag/arcsec^2 when the Sun's centre is 12 deg down and fades
# by about 1.2 mag per degree of further depression; it is ignored once the Sun is 18 deg down.
# Above the horizon the value is held at its Sun-on-horizon level (~3.6 mag/arcsec^2, close to
# a clear daytime sky). The twilight light is taken to have the colour of sunlight, i.e. the
# band's moon_color_mag, which makes the near infrared usable earlier than the blue.
TWILIGHT_V_AT_MINUS12 = 18.0
TWILIGHT_SLOPE_MAG_PER_DEG = 1.2
TWILIGHT_END_SUN_ALT = -18.0


def twilight_sky_nl(sun_alt_deg, color_mag=0.0):
    """Zenith twilight sky, nanolamberts in the band's V-like magnitude scale (see above)."""
    h = np.minimum(np.asarray(sun_alt_deg, dtype=np.float64), 0.0)
    mag = TWILIGHT_V_AT_MINUS12 + TWILIGHT_SLOPE_MAG_PER_DEG * (-12.0 - h) + color_mag
    return np.where(h > TWILIGHT_END_SUN_ALT, mag_to_nl(mag), 0.0)[()]


def sky_brightness_mag(band: Band, phase_angle_deg, moon_sep_deg, moon_alt_deg, target_alt_deg, sun_alt_deg):
    """Sky surface brightness in the band, mag/arcsec^2, at the target.

    dark sky (band.dark_sky_mag at zenith, brightened toward the horizon)
    + moonlight (Krisciunas & Schaefer with the band's extinction; the Moon's brightness shifted
      by band.moon_color_mag, the colour of moonlight band minus V; common practice)
    + twilight (twilight_sky_nl). nan where the band has no dark_sky_mag (thermal bands).
    Targets below the horizon are evaluated at the horizon.
    """
    shape = np.broadcast(*(np.asarray(v) for v in (phase_angle_deg, moon_sep_deg, moon_alt_deg,
                                                   target_alt_deg, sun_alt_deg))).shape
    if band.dark_sky_mag is None:
        return np.full(shape, np.nan)[()]
    color = band.moon_color_mag or 0.0
    k = band.extinction_mag
    zd = 90.0 - np.maximum(np.asarray(target_alt_deg, dtype=np.float64), 0.0)
    moon_zd = 90.0 - np.asarray(moon_alt_deg, dtype=np.float64)
    total = (dark_sky_nl(band.dark_sky_mag, zd, k)
             + moon_sky_nl(phase_angle_deg, moon_sep_deg, moon_zd, zd, k) * 10.0 ** (-0.4 * color)
             + twilight_sky_nl(sun_alt_deg, color))
    return np.broadcast_to(nl_to_mag(total), shape).copy()[()]
