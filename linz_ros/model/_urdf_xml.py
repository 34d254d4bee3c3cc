"""Reading a plain URDF file into the chain from a base link to a tip link (numbers only; the
plant-file section and the symbolic model are in ``_urdf``).

Standard library ``xml.etree.ElementTree`` after the bounded read; a DOCTYPE or ENTITY
declaration (entity expansion) and xacro are refused before parsing. Each link has at most
one parent joint and no cycle (a tree); fixed joints on the chain, and links fixed to a body
off the chain, merge into the body before them; a movable joint off the chain is refused.
Every mistake is one ``PlantFileError`` naming the URDF, the element and attribute, the problem.
"""

from __future__ import annotations

import math
import re
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from linz_ros.artifact.urdf import MAX_URDF_NAME, joint_identifier
from linz_ros.errors import PlantFileError

__all__ = ["UrdfJoint", "ChainBody", "read_urdf_text", "rpy_matrix"]

_MOVABLE = {"revolute": "revolute", "continuous": "revolute", "prismatic": "prismatic"}
_REFUSED = {"floating": "a floating joint has six degrees of freedom (a mobile base), not one; start the chain "
                        "at the link after it",
            "planar": "a planar joint has three degrees of freedom, not one; start the chain at the link after it"}
_XACRO_TAG = re.compile(r"<\s*xacro:")
_XACRO_EXPRESSION = re.compile(r"\$\{|\$\(")
_XACRO_MESSAGE = ("holds xacro (xacro: elements or ${...}/$(...) expressions); expand it first: "
                  "xacro file.urdf.xacro > file.urdf (with a ROS distribution)")
_DECLARATION = re.compile(r"<!\s*(DOCTYPE|ENTITY)", re.IGNORECASE)


@dataclass(frozen=True)
class UrdfJoint:
    """A movable joint of the chain, as the plant keeps it (``Mechanics.links``)."""

    name: str
    kind: str                      # revolute (also continuous) or prismatic
    urdf_type: str
    damping: float
    friction: float
    lower: float | None = None
    upper: float | None = None
    velocity: float | None = None
    effort: float | None = None


@dataclass
class _Joint:
    name: str
    kind: str
    parent: str
    child: str
    rotation: np.ndarray
    offset: np.ndarray
    axis: np.ndarray
    element: Any


@dataclass
class _Inertial:
    mass: float = 0.0
    com: np.ndarray = field(default_factory=lambda: np.zeros(3))
    inertia: np.ndarray = field(default_factory=lambda: np.zeros((3, 3)))

    def moved(self, rotation: np.ndarray, offset: np.ndarray) -> "_Inertial":
        """The same body seen from a frame in which its frame has this rotation and offset."""
        return _Inertial(self.mass, rotation @ self.com + offset, rotation @ self.inertia @ rotation.T)

    def plus(self, other: "_Inertial") -> "_Inertial":
        """Two rigidly joined bodies as one (parallel-axis theorem about the joint centre of mass)."""
        mass = self.mass + other.mass
        if mass == 0.0:
            return _Inertial(0.0, np.zeros(3), self.inertia + other.inertia)
        com = (self.mass * self.com + other.mass * other.com) / mass
        inertia = np.zeros((3, 3))
        for part in (self, other):
            d = part.com - com
            inertia += part.inertia + part.mass * (d @ d * np.eye(3) - np.outer(d, d))
        return _Inertial(mass, com, inertia)


@dataclass(frozen=True)
class ChainBody:
    """A movable joint, its frame in the previous body's and the (merged) body it moves."""

    joint: UrdfJoint
    rotation: np.ndarray      # joint frame in the previous body's frame
    offset: np.ndarray
    axis: np.ndarray
    inertial: _Inertial


