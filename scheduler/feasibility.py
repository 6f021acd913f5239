"""Per request x grid time: allowed? why not? how good?

CONTRACT: Feasibility is the solver's, the checker's and `plan why`'s input.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import IntFlag

import numpy as np


class Reason(IntFlag):
    """One bit per constraint that fails at a time (0 = feasible)."""

    ALTITUDE = 1 << 0  # below the telescope's limit, in the zenith blind spot, or beyond max_airmass
    TWILIGHT = 1 << 1  # Sun too high for the band
    MOON_SEP = 1 << 2
    SKY_BRIGHTNESS = 1 << 3  # sky too bright in the band (Moon, twilight), or Moon too illuminated
    SEEING = 1 << 4
    RESOLUTION = 1 << 5  # delivered FWHM in the band worse than needed
    PWV = 1 << 6
    TRANSMISSION = 1 << 7
    CLOUD = 1 << 8
    CLOSURE = 1 << 9  # dome closed, wind or humidity over the limit
    SUN = 1 << 10  # within the sun-avoidance angle
    WINDOW = 1 << 11  # outside the absolute or periodic time window
    NIGHT_END = 1 << 12  # (start only) the whole exposure does not fit before the grid ends


@dataclass(frozen=True)
class Feasibility:
    request_ids: np.ndarray  # [n_r] ids of the RequestSpecs evaluated, in row order
    target_row: np.ndarray  # [n_r] row of each request in the SkyGrid
    ok: np.ndarray  # [n_r, n_t] bool: every constraint holds at this time
    reasons: np.ndarray  # [n_r, n_t] uint16 bitmask of Reason
    merit: np.ndarray  # [n_r, n_t] float32 in (0, 1]; meaningful where ok
    duration_steps: np.ndarray  # [n_r] int: setup + remaining exposure, in grid steps (ceil)
    start_ok: np.ndarray  # [n_r, n_t] bool: ok for every step of [t, t + duration)
    fwhm_arcsec: np.ndarray  # [n_r, n_t] predicted delivered image FWHM in the band
    transmission: np.ndarray  # [n_r, n_t] 0..1 (extinction, water vapour, cloud)
    sky_mag: np.ndarray  # [n_r, n_t] sky brightness in the band, mag/arcsec^2 (nan if not modelled)
