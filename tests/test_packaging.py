"""The built wheel installs everything under the sigmad namespace, so it coexists with
distributions that own top-level `daemon` or `estimators` packages (python-daemon)."""

from __future__ import annotations

import shutil
import subprocess
import sys
import venv
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    # build from a copy of the committed tree, so no build/ folder lands in the checkout
    tree = tmp_path_factory.mktemp("tree")
    files = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True,
                           check=True).stdout.decode().split("\0")
    for name in filter(None, files):
        if (ROOT / name).is_file():
            (tree / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(ROOT / name, tree / name)
    subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps",
                    "-w", str(out), str(tree)], check=True, timeout=300)
    (built,) = out.glob("sigmad-*.whl")
    return built


@pytest.mark.slow
def test_wheel_holds_only_the_sigmad_namespace(wheel: Path) -> None:
    names = zipfile.ZipFile(wheel).namelist()
    tops = {n.split("/")[0] for n in names if not n.split("/")[0].endswith(".dist-info")}
    assert tops == {"sigmad"}
    assert "sigmad/daemon/config/default.toml" in names        # the embedded default ships
    assert "sigmad/estimators/moments.py" in names


@pytest.mark.slow
def test_wheel_runs_beside_python_daemon_installed_after_it(wheel: Path, tmp_path: Path) -> None:
    env_dir = tmp_path / "venv"
    venv.EnvBuilder(with_pip=True).create(env_dir)
    py = env_dir / "bin" / "python"
    pip = [str(py), "-m", "pip", "install", "-q", "--disable-pip-version-check"]
    subprocess.run([*pip, str(wheel)], check=True, timeout=600)
    subprocess.run([*pip, "python-daemon"], check=True, timeout=600)   # owns top-level `daemon`
    both = subprocess.run([str(py), "-c", "import daemon, sigmad.daemon, sigmad.estimators; "
                           "print(daemon.__file__); print(sigmad.estimators.Moments.__name__)"],
                          capture_output=True, text=True, timeout=60, cwd=tmp_path)
    assert both.returncode == 0, both.stderr
    assert "site-packages/daemon/" in both.stdout and "Moments" in both.stdout
    sigmad = env_dir / "bin" / "sigmad"
    version = subprocess.run([str(sigmad), "--version"], capture_output=True, text=True,
                             timeout=60, cwd=tmp_path)
    assert version.returncode == 0 and "0.1.0" in version.stdout + version.stderr, version.stderr
    check = subprocess.run([str(sigmad), "validate", str(ROOT / "configs" / "latency.toml")],
                           capture_output=True, text=True, timeout=60, cwd=tmp_path)
    assert check.returncode == 0, check.stderr