class _Urdf:
    """One URDF document; ``fail`` names the file and the element."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, where: str, problem: str) -> PlantFileError:
        return PlantFileError(self.source, where, problem)

    def name(self, element: Any, what: str) -> str:
        name = element.get("name")
        if name is None or not name.strip():
            raise self.fail(f"<{what}>", "has no name attribute")
        if len(name) > MAX_URDF_NAME or not name.isprintable():
            raise self.fail(f"<{what}> name", f"expected at most {MAX_URDF_NAME} printable characters")
        return name

    def numbers(self, element: Any, attribute: str, where: str, count: int, default: str | None) -> np.ndarray:
        text = element.get(attribute, default) if element is not None else default
        if text is None:
            raise self.fail(where, f"missing attribute {attribute}")
        parts = text.split()
        try:
            values = [float(p) for p in parts]
        except ValueError:
            values = []
        if len(parts) != count or len(values) != count or not all(math.isfinite(v) for v in values):
            kind = "a finite number" if count == 1 else f"{count} finite numbers"
            raise self.fail(f"{where} {attribute}", f"expected {kind}, got {text[:40]!r}")
        return np.array(values)

    def number(self, element: Any, attribute: str, where: str, default: float | None = None,
               minimum: float | None = None) -> float | None:
        if element is None or element.get(attribute) is None:
            return default
        value = float(self.numbers(element, attribute, where, 1, None)[0])
        if minimum is not None and value < minimum:
            raise self.fail(f"{where} {attribute}", f"must not be negative, got {value:g}")
        return value

    def origin(self, parent: Any, where: str) -> tuple[np.ndarray, np.ndarray]:
        origin = parent.find("origin")
        xyz = self.numbers(origin, "xyz", f"{where} <origin>", 3, "0 0 0")
        rpy = self.numbers(origin, "rpy", f"{where} <origin>", 3, "0 0 0")
        return rpy_matrix(*rpy), xyz


def rpy_matrix(roll: float, pitch: float, yaw: float) -> np.ndarray:
    """R = Rz(yaw) Ry(pitch) Rx(roll): URDF's fixed-axis roll, pitch, yaw.

    Parameters
    ----------
    roll, pitch, yaw : float
        Radians.

    Returns
    -------
    numpy.ndarray
        3 x 3.
    """
    cr, sr, cp, sp_, cy, sy = (math.cos(roll), math.sin(roll), math.cos(pitch), math.sin(pitch),
                               math.cos(yaw), math.sin(yaw))
    return np.array([[cy * cp, cy * sp_ * sr - sy * cr, cy * sp_ * cr + sy * sr],
                     [sy * cp, sy * sp_ * sr + cy * cr, sy * sp_ * cr - cy * sr],
                     [-sp_, cp * sr, cp * cr]])


def _inertial(doc: _Urdf, link: Any, name: str) -> _Inertial:
    element = link.find("inertial")
    if element is None:
        return _Inertial()
    where = f"link {name!r} <inertial>"
    rotation, offset = doc.origin(element, where)
    mass_element = element.find("mass")
    if mass_element is None:
        raise doc.fail(where, "has no <mass>")
    mass = doc.number(mass_element, "value", f"{where} <mass>", None, minimum=0.0)
    if mass is None:
        raise doc.fail(f"{where} <mass>", "missing attribute value")
    tensor = element.find("inertia")
    if tensor is None:
        raise doc.fail(where, "has no <inertia>")
    keys = ("ixx", "ixy", "ixz", "iyy", "iyz", "izz")
    ixx, ixy, ixz, iyy, iyz, izz = (doc.number(tensor, k, f"{where} <inertia>", 0.0) for k in keys)
    inertia = np.array([[ixx, ixy, ixz], [ixy, iyy, iyz], [ixz, iyz, izz]])
    _check_inertia(doc, f"{where} <inertia>", inertia)
    return _Inertial(mass, offset, rotation @ inertia @ rotation.T)


def _check_inertia(doc: _Urdf, where: str, inertia: np.ndarray) -> None:
    """Positive definite, and principal moments that a rigid body can have (a + b >= c); all zero is a point mass."""
    if not inertia.any():
        return
    moments = np.linalg.eigvalsh(inertia)
    scale = float(np.max(np.abs(moments)))
    if not moments[0] > 1e-12 * scale:
        raise doc.fail(where, f"not positive definite (principal moments {', '.join(f'{m:.6g}' for m in moments)})")
    if moments[0] + moments[1] < moments[2] * (1 - 1e-9):
        raise doc.fail(where, f"principal moments {moments[0]:.6g}, {moments[1]:.6g}, {moments[2]:.6g} break the "
                              "triangle inequality (a + b >= c); no rigid body has them")


def _joint(doc: _Urdf, element: Any, links: Mapping[str, Any]) -> _Joint:
    name = doc.name(element, "joint")
    where = f"joint {name!r}"
    kind = element.get("type")
    if kind not in _MOVABLE and kind not in _REFUSED and kind != "fixed":
        raise doc.fail(f"{where} type", f"unknown joint type {str(kind)[:40]!r}; expected revolute, continuous, "
                                        "prismatic or fixed (floating and planar are refused)")
    ends = []
    for tag in ("parent", "child"):
        end = element.find(tag)
        link = None if end is None else end.get("link")
        if link is None:
            raise doc.fail(f"{where} <{tag}>", "missing (with attribute link)")
        if link not in links:
            raise doc.fail(f"{where} <{tag}> link", f"{link[:MAX_URDF_NAME]!r} is not a link of the robot")
        ends.append(link)
    if ends[0] == ends[1]:
        raise doc.fail(f"{where} <child> link", f"{ends[0]!r} is also its parent (a closed loop)")
    rotation, offset = doc.origin(element, where)
    axis = doc.numbers(element.find("axis"), "xyz", f"{where} <axis>", 3, "1 0 0")
    return _Joint(name, kind, ends[0], ends[1], rotation, offset, axis, element)


def _movable(doc: _Urdf, joint: _Joint) -> tuple[UrdfJoint, np.ndarray]:
    """The chain's record of a movable joint and its unit axis."""
    where = f"joint {joint.name!r}"
    if joint.kind in _REFUSED:
        raise doc.fail(f"{where} type", f"{joint.kind} refused: {_REFUSED[joint.kind]}")
    if joint.element.find("mimic") is not None:
        raise doc.fail(f"{where} <mimic>", "mimic joints are not supported (each joint of the chain has its own "
                                           "coordinate and input)")
    norm = float(np.linalg.norm(joint.axis))
    if not norm > 1e-12:
        raise doc.fail(f"{where} <axis> xyz", "is zero; a joint needs a direction")
    limit = joint.element.find("limit")
    lower = upper = velocity = effort = None
    if limit is not None:
        velocity = doc.number(limit, "velocity", f"{where} <limit>", None, minimum=0.0) or None
        effort = doc.number(limit, "effort", f"{where} <limit>", None, minimum=0.0) or None
        if joint.kind != "continuous" and (limit.get("lower") is not None or limit.get("upper") is not None):
            lower = doc.number(limit, "lower", f"{where} <limit>", 0.0)
            upper = doc.number(limit, "upper", f"{where} <limit>", 0.0)
            if not lower < upper:
                raise doc.fail(f"{where} <limit>", f"lower {lower:g} is not below upper {upper:g}")
    dynamics = joint.element.find("dynamics")
    damping = doc.number(dynamics, "damping", f"{where} <dynamics>", 0.0, minimum=0.0)
    friction = doc.number(dynamics, "friction", f"{where} <dynamics>", 0.0, minimum=0.0)
    record = UrdfJoint(joint.name, _MOVABLE[joint.kind], joint.kind, damping, friction, lower, upper, velocity, effort)
    return record, joint.axis / norm


