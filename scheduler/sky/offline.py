"""Run astropy without a network: Earth-orientation data from the bundled astropy-iers-data.

Why: the planner runs on observatory machines that may have no route to the IERS servers, and
a plan must never fail because the predictive table shipped with the package has aged.
Accuracy with a stale table: UT1-UTC is extrapolated (error grows to ~1 s within a few years,
and is bounded by the 0.9 s UTC leap-second rule), i.e. at most ~15 arcsec in hour angle and
well under that in altitude at the planning grid's one-minute resolution. See docs/physics.md.
"""

from __future__ import annotations

import functools
import hashlib
import logging
import os
import pickle
import sys
import tempfile
import threading
import warnings
from pathlib import Path

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
        if iers.IERS_Auto.iers_table is None:
            iers.IERS_Auto.iers_table = _cached_iers_table()
        table = iers.IERS_Auto.open()  # the bundled finals2000A.all (parsed or cached), no download
        log.debug("astropy offline: IERS table %s, predictive from MJD %s",
                  table.meta.get("data_path"), table.meta.get("predictive_mjd"))
        _configured = True


def iers_table_end_mjd() -> float:
    """Last MJD covered by the bundled IERS table (predictions included)."""
    configure_offline()
    from astropy.utils import iers

    return float(iers.IERS_Auto.open()["MJD"][-1].value)


# --------------------------------------------------------------------------- files kept between processes
#
# Two things are kept on disk between processes: the parsed IERS table (below; parsing the
# bundled finals2000A.all and the IERS-B table costs 1.6-2.3 s in every process that computes a
# sky position, loading the cache a few hundredths of a second) and each night's Sun events
# (sky/night.py). Both live in one directory private to the user (mode 0700), keyed by the
# versions of this package, astropy, astropy-iers-data and Python, so an upgrade of any of them
# makes new files. A file is written to a temporary file beside it and renamed into place
# (atomic: concurrent processes each read either nothing or a whole file) and carries a SHA-256
# of its payload; a missing, truncated or damaged file, or one that does not belong to the
# current user or is writable by others, is not read (the caller computes afresh). The IERS
# table is a pickle, which is one more reason for the ownership rule. NIGHTPLAN_CACHE_DIR
# overrides the directory; NIGHTPLAN_CACHE_DIR="" (empty) turns the cache off.

_MAGIC = b"nightplan-iers-1\n"


def cache_dir() -> Path | None:
    """Where files are kept between processes (None: nothing is kept)."""
    env = os.environ.get("NIGHTPLAN_CACHE_DIR")
    if env is not None:
        return Path(env) if env.strip() else None
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "nightplan"


@functools.lru_cache(maxsize=1)
def versions_key() -> str:
    """The versions a kept file depends on (read from the installed metadata: no astropy import;
    the IERS and night caches both ask, once per process)."""
    from importlib import metadata

    import scheduler

    parts = [scheduler.__version__]
    for dist in ("astropy", "astropy-iers-data"):
        try:
            parts.append(metadata.version(dist))
        except metadata.PackageNotFoundError:  # older astropy bundles its tables itself
            parts.append("-")
    parts.append(sys.version.split()[0])
    return "|".join(parts)


def read_private(path: Path, magic: bytes) -> bytes | None:
    """The payload of a file written by :func:`write_private`, or None (see above)."""
    try:
        st = path.stat()
    except FileNotFoundError:
        return None
    if hasattr(os, "getuid") and (st.st_uid != os.getuid() or st.st_mode & 0o022):
        log.warning("cache file %s is not private to this user; ignored", path)
        return None
    try:
        raw = path.read_bytes()
    except OSError as e:
        log.info("cache file %s unreadable (%s); computing afresh", path, e)
        return None
    digest, payload = raw[len(magic):len(magic) + 64], raw[len(magic) + 65:]
    if not raw.startswith(magic) or hashlib.sha256(payload).hexdigest().encode() != digest:
        log.info("cache file %s damaged; computing afresh", path)
        return None
    return payload


def write_private(path: Path, magic: bytes, payload: bytes) -> None:
    """Write atomically with the payload's checksum; a failure only costs the next process the work."""
    try:
        path.parent.mkdir(mode=0o700, parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "wb") as f:
                f.write(magic + hashlib.sha256(payload).hexdigest().encode() + b"\n" + payload)
                f.flush()
                os.fsync(f.fileno())
            os.replace(tmp, path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
    except OSError as e:
        log.info("cache file not written to %s (%s)", path, e)


# --------------------------------------------------------------------------- IERS table cache

def iers_cache_path() -> Path | None:
    """The cache file for the versions installed now (None: no cache)."""
    d = cache_dir()
    if d is None:
        return None
    return d / f"iers-{hashlib.sha256(versions_key().encode()).hexdigest()[:16]}.pickle"


def _read_cache(path: Path):
    """The cached table, or None when the file is missing, not ours, or damaged."""
    payload = read_private(path, _MAGIC)
    if payload is None:
        return None
    try:
        from astropy.utils import iers

        table = pickle.loads(payload)
        if not isinstance(table, iers.IERS_Auto) or len(table) == 0:
            raise ValueError("unexpected content")
        return table
    except Exception as e:  # damaged in any way: rebuilt by the caller
        log.info("IERS cache %s unreadable (%s); rebuilding it", path, e)
        return None


def _write_cache(path: Path, table) -> None:
    write_private(path, _MAGIC, pickle.dumps(table, protocol=pickle.HIGHEST_PROTOCOL))


def _cached_iers_table():
    """The parsed IERS_Auto table: from the disk cache, or parsed and then cached."""
    from astropy.utils import iers

    path = iers_cache_path()
    table = _read_cache(path) if path is not None else None
    if table is None:
        table = iers.IERS_Auto.read()  # the bundled files; auto_download is off
        if path is not None:
            _write_cache(path, table)
    return table
