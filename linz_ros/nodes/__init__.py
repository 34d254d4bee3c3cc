"""ROS 2 nodes: thin rclpy adapters around the runtime core (rclpy appears nowhere else).

Executables (console scripts; each accepts ``--ros-args --params-file FILE -r a:=b``)
------------------------------------------------------------------------------------
linz_controller   the managed controller node (:mod:`linz_ros.nodes.controller`)
linz_plant_sim    the plant simulator node (:mod:`linz_ros.nodes.simulator`)
linz_reference    a reference publisher (:mod:`linz_ros.nodes.reference`)

Modules
-------
adapters     messages to and from state and input vectors (field paths)
recorder     an in-process subscriber that records a bringup for the demo and the tests
"""
