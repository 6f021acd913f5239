"""nightplan installs like any other package: a wheel built from this tree and installed into a
fresh virtualenv runs `init` in an empty folder, takes a request, builds a small plan and runs
the demo, far from the source tree (the migrations and the demo scenario are package data)."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

from conftest import ROOT

pytestmark = pytest.mark.slow

NIGHT = "2026-12-16"  # the demo night at the starter configuration's invented site


def _run(*args, cwd: Path, env: dict | None = None, timeout: float = 300) -> subprocess.CompletedProcess:
    proc = subprocess.run([str(a) for a in args], cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)
    assert proc.returncode == 0, f"{' '.join(map(str, args))} failed ({proc.returncode}):\n{proc.stdout[-3000:]}\n" \
                                 f"{proc.stderr[-3000:]}"
    return proc


@pytest.fixture(scope="module")
def installed(tmp_path_factory) -> Path:
    """A fresh virtualenv holding nightplan from a wheel built here; its bin/ folder."""
    tmp = tmp_path_factory.mktemp("wheel")
    # Build from a copy of what the build reads, so build/ and *.egg-info stay out of the tree.
    src = tmp / "src"
    shutil.copytree(ROOT / "scheduler", src / "scheduler", ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(ROOT / name, src / name)
    wheels = tmp / "wheels"
    _run(sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--no-index", "-q",
         "-w", wheels, src, cwd=tmp)
    (wheel,) = wheels.glob("nightplan-*.whl")
    with zipfile.ZipFile(wheel) as z:
        names = set(z.namelist())
    # Every file of the folders read at run time ships, whatever is added to them later.
    for folder in ("db/migrations", "data", "web/templates", "web/static"):
        for f in (ROOT / "scheduler" / folder).rglob("*"):
            if f.is_file() and "__pycache__" not in f.parts and f.suffix != ".pyc":
                rel = f.relative_to(ROOT).as_posix()
                assert rel in names, f"{rel} is not in the wheel (pyproject.toml: [tool.setuptools.package-data])"
    assert "scheduler/db/migrations/versions/0001_initial_schema.py" in names
    assert not any("__pycache__" in n for n in names)

    venv = tmp / "venv"
    _run(sys.executable, "-m", "venv", "--without-pip", venv, cwd=tmp)
    py = venv / "bin" / "python"
    # This environment's pip installs the wheel into the new one, before the new one can see any
    # other nightplan.
    _run(sys.executable, "-m", "pip", "--python", py, "install", "--no-deps", "--no-index", "-q", wheel, cwd=tmp)
    # The dependencies (numpy, astropy, OR-Tools, ...) are this environment's, reached through a
    # path file: nothing is downloaded or copied. A .pth file's folders come after the venv's own
    # site-packages, and the path files inside them are not run, so this environment's editable
    # nightplan stays invisible.
    site = _run(py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])", cwd=tmp).stdout.strip()
    deps = dict.fromkeys([sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]])
    (Path(site) / "_test_dependencies.pth").write_text("\n".join(deps) + "\n", encoding="utf-8")
    return venv / "bin"


def _env() -> dict:
    env = {k: v for k, v in os.environ.items()
           if k not in ("PYTHONPATH", "NIGHTPLAN_DB", "NIGHTPLAN_CONFIG", "NIGHTPLAN_CLOCK", "VIRTUAL_ENV")}
    env["PYTHONNOUSERSITE"] = "1"
    return env


def test_installed_wheel_runs_init_a_request_and_a_plan(installed, tmp_path):
    env = _env()
    where = _run(installed / "python", "-c", "import scheduler; print(scheduler.__file__)", cwd=tmp_path, env=env)
    assert Path(where.stdout.strip()).is_relative_to(installed.parent), where.stdout  # not the source tree
    nightplan = installed / "nightplan"

    out = _run(nightplan, "init", cwd=tmp_path, env=env).stdout
    assert "(starter file for an invented site; edit it)" in out and "(created, schema " in out
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith("nightplan.sqlite-")) == \
        ["nightplan.sqlite", "observatory.toml"]
    _run(nightplan, "program", "add", "WHL-1", "--pi", "Dr. Invented Tester", "--hours", "5", cwd=tmp_path, env=env)
    # An invented field high in the evening sky of the invented site on the demo night.
    rid = _run(nightplan, "request", "add", "--program", "WHL-1", "--target", "wheel field 1", "--ra", "30",
               "--dec", "-55", "--band", "R", "--exposure", "600", cwd=tmp_path, env=env).stdout.strip()
    built = _run(nightplan, "plan", "build", "--night", NIGHT, "--time-limit", "1", "--now", f"{NIGHT}T18:00:00Z",
                 cwd=tmp_path, env=env)
    assert "plan version 1 stored" in built.stdout
    doc = json.loads(_run(nightplan, "plan", "show", "--json", cwd=tmp_path, env=env).stdout)
    assert [e["request_id"] for e in doc["entries"]] == [int(rid)]


def test_installed_wheel_runs_the_demo(installed, tmp_path):
    proc = _run(installed / "nightplan", "demo", "--out", tmp_path / "demo", "--time-limit", "0.5", cwd=tmp_path,
                env=_env())
    assert "$ nightplan request import demo_queue/requests.csv" in proc.stdout
    assert "Demo finished" in proc.stdout
    assert (tmp_path / "demo" / "plan_v2.json").is_file()
