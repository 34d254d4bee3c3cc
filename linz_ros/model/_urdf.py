"""The URDF form: a plain URDF file read into a kinematic chain, reduced to the mechanical form.

The plant file's ``urdf`` section names the file (relative to the plant file), the chain's
``base`` and ``tip`` links and optionally the movable ``joints`` expected on it, a ``tool``
point in the tip link's frame, ``gravity`` in the base frame and the ``friction_velocity``
of the smoothed Coulomb friction. The file is read by ``_urdf_xml`` (standard library
``xml.etree.ElementTree`` after a bounded read; a DOCTYPE or ENTITY declaration, entity
expansion, and xacro, which needs expanding first, are refused before parsing).

Read: ``link`` (``inertial``: ``origin`` xyz/rpy, ``mass``, the full ``inertia``),
``joint`` (``revolute``, ``continuous``, ``prismatic``, ``fixed``; ``origin`` xyz/rpy with
R = Rz(yaw) Ry(pitch) Rx(roll), ``axis`` normalised, default 1 0 0; ``parent``, ``child``;
``limit`` lower/upper/velocity/effort; ``dynamics`` damping/friction). Ignored: visuals,
collisions, transmissions, gazebo and other extensions. Fixed joints merge their child's
inertial into the body before them (parallel-axis theorem), as do links hanging off the
chain by fixed joints; a movable joint off the chain is refused (the plant would not hold it).
The dynamics are those of :func:`~linz_ros.model._serial_arm.joint_frame_model`; the URDF's
numbers enter as constants. Coulomb friction f is smoothed to f tanh(q' / v_s) (a sign
would make F discontinuous at rest); viscous damping d gives -d q'.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import sympy as sp

from linz_ros.artifact.urdf import MAX_URDF_NAME, urdf_names
from linz_ros.errors import PlantFileError
from linz_ros.model._plant import UrdfSource
from linz_ros.model._reader import read_bounded
from linz_ros.model._serial_arm import JointFrame, joint_frame_model
from linz_ros.model._urdf_xml import ChainBody, UrdfJoint, read_urdf_text, rpy_matrix

__all__ = ["URDF_KEY", "UrdfChain", "UrdfJoint", "read_urdf", "urdf_terms", "FRICTION_VELOCITY", "rpy_matrix"]

URDF_KEY = "urdf"
_SECTION_KEYS = ("file", "base", "tip", "joints", "tool", "gravity", "friction_velocity")
#: Default v_s of the smoothed Coulomb friction f tanh(q'/v_s), rad/s or m/s: 76 % of f at v_s,
#: 96 % at 2 v_s. Slow enough a rate that the smoothing hides only a crawl, fast enough that the
#: slope f / v_s near rest does not make the plant stiff at control rates.
FRICTION_VELOCITY = 0.05
#: Entries of constant rotations and axes closer than this to 0 or +-1 are taken as exact (cos(pi/2) ~ 6e-17).
_SNAP = 1e-15


@dataclass(frozen=True)
class UrdfChain:
    """The chain from base to tip, read and checked; numbers only (the model is built by :func:`urdf_terms`).

    Attributes
    ----------
    source : UrdfSource
    joints : tuple of UrdfJoint
        Movable joints in chain order.
    tip_rotation, tip_offset : numpy.ndarray
        The tip link's frame in the last body's frame.
    tool : numpy.ndarray
        The tool point in the tip link's frame.
    gravity : numpy.ndarray
        In the base frame.
    friction_velocity : float
    """

    source: UrdfSource
    joints: tuple[UrdfJoint, ...]
    bodies: tuple[ChainBody, ...]
    tip_rotation: np.ndarray
    tip_offset: np.ndarray
    tool: np.ndarray
    gravity: np.ndarray
    friction_velocity: float

    def names(self) -> tuple[list[str], list[str], list[str]]:
        """Coordinates, velocities and inputs: ``q_<joint>``, ``qd_<joint>``, ``tau_<joint>``."""
        return urdf_names([j.name for j in self.joints])

    def envelope(self) -> dict[str, tuple[float, float]]:
        """Joint limits as the envelope of q (lower, upper) and of q' (+-velocity)."""
        q, qd, _ = self.names()
        bounds = {}
        for joint, position, rate in zip(self.joints, q, qd):
            if joint.lower is not None:
                bounds[position] = (joint.lower, joint.upper)
            if joint.velocity is not None:
                bounds[rate] = (-joint.velocity, joint.velocity)
        return bounds

    def input_limits(self) -> dict[str, tuple[float, float]]:
        """Effort limits as input limits (+-effort)."""
        _, _, tau = self.names()
        return {u: (-j.effort, j.effort) for j, u in zip(self.joints, tau) if j.effort is not None}


def _section(reader: Any, doc: Mapping) -> dict:
    section = reader.section(doc, URDF_KEY, _SECTION_KEYS, "file, base, tip (and optionally joints, tool, gravity, "
                                                          "friction_velocity)")
    for key in ("file", "base", "tip"):
        value = section.get(key)
        if not isinstance(value, str) or not value.strip():
            raise reader.fail(f"{URDF_KEY}.{key}", "missing (required): the URDF file name" if key == "file"
                              else f"missing (required): the name of the chain's {key} link")
    return section


