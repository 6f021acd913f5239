"""Several conditions reports on one night: for each time, the newest report that covers it.

Loading tomorrow's forecast must not replace tonight's: a report speaks only for the span of
its own samples. For every grid time the newest report whose samples span that time is used
(newest: latest ``issued``, then the later stored id). Where no report covers a time, the
report that ended most recently before it still supplies what holds past its end (the dome
state, see grid.py), and the configuration's conservative defaults fill the rest, exactly as
for a single report.

``forecast_share`` is the share of the night's times that some report covers, and
``coverage_warning`` the one sentence that `plan build`, the service log and `status` print
when it is below ``planning.min_forecast_share``.

Pure: reports in, arrays out.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid, conditions_on_grid
from scheduler.conditions.ingest import Sample
from scheduler.model.config import ConditionDefaults

_FIELDS = ("seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct", "dome_open", "covered",
           "coherence_time_ms")


@dataclass(frozen=True)
class Report:
    """One stored report as the merge needs it."""

    id: int | None
    issued: datetime  # aware UTC; the newer report wins where two cover the same time
    samples: tuple[Sample, ...]

    @property
    def span_unix(self) -> tuple[float, float] | None:
        """First and last sample time (unix seconds), or None for a report without samples."""
        if not self.samples:
            return None
        ts = [s.time.timestamp() for s in self.samples]
        return min(ts), max(ts)


def _newest_first(reports: Sequence[Report]) -> list[int]:
    return sorted(range(len(reports)), key=lambda i: (reports[i].issued.timestamp(),
                                                      -1 if reports[i].id is None else reports[i].id), reverse=True)


def choose_reports(reports: Sequence[Report], times_unix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per grid time: (index of the newest report covering it or -1, index of the report whose
    values apply there). Where nothing covers a time, the report that ended most recently
    before it applies (what it said last still holds for the dome; defaults otherwise), else
    -1 (defaults everywhere)."""
    t = np.asarray(times_unix, dtype=np.float64)
    covering = np.full(t.shape, -1, dtype=np.int64)
    ended = np.full(t.shape, -1, dtype=np.int64)
    ended_at = np.full(t.shape, -np.inf)
    for i in _newest_first(reports):
        span = reports[i].span_unix
        if span is None:
            continue
        covering[(covering < 0) & (t >= span[0]) & (t <= span[1])] = i
        later = (t > span[1]) & (span[1] > ended_at)  # strictly later end: on a tie the newer stays
        ended[later] = i
        ended_at[later] = span[1]
    applies = np.where(covering >= 0, covering, ended)
    return covering, applies


def conditions_from_reports(reports: Sequence[Report], times_unix: np.ndarray,
                            defaults: ConditionDefaults) -> ConditionsGrid:
    """One ConditionsGrid from several reports, each time from the newest report covering it.

    ``report_id`` is the newest report that supplies any time (None if none does);
    ``report_ids`` all those that do, newest first.
    """
    t = np.asarray(times_unix, dtype=np.float64)
    _covering, applies = choose_reports(reports, t)
    base = conditions_on_grid((), t, defaults)
    out = {name: getattr(base, name).copy() for name in _FIELDS}
    used = [i for i in _newest_first(reports) if np.any(applies == i)]
    for i in used:
        g = conditions_on_grid(reports[i].samples, t, defaults, reports[i].id)
        here = applies == i
        for name in _FIELDS:
            out[name][here] = getattr(g, name)[here]
    ids = tuple(reports[i].id for i in used if reports[i].id is not None)
    return ConditionsGrid(
        seeing_arcsec=out["seeing_arcsec"], pwv_mm=out["pwv_mm"], cloud_mag=out["cloud_mag"],
        wind_ms=out["wind_ms"], humidity_pct=out["humidity_pct"], dome_open=out["dome_open"].astype(bool),
        covered=out["covered"].astype(bool), report_id=ids[0] if ids else None, times_unix=t.copy(),
        coherence_time_ms=out["coherence_time_ms"], report_ids=ids,
    )


def forecast_share(reports: Sequence[Report], times_unix: np.ndarray) -> float:
    """Share (0..1) of the grid times inside the span of at least one report."""
    t = np.asarray(times_unix, dtype=np.float64)
    if t.size == 0:
        return 0.0
    covering, _ = choose_reports(reports, t)
    return float(np.count_nonzero(covering >= 0)) / t.size


def coverage_warning(share: float, min_share: float, night_label: str) -> str | None:
    """The warning when forecasts cover too little of the night, else None."""
    if share >= min_share:
        return None
    return (f"conditions reports cover {100 * share:.0f} % of the night of {night_label} (below "
            f"planning.min_forecast_share {100 * min_share:.0f} %): the rest is planned on the "
            "configuration's conservative defaults; load a forecast for this night")
