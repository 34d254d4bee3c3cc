"""Hardware bringup: the controller node alone, on the robot's topics.

    ros2 launch linz_ros hardware_bringup.launch.py artifact:=/path/pick_arm.artifact.json \
        params_file:=/path/robot.yaml state_topic:=/robot/joint_states command_topic:=/robot/effort_cmd

The topic arguments, when given, override the parameter file's ``state_topic``,
``command_topic`` and ``reference_topic``. The controller starts unconfigured
(``autostart:=false``, the default here whatever the parameter file says); bring it up
with ``ros2 lifecycle set /linz_controller configure`` and then ``activate`` once the
robot is ready and the emergency stop is within reach. Simulate first.

Every step is recorded to field logs in ``field_log_folder`` (default ``~/.ros/linz_logs``;
``field_log_folder:=''`` turns recording off); read them with ``linz logs``.
"""


from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument, OpaqueFunction
from launch.substitutions import LaunchConfiguration, PathJoinSubstitution
from launch_ros.actions import LifecycleNode
from launch_ros.substitutions import FindPackageShare

PACKAGE = "linz_ros"
TOPICS = ("state_topic", "command_topic", "reference_topic")


def _controller(context):
    overrides = {"artifact": LaunchConfiguration("artifact").perform(context),
                 "autostart": LaunchConfiguration("autostart").perform(context).lower() in ("true", "1", "yes")}
    overrides["field_log_folder"] = LaunchConfiguration("field_log_folder").perform(context)   # ~ expanded by the node
    for name in TOPICS:
        value = LaunchConfiguration(name).perform(context)
        if value:
            overrides[name] = value
    return [LifecycleNode(package=PACKAGE, executable="linz_controller", name="linz_controller", namespace="",
                          output="screen", parameters=[LaunchConfiguration("params_file").perform(context),
                                                       overrides])]


def generate_launch_description() -> LaunchDescription:
    default_params = PathJoinSubstitution([FindPackageShare(PACKAGE), "config", "pick_arm.yaml"])
    return LaunchDescription([
        DeclareLaunchArgument("artifact", description="controller artifact written by linz build"),
        DeclareLaunchArgument("params_file", default_value=default_params, description="parameter file"),
        DeclareLaunchArgument("autostart", default_value="false",
                              description="configure and activate without waiting for the lifecycle commands"),
        DeclareLaunchArgument("field_log_folder", default_value="~/.ros/linz_logs",
                              description="folder of the field logs ('' for none)"),
        *[DeclareLaunchArgument(name, default_value="", description=f"{name} (default: the parameter file's)")
          for name in TOPICS],
        OpaqueFunction(function=_controller),
    ])
