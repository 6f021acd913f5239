"""Conditions on the night's grid.

CONTRACT: ConditionsGrid is what feasibility, the solver's merit and the reports read.

``conditions_on_grid`` puts a report's samples onto the grid times:

- seeing, PWV, cloud: linear interpolation between the samples that carry that quantity (a
  sample that leaves a field empty is skipped for that field only);
- wind, humidity: the larger of the two samples around the time (a sample's own value at its
  exact time). These two only decide dome closure, and a weather closure should start as soon
  as either neighbouring sample is over the limit and end only when both are under it:
  linear interpolation would open the dome half an interval too early when the wind drops and
  close it half an interval too late when it rises (conservative choice, common practice);
- coherence time (optional): linear between the samples that carry it; nan elsewhere (no
  default: adaptive optics then has no temporal term). It does not affect ``covered``;
- dome: step-wise, the last reported state holds (also after the last sample: a dome state is
  an operator's fact, not a forecast that runs out); before the first dome sample, the default.

Outside the time span of the samples carrying a quantity, the config's conservative default
is used. ``covered`` is True where every quantity that the report provides at all comes from
the report (quantities the report never mentions take the defaults and do not clear it).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable

import numpy as np

from scheduler.model.config import ConditionDefaults


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
    times_unix: np.ndarray | None = None  # [n_t] the grid times these values belong to (added)
    coherence_time_ms: np.ndarray | None = None  # [n_t] tau0 at 500 nm, zenith; nan (or None) where unknown
    report_ids: tuple[int, ...] = ()  # every report that supplied some time, newest first (merge.py)

    @property
    def n_times(self) -> int:
        return int(self.seeing_arcsec.shape[0])


_LINEAR = ("seeing_arcsec", "pwv_mm", "cloud_mag")
_ENVELOPE = ("wind_ms", "humidity_pct")


def _envelope(t: np.ndarray, ts: np.ndarray, vs: np.ndarray) -> np.ndarray:
    """Max of the bracketing samples; the sample itself at an exact sample time; clamped at the ends."""
    n = ts.shape[0]
    j = np.searchsorted(ts, t, side="left")  # first sample at or after t
    jr = np.minimum(j, n - 1)
    jl = np.clip(j - 1, 0, n - 1)
    exact = ts[jr] == t
    return np.where(exact, vs[jr], np.maximum(vs[jl], vs[jr]))


def conditions_on_grid(samples: Iterable, times_unix: np.ndarray, defaults: ConditionDefaults,
                       report_id: int | None = None) -> ConditionsGrid:
    """Samples (ingest.Sample, any order) -> ConditionsGrid on ``times_unix`` (float seconds, [n_t]).

    No samples at all gives the defaults everywhere with covered=False.
    """
    t = np.asarray(times_unix, dtype=np.float64)
    if t.ndim != 1 or not np.all(np.isfinite(t)):
        raise ValueError("times_unix must be a 1-D array of finite unix seconds")
    rows = sorted(samples, key=lambda s: s.time)
    n_t = t.shape[0]
    ts = np.array([s.time.timestamp() for s in rows], dtype=np.float64)

    def column(name: str) -> np.ndarray:
        return np.array([np.nan if getattr(s, name) is None else getattr(s, name) for s in rows], dtype=np.float64)

    covered = np.full(n_t, bool(rows))
    out: dict[str, np.ndarray] = {}
    for name in _LINEAR + _ENVELOPE:
        v = column(name)
        have = ~np.isnan(v)
        default = float(getattr(defaults, name))
        if not have.any():
            out[name] = np.full(n_t, default)
            continue
        tf, vf = ts[have], v[have]
        inside = (t >= tf[0]) & (t <= tf[-1])
        vals = np.interp(t, tf, vf) if name in _LINEAR else _envelope(t, tf, vf)
        out[name] = np.where(inside, vals, default)
        covered &= inside

    tau = column("coherence_time_ms") if rows else np.empty(0)
    have = ~np.isnan(tau)
    coherence = np.full(n_t, np.nan)
    if have.any():
        tf, vf = ts[have], tau[have]
        inside = (t >= tf[0]) & (t <= tf[-1])
        coherence = np.where(inside, np.interp(t, tf, vf), np.nan)

    dome = np.array([np.nan if s.dome_open is None else float(s.dome_open) for s in rows], dtype=np.float64)
    have = ~np.isnan(dome)
    if have.any():
        td, vd = ts[have], dome[have] > 0.5
        k = np.searchsorted(td, t, side="right") - 1  # last dome sample at or before t
        dome_open = np.where(k >= 0, vd[np.maximum(k, 0)], defaults.dome_open)
        covered &= k >= 0
    else:
        dome_open = np.full(n_t, bool(defaults.dome_open))

    return ConditionsGrid(
        seeing_arcsec=out["seeing_arcsec"], pwv_mm=out["pwv_mm"], cloud_mag=out["cloud_mag"],
        wind_ms=out["wind_ms"], humidity_pct=out["humidity_pct"], dome_open=dome_open.astype(bool),
        covered=covered, report_id=report_id, times_unix=t.copy(), coherence_time_ms=coherence,
        report_ids=(report_id,) if report_id is not None and rows else (),
    )


def default_conditions(times_unix: np.ndarray, defaults: ConditionDefaults) -> ConditionsGrid:
    """No report at all: the config's conservative defaults everywhere, nothing covered."""
    return conditions_on_grid((), times_unix, defaults)
