"""Build script of the linz_ros ROS 2 package (ament_python; also pip-installable)."""

from glob import glob

from setuptools import find_packages, setup

package_name = "linz_ros"

setup(
    name=package_name,
    version="0.1.0",
    packages=find_packages(exclude=["tests", "tests.*", "benchmarks"]),
    # the native step's fixed C sources, compiled with each artifact's emitted law at load
    package_data={"linz_ros.runtime.native": ["*.c", "*.h"]},
    data_files=[
        ("share/ament_index/resource_index/packages", ["resource/" + package_name]),
        ("share/" + package_name, ["package.xml"]),
        ("share/" + package_name + "/launch", glob("launch/*.py")),
        ("share/" + package_name + "/config", glob("config/*.yaml")),
        ("share/" + package_name + "/config/plants", glob("config/plants/*.yaml")),
        ("share/" + package_name + "/config/urdf", glob("config/urdf/*.urdf")),
        ("share/" + package_name + "/config/campaigns", glob("config/campaigns/*.yaml")),
    ],
    python_requires=">=3.10",
    # rclpy and the message packages come from the ROS 2 distribution; never pin them here.
    install_requires=["numpy>=1.24", "scipy>=1.10", "sympy>=1.12", "mpmath>=1.3", "PyYAML>=6.0",
                      "matplotlib>=3.6", "mcap>=1.1", "mcap-ros2-support>=0.5", "setuptools"],
    extras_require={
        # for pip-only machines (CI): the ROS 2 Kilted client library wheels from PyPI
        "ros": [
            "ros-kilted-rclpy", "ros-kilted-rmw-fastrtps-cpp", "ros-kilted-std-msgs",
            "ros-kilted-sensor-msgs", "ros-kilted-geometry-msgs", "ros-kilted-nav-msgs",
            "ros-kilted-diagnostic-msgs", "ros-kilted-lifecycle-msgs", "ros-kilted-rosgraph-msgs",
            "ros-kilted-trajectory-msgs",
        ],
        "test": ["pytest>=7", "hypothesis>=6", "control>=0.10", "colcon-common-extensions", "pin>=2.7",
                 "cryptography>=41", "symengine>=0.11", "cffi>=1.15", "mujoco>=3.2,<4", "distributed>=2024.1"],
        # the native control step and plant (compiled C at load, called through cffi; the Python core
        # is used, with a one-line note, where it is missing)
        "native": ["cffi>=1.15"],
        # the independent check of a chain-form law at build time: symengine forms the long Lie-derivative
        # chains about 400x faster than sympy (which stays the fallback)
        "fast": ["symengine>=0.11"],
        # signed artifacts: linz keygen, linz build --sign-key, trusted keys on the robot
        "sign": ["cryptography>=41"],
        # MuJoCo as the plant of a URDF arm (linz sim --physics mujoco, the simulator's physics parameter);
        # 4.x on PyPI is a stub without the engine, and MjSpec (the URDF compiled with its fixed links kept)
        # needs 3.2
        "physics": ["mujoco>=3.2,<4"],
        # linz campaign / linz logs on a Dask cluster (--scheduler, LINZ_DASK_SCHEDULER); local worker
        # processes need nothing extra
        "cluster": ["distributed>=2024.1"],
    },
    zip_safe=True,
    maintainer="linz_ros developers",
    maintainer_email="linz-ros@example.org",
    description="Feedback linearization from plant file to ROS 2 node: analysis, synthesis, runtime.",
    license="Apache-2.0",
    entry_points={
        "console_scripts": [
            "linz = linz_ros.cli:main",
            "linz_controller = linz_ros.nodes.controller:main",
            "linz_plant_sim = linz_ros.nodes.simulator:main",
            "linz_reference = linz_ros.nodes.reference:main",
        ],
    },
)
