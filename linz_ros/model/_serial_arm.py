"""Rigid serial arms, from a Denavit-Hartenberg table or from joint origins (the URDF form): mass
matrix, bias forces, tool point.

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

Both work on :class:`ChainFrames`, the chain in base-frame terms (each joint's axis and a
point on it, each body's rotation and centre of mass), so the frames are the only part that
depends on the form: a DH table (joint i about z_(i-1) through o_(i-1)) or joint origins
(joint i in J_i = L_(i-1) T(origin_i), about its axis there, body L_i = J_i motion(q_i);
:class:`JointFrame`).
"""

from __future__ import annotations

from dataclasses import dataclass

import sympy as sp

__all__ = ["Link", "ArmModel", "arm_model", "JointFrame", "ChainFrames", "chain_dynamics", "joint_frame_model",
           "axis_rotation"]


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
class JointFrame:
    """One joint and the body it moves, placed by a joint origin (the URDF convention).

    The joint frame is ``J_i = L_(i-1) T(origin_i)`` (``rotation``, ``offset`` in the
    previous body's frame); the joint moves about or along ``axis`` (a unit vector in
    J_i) and the body's frame is ``L_i = J_i motion(q_i)``.

    Attributes
    ----------
    kind : {"revolute", "prismatic"}
    rotation : sympy.Matrix
        3 x 3, of J_i in L_(i-1).
    offset : sympy.Matrix
        3 x 1, origin of J_i in L_(i-1).
    axis : sympy.Matrix
        3 x 1 unit vector in J_i.
    mass : sympy.Expr
    com : sympy.Matrix
        3 x 1 centre of mass in L_i.
    inertia : sympy.Matrix
        3 x 3 about the centre of mass, in L_i.
    damping : sympy.Expr
        Viscous friction coefficient (generalized force -damping q_i').
    """

    kind: str
    rotation: sp.Matrix
    offset: sp.Matrix
    axis: sp.Matrix
    mass: sp.Expr
    com: sp.Matrix
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


@dataclass(frozen=True)
class ChainFrames:
    """A chain's joints and bodies in the base frame: all the dynamics needs.

    Joint i moves about (revolute) or along (prismatic) the unit axis ``axes[i]`` through
    the point ``pivots[i]``; both are fixed in body i-1 (the base for i = 0). Body i has
    the rotation ``rotations[i]`` (its inertia is given in that frame), its frame's origin at
    ``origins[i]`` and its centre of mass at ``centres[i]``.
    """

    kinds: tuple[str, ...]
    axes: tuple[sp.Matrix, ...]
    pivots: tuple[sp.Matrix, ...]
    rotations: tuple[sp.Matrix, ...]
    origins: tuple[sp.Matrix, ...]
    centres: tuple[sp.Matrix, ...]
    masses: tuple[sp.Expr, ...]
    inertias: tuple[sp.Matrix, ...]
    dampings: tuple[sp.Expr, ...]


def _cross(a: sp.Matrix, b: sp.Matrix) -> sp.Matrix:
    return sp.Matrix([a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]])


def _mass_matrix(chain: ChainFrames) -> sp.Matrix:
    n = len(chain.kinds)
    M = sp.zeros(n, n)
    for i in range(n):
        Jv = sp.zeros(3, n)
        Jw = sp.zeros(3, n)
        for j in range(i + 1):
            if chain.kinds[j] == "revolute":
                Jv[:, j] = _cross(chain.axes[j], chain.centres[i] - chain.pivots[j])
                Jw[:, j] = chain.axes[j]
            else:
                Jv[:, j] = chain.axes[j]
        R = chain.rotations[i]
        inertia_world = R * chain.inertias[i] * R.T
        M += chain.masses[i] * (Jv.T * Jv) + Jw.T * inertia_world * Jw
    return M


