"""The URDF a plant was built from, as an artifact records it (``plant.urdf``), and the names a URDF
joint gives to the plant's states and inputs.

Layout: ``plant.urdf = {file, sha256, base, tip, joints, gravity}``: the ``file`` as the plant
file wrote it (relative to the plant file, or absolute), the SHA-256 of its bytes, the base and tip
links of the chain, its movable joints in state order and gravity [gx, gy, gz] (m/s^2) in the
base link's frame, as the model was built with it. A URDF plant's states are
``q_<joint> ...`` then ``qd_<joint> ...`` and its inputs ``tau_<joint>`` (a torque, or a force
for a prismatic joint), where ``<joint>`` is the URDF joint name with every character other
than a letter, digit or ``_`` replaced by ``_`` (:func:`joint_identifier`). numpy-free.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from linz_ros.artifact._files import bounded_sha256
from linz_ros.errors import ArtifactError

__all__ = ["UrdfRecord", "joint_identifier", "urdf_names", "urdf_problem", "URDF_KEYS", "MAX_URDF_NAME"]

URDF_KEYS = ("file", "sha256", "base", "tip", "joints", "gravity")
#: Longest link or joint name (characters) that a plant file, an artifact or a message carries.
MAX_URDF_NAME = 100
_NOT_IDENTIFIER = re.compile(r"[^A-Za-z0-9_]")
_SHA256 = re.compile(r"^[0-9a-f]{64}\Z")


def joint_identifier(name: str) -> str:
    """A URDF joint name as it appears in state and input names (``a-b.c`` -> ``a_b_c``).

    Parameters
    ----------
    name : str

    Returns
    -------
    str

    Examples
    --------
    >>> joint_identifier("wrist-1.joint")
    'wrist_1_joint'
    """
    return _NOT_IDENTIFIER.sub("_", name)


def urdf_names(joints: list[str]) -> tuple[list[str], list[str], list[str]]:
    """The coordinates, velocities and inputs of a URDF plant with these movable joints.

    Parameters
    ----------
    joints : list of str
        URDF joint names in chain order.

    Returns
    -------
    tuple of list of str
        ``q_<joint>``, ``qd_<joint>``, ``tau_<joint>``.

    Examples
    --------
    >>> urdf_names(["shoulder", "elbow"])
    (['q_shoulder', 'q_elbow'], ['qd_shoulder', 'qd_elbow'], ['tau_shoulder', 'tau_elbow'])
    """
    ids = [joint_identifier(j) for j in joints]
    return [f"q_{j}" for j in ids], [f"qd_{j}" for j in ids], [f"tau_{j}" for j in ids]


def _is_name(value: Any) -> bool:
    return isinstance(value, str) and 0 < len(value) <= MAX_URDF_NAME and value.isprintable()


def urdf_problem(section: Any, states: list[str], inputs: list[str]) -> tuple[str, str] | None:
    """What is wrong with an artifact's ``plant.urdf`` section, or None.

    Parameters
    ----------
    section : Any
        The section as read from the JSON.
    states, inputs : list of str
        The artifact's plant states and inputs.

    Returns
    -------
    (field, problem) or None
    """
    if not isinstance(section, dict):
        return "", "expected a mapping with " + ", ".join(URDF_KEYS)
    keys = set(section)
    if keys != set(URDF_KEYS):
        odd = sorted(keys - set(URDF_KEYS)) or sorted(set(URDF_KEYS) - keys)
        return "", f"expected exactly the keys {', '.join(URDF_KEYS)} ({str(odd[0])[:40]!r} differs)"
    file = section["file"]
    if not isinstance(file, str) or not file or len(file) > 4096 or not file.isprintable():
        return "file", "expected the URDF file name as the plant file wrote it"
    if not isinstance(section["sha256"], str) or not _SHA256.match(section["sha256"]):
        return "sha256", "expected 64 lowercase hexadecimal digits"
    for key in ("base", "tip"):
        if not _is_name(section[key]):
            return key, f"expected a link name of 1 to {MAX_URDF_NAME} printable characters"
    joints = section["joints"]
    if not (isinstance(joints, list) and joints and all(_is_name(j) for j in joints)
            and len(set(joints)) == len(joints)):
        return "joints", "expected a non-empty list of distinct joint names"
    gravity = section["gravity"]
    if not (isinstance(gravity, list) and len(gravity) == 3
            and all(isinstance(g, (int, float)) and not isinstance(g, bool) and math.isfinite(g) for g in gravity)):
        return "gravity", "expected [gx, gy, gz] (finite numbers, m/s^2)"
    q, qd, tau = urdf_names(joints)
    if states[:2 * len(joints)] != q + qd:
        return "joints", "the plant's states are not q_<joint> then qd_<joint> of these joints"
    if inputs != tau:
        return "joints", "the plant's inputs are not tau_<joint> of these joints"
    return None


@dataclass(frozen=True)
class UrdfRecord:
    """The URDF an artifact was built from (``Artifact.urdf``).

    Attributes
    ----------
    file : str
        As the plant file wrote it (relative to the plant file, or absolute).
    sha256 : str
        Of the URDF's bytes at build time.
    base, tip : str
        The chain's links.
    joints : tuple of str
        Movable joints in state order (URDF names).
    gravity : tuple of float
        m/s^2 in the base link's frame, as the model was built with it.
    """

    file: str
    sha256: str
    base: str
    tip: str
    joints: tuple[str, ...]
    gravity: tuple[float, float, float]

    @classmethod
    def from_json(cls, section: dict[str, Any]) -> "UrdfRecord":
        """The record from a checked ``plant.urdf`` section.

        Parameters
        ----------
        section : dict

        Returns
        -------
        UrdfRecord
        """
        return cls(section["file"], section["sha256"], section["base"], section["tip"], tuple(section["joints"]),
                   tuple(float(g) for g in section["gravity"]))

    def path(self, artifact: Any) -> Path:
        """The URDF file, resolved relative to the plant file the artifact records, with its hash checked.

        Parameters
        ----------
        artifact : Artifact

        Returns
        -------
        pathlib.Path

        Raises
        ------
        ArtifactError
            One line when the plant file or the URDF cannot be found or read, or the URDF's hash
            differs from the one recorded at build time.
        """
        source = artifact.source
        if os.path.isabs(self.file):
            candidates = [Path(self.file)]
        else:
            candidates = [plant.parent / self.file for plant in artifact.recorded_plant_files() if plant.is_file()]
            if not candidates and artifact.plant_source and Path(artifact.plant_source).is_file():
                candidates = [Path(artifact.plant_source).parent / self.file]    # built in memory (linz sim PLANT)
        if not candidates:
            raise ArtifactError(source, f"plant.urdf: the plant file is not found, so the URDF {self.file!r} "
                                        "(relative to it) cannot be located")
        where = candidates[0].resolve()
        try:
            digest = bounded_sha256(where, str(where))
        except ArtifactError as err:
            raise ArtifactError(source, f"plant.urdf: {where}: {err.problem}") from None
        if digest != self.sha256:
            raise ArtifactError(source, f"plant.urdf: {where} has changed since this artifact was built "
                                        "(its sha256 differs); rebuild with linz build")
        return where
