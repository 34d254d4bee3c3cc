"""Plant description: the plant-file format, its validation, and the control-affine split.

Public names
------------
Plant            the validated plant: f(x), G(x), h(x), parameters, limits, envelope
load_plant       read a plant file (YAML) into a Plant
plant_from_text  the same from text
expression_in    read an expression over a plant's states and parameters
"""

from linz_ros.model._loader import expression_in, load_plant, plant_from_text
from linz_ros.model._plant import Plant

__all__ = ["Plant", "load_plant", "plant_from_text", "expression_in"]
