"""Plant description: the plant-file format, its validation, and the control-affine split.

Public names
------------
Plant            the validated plant: f(x), G(x), h(x), parameters, limits, envelope
Mechanics        a mechanical plant's structure M(q) q'' = F(q, q') + B(q) u
load_plant       read a plant file (YAML) into a Plant
plant_from_text  the same from text
expression_in    read an expression over a plant's states and parameters
read_yaml_file   a YAML file under the plant file's rules (for sections other verbs read)
numeric_function lambdify that stays fast on big expression trees
"""

from linz_ros.model._loader import expression_in, load_plant, plant_from_text, read_yaml_file
from linz_ros.model._plant import Mechanics, Plant
from linz_ros.model._symbolic import numeric_function

__all__ = ["Plant", "Mechanics", "load_plant", "plant_from_text", "expression_in", "numeric_function", "read_yaml_file"]
