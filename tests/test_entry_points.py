"""How leadline is started: ``leadline --version``, ``python -m leadline``, and both kinds of install.

The version printed is checked against ``[project].version`` of pyproject.toml (what the
distribution declares) and against the installed metadata. The package ``leadline`` has no folder
of its own in the repository (pyproject.toml maps it to adapters/_top), so an editable install
and a built wheel are both checked to import ``leadline``, ``leadline.detector`` and
``leadline.adapters`` from the right place.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import sysconfig
import tomllib
import zipfile
from importlib.metadata import distributions, version
from pathlib import Path

import pytest

from leadline.adapters.cli import main

REPO = Path(__file__).resolve().parents[1]
DECLARED = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["version"]


def test_version_option_prints_the_declared_version(capsys):
    with pytest.raises(SystemExit) as stopped:
        main(["--version"])
    assert stopped.value.code == 0
    assert capsys.readouterr().out == f"leadline {DECLARED}\n"
    assert version("leadline") == DECLARED


def test_python_dash_m_leadline_runs_the_command():
    shown = subprocess.run([sys.executable, "-m", "leadline", "--version"], capture_output=True, text=True,
                           timeout=120)
    assert (shown.returncode, shown.stdout) == (0, f"leadline {DECLARED}\n"), shown.stderr
    helped = subprocess.run([sys.executable, "-m", "leadline", "events", "--help"], capture_output=True,
                            text=True, timeout=120)
    assert helped.returncode == 0 and "--since" in helped.stdout
    wrong = subprocess.run([sys.executable, "-m", "leadline", "no-such-command"], capture_output=True, text=True,
                           timeout=120)
    assert wrong.returncode == 2 and "invalid choice" in wrong.stderr


def _editable() -> bool:
    # A leadline.egg-info left in the working directory by a build is a distribution too; look at all.
    for dist in distributions(name="leadline"):
        text = dist.read_text("direct_url.json")
        if text and json.loads(text).get("dir_info", {}).get("editable", False):
            return True
    return False


def test_an_editable_install_maps_all_three_packages_to_the_repository():
    if not _editable():
        pytest.skip("leadline is not installed in editable mode here")
    probe = ("import leadline, leadline.detector, leadline.adapters, leadline.adapters.cli;"
             "print(leadline.__file__); print(leadline.detector.__file__); print(leadline.adapters.cli.__file__)")
    shown = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=120, cwd="/")
    assert shown.returncode == 0, shown.stderr
    assert shown.stdout.split() == [str(REPO / "adapters" / "_top" / "__init__.py"),
                                    str(REPO / "detector" / "__init__.py"),
                                    str(REPO / "adapters" / "cli" / "__init__.py")]


@pytest.mark.slow
def test_a_built_wheel_installs_all_three_packages(tmp_path):
    # Build from a copy of what the sdist would hold, so no build output lands in the repository.
    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(REPO / name, src / name)
    for name in ("detector", "adapters"):
        shutil.copytree(REPO / name, src / name, ignore=shutil.ignore_patterns("__pycache__"))
    built = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(tmp_path / "dist"),
                            str(src)], capture_output=True, text=True, timeout=600)
    assert built.returncode == 0, built.stderr[-2000:]
    (wheel,) = (tmp_path / "dist").glob("leadline-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    assert {"leadline/__init__.py", "leadline/__main__.py", "leadline/detector/__init__.py",
            "leadline/adapters/__init__.py", "leadline/adapters/cli/__main__.py",
            "leadline/adapters/examples/booster-pressure.csv"} <= set(names)
    assert not [n for n in names if "_top" in n or "__pycache__" in n]

    target = tmp_path / "site"
    installed = subprocess.run([sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--no-index",
                                "--target", str(target), str(wheel)], capture_output=True, text=True, timeout=300)
    assert installed.returncode == 0, installed.stderr[-2000:]
    # -S: no site-packages processing, so the editable install's path hook is not loaded; the
    # dependencies come from this environment's site-packages, after the wheel's files.
    env = {"PYTHONPATH": f"{target}:{sysconfig.get_paths()['purelib']}", "PATH": "/usr/bin:/bin"}
    probe = ("import leadline, leadline.detector, leadline.adapters, leadline.adapters.store;"
             "from importlib.metadata import version; print(version('leadline'));"
             "print(leadline.__file__); print(leadline.detector.__file__); print(leadline.adapters.store.__file__)")
    shown = subprocess.run([sys.executable, "-S", "-c", probe], capture_output=True, text=True, timeout=120,
                           env=env, cwd=tmp_path)
    assert shown.returncode == 0, shown.stderr
    assert shown.stdout.split() == [DECLARED, str(target / "leadline" / "__init__.py"),
                                    str(target / "leadline" / "detector" / "__init__.py"),
                                    str(target / "leadline" / "adapters" / "store" / "__init__.py")]
    ran = subprocess.run([sys.executable, "-S", "-m", "leadline", "--version"], capture_output=True, text=True,
                         timeout=120, env=env, cwd=tmp_path)
    assert (ran.returncode, ran.stdout) == (0, f"leadline {DECLARED}\n"), ran.stderr
