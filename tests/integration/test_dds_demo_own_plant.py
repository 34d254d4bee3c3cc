"""A user's own plant file reaches the DDS bringup through the README's commands alone:
`linz wire PLANT` writes its bringup parameter file beside it, `linz demo PLANT` finds it there."""

import json
import subprocess
import sys

PLANT = """plant: tank_pair
description: two tanks in a row, each with its own inflow
states: [h1, h2]
inputs: [q1, q2]
parameters: {a: 0.5}
dynamics:
  h1: -a*h1 + q1
  h2: a*h1 - a*h2 + q2
outputs: {y1: h1, y2: h2}
input_limits: {q1: [-5, 5], q2: [-5, 5]}
envelope: {h1: [-2, 2], h2: [-2, 2]}
design:
  rate: 100
  poles: {y1: [-3], y2: [-4]}
  reference: "smooth:y1=0.2,y2=-0.1,duration=0.5,at=0.1"
"""


def _linz(*args, cwd):
    return subprocess.run([sys.executable, "-m", "linz_ros", *args], capture_output=True, text=True, timeout=600,
                          cwd=cwd)


def test_a_plant_file_of_the_users_own_runs_over_dds_with_the_bringup_written_beside_it(tmp_path):
    (tmp_path / "tanks.yaml").write_text(PLANT)
    wired = _linz("wire", "tanks.yaml", cwd=tmp_path)
    assert wired.returncode == 0, wired.stderr
    assert (tmp_path / "tanks.bringup.yaml").is_file() and "wrote tanks.bringup.yaml" in wired.stdout
    demo = _linz("demo", "tanks.yaml", "-o", "out", "--seconds", "1", cwd=tmp_path)
    assert demo.returncode == 0, demo.stdout[-3000:] + demo.stderr[-3000:]
    assert "bringup parameter file: tanks.bringup.yaml (beside the plant file)" in demo.stdout
    assert "no bringup parameter file" not in demo.stdout and "== 5. simulation bringup over DDS" in demo.stdout
    summary = json.loads((tmp_path / "out" / "bringup" / "summary.json").read_text())
    assert summary["verdict"] == "tracked", summary["verdict"]
    assert summary["time_in_mode"]["nominal"] > 0.9
    # the design reference tracked, judged on the controller's own field log
    assert max(o["max_error"] for o in summary["outputs"].values()) < 0.01
