"""The mechanical plant forms: mass-matrix, energy (Lagrange), serial-arm (DH table) and URDF.

Each reduces to :class:`~linz_ros.model._plant.Mechanics`, ``M(q) q'' = F(q, q') + B(q) u``,
with the states ``(q, q')``. The reader object is the plant-file reader of ``_reader``
(passed in, so this module stays below it): it declares names, parses expressions and
turns every mistake into a one-line ``PlantFileError``.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np
import sympy as sp

from linz_ros.model._elastic import ELASTIC_KEY, read_elastic
from linz_ros.model._plant import Mechanics
from linz_ros.model._serial_arm import Link, arm_model
from linz_ros.model._urdf import URDF_KEY, UrdfChain, urdf_terms
from linz_ros.model._symbolic import numeric_function

__all__ = ["MECHANICAL_FORMS", "read_mechanics", "check_mass_matrix", "velocity_names", "TOOL_NAMES",
           "STANDARD_GRAVITY", "MAX_JOINTS"]

#: Top-level key that selects each mechanical form.
MECHANICAL_FORMS = {"mass_matrix": "mass_matrix", "kinetic_energy": "energy", "serial_arm": "serial_arm",
                    URDF_KEY: "urdf"}
#: Names under which a serial arm's (or a URDF chain's) tool point can be used in ``outputs``.
TOOL_NAMES = ("tip_x", "tip_y", "tip_z")
#: Standard gravity, m/s^2 (CGPM 1901): the one default of the serial arm (along -z) and of the URDF form
#: (along -z of the base link).
STANDARD_GRAVITY = 9.80665
#: Joints of a serial arm at most: the symbolic mass matrix of 8 joints takes ~10 s, and the
#: time grows about threefold with every further two joints.
MAX_JOINTS = 8
_JOINT_KEYS = ("type", "a", "alpha", "d", "theta", "mass", "com", "inertia", "damping")
_SERIAL_KEYS = ("joints", "gravity", "tool")
#: Points of the envelope at which M(q) is checked to be symmetric positive definite.
MASS_MATRIX_SAMPLES = 64
_SYMMETRY_TOLERANCE = 1e-9


def velocity_names(reader: Any, doc: Mapping, coordinates: list[str]) -> list[str]:
    """The velocity names: ``velocities`` when given (one per coordinate), else ``<q>_dot``."""
    given = doc.get("velocities")
    if given is None:
        names = [f"{q}_dot" for q in coordinates]
        return [reader.declare(f"velocities (default name of {q}')", name, "state")
                for q, name in zip(coordinates, names)]
    names = reader.name_list(doc, "velocities", "state")
    if len(names) != len(coordinates):
        raise reader.fail("velocities", f"expected one velocity per coordinate ({len(coordinates)}), "
                                        f"got {len(names)}")
    return names


def _expression_without(reader: Any, field: str, text: Any, allowed: set[str], refused: set[sp.Symbol],
                        what: str) -> sp.Expr:
    """An expression that must not contain ``refused`` symbols (named ``what`` in the message)."""
    expr = reader.expression(field, text, allowed)
    bad = sorted(expr.free_symbols & refused, key=str)
    if bad:
        raise reader.fail(field, f"depends on {bad[0]}; {what}")
    return expr


def _matrix(reader: Any, field: str, value: Any, rows: int, cols: int, allowed: set[str],
            refused: set[sp.Symbol], what: str) -> sp.Matrix:
    """A rows x cols matrix written as a list of rows (a 1 x 1 matrix may be one expression)."""
    if rows == 1 and cols == 1 and not isinstance(value, list):
        value = [[value]]
    if not isinstance(value, list) or len(value) != rows:
        raise reader.fail(field, f"expected a list of {rows} row(s) of {cols} expression(s)")
    entries = []
    for i, row in enumerate(value):
        if cols == 1 and not isinstance(row, list):
            row = [row]
        if not isinstance(row, list) or len(row) != cols:
            raise reader.fail(f"{field}[{i}]", f"expected a row of {cols} expression(s)")
        entries.append([_expression_without(reader, f"{field}[{i}][{j}]", e, allowed, refused, what)
                        for j, e in enumerate(row)])
    return sp.Matrix(entries)


def _forces(reader: Any, doc: Mapping, coordinates: list[sp.Symbol], allowed: set[str],
            inputs: set[sp.Symbol]) -> sp.Matrix:
    """Generalized forces other than the inputs, per coordinate (zero where not given)."""
    given = reader.mapping(doc, "forces")
    names = [q.name for q in coordinates]
    extra = [str(k) for k in given if k not in names]
    if extra:
        raise reader.fail(f"forces.{extra[0]}", f"{extra[0]!r} is not a coordinate")
    return sp.Matrix([_expression_without(reader, f"forces.{q}", given[q], allowed, inputs,
                                          "inputs enter through input_map") if q in given else sp.Integer(0)
                      for q in names])


def _input_map(reader: Any, doc: Mapping, nq: int, m: int, allowed: set[str],
               refused: set[sp.Symbol]) -> sp.Matrix:
    if doc.get("input_map") is None:
        if m != nq:
            raise reader.fail("input_map", f"required when the inputs ({m}) are not one per coordinate ({nq})")
        return sp.eye(nq)
    return _matrix(reader, "input_map", doc["input_map"], nq, m, allowed, refused,
                   "the input map may depend on the coordinates and parameters only")


def _energy_terms(reader: Any, doc: Mapping, q: list[sp.Symbol], qd: list[sp.Symbol], allowed: set[str],
                  inputs: set[sp.Symbol]) -> tuple[sp.Matrix, sp.Matrix]:
    """M from the Hessian of T in q'; C q' from the Christoffel symbols; g = dV/dq.

    Lagrange's equations for T = q'^T M(q) q' / 2 and V(q) give
    ``M q'' + C(q, q') q' + g(q) = Q`` with
    ``(C q')_k = sum_ij c_ijk q'_i q'_j``, ``c_ijk = (dM_kj/dq_i + dM_ki/dq_j - dM_ij/dq_k) / 2``
    (Spong, Hutchinson and Vidyasagar, Robot Modeling and Control, eqs. 7.52-7.55).
    """
    T = _expression_without(reader, "kinetic_energy", doc["kinetic_energy"], allowed, inputs,
                            "kinetic energy is a function of the coordinates and velocities")
    V = sp.Integer(0)
    if doc.get("potential_energy") is not None:
        V = _expression_without(reader, "potential_energy", doc["potential_energy"], allowed,
                                inputs | set(qd), "potential energy is a function of the coordinates")
    M = sp.hessian(T, qd)
    if M.free_symbols & set(qd):
        M = M.applyfunc(sp.simplify)
        if M.free_symbols & set(qd):
            raise reader.fail("kinetic_energy", "not quadratic in the velocities (its Hessian in them "
                                                "depends on them)")
    residual = sp.expand(T - (sp.Matrix(qd).T * M * sp.Matrix(qd))[0, 0] / 2)
    if residual != 0 and sp.simplify(residual) != 0:
        raise reader.fail("kinetic_energy", "has terms that are not quadratic in the velocities "
                                            f"({sp.simplify(residual)}); write them as forces")
    n = len(q)
    dM = [M.diff(qi) for qi in q]
    coriolis = []
    for k in range(n):
        total = sp.Integer(0)
        for i in range(n):
            for j in range(n):
                c = (dM[i][k, j] + dM[j][k, i] - dM[k][i, j]) / 2
                if c != 0:
                    total += c * qd[i] * qd[j]
        coriolis.append(total)
    gravity = [sp.diff(V, qi) for qi in q]
    F = sp.Matrix([-c - g for c, g in zip(coriolis, gravity)])
    return M, F


def _vector(reader: Any, field: str, value: Any, allowed: set[str], refused: set[sp.Symbol]) -> sp.Matrix:
    if not isinstance(value, list) or len(value) != 3:
        raise reader.fail(field, "expected [x, y, z]")
    return sp.Matrix([_expression_without(reader, f"{field}[{i}]", v, allowed, refused,
                                          "arm geometry and inertia are constants (parameters)")
                      for i, v in enumerate(value)])


def _inertia(reader: Any, field: str, value: Any, allowed: set[str], refused: set[sp.Symbol]) -> sp.Matrix:
    if not isinstance(value, list) or len(value) not in (3, 6):
        raise reader.fail(field, "expected [ixx, iyy, izz] or [ixx, iyy, izz, ixy, ixz, iyz] about the "
                                 "centre of mass, in the link frame")
    v = [_expression_without(reader, f"{field}[{i}]", e, allowed, refused,
                             "arm geometry and inertia are constants (parameters)") for i, e in enumerate(value)]
    ixx, iyy, izz = v[:3]
    ixy, ixz, iyz = v[3:] if len(v) == 6 else (0, 0, 0)
    return sp.Matrix([[ixx, ixy, ixz], [ixy, iyy, iyz], [ixz, iyz, izz]])


def _joint(reader: Any, field: str, spec: Any, allowed: set[str], refused: set[sp.Symbol]) -> Link:
    if not isinstance(spec, dict):
        raise reader.fail(field, "expected a mapping with type, a, alpha, d, theta, mass, com, inertia")
    unknown = [str(k) for k in spec if k not in _JOINT_KEYS]
    if unknown:
        raise reader.fail(f"{field}.{unknown[0]}", "unknown key; expected one of " + ", ".join(_JOINT_KEYS))
    kind = spec.get("type")
    if kind not in ("revolute", "prismatic"):
        raise reader.fail(f"{field}.type", f"expected revolute or prismatic, got {kind!r}")
    for key in ("mass", "com", "inertia"):
        if spec.get(key) is None:
            raise reader.fail(f"{field}.{key}", "missing (required)")

    def scalar(key: str, default: Any = 0) -> sp.Expr:
        return _expression_without(reader, f"{field}.{key}", spec.get(key, default), allowed, refused,
                                   "arm geometry and inertia are constants (parameters)")

    return Link(kind, scalar("a"), scalar("alpha"), scalar("d"), scalar("theta"), scalar("mass"),
                tuple(_vector(reader, f"{field}.com", spec["com"], allowed, refused)),
                _inertia(reader, f"{field}.inertia", spec["inertia"], allowed, refused), scalar("damping"))


def _serial_arm_terms(reader: Any, doc: Mapping, q: list[sp.Symbol], qd: list[sp.Symbol], allowed: set[str],
                      refused: set[sp.Symbol]) -> tuple[sp.Matrix, sp.Matrix, list[Link], sp.Matrix]:
    arm = doc["serial_arm"]
    if not isinstance(arm, dict):
        raise reader.fail("serial_arm", "expected a mapping with joints (and optionally gravity, tool)")
    unknown = [str(k) for k in arm if k not in _SERIAL_KEYS]
    if unknown:
        raise reader.fail(f"serial_arm.{unknown[0]}", "unknown key; expected one of " + ", ".join(_SERIAL_KEYS))
    joints = arm.get("joints")
    if not isinstance(joints, list) or not joints:
        raise reader.fail("serial_arm.joints", "expected a non-empty list of joints")
    if len(joints) > MAX_JOINTS:
        raise reader.fail("serial_arm.joints", f"too large: {len(joints)} joints, at most {MAX_JOINTS} (the "
                                               "symbolic mass matrix grows too fast beyond)")
    if len(joints) != len(q):
        raise reader.fail("serial_arm.joints", f"{len(joints)} joint(s) but {len(q)} coordinate(s)")
    links = [_joint(reader, f"serial_arm.joints[{i}]", spec, allowed, refused) for i, spec in enumerate(joints)]
    gravity = (sp.Matrix([0, 0, -sp.Float(STANDARD_GRAVITY)]) if arm.get("gravity") is None
               else _vector(reader, "serial_arm.gravity", arm["gravity"], allowed, refused))
    tool = None if arm.get("tool") is None else _vector(reader, "serial_arm.tool", arm["tool"], allowed, refused)
    values = {p: sp.Rational(repr(float(v))) for p, v in getattr(reader, "values", {}).items()}
    for i, link in enumerate(links):
        mass = link.mass.xreplace(values)
        if mass.is_number and not mass > 0:
            raise reader.fail(f"serial_arm.joints[{i}].mass", f"the mass of joint {i + 1}'s link must be positive, "
                                                              f"got {float(mass):g}")
    model = arm_model(links, q, qd, gravity, tool)
    _declare_tool(reader, "serial_arm.tool", model.tool)
    return model.M, model.F, links, gravity


def _declare_tool(reader: Any, field: str, tool: sp.Matrix | None) -> None:
    """The tool point's coordinates as definitions ``tip_x``, ``tip_y``, ``tip_z`` for the outputs."""
    if tool is not None:
        for name, expr in zip(TOOL_NAMES, tool):
            reader.declare(field, name, "definition")
            reader.table[name] = expr


def read_mechanics(reader: Any, doc: Mapping, form_key: str, coordinates: list[sp.Symbol],
                   velocities: list[sp.Symbol], inputs: list[sp.Symbol],
                   motor: list[sp.Symbol] | None = None, chain: UrdfChain | None = None) -> Mechanics:
    """Read the model of a mechanical plant in the form named by ``form_key``.

    Parameters
    ----------
    reader : the plant-file reader
    doc : mapping
        The plant document.
    form_key : {"mass_matrix", "kinetic_energy", "serial_arm", "urdf"}
    coordinates, velocities, inputs : list of sympy.Symbol
    motor : list of sympy.Symbol, optional
        The motor angles then rates of an elastic-joint arm (with its section in ``doc``).
    chain : UrdfChain, optional
        The chain read from the ``urdf`` section (``model._urdf.read_urdf``; the URDF form only).

    Returns
    -------
    Mechanics
    """
    allowed = set(reader.names)
    input_set = set(inputs)
    nq, m = len(coordinates), len(inputs)
    configuration_only = input_set | set(velocities)
    links, gravity = [], None
    if form_key == "mass_matrix":
        M = _matrix(reader, "mass_matrix", doc["mass_matrix"], nq, nq, allowed, configuration_only,
                    "the mass matrix may depend on the coordinates and parameters only")
        F = _forces(reader, doc, coordinates, allowed, input_set)
    elif form_key == "kinetic_energy":
        M, F = _energy_terms(reader, doc, coordinates, velocities, allowed, input_set)
        F = F + _forces(reader, doc, coordinates, allowed, input_set)
    elif form_key == URDF_KEY:
        M, F, tool, gravity = urdf_terms(chain, coordinates, velocities)
        links = list(chain.joints)
        _declare_tool(reader, f"{URDF_KEY}.tool", tool)
        F = F + _forces(reader, doc, coordinates, set(reader.names), input_set)
    else:
        M, F, links, gravity = _serial_arm_terms(reader, doc, coordinates, velocities, allowed - {s.name for s in coordinates}
                                 - {s.name for s in velocities} - {u.name for u in inputs},
                                 set(coordinates) | configuration_only)
        F = F + _forces(reader, doc, coordinates, set(reader.names), input_set)
    if motor:
        elastic = read_elastic(reader, doc, coordinates, motor, inputs,
                               set(coordinates) | configuration_only | set(motor))
        bad = sorted((M.free_symbols | F.free_symbols) & set(motor), key=str)
        if bad:
            raise reader.fail(form_key, f"depends on motor state {bad[0]}; the link side feels the motors "
                                        f"through the springs of {ELASTIC_KEY} only")
        return Mechanics(MECHANICAL_FORMS[form_key], tuple(coordinates), tuple(velocities), M, F,
                         sp.zeros(nq, m), tuple(links), gravity, None, elastic)
    B = _input_map(reader, doc, nq, m, set(reader.names), configuration_only)
    kinematics = _kinematics(reader, doc, form_key, coordinates, set(reader.names), input_set)
    return Mechanics(MECHANICAL_FORMS[form_key], tuple(coordinates), tuple(velocities), M, F, B,
                     tuple(links), gravity, kinematics)


def _kinematics(reader: Any, doc: Mapping, form_key: str, coordinates: list[sp.Symbol], allowed: set[str],
                inputs: set[sp.Symbol]) -> sp.Matrix | None:
    """q' = k(q, v) for quasi-velocities (mass-matrix form only); every coordinate needs an entry."""
    given = doc.get("kinematics")
    if given is None:
        return None
    if form_key != "mass_matrix":
        raise reader.fail("kinematics", "only the mass-matrix form takes kinematics (the energy and serial-arm "
                                        "forms use v = q')")
    if not isinstance(given, dict):
        raise reader.fail("kinematics", "expected a mapping of coordinate: rate expression")
    names = [q.name for q in coordinates]
    extra = [str(k) for k in given if k not in names]
    if extra:
        raise reader.fail(f"kinematics.{extra[0]}", f"{extra[0]!r} is not a coordinate")
    missing = [q for q in names if q not in given]
    if missing:
        raise reader.fail("kinematics", "missing an entry for coordinate(s) " + ", ".join(missing))
    return sp.Matrix([_expression_without(reader, f"kinematics.{q}", given[q], allowed, inputs,
                                          "kinematics relate coordinates and velocities only") for q in names])


def _sample_configurations(coordinates: list[sp.Symbol], envelope: Mapping[str, tuple[float, float]],
                           operating_point: Mapping[str, float], count: int, seed: int = 11) -> np.ndarray:
    """The operating point, then uniform random points of the envelope box (+-1 where unbounded)."""
    rng = np.random.default_rng(seed)
    center = np.array([operating_point[q.name] for q in coordinates], dtype=float)
    points = np.empty((count, len(coordinates)))
    for i, q in enumerate(coordinates):
        lo, hi = envelope.get(q.name, (center[i] - 1.0, center[i] + 1.0))
        points[:, i] = rng.uniform(lo, hi, size=count)
    points[0] = center
    return points


def check_mass_matrix(reader: Any, field: str, mechanics: Mechanics, parameters: Mapping[sp.Symbol, float],
                      envelope: Mapping[str, tuple[float, float]], operating_point: Mapping[str, float],
                      count: int = MASS_MATRIX_SAMPLES) -> None:
    """Refuse a mass matrix that is not symmetric positive definite at a sample point, naming it.

    Parameters
    ----------
    reader : the plant-file reader
    field : str
        The plant-file field the mass matrix came from.
    mechanics : Mechanics
    parameters : mapping
        Parameter symbol -> nominal value.
    envelope, operating_point : mapping
        By state name.
    count : int
        Number of points (the operating point first).
    """
    q = list(mechanics.coordinates)
    symbols = q + list(parameters)
    function = numeric_function(symbols, list(mechanics.M))
    nominal = [float(v) for v in parameters.values()]
    n = mechanics.nq
    for point in _sample_configurations(q, envelope, operating_point, count):
        where = ", ".join(f"{s.name}={v:.4g}" for s, v in zip(q, point))
        with np.errstate(all="ignore"):
            try:
                values = np.array(function(*point, *nominal), dtype=complex).reshape(n, n)
            except (ArithmeticError, ValueError, TypeError):
                raise reader.fail(field, f"the mass matrix cannot be evaluated at {where}") from None
        if not np.all(np.isfinite(values)) or np.any(np.abs(values.imag) > 1e-12 * (1 + np.abs(values.real))):
            raise reader.fail(field, f"the mass matrix is not finite and real at {where}")
        real = values.real
        scale = float(np.max(np.abs(real)))
        asymmetry = np.abs(real - real.T)
        if float(np.max(asymmetry)) > _SYMMETRY_TOLERANCE * (1.0 + scale):
            i, j = np.unravel_index(int(np.argmax(asymmetry)), asymmetry.shape)
            raise reader.fail(field, f"the mass matrix is not symmetric at {where}: M[{i}][{j}] = "
                                     f"{real[i, j]:.6g} but M[{j}][{i}] = {real[j, i]:.6g}")
        smallest = float(np.linalg.eigvalsh(real)[0])
        if not smallest > _SYMMETRY_TOLERANCE * scale or not math.isfinite(smallest):
            raise reader.fail(field, f"the mass matrix is not positive definite at {where} "
                                     f"(smallest eigenvalue {smallest:.6g})")
