"""Rigid serial arms from a Denavit-Hartenberg table: mass matrix, bias forces, tool point.

Conventions (standard, distal DH; Spong, Hutchinson and Vidyasagar, Robot Modeling and
Control, sec. 3.2): frame i is attached to link i and

    A_i = Rot_z(theta_i) Trans_z(d_i) Trans_x(a_i) Rot_x(alpha_i),

with theta_i = q_i + theta0_i for a revolute joint and d_i = q_i + d0_i for a prismatic
one. Joint i moves about (or along) z_(i-1), the z axis of frame i-1. Every vector below
is written in the base frame.

The mass matrix comes from the link Jacobians (ibid. eq. 7.60),

    M(q) = sum_i m_i Jv_i^T Jv_i + Jw_i^T R_i I_i R_i^T Jw_i,

and the bias forces C(q, q') q' + g(q) from a recursive Newton-Euler pass with q'' = 0
(Luh, Walker and Paul, 1980; ibid. sec. 7.6), so the two halves of the model are
derived independently of each other. Nothing is inverted symbolically.
"""

from __future__ import annotations

from dataclasses import dataclass

import sympy as sp

__all__ = ["Link", "ArmModel", "arm_model"]


@dataclass(frozen=True)
class Link:
    """One joint and the link it moves.

    Attributes
    ----------
    kind : {"revolute", "prismatic"}
    a, alpha, d, theta : sympy.Expr
        DH parameters; for the joint variable, ``theta`` (revolute) or ``d``
        (prismatic) is the constant offset added to q_i.
    mass : sympy.Expr
    com : tuple of sympy.Expr
        Centre of mass in the link's own frame.
    inertia : sympy.Matrix
        3 x 3 inertia about the centre of mass, in the link's own frame.
    damping : sympy.Expr
        Viscous joint friction coefficient (generalized force -damping * q_i').
    """

    kind: str
    a: sp.Expr
    alpha: sp.Expr
    d: sp.Expr
    theta: sp.Expr
    mass: sp.Expr
    com: tuple[sp.Expr, sp.Expr, sp.Expr]
    inertia: sp.Matrix
    damping: sp.Expr = sp.Integer(0)


@dataclass(frozen=True)
class ArmModel:
    """The arm in mass-matrix form, ``M(q) q'' = F(q, q') + tau``, and its tool point."""

    M: sp.Matrix
    F: sp.Matrix
    tool: sp.Matrix | None


def _rotation_and_offset(link: Link, q: sp.Symbol) -> tuple[sp.Matrix, sp.Matrix]:
    theta = link.theta + q if link.kind == "revolute" else link.theta
    d = link.d + q if link.kind == "prismatic" else link.d
    ct, st, ca, sa = sp.cos(theta), sp.sin(theta), sp.cos(link.alpha), sp.sin(link.alpha)
    rotation = sp.Matrix([[ct, -st * ca, st * sa], [st, ct * ca, -ct * sa], [0, sa, ca]])
    offset = sp.Matrix([link.a * ct, link.a * st, d])
    return rotation, offset


def _frames(links: list[Link], q: list[sp.Symbol]) -> tuple[list[sp.Matrix], list[sp.Matrix]]:
    """Rotations R_0..R_n and origins o_0..o_n of the link frames in the base frame."""
    rotations, origins = [sp.eye(3)], [sp.zeros(3, 1)]
    for link, qi in zip(links, q):
        rotation, offset = _rotation_and_offset(link, qi)
        origins.append(origins[-1] + rotations[-1] * offset)
        rotations.append(rotations[-1] * rotation)
    return rotations, origins


def _cross(a: sp.Matrix, b: sp.Matrix) -> sp.Matrix:
    return sp.Matrix([a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]])


def _mass_matrix(links: list[Link], rotations: list[sp.Matrix], origins: list[sp.Matrix],
                 centres: list[sp.Matrix]) -> sp.Matrix:
    n = len(links)
    M = sp.zeros(n, n)
    axes = [R[:, 2] for R in rotations]
    for i, link in enumerate(links):
        Jv = sp.zeros(3, n)
        Jw = sp.zeros(3, n)
        for j in range(i + 1):
            if links[j].kind == "revolute":
                Jv[:, j] = _cross(axes[j], centres[i] - origins[j])
                Jw[:, j] = axes[j]
            else:
                Jv[:, j] = axes[j]
        R = rotations[i + 1]
        inertia_world = R * link.inertia * R.T
        M += link.mass * (Jv.T * Jv) + Jw.T * inertia_world * Jw
    return M


