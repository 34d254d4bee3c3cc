"""The elastic-joint section of a mechanical plant: a motor behind every joint, coupled by a spring.

The reduced model of an arm with elastic joints (Spong, "Modeling and control of elastic
joint robots", ASME J. Dyn. Sys. Meas. Control 109, 1987): the link side keeps the
mechanical convention of :class:`~linz_ros.model._plant.Mechanics` with the spring torque
as its input, the motor side is one rotor per joint,

    M(q) q'' = F(q, q') + K (theta - q),
    J theta'' = u - K (theta - q) - D theta',

K, J and D diagonal (stiffness, motor inertia, motor damping), K and J positive. The
states are (q, q', theta, theta'), the inputs the motor torques u, one per joint.

The plant file's section::

    elastic_joints:
      motor_angles: [th1, th2]        # optional: <coordinate>_motor
      motor_rates: [thd1, thd2]       # optional: <motor angle>_dot
      stiffness: [k1, k2]             # one expression in the parameters per joint
      motor_inertia: [J1, J2]
      motor_damping: [0.1, 0.1]       # optional: zero
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import sympy as sp

__all__ = ["Elastic", "ELASTIC_KEY", "motor_names", "read_elastic"]

#: The plant-file key of the elastic-joint section.
ELASTIC_KEY = "elastic_joints"
_KEYS = ("motor_angles", "motor_rates", "stiffness", "motor_inertia", "motor_damping")


@dataclass(frozen=True)
class Elastic:
    """The motor side of an elastic-joint arm.

    Attributes
    ----------
    motor_angles, motor_rates : tuple of sympy.Symbol
        theta and theta', one per joint.
    stiffness, motor_inertia, motor_damping : tuple of sympy.Expr
        The diagonals of K, J and D, in the parameters.
    """

    motor_angles: tuple[sp.Symbol, ...]
    motor_rates: tuple[sp.Symbol, ...]
    stiffness: tuple[sp.Expr, ...]
    motor_inertia: tuple[sp.Expr, ...]
    motor_damping: tuple[sp.Expr, ...]

    def spring(self, coordinates: tuple[sp.Symbol, ...]) -> sp.Matrix:
        """K (theta - q): the spring torque on the links."""
        return sp.Matrix([k * (th - q) for k, th, q in zip(self.stiffness, self.motor_angles, coordinates)])


def _section(reader: Any, doc: Mapping) -> dict:
    return reader.section(doc, ELASTIC_KEY, _KEYS, "stiffness and motor_inertia (and optionally motor_angles, "
                                                   "motor_rates, motor_damping)")


def _names(reader: Any, section: Mapping, key: str, defaults: list[str]) -> list[str]:
    field = f"{ELASTIC_KEY}.{key}"
    given = section.get(key)
    if given is None:
        return [reader.declare(f"{field} (default name)", name, "state") for name in defaults]
    if not isinstance(given, list) or len(given) != len(defaults):
        raise reader.fail(field, f"expected a list of {len(defaults)} names (one per joint)")
    return [reader.declare(f"{field}[{i}]", name, "state") for i, name in enumerate(given)]


def motor_names(reader: Any, doc: Mapping, coordinates: list[str]) -> list[str]:
    """Declare the motor angles and rates (in that order) as states.

    Parameters
    ----------
    reader : the plant-file reader
    doc : mapping
        The plant document, with the elastic-joint section.
    coordinates : list of str
        The link coordinates, one per joint.

    Returns
    -------
    list of str
        The motor angles, then the motor rates.
    """
    section = _section(reader, doc)
    angles = _names(reader, section, "motor_angles", [f"{q}_motor" for q in coordinates])
    rates = _names(reader, section, "motor_rates", [f"{th}_dot" for th in angles])
    return angles + rates


def _diagonal(reader: Any, section: Mapping, key: str, nq: int, allowed: set[str], refused: set[sp.Symbol],
              least: str) -> tuple[sp.Expr, ...]:
    """One constant expression per joint, positive (``least`` "positive") or not negative at the nominal values."""
    field = f"{ELASTIC_KEY}.{key}"
    given = section.get(key)
    if given is None:
        if least == "positive":
            raise reader.fail(field, f"missing (required: one value per joint, {nq})")
        return (sp.Integer(0),) * nq
    if not isinstance(given, list) or len(given) != nq:
        raise reader.fail(field, f"expected a list of {nq} expressions (one per joint)")
    values = {p: sp.Rational(repr(float(v))) for p, v in getattr(reader, "values", {}).items()}
    out = []
    for i, text in enumerate(given):
        where = f"{field}[{i}]"
        expr = reader.expression(where, text, allowed)
        bad = sorted(expr.free_symbols & refused, key=str)
        if bad:
            raise reader.fail(where, f"depends on {bad[0]}; the {key.replace('_', ' ')} is a constant (parameters)")
        nominal = expr.xreplace(values)
        if nominal.is_number:
            value = complex(nominal.evalf())
            if value.imag != 0.0:
                raise reader.fail(where, f"must be {least}, got a complex value ({text})")
            if not (value.real > 0 if least == "positive" else value.real >= 0):
                raise reader.fail(where, f"must be {least}, got {value.real:g}")
        out.append(expr)
    return tuple(out)


def read_elastic(reader: Any, doc: Mapping, coordinates: list[sp.Symbol], motor: list[sp.Symbol],
                 inputs: list[sp.Symbol], refused: set[sp.Symbol]) -> Elastic:
    """Read the elastic-joint section (the motor names are already declared by :func:`motor_names`).

    Parameters
    ----------
    reader : the plant-file reader
    doc : mapping
    coordinates : list of sympy.Symbol
        The link coordinates q.
    motor : list of sympy.Symbol
        The motor angles then the motor rates.
    inputs : list of sympy.Symbol
        The motor torques, one per joint.
    refused : set of sympy.Symbol
        Symbols the constants may not contain (states and inputs).

    Returns
    -------
    Elastic
    """
    nq = len(coordinates)
    if len(inputs) != nq:
        raise reader.fail("inputs", f"an elastic-joint arm takes one motor torque per joint ({nq}), got {len(inputs)}")
    for key in ("input_map", "kinematics", "outputs"):
        if doc.get(key) is not None:
            what = {"input_map": "the motor torques drive the motors one by one",
                    "kinematics": "the velocities are the joint rates",
                    "outputs": "the outputs are the link angles (leave outputs out)"}[key]
            raise reader.fail(key, f"not taken with {ELASTIC_KEY}: {what}")
    section = _section(reader, doc)
    allowed = set(reader.names)
    K = _diagonal(reader, section, "stiffness", nq, allowed, refused, "positive")
    J = _diagonal(reader, section, "motor_inertia", nq, allowed, refused, "positive")
    D = _diagonal(reader, section, "motor_damping", nq, allowed, refused, "not negative")
    return Elastic(tuple(motor[:nq]), tuple(motor[nq:]), K, J, D)
