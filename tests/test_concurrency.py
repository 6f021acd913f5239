"""Several PIs at once: concurrent CLI processes submitting, importing and withdrawing.

Nothing lost, nothing duplicated, no "database is locked" reaching a user.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from conftest import ROOT, cli_json

SUBMITTERS = 4
ADDS_EACH = 4
IMPORT_ROWS = 25


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env.pop("NIGHTPLAN_DB", None)
    env.pop("NIGHTPLAN_CONFIG", None)
    return env


def _script(k: int, folder: Path) -> str:
    """One PI's session: several adds, one import, one withdraw of its own first request."""
    imp = folder / f"imp{k}.csv"
    imp.write_text("program,target,ra,dec,band,exposure_s\n" +
                   "".join(f"STAR-1,pi{k}-imp{i},{(10 * i) % 360},-30,V,120\n" for i in range(IMPORT_ROWS)))
    lines = [f"{sys.executable} -m scheduler request add --program STAR-1 --target pi{k}-add{i} "
             f"--ra {(k * 37 + i * 11) % 360} --dec -20 --band R --exposure 200 >> out{k}.txt 2>> err{k}.txt"
             for i in range(ADDS_EACH)]
    lines.insert(2, f"{sys.executable} -m scheduler request import {imp} >> log{k}.txt 2>> err{k}.txt")
    lines.append(f"{sys.executable} -m scheduler request withdraw $(head -n 1 out{k}.txt) >> log{k}.txt 2>> err{k}.txt")
    return "set -e\n" + "\n".join(lines) + "\n"


def test_concurrent_submitters_lose_nothing(workdir):
    procs = [subprocess.Popen(["bash", "-c", _script(k, workdir)], cwd=workdir, env=_env())
             for k in range(SUBMITTERS)]
    codes = [p.wait(timeout=600) for p in procs]
    errors = "".join((workdir / f"err{k}.txt").read_text() for k in range(SUBMITTERS))
    assert codes == [0] * SUBMITTERS, errors
    assert "locked" not in errors.lower() and "Traceback" not in errors
    rows = cli_json("request", "list", cwd=workdir)
    targets = [r["target"] for r in rows]
    expected = {f"pi{k}-add{i}" for k in range(SUBMITTERS) for i in range(ADDS_EACH)} | \
               {f"pi{k}-imp{i}" for k in range(SUBMITTERS) for i in range(IMPORT_ROWS)}
    assert len(targets) == len(set(targets)) == len(expected)  # none duplicated
    assert set(targets) == expected  # none lost
    withdrawn = {r["target"] for r in rows if r["status"] == "withdrawn"}
    assert withdrawn == {f"pi{k}-add0" for k in range(SUBMITTERS)}
    ids = [r["id"] for r in rows]
    assert len(ids) == len(set(ids))
