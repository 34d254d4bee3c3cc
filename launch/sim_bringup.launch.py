"""Simulation bringup: plant simulator, reference publisher and controller for one plant.

    linz build config/plants/pick_arm.yaml -o linz_out
    ros2 launch linz_ros sim_bringup.launch.py plant:=pick_arm artifact:=$PWD/linz_out/pick_arm.artifact.json

Arguments: ``plant`` (a bundled example: pick_arm, mast_camera, survey_boat), ``artifact``
(the file written by ``linz build``), ``params_file`` (default: the package's
``config/<plant>.yaml``), ``publish_clock`` (the simulator then owns time and the other
nodes follow ``/clock``), ``lockstep`` (with ``publish_clock``: the simulator waits for each
command before it advances) and ``with_reference``.
"""

from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument
from launch.conditions import IfCondition
from launch.substitutions import LaunchConfiguration, PathJoinSubstitution, PythonExpression
from launch_ros.actions import Node
from launch_ros.substitutions import FindPackageShare

PACKAGE = "linz_ros"


def generate_launch_description() -> LaunchDescription:
    plant = LaunchConfiguration("plant")
    artifact = LaunchConfiguration("artifact")
    params_file = LaunchConfiguration("params_file")
    publish_clock = LaunchConfiguration("publish_clock")
    # true, True, 1 ... all mean simulated time, for the simulator and for the others alike
    sim_time = PythonExpression(["'", publish_clock, "'.lower() in ('true', '1', 'yes')"])
    lockstep = PythonExpression(["'", LaunchConfiguration("lockstep"), "'.lower() in ('true', '1', 'yes')"])
    # <share>/config/<plant>.yaml, written so that older launch releases join it too
    default_params = [PathJoinSubstitution([FindPackageShare(PACKAGE), "config", plant]), ".yaml"]
    return LaunchDescription([
        DeclareLaunchArgument("plant", default_value="pick_arm", description="bundled example plant"),
        DeclareLaunchArgument("artifact", description="controller artifact written by linz build"),
        DeclareLaunchArgument("params_file", default_value=default_params, description="parameter file"),
        DeclareLaunchArgument("publish_clock", default_value="false",
                              description="simulator publishes /clock; nodes use simulated time"),
        DeclareLaunchArgument("lockstep", default_value="false",
                              description="with publish_clock: the simulator waits for each command"),
        DeclareLaunchArgument("with_reference", default_value="true", description="start the reference node"),
        Node(package=PACKAGE, executable="linz_plant_sim", name="linz_plant_sim", output="screen",
             parameters=[params_file, {"artifact": artifact, "publish_clock": sim_time,
                                         "lockstep": lockstep}]),
        Node(package=PACKAGE, executable="linz_reference", name="linz_reference", output="screen",
             condition=IfCondition(LaunchConfiguration("with_reference")),
             parameters=[params_file, {"artifact": artifact, "use_sim_time": sim_time}]),
        Node(package=PACKAGE, executable="linz_controller", name="linz_controller", output="screen",
             parameters=[params_file, {"artifact": artifact, "use_sim_time": sim_time}]),
    ])