def _bias_forces(chain: ChainFrames, qd: list[sp.Symbol], gravity: sp.Matrix) -> sp.Matrix:
    """C(q, q') q' + g(q) + damping q' by Newton-Euler with q'' = 0, base-frame vectors.

    The forward pass carries the acceleration of body i's frame origin: moved to pivot i on
    body i-1 (no move for DH frames, whose pivot is that origin), across the joint (for a
    prismatic joint, the child's point there gains the Coriolis term 2 w x z q'), then to
    body i's origin. The backward pass sums forces and moments about the pivots and projects
    them on the axes.
    """
    n = len(chain.kinds)
    omega, alpha, accel = sp.zeros(3, 1), sp.zeros(3, 1), -gravity   # a_0 = -g lifts gravity
    point = sp.zeros(3, 1)
    centre_accels, omegas, alphas = [], [], []
    for i in range(n):
        z, r = chain.axes[i], chain.pivots[i] - point
        accel = accel + _cross(alpha, r) + _cross(omega, _cross(omega, r))   # body i-1's point at pivot i
        if chain.kinds[i] == "revolute":
            alpha = alpha + _cross(omega, z * qd[i])
            omega = omega + z * qd[i]
        r = chain.origins[i] - chain.pivots[i]
        accel = accel + _cross(alpha, r) + _cross(omega, _cross(omega, r))
        if chain.kinds[i] == "prismatic":
            accel = accel + 2 * _cross(omega, z * qd[i])
        point = chain.origins[i]
        c = chain.centres[i] - point
        centre_accels.append(accel + _cross(alpha, c) + _cross(omega, _cross(omega, c)))
        omegas.append(omega)
        alphas.append(alpha)
    force, moment = sp.zeros(3, 1), sp.zeros(3, 1)
    tau = [sp.Integer(0)] * n
    for i in reversed(range(n)):
        R = chain.rotations[i]
        inertia_world = R * chain.inertias[i] * R.T
        inertial_force = chain.masses[i] * centre_accels[i]
        lever = (chain.pivots[i + 1] - chain.pivots[i]) if i + 1 < n else sp.zeros(3, 1)
        moment = (moment + _cross(lever, force)
                  + _cross(chain.centres[i] - chain.pivots[i], inertial_force)
                  + inertia_world * alphas[i] + _cross(omegas[i], inertia_world * omegas[i]))
        force = force + inertial_force
        projected = moment if chain.kinds[i] == "revolute" else force
        tau[i] = (chain.axes[i].T * projected)[0, 0] + chain.dampings[i] * qd[i]
    return sp.Matrix(tau)


def chain_dynamics(chain: ChainFrames, qd: list[sp.Symbol], gravity: sp.Matrix) -> tuple[sp.Matrix, sp.Matrix]:
    """M(q) and F(q, q') = -(C q' + g + damping q') of a chain given in base-frame terms.

    Parameters
    ----------
    chain : ChainFrames
    qd : list of sympy.Symbol
        The joint rates.
    gravity : sympy.Matrix
        3 x 1, in the base frame.

    Returns
    -------
    tuple of sympy.Matrix
        M from the link Jacobians, F from Newton-Euler with q'' = 0.
    """
    return _mass_matrix(chain), -_bias_forces(chain, qd, gravity)


def axis_rotation(axis: sp.Matrix, angle: sp.Expr) -> sp.Matrix:
    """Rotation by ``angle`` about the unit ``axis``: Rodrigues, I + sin K + (1 - cos) K^2.

    Parameters
    ----------
    axis : sympy.Matrix
        3 x 1 unit vector.
    angle : sympy.Expr

    Returns
    -------
    sympy.Matrix

    Examples
    --------
    >>> q = sp.Symbol("q")
    >>> axis_rotation(sp.Matrix([0, 0, 1]), q)
    Matrix([
    [cos(q), -sin(q), 0],
    [sin(q),  cos(q), 0],
    [     0,       0, 1]])
    """
    x, y, z = axis
    K = sp.Matrix([[0, -z, y], [z, 0, -x], [-y, x, 0]])
    return sp.eye(3) + sp.sin(angle) * K + (1 - sp.cos(angle)) * (K * K)


