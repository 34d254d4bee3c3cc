"""An independent rigid-body reference for serial arms: the same DH table in Pinocchio.

Pinocchio (Carpentier et al., "The Pinocchio C++ library", IEEE/SICE SII 2019; the ``pin``
package on PyPI) computes inverse dynamics by its own recursive Newton-Euler algorithm
on spatial vectors. It shares nothing with :mod:`linz_ros.model._serial_arm` but the
DH table, so agreement of ``M q'' - F`` with ``rnea(q, q', q'') + damping q'`` checks the
mass matrix, the Coriolis and gravity terms and the friction of a serial-arm plant.

The DH frame of link i is ``Rot_z(q_i) X_i`` (revolute) or ``Trans_z(q_i) X_i``
(prismatic) after frame i-1, with the fixed part
``X_i = Rot_z(theta_i) Trans_z(d_i) Trans_x(a_i) Rot_x(alpha_i)``; in Pinocchio, joint i
moves about z of its own frame, placed at ``X_(i-1)`` in its parent's, and carries link
i's inertia expressed through ``X_i``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import sympy as sp

from linz_ros.errors import ConfigError
from linz_ros.model import Plant

__all__ = ["RigidBodyReference", "pinocchio_reference", "pinocchio_available"]


def pinocchio_available() -> bool:
    """True when the ``pin`` package imports."""
    try:
        import pinocchio  # noqa: F401
    except ImportError:
        return False
    return True


@dataclass
class RigidBodyReference:
    """A Pinocchio model of a serial-arm plant at given parameter values."""

    model: Any
    data: Any
    damping: np.ndarray

    def inverse_dynamics(self, q: Sequence[float], qd: Sequence[float], qdd: Sequence[float]) -> np.ndarray:
        """Joint forces for the motion (q, q', q''): Pinocchio's RNEA plus viscous friction."""
        import pinocchio as pin

        qd = np.asarray(qd, dtype=float)
        tau = pin.rnea(self.model, self.data, np.asarray(q, dtype=float), qd, np.asarray(qdd, dtype=float))
        return np.asarray(tau) + self.damping * qd

    def mass_matrix(self, q: Sequence[float]) -> np.ndarray:
        """M(q) by Pinocchio's composite rigid body algorithm (both triangles filled)."""
        import pinocchio as pin

        upper = np.array(pin.crba(self.model, self.data, np.asarray(q, dtype=float)))
        return np.triu(upper) + np.triu(upper, 1).T


def _number(expr: sp.Expr, values: dict) -> float:
    return float(sp.sympify(expr).xreplace(values).evalf())


def _fixed_transform(link, values: dict):
    """X_i = Rot_z(theta) Trans_z(d) Trans_x(a) Rot_x(alpha) as a Pinocchio SE3 (joint offset excluded)."""
    import pinocchio as pin

    theta, d = _number(link.theta, values), _number(link.d, values)
    a, alpha = _number(link.a, values), _number(link.alpha, values)
    ct, st, ca, sa = np.cos(theta), np.sin(theta), np.cos(alpha), np.sin(alpha)
    rotation = np.array([[ct, -st * ca, st * sa], [st, ct * ca, -ct * sa], [0.0, sa, ca]])
    return pin.SE3(rotation, np.array([a * ct, a * st, d]))


def pinocchio_reference(plant: Plant, parameters: Sequence[float] | None = None) -> RigidBodyReference:
    """Build the Pinocchio model of a serial-arm plant.

    Parameters
    ----------
    plant : Plant
        In serial-arm form (``plant.mechanics.links`` set).
    parameters : sequence of float, optional
        Parameter values in the plant's order (nominal by default).

    Returns
    -------
    RigidBodyReference

    Raises
    ------
    ConfigError
        When the plant is not a serial arm, or ``pin`` is not installed.
    """
    mech = plant.mechanics
    if mech is None or not mech.links or mech.form != "serial_arm":
        raise ConfigError("plant", f"{plant.name} is not in serial-arm form (no DH table)")
    try:
        import pinocchio as pin
    except ImportError:
        raise ConfigError("pin", "the Pinocchio package is not installed (pip install pin)") from None
    given = list(plant.parameters.values()) if parameters is None else list(parameters)
    values = {s: sp.Float(v) for s, v in zip(plant.parameters, given)}
    model = pin.Model()
    model.gravity.linear = np.array([_number(g, values) for g in mech.gravity], dtype=float)
    parent, placement = 0, pin.SE3.Identity()
    for i, link in enumerate(mech.links):
        joint = pin.JointModelRZ() if link.kind == "revolute" else pin.JointModelPZ()
        parent = model.addJoint(parent, joint, placement, f"joint{i + 1}")
        X = _fixed_transform(link, values)
        com = X.rotation @ np.array([_number(c, values) for c in link.com]) + X.translation
        inertia = np.array([[_number(link.inertia[r, k], values) for k in range(3)] for r in range(3)])
        model.appendBodyToJoint(parent, pin.Inertia(_number(link.mass, values), com,
                                                    X.rotation @ inertia @ X.rotation.T), pin.SE3.Identity())
        placement = X
    damping = np.array([_number(link.damping, values) for link in mech.links])
    return RigidBodyReference(model, model.createData(), damping)
