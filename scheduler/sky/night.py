"""The night: Sun events at the site and the planning time grid.

CONTRACT (shared by feasibility, solver, reports). Implementation: see compute_night.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime

import numpy as np


@dataclass(frozen=True)
class Night:
    date: date  # local calendar date of the evening the night begins
    sunset: datetime  # all datetimes aware UTC; None where the Sun never reaches that altitude
    sunrise: datetime
    civil_dusk: datetime | None
    civil_dawn: datetime | None
    nautical_dusk: datetime | None
    nautical_dawn: datetime | None
    astronomical_dusk: datetime | None
    astronomical_dawn: datetime | None
    step_s: int
    times_unix: np.ndarray  # float64 [n_t]: start of each grid step, UTC unix seconds

    @property
    def n_times(self) -> int:
        return int(self.times_unix.shape[0])

    @property
    def start(self) -> datetime:
        return self.sunset

    @property
    def end(self) -> datetime:
        return self.sunrise