def _origin_chain(joints: list[JointFrame], q: list[sp.Symbol]) -> tuple[ChainFrames, sp.Matrix, sp.Matrix]:
    """Joint frames J_i = L_(i-1) T(origin_i) and bodies L_i = J_i motion(q_i), in the base frame;
    also the last body's rotation and origin."""
    R, p = sp.eye(3), sp.zeros(3, 1)
    axes, pivots, rotations, origins, centres = [], [], [], [], []
    for joint, qi in zip(joints, q):
        pivot = p + R * joint.offset
        R_joint = R * joint.rotation
        axis = R_joint * joint.axis
        if joint.kind == "revolute":
            R, p = R_joint * axis_rotation(joint.axis, qi), pivot
        else:
            R, p = R_joint, pivot + axis * qi
        axes.append(axis)
        pivots.append(pivot)
        rotations.append(R)
        origins.append(p)
        centres.append(p + R * joint.com)
    chain = ChainFrames(tuple(j.kind for j in joints), tuple(axes), tuple(pivots), tuple(rotations), tuple(origins),
                        tuple(centres), tuple(j.mass for j in joints), tuple(j.inertia for j in joints),
                        tuple(j.damping for j in joints))
    return chain, R, p


def joint_frame_model(joints: list[JointFrame], q: list[sp.Symbol], qd: list[sp.Symbol], gravity: sp.Matrix,
                      tool: sp.Matrix | None = None) -> ArmModel:
    """Mass matrix, generalized forces and tool point of a chain placed by joint origins.

    Parameters
    ----------
    joints : list of JointFrame
    q, qd : list of sympy.Symbol
        Joint coordinates and rates, one per joint.
    gravity : sympy.Matrix
        3 x 1 in the base frame.
    tool : sympy.Matrix, optional
        3 x 1 point in the last body's frame.

    Returns
    -------
    ArmModel
        ``M(q) q'' = F(q, q') + tau``, F = -(C q' + g + damping q'), and the tool point in the
        base frame when given.

    Examples
    --------
    >>> q, w = sp.symbols("q w")
    >>> joint = JointFrame("revolute", sp.eye(3), sp.zeros(3, 1), sp.Matrix([0, 0, 1]), 2,
    ...                    sp.Matrix([sp.Rational(1, 2), 0, 0]), sp.zeros(3, 3))
    >>> model = joint_frame_model([joint], [q], [w], sp.Matrix([0, -10, 0]))
    >>> sp.simplify(model.M[0, 0]), sp.simplify(model.F[0])
    (1/2, -10*cos(q))
    """
    chain, R, p = _origin_chain(joints, q)
    M, F = chain_dynamics(chain, qd, gravity)
    return ArmModel(M, F, None if tool is None else p + R * tool)


def _dh_chain(links: list[Link], rotations: list[sp.Matrix], origins: list[sp.Matrix]) -> ChainFrames:
    """DH frames: joint i moves about z_(i-1) through o_(i-1); link i's frame is frame i."""
    centres = [origins[i + 1] + rotations[i + 1] * sp.Matrix(link.com) for i, link in enumerate(links)]
    return ChainFrames(tuple(link.kind for link in links), tuple(R[:, 2] for R in rotations[:-1]),
                       tuple(origins[:-1]), tuple(rotations[1:]), tuple(origins[1:]), tuple(centres),
                       tuple(link.mass for link in links), tuple(link.inertia for link in links),
                       tuple(link.damping for link in links))


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
    M, F = chain_dynamics(_dh_chain(links, rotations, origins), qd, gravity)
    tip = None if tool is None else origins[-1] + rotations[-1] * tool
    return ArmModel(M, F, tip)