def _read_xml(text: str) -> tuple[Any, list[tuple[str, str]]]:
    """The root element and the namespace declarations (prefix, uri) of the document."""
    parser = ET.XMLPullParser(events=("start-ns", "end"))
    parser.feed(text)
    parser.close()
    prefixes, root = [], None
    for event, item in parser.read_events():
        if event == "start-ns":
            prefixes.append(item)
        else:
            root = item
    if root is None:
        raise ET.ParseError("no element found")
    return root, prefixes


def _is_xacro(root: Any, prefixes: list[tuple[str, str]]) -> bool:
    """xacro in the parsed document (comments and text aside): its namespace, its elements or attributes,
    or ``${...}``/``$(...)`` in an attribute value."""
    if any(prefix == "xacro" or "xacro" in uri for prefix, uri in prefixes):
        return True
    for element in root.iter():
        if isinstance(element.tag, str) and "xacro" in element.tag:
            return True
        if any("xacro" in key or _XACRO_EXPRESSION.search(value) for key, value in element.attrib.items()):
            return True
    return False


def _parse(text: str, source: str) -> tuple[_Urdf, dict[str, Any], dict[str, _Joint]]:
    doc = _Urdf(source)
    if _DECLARATION.search(text):
        raise doc.fail("", "declares a DOCTYPE or ENTITY; refused (entity expansion); plain URDF needs neither")
    try:
        root, prefixes = _read_xml(text)
    except ET.ParseError as err:
        if _XACRO_TAG.search(text):             # an undeclared xacro: prefix is what made it unreadable
            raise doc.fail("", _XACRO_MESSAGE) from None
        raise doc.fail("", f"not well-formed XML: {err}") from None
    if _is_xacro(root, prefixes):
        raise doc.fail("", _XACRO_MESSAGE)
    if root.tag != "robot":
        raise doc.fail(f"<{str(root.tag)[:40]}>", "expected <robot> as the root element of a URDF")
    links: dict[str, Any] = {}
    for element in root.findall("link"):
        name = doc.name(element, "link")
        if name in links:
            raise doc.fail(f"link {name!r}", "defined twice")
        links[name] = element
    joints: dict[str, _Joint] = {}
    for element in root.findall("joint"):
        joint = _joint(doc, element, links)
        if joint.name in joints:
            raise doc.fail(f"joint {joint.name!r}", "defined twice")
        joints[joint.name] = joint
    return doc, links, joints


