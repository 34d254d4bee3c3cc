"""linz_ros: feedback linearization from plant file to ROS 2 node.

Layers (imports point downward only):

- offline tower (sympy): ``model`` -> ``geometry`` -> ``analysis``
- the seam (numpy only): ``artifact``
- on top: ``cli``, the ``linz`` command
"""

__version__ = "0.1.0"
