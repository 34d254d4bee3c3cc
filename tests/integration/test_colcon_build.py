"""colcon builds the package as a ROS 2 ament_python package and installs what the bringups need."""

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from dds_harness import ROOT

COLCON = shutil.which("colcon", path=str(Path(sys.executable).parent)) or shutil.which("colcon")
PACKAGE_FILES = ["setup.py", "setup.cfg", "package.xml", "README.md", "resource", "linz_ros", "launch", "config"]


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    if COLCON is None:
        pytest.skip("colcon is not installed (pip install '.[test]' brings colcon-common-extensions)")
    ws = tmp_path_factory.mktemp("colcon_ws")
    target = ws / "src" / "linz_ros"
    target.mkdir(parents=True)
    ignore = shutil.ignore_patterns("__pycache__", "*.egg-info", "*.pyc")
    for name in PACKAGE_FILES:
        source = ROOT / name
        if source.is_dir():
            shutil.copytree(source, target / name, ignore=ignore)
        else:
            shutil.copy(source, target / name)
    env = dict(__import__("os").environ, PATH=f"{Path(sys.executable).parent}:{__import__('os').environ['PATH']}")
    result = subprocess.run([COLCON, "build", "--base-paths", "src"], cwd=ws, env=env, capture_output=True,
                            text=True, timeout=600)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    return ws / "install" / "linz_ros"


def test_colcon_installs_launch_config_and_plant_files_into_share(workspace):
    share = workspace / "share" / "linz_ros"
    assert (share / "package.xml").is_file()
    assert (workspace / "share" / "ament_index" / "resource_index" / "packages" / "linz_ros").is_file()
    for launch in ("sim_bringup.launch.py", "hardware_bringup.launch.py"):
        assert (share / "launch" / launch).is_file()
    for plant in ("pick_arm", "mast_camera", "survey_boat"):
        assert (share / "config" / f"{plant}.yaml").is_file()
        assert (share / "config" / "plants" / f"{plant}.yaml").is_file()


def test_colcon_installs_the_executables_into_lib_and_they_run(workspace, tmp_path):
    lib = workspace / "lib" / "linz_ros"
    for name in ("linz", "linz_controller", "linz_plant_sim", "linz_reference"):
        assert (lib / name).is_file(), name
    site = next((workspace / "lib").glob("python3*/site-packages"))
    env = dict(__import__("os").environ, PYTHONPATH=str(site), AMENT_PREFIX_PATH=str(workspace))
    # the installed command line finds the installed plant files
    result = subprocess.run([str(lib / "linz"), "check", str(workspace / "share/linz_ros/config/plants/pick_arm.yaml")],
                            capture_output=True, text=True, timeout=300, env=env, cwd=tmp_path)
    assert result.returncode == 0 and "VERDICT" in result.stdout, result.stderr
    # a node refuses a bad parameter with one line and exit code 2, not a traceback
    result = subprocess.run([str(lib / "linz_plant_sim"), "--ros-args", "-p", "artifact:=missing.json"],
                            capture_output=True, text=True, timeout=120, env=env, cwd=tmp_path)
    assert result.returncode == 2 and "Traceback" not in result.stderr
    assert "missing.json: no such file" in result.stderr
