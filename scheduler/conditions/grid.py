"""Conditions on the night's grid.

CONTRACT: ConditionsGrid is what feasibility, the solver's merit and the reports read.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ConditionsGrid:
    seeing_arcsec: np.ndarray  # [n_t] site seeing, 500 nm, zenith
    pwv_mm: np.ndarray  # [n_t]
    cloud_mag: np.ndarray  # [n_t] extinction by cloud, magnitudes
    wind_ms: np.ndarray  # [n_t]
    humidity_pct: np.ndarray  # [n_t]
    dome_open: np.ndarray  # [n_t] bool: dome open per the report (closures applied separately)
    covered: np.ndarray  # [n_t] bool: a sample covered this time (False: config defaults used)
    report_id: int | None = None