def _bias_forces(links: list[Link], qd: list[sp.Symbol], rotations: list[sp.Matrix],
                 origins: list[sp.Matrix], centres: list[sp.Matrix], gravity: sp.Matrix) -> sp.Matrix:
    """C(q, q') q' + g(q) + damping q' by Newton-Euler with q'' = 0, base-frame vectors."""
    n = len(links)
    omega, alpha, accel = sp.zeros(3, 1), sp.zeros(3, 1), -gravity   # a_0 = -g lifts gravity
    centre_accels, omegas, alphas = [], [], []
    for i, link in enumerate(links):
        z = rotations[i][:, 2]
        r = origins[i + 1] - origins[i]
        if link.kind == "revolute":
            omega_next = omega + z * qd[i]
            alpha = alpha + _cross(omega, z * qd[i])
            omega = omega_next
            accel = accel + _cross(alpha, r) + _cross(omega, _cross(omega, r))
        else:
            accel = accel + 2 * _cross(omega, z * qd[i]) + _cross(alpha, r) + _cross(omega, _cross(omega, r))
        c = centres[i] - origins[i + 1]
        centre_accels.append(accel + _cross(alpha, c) + _cross(omega, _cross(omega, c)))
        omegas.append(omega)
        alphas.append(alpha)
    force, moment = sp.zeros(3, 1), sp.zeros(3, 1)
    tau = [sp.Integer(0)] * n
    for i in reversed(range(n)):
        link = links[i]
        R = rotations[i + 1]
        inertia_world = R * link.inertia * R.T
        inertial_force = link.mass * centre_accels[i]
        moment = (moment + _cross(origins[i + 1] - origins[i], force)
                  + _cross(centres[i] - origins[i], inertial_force)
                  + inertia_world * alphas[i] + _cross(omegas[i], inertia_world * omegas[i]))
        force = force + inertial_force
        z = rotations[i][:, 2]
        projected = moment if link.kind == "revolute" else force
        tau[i] = (z.T * projected)[0, 0] + link.damping * qd[i]
    return sp.Matrix(tau)


def arm_model(links: list[Link], q: list[sp.Symbol], qd: list[sp.Symbol], gravity: sp.Matrix,
              tool: sp.Matrix | None = None) -> ArmModel:
    """Mass matrix, generalized forces and tool point of a serial arm.

    Parameters
    ----------
    links : list of Link
    q, qd : list of sympy.Symbol
        Joint coordinates and their rates, one per link.
    gravity : sympy.Matrix
        3 x 1 gravity vector in the base frame (e.g. (0, 0, -9.81)).
    tool : sympy.Matrix, optional
        3 x 1 tool point in the last link's frame.

    Returns
    -------
    ArmModel
        ``M(q) q'' = F(q, q') + tau`` with F = -(C q' + g + damping q'), and the tool
        point's base-frame position when a tool was given.

    Examples
    --------
    >>> q, w = sp.symbols("q w")
    >>> link = Link("revolute", 1, 0, 0, 0, 2, (-sp.Rational(1, 2), 0, 0), sp.zeros(3, 3))
    >>> model = arm_model([link], [q], [w], sp.Matrix([0, -9.81, 0]))
    >>> sp.simplify(model.M[0, 0]), sp.simplify(model.F[0])
    (1/2, -9.81*cos(q))
    """
    rotations, origins = _frames(links, q)
    centres = [origins[i + 1] + rotations[i + 1] * sp.Matrix(link.com) for i, link in enumerate(links)]
    M = _mass_matrix(links, rotations, origins, centres)
    F = -_bias_forces(links, qd, rotations, origins, centres, gravity)
    tip = None if tool is None else origins[-1] + rotations[-1] * tool
    return ArmModel(M, F, tip)