def _parents(doc: _Urdf, joints: dict[str, _Joint]) -> dict[str, _Joint]:
    """Each link's parent joint, refusing a link with two parents or a cycle (URDF describes a tree)."""
    parent_joint: dict[str, _Joint] = {}
    for joint in joints.values():
        if joint.child in parent_joint:
            raise doc.fail(f"joint {joint.name!r} <child> link", f"{joint.child!r} is already the child of joint "
                                                                 f"{parent_joint[joint.child].name!r} (a closed "
                                                                 "loop; URDF describes a tree)")
        parent_joint[joint.child] = joint
    rooted: set[str] = set()
    for start in parent_joint:
        walked, link = [], start
        while link in parent_joint and link not in rooted:
            if link in walked:
                raise doc.fail(f"joint {parent_joint[link].name!r}", f"closes a loop through link {link!r} "
                                                                     "(URDF describes a tree)")
            walked.append(link)
            link = parent_joint[link].parent
        rooted.update(walked)
    return parent_joint


def _path(doc: _Urdf, joints: dict[str, _Joint], base: str, tip: str) -> list[_Joint]:
    """The joints from base to tip, walking up from the tip."""
    parent_joint = _parents(doc, joints)
    path, link = [], tip
    while link != base:
        joint = parent_joint.get(link)
        if joint is None:
            raise doc.fail("", f"tip link {tip!r} is not reachable from base link {base!r} (walking up from the "
                               f"tip ends at the root {link!r})")
        path.append(joint)
        link = joint.parent
    return path[::-1]


def _check_ground(doc: _Urdf, joints: dict[str, _Joint], base: str, path: list[_Joint]) -> None:
    """Refuse what the plant would not hold still: a joint other than fixed between the base and the root,
    and a movable joint hanging off the ground (the base, the links above it and those fixed to it)."""
    parent_joint = _parents(doc, joints)
    above, link = [], base
    while link in parent_joint:
        above.append(parent_joint[link])
        link = parent_joint[link].parent
    for joint in above:
        if joint.kind != "fixed":
            raise doc.fail(f"joint {joint.name!r}", f"a {joint.kind} joint between the base link {base!r} and the "
                                                    f"root {link!r}; the base must be fixed to the world (make it "
                                                    "fixed, or choose a base above it)")
    ground = {base} | {j.parent for j in above}
    for joint in path:
        if joint.kind != "fixed":
            break
        ground.add(joint.child)
    known = {j.name for j in above} | {j.name for j in path}
    stack = [j for j in joints.values() if j.parent in ground and j.name not in known]
    while stack:
        joint = stack.pop()
        if joint.kind != "fixed":
            raise doc.fail(f"joint {joint.name!r}", f"a {joint.kind} joint hangs off the ground at link "
                                                    f"{joint.parent!r} (the base and the links fixed to it); only "
                                                    "fixed joints may (make it fixed, or choose a base and tip "
                                                    "that include it)")
        stack.extend(j for j in joints.values() if j.parent == joint.child)


