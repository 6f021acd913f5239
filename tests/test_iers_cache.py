"""The parsed Earth-rotation (IERS) table kept on disk between processes (scheduler/sky/offline.py).

The table's values are checked against astropy's own parse of the same bundled files (the
reference here is astropy itself: the cache must change nothing but the time it takes).
"""

from __future__ import annotations

import hashlib
import os
import pickle
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from scheduler.sky import offline


def _write_raw(path: Path, payload: bytes, digest: bytes | None = None, mode: int = 0o600) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    digest = digest if digest is not None else hashlib.sha256(payload).hexdigest().encode()
    path.write_bytes(offline._MAGIC + digest + b"\n" + payload)
    path.chmod(mode)


def test_cache_path_is_keyed_by_versions_and_can_be_turned_off(monkeypatch, tmp_path):
    monkeypatch.setenv("NIGHTPLAN_CACHE_DIR", str(tmp_path))
    p = offline.iers_cache_path()
    assert p.parent == tmp_path and p.name.startswith("iers-") and p.suffix == ".pickle"
    import scheduler
    monkeypatch.setattr(scheduler, "__version__", "0.0.0-other")
    offline.versions_key.cache_clear()  # read once per process (an upgrade starts a new one)
    try:
        assert offline.iers_cache_path() != p  # another package version: another file
    finally:
        offline.versions_key.cache_clear()
    monkeypatch.setenv("NIGHTPLAN_CACHE_DIR", "")
    assert offline.iers_cache_path() is None


@pytest.mark.parametrize("damage", ["garbage", "truncated", "checksum", "wrong object", "world-writable"])
def test_damaged_or_foreign_cache_files_are_not_used(tmp_path, damage):
    path = tmp_path / "iers-x.pickle"
    payload = pickle.dumps({"not": "a table"})
    if damage == "garbage":
        path.write_bytes(b"\x00\x01 not a cache")
        path.chmod(0o600)
    elif damage == "truncated":
        _write_raw(path, payload)
        path.write_bytes(path.read_bytes()[:-5])
    elif damage == "checksum":
        _write_raw(path, payload, digest=b"0" * 64)
    elif damage == "wrong object":
        _write_raw(path, payload)  # checksum right, content not an IERS table
    else:
        _write_raw(path, payload, mode=0o666)
        path.chmod(0o666)  # umask may have masked the mode
    assert offline._read_cache(path) is None
    assert offline._read_cache(tmp_path / "missing.pickle") is None


@pytest.mark.slow
def test_table_is_parsed_once_then_read_back_identical_and_a_damaged_file_is_rebuilt(monkeypatch, tmp_path):
    from astropy.utils import iers

    monkeypatch.setenv("NIGHTPLAN_CACHE_DIR", str(tmp_path / "cache"))
    first = offline._cached_iers_table()  # parses the bundled files and writes the cache
    path = offline.iers_cache_path()
    assert path.exists() and (path.parent.stat().st_mode & 0o777) == 0o700
    again = offline._read_cache(path)
    reference = iers.IERS_Auto.read()  # astropy's own parse of the same files
    for col in ("MJD", "UT1_UTC", "PM_x", "PM_y"):
        assert np.array_equal(np.asarray(again[col]), np.asarray(reference[col]))
        assert np.array_equal(np.asarray(first[col]), np.asarray(reference[col]))
    # damaged on disk: the next call rebuilds it, and the rebuilt file reads back
    path.write_bytes(path.read_bytes()[: len(path.read_bytes()) // 2])
    assert offline._read_cache(path) is None
    rebuilt = offline._cached_iers_table()
    assert np.array_equal(np.asarray(rebuilt["UT1_UTC"]), np.asarray(reference["UT1_UTC"]))
    assert offline._read_cache(path) is not None
    assert not list(path.parent.glob("*.tmp"))  # no temporary file left behind


@pytest.mark.slow
def test_concurrent_processes_with_an_empty_cache_all_succeed(tmp_path):
    """Three processes start on an empty cache at once: each parses or reads a whole file (the
    write is a rename), all get the same UT1-UTC, and one valid file is left."""
    code = ("from scheduler.sky.offline import configure_offline; configure_offline();"
            "from astropy.utils import iers; import numpy as np;"
            "t = iers.IERS_Auto.open(); print(float(np.asarray(t['UT1_UTC'])[-1]), len(t))")
    env = {**os.environ, "NIGHTPLAN_CACHE_DIR": str(tmp_path / "c")}
    procs = [subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                              text=True) for _ in range(3)]
    outs = [p.communicate(timeout=300) for p in procs]
    assert all(p.returncode == 0 for p in procs), [o[1][-500:] for o in outs]
    assert len({o[0] for o in outs}) == 1
    files = list((tmp_path / "c").iterdir())
    assert len(files) == 1 and offline._read_cache(files[0]) is not None
