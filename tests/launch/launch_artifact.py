"""What both launch tests need: the installed share folder and an artifact built from it."""

import subprocess
import sys
import tempfile
from pathlib import Path


def share() -> Path:
    """``share/linz_ros`` of the colcon install the launch tests run in."""
    from ament_index_python.packages import get_package_share_directory

    return Path(get_package_share_directory("linz_ros"))


def build_artifact(plant: str = "pick_arm") -> Path:
    """Run ``linz build`` on an installed bundled plant into a fresh folder; return the artifact."""
    folder = Path(tempfile.mkdtemp(prefix="linz_launch_test_"))
    subprocess.run([sys.executable, "-m", "linz_ros", "build", str(share() / "config" / "plants" / f"{plant}.yaml"),
                    "-o", str(folder)], check=True, timeout=300)
    return folder / f"{plant}.artifact.json"
