"""A plain install works outside the repository: `pip install .` then `fcnkit demo --quick` (the shipped
configs travel inside the package)."""

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_installed_package_runs_the_quick_demo_outside_the_repository(tmp_path):
    wheels, site, work = tmp_path / "wheels", tmp_path / "site", tmp_path / "elsewhere"
    work.mkdir()
    pip = [sys.executable, "-m", "pip", "--disable-pip-version-check", "-q"]
    # pip builds a wheel of the project (as `pip install .` does) and installs it into a folder of its own;
    # dependencies come from the environment running the tests
    subprocess.run([*pip, "wheel", "--no-deps", "--no-build-isolation", "-w", str(wheels), str(ROOT)], check=True,
                   capture_output=True, cwd=work)
    wheel = next(wheels.glob("fcnkit-*.whl"))
    subprocess.run([*pip, "install", "--no-deps", "--target", str(site), str(wheel)], check=True,
                   capture_output=True, cwd=work)
    env = {**os.environ, "PYTHONPATH": str(site)}
    where = subprocess.run([sys.executable, "-c", "import fcnkit; print(fcnkit.__file__)"], check=True,
                           capture_output=True, text=True, cwd=work, env=env).stdout
    assert Path(where.strip()).is_relative_to(site)  # the installed copy, not the checkout
    assert sorted(p.name for p in (site / "fcnkit" / "configs").iterdir()) == sorted(
        p.name for p in (ROOT / "fcnkit" / "configs").glob("*.toml"))
    run = subprocess.run([sys.executable, "-m", "fcnkit", "demo", "--quick", "--out", "demo", "--quiet"],
                         capture_output=True, text=True, cwd=work, env={**env, "OMP_NUM_THREADS": "1"}, timeout=600)
    assert run.returncode == 0, run.stderr[-2000:]
    assert (work / "demo" / "report.html").is_file() and (work / "demo" / "map" / "mosaic.labels.tif").is_file()
