"""Run astropy without a network: Earth-orientation data from the bundled astropy-iers-data.

Why: the planner runs on observatory machines that may have no route to the IERS servers, and
a plan must never fail because the predictive table shipped with the package has aged.
Accuracy with a stale table: UT1-UTC is extrapolated (error grows to ~1 s within a few years,
and is bounded by the 0.9 s UTC leap-second rule), i.e. at most ~15 arcsec in hour angle and
well under that in altitude at the planning grid's one-minute resolution. See docs/physics.md.
"""

from __future__ import annotations

import logging
import threading
import warnings

log = logging.getLogger(__name__)

_lock = threading.Lock()
_configured = False

# Warnings astropy raises when times fall beyond the bundled tables. They are expected offline
# and carry no action for the user; the accuracy consequence is documented instead.
_SILENCED_MESSAGES = (
    r".*times are outside of range covered by IERS table.*",
    r"Tried to get polar motions for times (after|before) IERS data is valid.*",
    r"Tried to get UT1-UTC for times (after|before) IERS data is valid.*",
    r".*leap-second file is expired.*",
    r".*leap-second auto-update failed.*",
    r".*dubious year.*",
)


def _silence() -> None:
    # filterwarnings de-duplicates identical filters, so re-applying is cheap; it is re-applied
    # on every call because test runners and callers may reset the warning filters.
    for msg in _SILENCED_MESSAGES:
        warnings.filterwarnings("ignore", message=msg)


def configure_offline() -> None:
    """Point astropy at its bundled IERS/leap-second data and forbid downloads. Idempotent.

    - iers.conf.auto_download = False: never reach for the network.
    - iers.conf.auto_max_age = None: never refuse predictive values because the table is old.
    - iers.conf.iers_degraded_accuracy = "ignore": times past the table use its last values
      instead of raising.
    """
    global _configured
    _silence()
    if _configured:
        return
    with _lock:
        if _configured:
            return
        from astropy.utils import iers

        iers.conf.auto_download = False
        iers.conf.auto_max_age = None
        iers.conf.iers_degraded_accuracy = "ignore"
        table = iers.IERS_Auto.open()  # reads the bundled finals2000A.all, no download
        log.debug("astropy offline: IERS table %s, predictive from MJD %s",
                  table.meta.get("data_path"), table.meta.get("predictive_mjd"))
        _configured = True


def iers_table_end_mjd() -> float:
    """Last MJD covered by the bundled IERS table (predictions included)."""
    configure_offline()
    from astropy.utils import iers

    return float(iers.IERS_Auto.open()["MJD"][-1].value)
