"""The objective: what one execution of a request is worth. The one home of the science value
(program weight, priority, exposure, merit buckets) and of the integer scale CP-SAT works in.
Pure: imports only the ground floor."""

from __future__ import annotations

import numpy as np

from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import consecutive_runs

VALUE_SCALE = 10_000  # objective units per unit of science value (integer objective for CP-SAT)


def science_base_value(spec: RequestSpec, program_weights: dict[str, float]) -> float:
    w = float(program_weights.get(spec.program, 1.0))
    return w * (spec.priority / 5.0) * (spec.exposure_s / 3600.0)


def merit_buckets(starts_mask: np.ndarray, merit: np.ndarray, base: float, bucket_steps: int):
    """(bucket_lo, bucket_hi, coef): feasible starts cut into buckets of ``bucket_steps``; each
    bucket is worth the value at its lowest merit (conservative; bucket_steps=1 is exact)."""
    lo_l, hi_l, coef_l = [], [], []
    for lo, hi in consecutive_runs(np.flatnonzero(starts_mask)):
        for b0 in range(lo, hi + 1, bucket_steps):
            b1 = min(hi, b0 + bucket_steps - 1)
            m = float(np.min(merit[b0:b1 + 1]))
            lo_l.append(b0)
            hi_l.append(b1)
            coef_l.append(max(1, int(round(VALUE_SCALE * base * m))))
    return (np.array(lo_l, dtype=np.int64), np.array(hi_l, dtype=np.int64), np.array(coef_l, dtype=np.int64))
