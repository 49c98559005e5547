"""The installed package is `twinring` (source folder pipeline/), in regular and editable installs.

Packaging facts (common practice, no source): a wheel's top-level folders are the importable
names it installs; an editable install must import the same name from outside the source tree.
"""
import subprocess
import sys
import venv
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _venv(tmp_path):
    env_dir = tmp_path / "venv"
    venv.EnvBuilder(with_pip=True).create(env_dir)
    return env_dir / "bin" / "python"


def _run(cmd, cwd):
    res = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stdout[-2000:] + res.stderr[-2000:]
    return res.stdout


@pytest.mark.timeout(900)
def test_wheel_installs_twinring_and_no_pipeline(tmp_path):
    wheel_dir = tmp_path / "wheel"
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(wheel_dir), str(ROOT)], tmp_path)
    (wheel,) = wheel_dir.glob("twinring-*.whl")
    tops = {name.split("/")[0] for name in zipfile.ZipFile(wheel).namelist()}
    assert "twinring" in tops
    assert "pipeline" not in tops
    assert "twinring/topology/skies.py" in zipfile.ZipFile(wheel).namelist()
    py = _venv(tmp_path)
    _run([str(py), "-m", "pip", "install", "-q", "--no-deps", str(wheel)], tmp_path)
    code = ("import importlib.util, twinring; print(twinring.__version__); "
            "print(importlib.util.find_spec('pipeline') is None)")
    out = _run([str(py), "-c", code], tmp_path).split()
    assert out[0][0].isdigit() and out[1] == "True"


@pytest.mark.timeout(900)
def test_editable_install_imports_twinring_from_outside(tmp_path):
    py = _venv(tmp_path)
    _run([str(py), "-m", "pip", "install", "-q", "--no-deps", "-e", str(ROOT)], tmp_path)
    code = ("import importlib.util, twinring; print(twinring.__file__); "
            "print(importlib.util.find_spec('pipeline') is None)")
    out = _run([str(py), "-c", code], tmp_path).split()
    assert Path(out[0]).resolve() == ROOT / "pipeline" / "__init__.py"
    assert out[1] == "True"
