"""The process launcher: commands, environments, values on the command line, logs, cleanup."""

import sys

import pytest

from linz_ros.bringup import Bringup, _ros_value, executable, isolated_environment, node_parameters
from linz_ros.errors import ConfigError
from support import ROOT


def test_values_are_written_so_that_rclpy_reads_them_back_as_given():
    assert _ros_value(True) == "true" and _ros_value(3) == "3" and _ros_value(0.1) == "0.1"
    assert _ros_value("") == "''" and _ros_value("true") == "'true'" and _ros_value("1.5") == "'1.5'"
    assert _ros_value("it's") == "'it''s'"
    assert _ros_value(["a", "b"]) == "['a', 'b']" and _ros_value([1.0, 2.5]) == "[1.0, 2.5]"


def test_isolated_environment_has_its_own_domain_and_stays_on_localhost():
    env = isolated_environment(domain_id=42, base={"PATH": "/bin"})
    assert env["ROS_DOMAIN_ID"] == "42" and env["ROS_AUTOMATIC_DISCOVERY_RANGE"] == "LOCALHOST"
    assert 1 <= int(isolated_environment(base={})["ROS_DOMAIN_ID"]) <= 101
    with pytest.raises(ConfigError, match="expected 0..101"):
        isolated_environment(domain_id=300)


def test_executables_resolve_to_the_console_scripts_beside_python():
    for name in ("linz_controller", "linz_plant_sim", "linz_reference"):
        command = executable(name)
        assert command[0].endswith(name) or command[:2] == [sys.executable, "-m"]
    with pytest.raises(ConfigError, match="unknown executable"):
        executable("ros2")


def test_node_parameters_merge_the_wildcard_and_the_node_section(tmp_path):
    path = tmp_path / "p.yaml"
    path.write_text("/**:\n  ros__parameters: {a: 1, b: 2}\n/n:\n  ros__parameters: {b: 3}\n")
    assert node_parameters(path, "n") == {"a": 1, "b": 3}
    assert node_parameters(ROOT / "config" / "pick_arm.yaml", "linz_controller")["state_type"] == \
        "sensor_msgs/msg/JointState"
    with pytest.raises(ConfigError, match="cannot read"):
        node_parameters(tmp_path / "missing.yaml", "n")


def test_a_second_run_reads_only_its_own_part_of_the_log(tmp_path, monkeypatch):
    import linz_ros.bringup as bringup_module
    monkeypatch.setattr(bringup_module, "executable", lambda name: [sys.executable, "-c",
                                                                   "import sys; print(sys.argv[1:])"])
    bringup = Bringup(tmp_path, isolated_environment(domain_id=5, base={}))
    first = bringup.start("linz_controller", parameters={"artifact": "one"})
    first.process.wait(timeout=30)
    assert "artifact:='one'" in first.log_text()
    second = bringup.start("linz_controller", parameters={"artifact": "two"})
    second.process.wait(timeout=30)
    assert "artifact:='two'" in second.log_text() and "'one'" not in second.log_text()
    assert bringup.wait_for_log("linz_controller", "'two'", timeout=1)
    assert not bringup.wait_for_log("linz_controller", "never printed", timeout=0.2)


def test_stop_escalates_and_kills_a_process_that_ignores_sigint(tmp_path, monkeypatch):
    import linz_ros.bringup as bringup_module
    stubborn = ("import signal, time; signal.signal(signal.SIGINT, signal.SIG_IGN); "
                "signal.signal(signal.SIGTERM, signal.SIG_IGN); print('up', flush=True); time.sleep(60)")
    monkeypatch.setattr(bringup_module, "executable", lambda name: [sys.executable, "-c", stubborn])
    bringup = Bringup(tmp_path, isolated_environment(domain_id=5, base={}))
    node = bringup.start("linz_plant_sim")
    assert bringup.wait_for_log("linz_plant_sim", "up", timeout=30)
    # killed by SIGKILL (-9), not waited out: the process ignores SIGINT and SIGTERM and, left alone,
    # would end its 60 s sleep with code 0; how quickly stop() escalates is not judged by the clock
    assert bringup.stop("linz_plant_sim", timeout=0.5) == -9
    assert not node.alive()
