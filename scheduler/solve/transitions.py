"""Transition bounds between consecutive plan entries: slew, settle, instrument or filter change.

* ``pair_transition_steps``: an upper bound per ordered pair of requests, valid at every pair
  of times at which the two can follow each other tonight (the CP-SAT model, the dispatch and
  the bounds use this). It is computed on time buckets: in each bucket the positions a target
  can have are boxed (azimuth centre +- half width on the circle, altitude min..max), the slew
  between two boxes is bounded by the largest distance between them, and the pair's bound is
  the largest over the buckets where a handover between them is possible.
* ``worst_transition_steps``: a bound into an entry from anything at any time (tmax).
* ``slew_s``: the axis motion between two positions (reported on each plan entry).

The TRUE transition of a finished plan is recomputed apart, by the checker
(checker.true_transition_s), which must not share this code.

Slew model (physics sheet, telescope motion): both axes move at once, so the slew takes
max(d_az / rate_az, d_alt / rate_alt); azimuth takes the short way (no cable wrap modelled);
then the mount settles. Changing to another instrument costs the NEW instrument's
instrument_change_s; changing band on the same instrument its filter_change_s. The slew and
the change are added (conservative: they may overlap on a real telescope).
"""

from __future__ import annotations

import math

import numpy as np

from scheduler.model.config import ObservatoryConfig

# Numerical slack when rounding seconds up to whole grid steps (float noise, not physics).
_EPS_S = 1e-6


def az_distance_deg(az1, az2):
    """Short-way azimuth difference, 0..180 degrees (broadcasts)."""
    d = np.abs(np.asarray(az1, dtype=np.float64) - np.asarray(az2, dtype=np.float64)) % 360.0
    return np.minimum(d, 360.0 - d)


def _instrument(config: ObservatoryConfig, name: str):
    for inst in config.instruments:
        if inst.name == name:
            return inst
    raise KeyError(name)


def slew_s(config: ObservatoryConfig, alt1, az1, alt2, az2):
    """Slew time in seconds between two alt/az positions (without settle)."""
    tel = config.telescope
    daz = az_distance_deg(az1, az2)
    dalt = np.abs(np.asarray(alt2, dtype=np.float64) - np.asarray(alt1, dtype=np.float64))
    return np.maximum(daz / tel.slew_rate_az_deg_s, dalt / tel.slew_rate_alt_deg_s)


def seconds_to_steps(seconds, step_s: int):
    """Round a duration up to whole grid steps."""
    return np.ceil((np.asarray(seconds, dtype=np.float64) - _EPS_S) / step_s).astype(np.int64)


def worst_transition_steps(config: ObservatoryConfig, inst_to: str, step_s: int) -> int:
    """A transition bound into an entry that holds whatever came before and whenever.

    Largest possible slew (180 degrees of azimuth, or the whole altitude range) + settle + the
    larger of the new instrument's change times.
    """
    tel = config.telescope
    inst = _instrument(config, inst_to)
    worst_slew = max(180.0 / tel.slew_rate_az_deg_s,
                     (tel.max_altitude_deg - tel.min_altitude_deg) / tel.slew_rate_alt_deg_s)
    worst = worst_slew + tel.settle_s + max(inst.instrument_change_s, inst.filter_change_s)
    return int(seconds_to_steps(worst, step_s))


