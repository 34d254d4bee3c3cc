"""The package as ROS 2 and pip see it: package.xml, setup.py, README commands, CI."""

import ast
import re
import subprocess
import xml.etree.ElementTree as ET

from support import ROOT


def _setup_call():
    tree = ast.parse((ROOT / "setup.py").read_text())
    calls = [n for n in ast.walk(tree) if isinstance(n, ast.Call) and getattr(n.func, "id", "") == "setup"]
    assert len(calls) == 1
    return {k.arg: k.value for k in calls[0].keywords}


def test_package_xml_is_format_3_ament_python():
    root = ET.parse(ROOT / "package.xml").getroot()
    assert root.get("format") == "3"
    assert root.findtext("name") == "linz_ros"
    assert root.find("export/build_type").text == "ament_python"
    exec_deps = {e.text for e in root.findall("exec_depend")}
    assert {"rclpy", "python3-numpy", "python3-scipy", "python3-sympy", "python3-yaml"} <= exec_deps
    assert "python3-pytest" in {e.text for e in root.findall("test_depend")}


def test_setup_installs_ros_files_and_never_pins_rclpy():
    keywords = _setup_call()
    requires = ast.literal_eval(keywords["install_requires"])
    assert not any(r.lower().startswith(("rclpy", "ros-")) for r in requires)
    extras = ast.literal_eval(keywords["extras_require"])
    assert "ros-kilted-rclpy" in extras["ros"] and "ros-kilted-rmw-fastrtps-cpp" in extras["ros"]
    source = (ROOT / "setup.py").read_text()
    for target in ('"share/ament_index/resource_index/packages"', '"/launch"', '"/config"'):
        assert target in source
    assert (ROOT / "resource" / "linz_ros").exists()
    assert "script_dir=$base/lib/linz_ros" in (ROOT / "setup.cfg").read_text()


def _block(marker):
    text = (ROOT / "README.md").read_text()
    match = re.search(rf"<!-- {marker} -->\n```\n(.+?)\n```\n<!-- /{marker} -->", text, re.S)
    assert match, f"README has no {marker} block"
    return match.group(1)


def test_readme_has_the_two_commands_and_ci_runs_the_test_one():
    main_command, test_command = _block("main-command"), _block("test-command")
    assert "\n" not in main_command and "\n" not in test_command
    assert main_command.endswith("-m linz_ros demo")
    assert "pytest" in test_command
    extracted = subprocess.run(
        ["bash", "-c", "awk '/<!-- test-command -->/{grab=1; next} /<!-- \\/test-command -->/{grab=0} "
                       "grab && !/^```/' README.md"],
        cwd=ROOT, capture_output=True, text=True, check=True).stdout.strip()
    assert extracted == test_command
    assert "awk '/<!-- test-command -->/" in (ROOT / ".ci" / "run").read_text()


def test_readme_carries_the_safety_cautions():
    text = (ROOT / "README.md").read_text().lower()
    for words in ("simulation first", "emergency stop", "risk assessment", "local codes"):
        assert words in text
