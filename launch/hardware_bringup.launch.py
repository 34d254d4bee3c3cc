"""Hardware bringup: the controller node alone, wired to the robot's topics by remapping.

    ros2 launch linz_ros hardware_bringup.launch.py artifact:=/path/pick_arm.artifact.json \
        params_file:=/path/robot.yaml state_topic:=/robot/joint_states command_topic:=/robot/effort_cmd

The controller starts unconfigured unless the parameter file sets ``autostart``; bring it
up with the lifecycle services (configure, then activate) once the robot is ready and
the emergency stop is within reach. Simulate first.
"""

from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument
from launch.substitutions import LaunchConfiguration, PathJoinSubstitution
from launch_ros.actions import LifecycleNode
from launch_ros.substitutions import FindPackageShare

PACKAGE = "linz_ros"


def generate_launch_description() -> LaunchDescription:
    artifact = LaunchConfiguration("artifact")
    params_file = LaunchConfiguration("params_file")
    default_params = PathJoinSubstitution([FindPackageShare(PACKAGE), "config", "pick_arm.yaml"])
    return LaunchDescription([
        DeclareLaunchArgument("artifact", description="controller artifact written by linz build"),
        DeclareLaunchArgument("params_file", default_value=default_params, description="parameter file"),
        DeclareLaunchArgument("state_topic", default_value="/pick_arm/joint_states",
                              description="the robot's state topic"),
        DeclareLaunchArgument("command_topic", default_value="/pick_arm/joint_efforts",
                              description="the robot's command topic"),
        DeclareLaunchArgument("reference_topic", default_value="/pick_arm/reference",
                              description="where the reference comes from"),
        LifecycleNode(package=PACKAGE, executable="linz_controller", name="linz_controller", namespace="",
                      output="screen",
                      parameters=[params_file, {"artifact": artifact, "autostart": False}],
                      remappings=[("/pick_arm/joint_states", LaunchConfiguration("state_topic")),
                                  ("/pick_arm/joint_efforts", LaunchConfiguration("command_topic")),
                                  ("/pick_arm/reference", LaunchConfiguration("reference_topic"))]),
    ])
