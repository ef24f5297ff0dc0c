"""`nodekeep init` works from a built wheel in a fresh environment, not only from a checkout."""

from __future__ import annotations

import subprocess
import sys
import sysconfig
import venv
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]


@pytest.mark.slow
def test_init_from_installed_wheel(tmp_path):
    dist = tmp_path / "dist"
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "--no-build-isolation",
         "-w", str(dist), str(REPO)],
        check=True, capture_output=True,
    )
    wheel = next(dist.glob("nodekeep-*.whl"))
    env_dir = tmp_path / "fresh"
    venv.create(env_dir, with_pip=False)
    fresh_py = env_dir / "bin" / "python"
    site = Path(subprocess.run(
        [str(fresh_py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        check=True, capture_output=True, text=True).stdout.strip())
    # Third-party dependencies come from the test environment; nodekeep itself only from
    # the wheel (a path line in a .pth file does not run the editable-install hook).
    (site / "deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps",
                    "--target", str(site), str(wheel)], check=True, capture_output=True)
    where = subprocess.run(
        [str(fresh_py), "-c",
         "import archive, archive.store.migrate as m; print(archive.__file__); "
         "print(m.script_location())"],
        check=True, capture_output=True, text=True, cwd=tmp_path).stdout.split()
    assert all(Path(p).is_relative_to(site) for p in where), where
    run = subprocess.run([str(fresh_py), "-m", "archive", "init", str(tmp_path / "arc")],
                         capture_output=True, text=True, cwd=tmp_path)
    assert run.returncode == 0, run.stderr
    assert "created archive" in run.stdout and "schema" in run.stdout
    run = subprocess.run([str(fresh_py), "-m", "archive", "-A", str(tmp_path / "arc"),
                          "survey", "create", "Kestrel Flats 3D", "--crs", "EPSG:32614"],
                         capture_output=True, text=True, cwd=tmp_path)
    assert run.returncode == 0, run.stderr
    assert "UTM zone 14N" in run.stdout
    # every package of the checkout is in the wheel (a package missing from the build's
    # list installs nothing and fails only when a command imports it)
    packages = sorted("archive." + p.parent.name for p in (REPO / "archive").glob("*/__init__.py"))
    run = subprocess.run([str(fresh_py), "-c", "import importlib, sys; "
                          "[importlib.import_module(m) for m in sys.argv[1:]]", *packages],
                         capture_output=True, text=True, cwd=tmp_path)
    assert run.returncode == 0, run.stderr
