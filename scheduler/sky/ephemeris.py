"""Alt/az/airmass of every target at every grid time, Sun and Moon, in one astropy transform.

CONTRACT: the SkyGrid dataclass is read by feasibility, the solver's transitions, the plan
checker and the reports. Arrays are plain numpy (degrees, floats); rows follow ``ra_deg``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .night import Night


@dataclass(frozen=True)
class SkyGrid:
    night: Night
    ra_deg: np.ndarray  # [n_tg]
    dec_deg: np.ndarray  # [n_tg]
    alt_deg: np.ndarray  # [n_tg, n_t] true (unrefracted) altitude
    az_deg: np.ndarray  # [n_tg, n_t] 0..360, north through east
    airmass: np.ndarray  # [n_tg, n_t] Kasten & Young 1989; inf where alt <= 0
    sun_alt_deg: np.ndarray  # [n_t]
    sun_sep_deg: np.ndarray  # [n_tg, n_t] angular distance target-Sun
    moon_alt_deg: np.ndarray  # [n_t]
    moon_illum: np.ndarray  # [n_t] illuminated fraction 0..1
    moon_phase_angle_deg: np.ndarray  # [n_t] 0 = full, 180 = new
    moon_sep_deg: np.ndarray  # [n_tg, n_t]

    @property
    def n_targets(self) -> int:
        return int(self.ra_deg.shape[0])
