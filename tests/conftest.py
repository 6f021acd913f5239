"""Shared fixtures: a real temporary SQLite queue and the real CLI in a subprocess."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

# The CLI fits its tables to COLUMNS. The test runner's workers set it (pytest-xdist sets 80), so
# every process a test starts sees the width a user piping the output gets, unless a test asks
# for a width itself.
for _name in ("COLUMNS", "LINES"):
    os.environ.pop(_name, None)


def run_cli(*args: str, cwd: Path, env: dict | None = None, check: bool = False,
            timeout: float = 300) -> subprocess.CompletedProcess:
    """Run `nightplan ARGS` as a user would: a new process, its own working folder."""
    full_env = dict(os.environ)
    full_env.pop("NIGHTPLAN_DB", None)
    full_env.pop("NIGHTPLAN_CONFIG", None)
    full_env["PYTHONPATH"] = str(ROOT) + os.pathsep + full_env.get("PYTHONPATH", "")
    if env:
        full_env.update(env)
    proc = subprocess.run([sys.executable, "-m", "scheduler", *args], cwd=cwd, env=full_env,
                          capture_output=True, text=True, timeout=timeout)
    if check and proc.returncode != 0:
        raise AssertionError(f"nightplan {' '.join(args)} failed ({proc.returncode}):\n{proc.stdout}\n{proc.stderr}")
    return proc


def cli_json(*args: str, cwd: Path, env: dict | None = None):
    return json.loads(run_cli(*args, "--json", cwd=cwd, env=env, check=True).stdout)


STARTER_EFFORT_LINE = "# effort = 3 "
TEST_EFFORT_LINE = "effort = 1   "


def wall_clock(config_path: Path) -> None:
    """Take the tests' fixed effort out of a folder's observatory.toml: builds and re-plans there
    are bounded by the time limits again (for the tests of the time limits)."""
    text = config_path.read_text(encoding="utf-8")
    assert TEST_EFFORT_LINE in text
    config_path.write_text(text.replace(TEST_EFFORT_LINE, STARTER_EFFORT_LINE, 1), encoding="utf-8")


@pytest.fixture(scope="session")
def _initialised_template(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("template")
    run_cli("init", cwd=folder, check=True)
    # Every build and re-plan in the tests does a fixed amount of search (planning.effort), never
    # "as much as fits in N seconds", so no test depends on this machine's speed or load. The
    # tests of the time limits themselves take the line out again (WALL_CLOCK below).
    cfg = folder / "observatory.toml"
    text = cfg.read_text(encoding="utf-8")
    assert STARTER_EFFORT_LINE in text
    cfg.write_text(text.replace(STARTER_EFFORT_LINE, TEST_EFFORT_LINE, 1), encoding="utf-8")
    run_cli("program", "add", "STAR-1", "--pi", "Dr. Mira Okafor", "--hours", "12", "--weight", "2",
            cwd=folder, check=True)
    return folder


@pytest.fixture
def workdir(tmp_path: Path, _initialised_template: Path) -> Path:
    """An initialised nightplan folder (starter config, empty SQLite queue) with one program.

    Made once by the real CLI, then copied per test (a closed SQLite file copies safely).
    """
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(_initialised_template / name, tmp_path / name)
    return tmp_path


@pytest.fixture
def pg_url():
    """A fresh, empty PostgreSQL database on the loopback server CI starts (.ci/postgres)."""
    base = os.environ.get("NIGHTPLAN_TEST_PG_URL")
    if not base:
        pytest.skip("PostgreSQL not available: NIGHTPLAN_TEST_PG_URL is not set (CI starts one with .ci/postgres)")
    import uuid

    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    name = f"np_{uuid.uuid4().hex[:12]}"
    admin = create_engine(make_url(base).set(database="postgres"), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    url = make_url(base).set(database=name).render_as_string(hide_password=False)
    yield url
    with admin.connect() as conn:
        conn.execute(text(f"SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = '{name}'"))
        conn.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
    admin.dispose()


def wait_while_running(pred, proc, log_path: Path, what: str, timeout: float = 90.0, poll: float = 0.2):
    """Poll ``pred`` until truthy (returned), failing if the service process exits or time runs out."""
    import time

    end = time.monotonic() + timeout
    while True:
        got = pred()
        if got:
            return got
        tail = log_path.read_text()[-3000:] if log_path.exists() else ""
        assert proc.poll() is None, f"service exited ({proc.returncode}) waiting for {what}:\n{tail}"
        assert time.monotonic() < end, f"timed out after {timeout:g} s waiting for {what}:\n{tail}"
        time.sleep(poll)