def _triple(reader: Any, section: Mapping, key: str, default: list[float]) -> np.ndarray:
    value = section.get(key, default)
    if not isinstance(value, list) or len(value) != 3:
        raise reader.fail(f"{URDF_KEY}.{key}", "expected [x, y, z] (numbers)")
    return np.array([reader.number(f"{URDF_KEY}.{key}[{i}]", v) for i, v in enumerate(value)])


def _expected_joints(reader: Any, section: Mapping, found: tuple[UrdfJoint, ...], path_names: list[str]) -> None:
    """The optional ``joints`` list: the movable joints of the chain, in order."""
    expected = section.get("joints")
    if expected is None:
        return
    field = f"{URDF_KEY}.joints"
    if not isinstance(expected, list) or not all(isinstance(j, str) for j in expected):
        raise reader.fail(field, "expected a list of joint names")
    names = [j.name for j in found]
    for i, name in enumerate(expected):
        if name not in names:
            where = ("is a fixed joint of the chain" if name in path_names
                     else "is not a movable joint on the chain from base to tip")
            raise reader.fail(f"{field}[{i}]", f"{name[:MAX_URDF_NAME]!r} {where} (the chain's: {', '.join(names)})")
    if expected != names:
        raise reader.fail(field, f"expected the chain's movable joints in order from the base: {', '.join(names)}")


def read_urdf(reader: Any, doc: Mapping) -> UrdfChain:
    """Read the ``urdf`` section and its file into the chain from base to tip.

    Parameters
    ----------
    reader : the plant-file reader
    doc : mapping
        The plant document.

    Returns
    -------
    UrdfChain

    Raises
    ------
    PlantFileError
        The section's mistakes name the plant file; the URDF's name the URDF file.
    """
    section = _section(reader, doc)
    written = section["file"]
    path = Path(written) if os.path.isabs(written) else Path(reader.source).parent / written
    shown = os.path.normpath(str(path))
    try:
        raw = read_bounded(path, shown)
    except PlantFileError as err:
        raise reader.fail(f"{URDF_KEY}.file", f"{shown}: {err.problem}") from None
    base, tip = section["base"], section["tip"]
    path_names: list[str] = []
    joints, bodies, rotation, offset = read_urdf_text(raw, shown, base, tip, path_names)
    _expected_joints(reader, section, joints, path_names)
    velocity = section.get("friction_velocity", FRICTION_VELOCITY)
    velocity = reader.number(f"{URDF_KEY}.friction_velocity", velocity)
    if not velocity > 0:
        raise reader.fail(f"{URDF_KEY}.friction_velocity", f"must be positive, got {velocity:g}")
    from linz_ros.model._mechanics import STANDARD_GRAVITY     # here: _mechanics imports this module

    gravity = _triple(reader, section, "gravity", [0, 0, -STANDARD_GRAVITY])
    source = UrdfSource(written, str(path.resolve()), hashlib.sha256(raw).hexdigest(), base, tip,
                        tuple(j.name for j in joints), tuple(float(g) for g in gravity))
    return UrdfChain(source, joints, bodies, rotation, offset, _triple(reader, section, "tool", [0, 0, 0]),
                     gravity, velocity)


def _constant(value: float) -> sp.Expr:
    """A URDF number as a sympy constant: whole numbers exact, others as binary floats."""
    value = float(value)
    if abs(value) < _SNAP:
        return sp.Integer(0)
    if abs(value - round(value)) < _SNAP:
        return sp.Integer(round(value))
    return sp.Float(value)


def _matrix(values: np.ndarray) -> sp.Matrix:
    rows, cols = (values.shape[0], 1) if values.ndim == 1 else values.shape
    return sp.Matrix(rows, cols, [_constant(v) for v in np.ravel(values)])


def urdf_terms(chain: UrdfChain, q: list[sp.Symbol], qd: list[sp.Symbol]) -> tuple[sp.Matrix, sp.Matrix, sp.Matrix,
                                                                                  sp.Matrix]:
    """M(q), F(q, q'), the tool point and gravity of a URDF chain.

    Parameters
    ----------
    chain : UrdfChain
    q, qd : list of sympy.Symbol
        The joint coordinates and rates, in chain order.

    Returns
    -------
    tuple of sympy.Matrix
        M, F (Coriolis, gravity, viscous damping and smoothed Coulomb friction), the tool
        point in the base frame, gravity.
    """
    frames = [JointFrame(b.joint.kind, _matrix(b.rotation), _matrix(b.offset), _matrix(b.axis),
                         _constant(b.inertial.mass), _matrix(b.inertial.com), _matrix(b.inertial.inertia),
                         _constant(b.joint.damping)) for b in chain.bodies]
    gravity = _matrix(chain.gravity)
    tool = _matrix(chain.tip_rotation @ chain.tool + chain.tip_offset)
    model = joint_frame_model(frames, q, qd, gravity, tool)
    v_s = _constant(chain.friction_velocity)
    friction = sp.Matrix([-_constant(j.friction) * sp.tanh(w / v_s) if j.friction else sp.Integer(0)
                          for j, w in zip(chain.joints, qd)])
    return model.M, model.F + friction, model.tool, gravity
