"""Hardware bringup: the controller node alone, remapped onto the robot's topics.

    ros2 launch linz_ros hardware_bringup.launch.py artifact:=/path/pick_arm.artifact.json \
        params_file:=/path/robot.yaml state_topic:=/robot/joint_states command_topic:=/robot/effort_cmd

``state_topic``, ``command_topic`` and ``reference_topic``, when given, remap the topics
the parameter file names for the controller (``-r FROM:=TO``); ``remaps:='FROM:=TO ...'``
adds any other remapping (``/diagnostics``, the conditioning topic). The controller starts
unconfigured (``autostart:=false``, the default here whatever the parameter file says);
bring it up with ``ros2 lifecycle set /linz_controller configure`` and then ``activate``
once the robot is ready and the emergency stop is within reach. Simulate first.

Every step is recorded to field logs in ``field_log_folder`` (default ``~/.ros/linz_logs``;
``field_log_folder:=''`` turns recording off); read them with ``linz logs``.
"""

import yaml
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument, OpaqueFunction
from launch.substitutions import LaunchConfiguration, PathJoinSubstitution
from launch_ros.actions import LifecycleNode
from launch_ros.substitutions import FindPackageShare

PACKAGE = "linz_ros"
TOPICS = ("state_topic", "command_topic", "reference_topic")


def _declared_topics(params_file: str) -> dict[str, str]:
    """The controller's topic parameters as the parameter file sets them."""
    with open(params_file, encoding="utf-8") as stream:
        document = yaml.safe_load(stream) or {}
    section = document.get("/linz_controller", document.get("linz_controller", {})) or {}
    parameters = section.get("ros__parameters", {}) or {}
    return {name: str(parameters[name]) for name in TOPICS if name in parameters}


def _remappings(context, declared: dict[str, str]) -> list[tuple[str, str]]:
    """Remap rules: each given topic argument from the file's topic, then the ``remaps`` argument."""
    rules = []
    for name in TOPICS:
        target = LaunchConfiguration(name).perform(context)
        if target:
            if name not in declared:
                raise RuntimeError(f"{name}:={target} given, but the parameter file sets no {name} to remap")
            rules.append((declared[name], target))
    for rule in LaunchConfiguration("remaps").perform(context).split():
        source, sep, target = rule.partition(":=")
        if not (sep and source and target):
            raise RuntimeError(f"remaps: expected FROM:=TO, got {rule!r}")
        rules.append((source, target))
    return rules


def _controller(context):
    params_file = LaunchConfiguration("params_file").perform(context)
    overrides = {"artifact": LaunchConfiguration("artifact").perform(context),
                 "autostart": LaunchConfiguration("autostart").perform(context).lower() in ("true", "1", "yes")}
    overrides["field_log_folder"] = LaunchConfiguration("field_log_folder").perform(context)   # ~ expanded by the node
    return [LifecycleNode(package=PACKAGE, executable="linz_controller", name="linz_controller", namespace="",
                          output="screen", parameters=[params_file, overrides],
                          remappings=_remappings(context, _declared_topics(params_file)))]


def generate_launch_description() -> LaunchDescription:
    default_params = PathJoinSubstitution([FindPackageShare(PACKAGE), "config", "pick_arm.yaml"])
    return LaunchDescription([
        DeclareLaunchArgument("artifact", description="controller artifact written by linz build"),
        DeclareLaunchArgument("params_file", default_value=default_params, description="parameter file"),
        DeclareLaunchArgument("autostart", default_value="false",
                              description="configure and activate without waiting for the lifecycle commands"),
        DeclareLaunchArgument("field_log_folder", default_value="~/.ros/linz_logs",
                              description="folder of the field logs ('' for none)"),
        *[DeclareLaunchArgument(name, default_value="", description=f"remap the parameter file's {name} to this")
          for name in TOPICS],
        DeclareLaunchArgument("remaps", default_value="", description="more remappings, 'FROM:=TO FROM:=TO'"),
        OpaqueFunction(function=_controller),
    ])