def _hanging(doc: _Urdf, children: Mapping[str, list[_Joint]], inertials: dict[str, _Inertial], link: str,
             on_chain: set[str]) -> _Inertial:
    """The inertial of ``link`` and everything fixed to it off the chain, in ``link``'s frame."""
    total = inertials[link]
    stack = [(j, np.eye(3), np.zeros(3)) for j in children.get(link, []) if j.name not in on_chain]
    while stack:
        joint, rotation, offset = stack.pop()
        if joint.kind != "fixed":
            raise doc.fail(f"joint {joint.name!r}", f"a {joint.kind} joint hangs off the chain at link "
                                                    f"{joint.parent!r}; only fixed joints may (make it fixed, or "
                                                    "choose the tip beyond it)")
        R, p = rotation @ joint.rotation, rotation @ joint.offset + offset
        total = total.plus(inertials[joint.child].moved(R, p))
        stack.extend((j, R, p) for j in children.get(joint.child, []))
    return total


def _bodies(doc: _Urdf, joints: dict[str, _Joint], inertials: dict[str, _Inertial], path: list[_Joint]
            ) -> tuple[list[ChainBody], np.ndarray, np.ndarray]:
    """Movable joints with the bodies they move (fixed joints merged), and the tip in the last body's frame.

    Links fixed to the base (before the first movable joint) and whatever hangs off them are the
    ground and are left out.
    """
    on_chain = {j.name for j in path}
    children: dict[str, list[_Joint]] = {}
    for joint in joints.values():
        children.setdefault(joint.parent, []).append(joint)
    rotation, offset = np.eye(3), np.zeros(3)          # the current link in the current body's frame
    pending: list[list[Any]] = []                      # [record, rotation, offset, axis, inertial]
    for joint in path:
        R, p = rotation @ joint.rotation, rotation @ joint.offset + offset
        if joint.kind == "fixed":
            rotation, offset = R, p
            if pending:
                child = _hanging(doc, children, inertials, joint.child, on_chain)
                pending[-1][4] = pending[-1][4].plus(child.moved(R, p))
            continue
        record, axis = _movable(doc, joint)
        pending.append([record, R, p, axis, _hanging(doc, children, inertials, joint.child, on_chain)])
        rotation, offset = np.eye(3), np.zeros(3)
    if not pending:
        raise doc.fail("", "no movable joint between base and tip")
    return [ChainBody(*entry) for entry in pending], rotation, offset


def read_urdf_text(raw: bytes, source: str, base: str, tip: str, path_names: list[str]
                   ) -> tuple[tuple[UrdfJoint, ...], tuple[ChainBody, ...], np.ndarray, np.ndarray]:
    """Parse URDF bytes into the chain from ``base`` to ``tip``.

    Parameters
    ----------
    raw : bytes
        The file's contents.
    source : str
        Named in error messages.
    base, tip : str
        Link names.
    path_names : list of str
        Receives the names of every joint on the chain, fixed ones included.

    Returns
    -------
    tuple
        The movable joints, the bodies they move, and the tip link's rotation and offset in the
        last body's frame.

    Raises
    ------
    PlantFileError
        One line naming the URDF, the element or attribute and the problem.
    """
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise PlantFileError(source, "", f"not UTF-8 text (byte {err.start})") from None
    doc, links, joints = _parse(text, source)
    for role, link in (("base", base), ("tip", tip)):
        if link not in links:
            raise doc.fail("", f"no link {link[:MAX_URDF_NAME]!r} (the {role} named in the plant file)")
    if base == tip:
        raise doc.fail("", f"base and tip are the same link {base!r}; the chain needs a joint")
    path = _path(doc, joints, base, tip)
    path_names.extend(j.name for j in path)
    _check_ground(doc, joints, base, path)
    inertials = {name: _inertial(doc, element, name) for name, element in links.items()}
    bodies, rotation, offset = _bodies(doc, joints, inertials, path)
    if len({joint_identifier(b.joint.name) for b in bodies}) != len(bodies):
        names = [b.joint.name for b in bodies]
        clash = next(n for n in names if sum(joint_identifier(m) == joint_identifier(n) for m in names) > 1)
        raise doc.fail(f"joint {clash!r}", f"its name and another's both become q_{joint_identifier(clash)} "
                                           "(characters other than letters, digits and _ become _)")
    return tuple(b.joint for b in bodies), tuple(bodies), rotation, offset
