"""Plots of a closed-loop run are written as PNG images."""

from support import BUNDLED, built_artifact
from linz_ros.plotting import plot_run
from linz_ros.runtime import SimSettings, simulate


def test_plot_run_writes_three_png_images(tmp_path):
    result = simulate(built_artifact(BUNDLED / "pick_arm.yaml"), SimSettings(duration=0.3))
    paths = plot_run(result, tmp_path / "plots")
    assert [p.name for p in paths] == ["outputs.png", "inputs.png", "conditioning.png"]
    for path in paths:
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and path.stat().st_size > 10_000