def _position_boxes(alt: np.ndarray, az: np.ndarray, lo: np.ndarray, hi: np.ndarray):
    """Box the positions of each target over grid steps [lo[b], hi[b]] (inclusive) per bucket b.

    Returns (az_centre, az_halfwidth, alt_min, alt_max), each [n_targets, n_buckets].
    """
    n_tg, n_t = alt.shape
    nb = lo.shape[0]
    az_c = np.empty((n_tg, nb))
    az_hw = np.empty((n_tg, nb))
    alt_lo = np.empty((n_tg, nb))
    alt_hi = np.empty((n_tg, nb))
    for b in range(nb):  # a few dozen buckets; each one is vectorised over targets and steps
        a, z = alt[:, lo[b]:hi[b] + 1], az[:, lo[b]:hi[b] + 1]
        mid = z[:, z.shape[1] // 2]
        az_c[:, b] = mid
        az_hw[:, b] = az_distance_deg(z, mid[:, None]).max(axis=1)
        alt_lo[:, b] = a.min(axis=1)
        alt_hi[:, b] = a.max(axis=1)
    return az_c, az_hw, alt_lo, alt_hi


def pair_transition_steps(config: ObservatoryConfig, step_s: int, alt: np.ndarray, az: np.ndarray,
                          insts: list[str], bands: list[str], end_ok: np.ndarray, start_ok: np.ndarray,
                          bucket_steps: int = 15, chunk: int = 256) -> tuple[np.ndarray, np.ndarray]:
    """Upper bound on the transition (grid steps) for every ordered pair of requests.

    alt, az: [n, n_t] positions of each request's target. end_ok[n, n_t]: the request can end
    (its last step is t-1) at step t; start_ok[n, n_t]: it can start at t.
    Returns (T, tmax): T[i, j] bounds the transition from i to j at any time at which j can start
    within tmax[j] steps after i ends; tmax[j] bounds the transition into j from anything, any time.
    Pairs that can never hand over closer than tmax[j] get T = tmax[j].
    """
    n, n_t = alt.shape
    tmax = np.array([worst_transition_steps(config, ins, step_s) for ins in insts], dtype=np.int64)
    g = int(tmax.max()) if n else 0
    nb = max(1, math.ceil(n_t / bucket_steps))
    lo = np.arange(nb) * bucket_steps
    hi_end = np.minimum(lo + bucket_steps, n_t - 1)  # i ends in [lo, lo+W)
    hi_start = np.minimum(lo + bucket_steps + g, n_t - 1)  # j starts up to g steps later
    ends_in = np.zeros((n, nb), dtype=bool)
    starts_near = np.zeros((n, nb), dtype=bool)
    e_cum = np.concatenate([np.zeros((n, 1), np.int64), np.cumsum(end_ok, axis=1)], axis=1)
    s_cum = np.concatenate([np.zeros((n, 1), np.int64), np.cumsum(start_ok, axis=1)], axis=1)
    ends_in[:] = (e_cum[:, np.minimum(lo + bucket_steps, n_t)] - e_cum[:, lo]) > 0
    starts_near[:] = (s_cum[:, hi_start + 1] - s_cum[:, lo]) > 0
    # i's position while it can end in bucket b (the end step itself: position at the handover),
    # j's position while it can start in bucket b or up to g steps later.
    ai = _position_boxes(alt, az, lo, hi_end)
    aj = _position_boxes(alt, az, lo, hi_start)

    tel = config.telescope
    inst_idx = {name: k for k, name in enumerate(sorted(set(insts)))}
    band_idx = {name: k for k, name in enumerate(sorted(set(bands)))}
    ii = np.array([inst_idx[x] for x in insts], dtype=np.int64)
    bb = np.array([band_idx[x] for x in bands], dtype=np.int64)
    inst_change = np.array([_instrument(config, x).instrument_change_s for x in insts])
    filt_change = np.array([_instrument(config, x).filter_change_s for x in insts])

    # Largest box-to-box slew over the buckets where i can end and j can start soon after.
    # One bucket at a time on the [ends here] x [starts near here] sub-matrix (float32).
    slew = np.full((n, n), -1.0, dtype=np.float32)
    r_az, r_alt = np.float32(tel.slew_rate_az_deg_s), np.float32(tel.slew_rate_alt_deg_s)
    for b in range(nb):
        ri = np.flatnonzero(ends_in[:, b])
        cj = np.flatnonzero(starts_near[:, b])
        if ri.size == 0 or cj.size == 0:
            continue
        ca, ha, la, ua = (x[ri, b].astype(np.float32)[:, None] for x in ai)
        cb, hb, lb, ub = (x[cj, b].astype(np.float32)[None, :] for x in aj)
        d = np.abs(ca - cb) % np.float32(360.0)
        daz = np.minimum(np.float32(180.0), np.minimum(d, np.float32(360.0) - d) + ha + hb)
        dalt = np.maximum(np.maximum(ub - la, ua - lb), np.float32(0.0))
        sub = np.maximum(daz / r_az, dalt / r_alt)
        block = slew[np.ix_(ri, cj)]
        slew[np.ix_(ri, cj)] = np.maximum(block, sub)
    T = np.empty((n, n), dtype=np.int64)
    for s0 in range(0, n, chunk):  # change times and rounding, in row chunks
        sl = slice(s0, min(n, s0 + chunk))
        same_inst = ii[sl, None] == ii[None, :]
        same_band = same_inst & (bb[sl, None] == bb[None, :])
        chg = np.where(same_band, 0.0, np.where(same_inst, filt_change[None, :], inst_change[None, :]))
        sw = slew[sl].astype(np.float64)
        steps = seconds_to_steps(sw + tel.settle_s + chg, step_s)
        T[sl] = np.where(sw >= 0.0, np.minimum(steps, tmax[None, :]), tmax[None, :])
    return T, tmax
