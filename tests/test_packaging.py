"""The package as a user installs it: a wheel built from the sources, installed in a fresh
virtual environment outside the repository, validates a config and checks the sample basins
with no file of the repository but the raw records it is pointed at."""

import os
import shutil
import subprocess
import sys
import sysconfig
import venv
import zipfile
from pathlib import Path

import pytest
import yaml

from assim.caution import CAUTION

REPO = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.slow


def test_wheel_installs_and_checks_the_sample_basins_outside_the_repository(tmp_path):
    """Common practice, no published source (a wheel must carry its package data): build the
    wheel with `pip wheel --no-deps` from a copy of the sources, install it with
    `--no-deps --no-index` into a fresh venv (no system site-packages), and run `assim check`
    from a folder outside the repository. The dependencies are not installed again (offline,
    that takes minutes): a `.pth` file in the fresh venv lists this interpreter's
    site-packages, which appends its folders to sys.path without running their own `.pth`
    files, so the development install of assim stays invisible and `import assim` finds
    the wheel's copy first (checked)."""
    src = tmp_path / "src"
    src.mkdir()
    shutil.copytree(REPO / "assim", src / "assim", ignore=shutil.ignore_patterns("__pycache__"))
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(REPO / name, src / name)
    dist = tmp_path / "dist"
    pip = [sys.executable, "-m", "pip", "--disable-pip-version-check", "-q"]
    subprocess.run([*pip, "wheel", "--no-deps", "-w", str(dist), str(src)], check=True, cwd=tmp_path,
                   capture_output=True, timeout=600)
    (wheel,) = dist.glob("assim-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    assert "assim/schemas/config.schema.yaml" in names and "assim/_version.py" in names

    env_dir = tmp_path / "venv"
    venv.EnvBuilder(with_pip=True, system_site_packages=False).create(env_dir)
    py = env_dir / "bin" / "python"
    site = subprocess.run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                          check=True, capture_output=True, text=True).stdout.strip()
    deps = {sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]}
    Path(site, "assim_test_deps.pth").write_text("\n".join(sorted(deps)) + "\n")
    subprocess.run([str(py), "-m", "pip", "--disable-pip-version-check", "-q", "install", "--no-deps",
                    "--no-index", str(wheel)], check=True, capture_output=True, timeout=600)

    work = tmp_path / "elsewhere"
    work.mkdir()
    demo = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
    demo["data"].update(raw=str(REPO / "sample_basin"), prepared=str(work / "prepared"))
    demo["results"] = str(work / "results")
    (work / "my.yaml").write_text(yaml.safe_dump(demo))
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    where = subprocess.run([str(py), "-c", "import assim; print(assim.__file__)"], cwd=work, env=env,
                           check=True, capture_output=True, text=True).stdout.strip()
    assert Path(where).is_relative_to(env_dir) and not Path(where).is_relative_to(REPO), where
    r = subprocess.run([str(env_dir / "bin" / "assim"), "check", "--config", "my.yaml"], cwd=work, env=env,
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    assert "3 basin(s)" in r.stdout and "velmorra" in r.stdout and CAUTION in r.stdout
    bad = subprocess.run([str(env_dir / "bin" / "assim"), "check", "--config", "my.yaml",
                          "--set", "ensemble.members=1"], cwd=work, env=env, capture_output=True, text=True)
    assert bad.returncode == 2 and "ensemble.members" in bad.stderr  # the schema came with the wheel
