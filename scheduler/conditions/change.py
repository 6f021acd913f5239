"""Did the conditions change enough to re-plan? Compare two ConditionsGrids from a grid index on.

``compare`` returns human-readable sentences, most urgent first (dome and weather closures,
then seeing, PWV, cloud); an empty list means nothing material changed. The re-planning
service re-plans when the list is not empty and records the sentences as the reason.

Material (thresholds from observatory.toml [planning] for seeing and PWV):
- the dome closes or reopens at any time from ``from_index`` on;
- with ``safety`` given: wind or humidity newly over (or back under) the closure limit;
- seeing or PWV differs by at least its threshold at some time (better or worse: better
  conditions can open time for demanding requests);
- cloud extinction differs by at least ``cloud_threshold`` mag (0.2 mag: about 17 % of the
  light, common practice).
Times are printed as HH:MM UTC when the grids carry their times, else as grid step numbers.
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np

from scheduler.model.config import Safety
from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.timegrid import runs


def _inclusive(mask: np.ndarray) -> list[tuple[int, int]]:
    """Runs as (first, last) indices, the form the change wording uses."""
    return [(a, b - 1) for a, b in runs(mask)]


class _Clock:
    def __init__(self, times: np.ndarray | None, offset: int):
        self.times = times
        self.offset = offset

    def at(self, i: int) -> str:
        k = i + self.offset
        if self.times is None:
            return f"step {k}"
        return datetime.fromtimestamp(float(self.times[k]), tz=timezone.utc).strftime("%H:%M UTC")

    def span(self, runs: list[tuple[int, int]], n: int) -> str:
        a, b = runs[0]
        text = f"from {self.at(a)}" + (" to the end of the grid" if b == n - 1 else f" until {self.at(b + 1)}")
        if len(runs) > 1:
            text += f" (and {len(runs) - 1} more period{'s' if len(runs) > 2 else ''})"
        return text


def _state_change(old_bad: np.ndarray, new_bad: np.ndarray, clock: _Clock, now_bad: str,
                  now_good: str) -> list[str]:
    n = old_bad.shape[0]
    out = []
    worse = _inclusive(new_bad & ~old_bad)
    if worse:
        out.append(f"{now_bad} {clock.span(worse, n)}")
    better = _inclusive(old_bad & ~new_bad)
    if better:
        out.append(f"{now_good} {clock.span(better, n)}")
    return out


def _value_change(name: str, unit: str, old: np.ndarray, new: np.ndarray, threshold: float,
                  clock: _Clock, fmt: str) -> list[str]:
    if threshold <= 0:
        threshold = 1e-9  # any change at all
    d = new - old
    n = d.shape[0]
    out = []
    for sign, verb in ((1.0, "rose"), (-1.0, "fell")):
        big = sign * d >= threshold - 1e-12
        if not big.any():
            continue
        k = int(np.argmax(sign * d))
        out.append(
            f"{name} {verb} by {abs(d[k]):{fmt}} {unit} at {clock.at(k)} "
            f"({old[k]:{fmt}} -> {new[k]:{fmt}} {unit}); by {threshold:g} {unit} or more "
            f"{clock.span(_inclusive(big), n)}"
        )
    return out


def compare(old: ConditionsGrid, new: ConditionsGrid, from_index: int, seeing_threshold: float,
            pwv_threshold: float, *, cloud_threshold: float = 0.2, safety: Safety | None = None,
            times_unix: np.ndarray | None = None) -> list[str]:
    """Material changes from ``old`` to ``new`` at grid indices >= from_index (see module doc).

    ``times_unix`` overrides the grids' own times for the HH:MM labels.
    """
    n = new.n_times
    if old.n_times != n:
        raise ValueError(f"grids differ in length ({old.n_times} vs {n}); compare on the same night grid")
    i0 = int(min(max(from_index, 0), n))
    if i0 >= n:
        return []
    times = times_unix if times_unix is not None else (new.times_unix if new.times_unix is not None
                                                        else old.times_unix)
    clock = _Clock(None if times is None else np.asarray(times, dtype=np.float64), i0)
    sl = slice(i0, n)

    out: list[str] = []
    out += _state_change(~old.dome_open[sl], ~new.dome_open[sl], clock, "dome closed", "dome reopened")
    if safety is not None:
        out += _state_change(old.wind_ms[sl] > safety.max_wind_ms, new.wind_ms[sl] > safety.max_wind_ms, clock,
                             f"wind over the {safety.max_wind_ms:g} m/s closure limit",
                             f"wind back under the {safety.max_wind_ms:g} m/s closure limit")
        out += _state_change(old.humidity_pct[sl] > safety.max_humidity_pct,
                             new.humidity_pct[sl] > safety.max_humidity_pct, clock,
                             f"humidity over the {safety.max_humidity_pct:g} % closure limit",
                             f"humidity back under the {safety.max_humidity_pct:g} % closure limit")
    out += _value_change("seeing", "arcsec", old.seeing_arcsec[sl], new.seeing_arcsec[sl], seeing_threshold,
                         clock, ".2f")
    out += _value_change("PWV", "mm", old.pwv_mm[sl], new.pwv_mm[sl], pwv_threshold, clock, ".1f")
    out += _value_change("cloud extinction", "mag", old.cloud_mag[sl], new.cloud_mag[sl], cloud_threshold,
                         clock, ".2f")
    return out
