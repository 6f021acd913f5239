"""Relative optical airmass from the true (unrefracted) altitude.

All functions take plain floats or numpy arrays in degrees, broadcast, and return float64 (a numpy scalar
for scalar input).
Plain sec z is not offered: near the horizon it ignores the curved atmosphere (at z = 85 deg sec z
is 11.47 against 10.31 from Kasten & Young 1989, both computed from the formulas).
"""

from __future__ import annotations

import numpy as np


def _alt(alt_deg) -> np.ndarray:
    return np.asarray(alt_deg, dtype=np.float64)


def kasten_young_1989(alt_deg):
    """Kasten & Young (1989), Appl. Opt. 28, 4735, eq. with z in degrees:

    X = 1 / (cos z + 0.50572 (96.07995 - z)^-1.6364); written here with altitude h = 90 - z,
    so 96.07995 - z = h + 6.07995. Fitted to a ray-traced ISO standard atmosphere; stays
    right to the horizon (about 37.9 at h = 0). Returns inf where alt <= 0 (not observable).
    """
    h = _alt(alt_deg)
    up = h > 0.0
    hp = np.where(up, h, 45.0)  # dummy value keeps the power finite below the horizon
    x = 1.0 / (np.sin(np.radians(hp)) + 0.50572 * (hp + 6.07995) ** -1.6364)
    return np.where(up, x, np.inf)[()]


def young_1994(alt_deg):
    """Young (1994), Appl. Opt. 33, 1108: rational function of cos z (true zenith angle).

    X = (1.002432 cos^2 z + 0.148386 cos z + 0.0096467) /
        (cos^3 z + 0.149864 cos^2 z + 0.0102963 cos z + 0.000303978).
    Good to about 0.0037 airmass near the zenith; about 31.7 at the horizon. inf where alt <= 0.
    """
    h = _alt(alt_deg)
    up = h > 0.0
    c = np.sin(np.radians(np.where(up, h, 45.0)))  # cos z = sin h
    num = 1.002432 * c**2 + 0.148386 * c + 0.0096467
    den = c**3 + 0.149864 * c**2 + 0.0102963 * c + 0.000303978
    return np.where(up, num / den, np.inf)[()]


def hardie_1962(alt_deg):
    """Hardie (1962), in Astronomical Techniques (Hiltner, ed.), p. 180: polynomial in sec z - 1.

    X = sec z - 0.0018167 (sec z - 1) - 0.002875 (sec z - 1)^2 - 0.0008083 (sec z - 1)^3.
    Good to z ~ 85 deg; beyond that the polynomial turns over, so use Kasten & Young there.
    inf where alt <= 0.
    """
    h = _alt(alt_deg)
    up = h > 0.0
    s = 1.0 / np.sin(np.radians(np.where(up, h, 45.0)))  # sec z
    d = s - 1.0
    return np.where(up, s - 0.0018167 * d - 0.002875 * d**2 - 0.0008083 * d**3, np.inf)[()]
