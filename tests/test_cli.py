"""Tests of the ``linz`` command: the JSON contract, exit codes, one-line errors."""

import json
import subprocess
import sys

import pytest

from conftest import BUNDLED, MINIMAL, REFERENCE
from linz_ros.cli import main


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_check_json_follows_the_contract(capsys):
    code, out, err = _run(capsys, "check", str(REFERENCE / "flexible_joint.yaml"), "--json", "--samples", "64")
    assert code == 0 and err == ""
    report = json.loads(out)
    for key in ("plant", "states", "inputs", "control_affine", "input_state", "input_output", "envelope"):
        assert key in report
    assert report["plant"] == "flexible_joint"
    assert report["states"] == ["q1", "w1", "q2", "w2"] and report["inputs"] == ["tau"]
    assert report["control_affine"] is True
    iss = report["input_state"]
    assert iss["linearizable"] is True and iss["reason"]
    assert [d["order"] for d in iss["distributions"]] == [0, 1, 2, 3]
    assert all({"order", "rank", "involutive"} <= set(d) for d in iss["distributions"])
    assert iss["controllability_indices"] == [4]
    assert iss["linearizing_outputs"] == ["q1"]
    io = report["input_output"]
    assert io["outputs"] == ["y"] and io["relative_degree"] == [4]
    assert io["decoupling_matrix"] == [["k/(I*J)"]]
    assert io["singular_set"] == "1" and io["singular_set_empty"] is True
    assert io["zero_dynamics_order"] == 0
    env = report["envelope"]
    assert env["samples"] == 64
    assert env["min_sigma"] == pytest.approx(40.0 / (0.3 * 0.2))
    assert set(env["worst_state"]) == {"q1", "w1", "q2", "w2"}


def test_undecided_and_negative_verdicts_are_explicit_in_json(capsys):
    code, out, _ = _run(capsys, "check", str(REFERENCE / "ball_beam.yaml"), "--json")
    report = json.loads(out)
    assert code == 0
    assert report["input_state"]["linearizable"] is False
    assert report["input_output"]["relative_degree"] is None
    assert "not defined" in report["input_output"]["reason"]
    assert report["envelope"] is None                   # no envelope in the file


def test_check_text_on_every_bundled_plant(capsys):
    for path in sorted(BUNDLED.glob("*.yaml")):
        code, out, err = _run(capsys, "check", str(path), "--samples", "32")
        assert code == 0, err
        assert out.splitlines()[3] == "VERDICT"


@pytest.mark.parametrize("argv, words", [
    (["check"], "required: PLANT"),
    (["check", "x.yaml", "--samples", "0"], "at least 1"),
    (["check", "x.yaml", "--samples", "many"], "whole number"),
    (["frobnicate"], "invalid choice"),
])
def test_bad_arguments_are_one_line_and_exit_2(capsys, argv, words):
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert words in err and err.count("\n") == 1


def test_bad_plant_file_is_one_line_and_exit_2(capsys, write_plant):
    path = write_plant(MINIMAL.replace("-k*sin(x1)", "-k*sin(x1)*q"))
    code, out, err = _run(capsys, "check", str(path))
    assert code == 2 and out == ""
    assert err == f"linz: {path}: dynamics.x2: unknown symbol 'q' (not a declared state, input, parameter or definition)\n"


def test_no_traceback_from_a_real_process(write_plant):
    path = write_plant(MINIMAL.replace("+ u", "+ u**2"))
    result = subprocess.run([sys.executable, "-m", "linz_ros", "check", str(path)],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert result.stderr.strip().endswith("not affine in the inputs: term 'u**2' is nonlinear in u")
    assert result.stderr.count("\n") == 1
