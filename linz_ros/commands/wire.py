"""``linz wire``: the bringup parameter file of any plant or artifact (how the three nodes meet on topics).

The file has the layout of the bundled ``config/<plant>.yaml`` (``/linz_controller``,
``/linz_plant_sim`` and ``/linz_reference``, each with ``ros__parameters``): for an arm with joint
coordinates (a serial arm, a URDF chain, an elastic-joint arm) the state is a
``sensor_msgs/JointState`` (``position.<joint>``, ``velocity.<joint>``) and the command its
efforts, on ``/<plant>/joint_states`` and ``/<plant>/joint_efforts``; any other plant uses
``std_msgs/Float64MultiArray`` on ``/<plant>/state`` and ``/<plant>/command`` in the artifact's
order. The simulator runs at the design rate, the reference is the plant's own
(``design.reference``, else hold) on ``/<plant>/reference``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from linz_ros.errors import ConfigError

__all__ = ["WireResult", "bringup_text", "default_bringup_path", "render_wire", "topics_of", "wire", "STALE_PERIODS",
           "BRINGUP_SUFFIX"]

#: The controller's stale_after in control periods: three Python nodes sharing a small machine can
#: miss ten in a row (the bundled bringups say the same); on the robot keep the artifact's.
STALE_PERIODS = 25
#: Highest rate of the reference node (Hz): the controller carries the reference forward between messages.
REFERENCE_RATE = 100.0
#: Suffixes of a plant or artifact file, and of the bringup file written beside it.
_SOURCE_SUFFIXES = (".artifact.json", ".json", ".yaml", ".yml")
BRINGUP_SUFFIX = ".bringup.yaml"


@dataclass
class WireResult:
    """What ``linz wire`` wrote.

    Attributes
    ----------
    path : pathlib.Path
        The bringup parameter file.
    plant : str
    layout : str
        ``JointState`` (an arm's joints) or ``Float64MultiArray``.
    topics : dict of str -> str
        ``state``, ``command`` and ``reference`` topics.
    """

    path: Path
    plant: str
    layout: str
    topics: dict[str, str]


def default_bringup_path(source: str | Path) -> Path:
    """``<stem>.bringup.yaml`` beside a plant file or an artifact.

    Parameters
    ----------
    source : str or pathlib.Path

    Returns
    -------
    pathlib.Path

    Examples
    --------
    >>> default_bringup_path("robots/my_arm.yaml").as_posix()
    'robots/my_arm.bringup.yaml'
    >>> default_bringup_path("out/my_arm.artifact.json").name
    'my_arm.bringup.yaml'
    """
    path = Path(source)
    name = path.name
    for suffix in _SOURCE_SUFFIXES:
        if name.endswith(suffix) and len(name) > len(suffix):
            name = name[:-len(suffix)]
            break
    return path.with_name(name + BRINGUP_SUFFIX)


def _joints(artifact: Any) -> list[str] | None:
    """The state fields of an arm's JointState, or None when the plant is no arm with joints."""
    nq = artifact.mechanical_coordinates
    urdf = getattr(artifact, "urdf", None)
    if nq is None or not (artifact.mechanics_form in ("serial_arm", "urdf") or artifact.elastic or urdf is not None):
        return None
    states, inputs = artifact.plant_states, artifact.plant_inputs
    joints = list(urdf.joints) if urdf is not None else states[:nq]
    bodies = [joints]                      # links (their coordinates), then the motors behind elastic joints
    if artifact.elastic:
        bodies.append(states[2 * nq:3 * nq])
    if len(states) != 2 * nq * len(bodies) or len(inputs) != nq:
        return None
    return [f"{head}.{joint}" for names in bodies for head in ("position", "velocity") for joint in names]


def topics_of(artifact: Any) -> dict[str, str]:
    """The ``state``, ``command`` and ``reference`` topics of an artifact's bringup, named after the plant.

    Parameters
    ----------
    artifact : Artifact

    Returns
    -------
    dict of str -> str
    """
    name = artifact.name
    if _joints(artifact) is not None:
        return {"state": f"/{name}/joint_states", "command": f"/{name}/effort_controller/commands",
                "reference": f"/{name}/reference"}
    return {"state": f"/{name}/state", "command": f"/{name}/command", "reference": f"/{name}/reference"}


def _yaml(value: Any) -> str:
    """A YAML flow value (JSON is YAML): strings quoted, lists in brackets."""
    return json.dumps(value)


def bringup_text(artifact: Any, source: str) -> str:
    """The bringup parameter file of an artifact, as text.

    Parameters
    ----------
    artifact : Artifact
    source : str
        The plant file or artifact it came from (named in the file's first lines).

    Returns
    -------
    str
    """
    name, rate = artifact.name, artifact.rate
    joints = _joints(artifact)
    # an arm: the ros2_control layout (a joint_state_broadcaster's JointState in, an effort forward command
    # controller's Float64MultiArray out, in the artifact's input order); any other plant: arrays both ways
    state_kind = "sensor_msgs/msg/JointState" if joints is not None else "std_msgs/msg/Float64MultiArray"
    state_fields = joints if joints is not None else []
    topics = topics_of(artifact)
    reference = artifact.design_reference or "hold"
    wiring = [f"    state_topic: {_yaml(topics['state'])}", f"    state_type: {state_kind}",
              f"    state_fields: {_yaml(state_fields)}", f"    command_topic: {_yaml(topics['command'])}",
              "    command_type: std_msgs/msg/Float64MultiArray", "    command_fields: []"]
    order = ("states " + ", ".join(artifact.plant_states) + "; inputs " + ", ".join(artifact.plant_inputs))
    lines = [
        f"# Simulation bringup of {name}, written by `linz wire {source}`.",
        f"# The artifact comes from `linz build`; pass -p artifact:=PATH. Vectors in the artifact's order: {order}.",
        "/linz_controller:", "  ros__parameters:", *wiring,
        "    reference: topic", f"    reference_topic: {_yaml(topics['reference'])}", "    reference_timeout: 0.5",
        f"    stale_after: {STALE_PERIODS / rate:.6g}     # {STALE_PERIODS} control periods in simulation; on the "
        "robot, delete it to use the artifact's",
        "    autostart: true", "    diagnostics_period: 1.0",
        "/linz_plant_sim:", "  ros__parameters:", f"    rate: {float(rate)!r}", "    substeps: 4", *wiring,
        "/linz_reference:", "  ros__parameters:", f"    topic: {_yaml(topics['reference'])}",
        f"    reference: {_yaml(reference)}", f"    rate: {min(REFERENCE_RATE, float(rate))!r}", ""]
    return "\n".join(lines)


def wire(source: str, out: str | None = None, force: bool = False) -> WireResult:
    """Write the bringup parameter file of a plant file or an artifact.

    Parameters
    ----------
    source : str
        A plant file (built in memory) or an artifact (``*.json``).
    out : str, optional
        The file to write (default: ``<stem>.bringup.yaml`` beside ``source``).
    force : bool
        Replace an existing file.

    Returns
    -------
    WireResult

    Raises
    ------
    LinzError
        For a source that cannot be loaded or built, or an existing file without ``force``.
    """
    from linz_ros.commands._common import load_source
    from linz_ros.commands._options import DesignChoices

    path = Path(out) if out is not None else default_bringup_path(source)
    if path.exists() and not force:
        raise ConfigError("--force", f"{path} exists; pass --force to replace it")
    artifact = load_source(source, DesignChoices()).artifact
    text = bringup_text(artifact, source)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    except OSError as err:
        raise ConfigError("-o", f"cannot write {path}: {err.strerror or err}") from None
    return WireResult(path, artifact.name, "JointState" if _joints(artifact) is not None else "Float64MultiArray",
                      topics_of(artifact))


def render_wire(result: WireResult) -> str:
    """What ``linz wire`` prints.

    Parameters
    ----------
    result : WireResult

    Returns
    -------
    str
    """
    t = result.topics
    return (f"wrote {result.path}: {result.plant} over {result.layout} (state {t['state']}, command {t['command']}, "
            f"reference {t['reference']})\nrun it: linz demo PLANT --bringup {result.path}, or the nodes with "
            f"--ros-args --params-file {result.path} -p artifact:=ARTIFACT")
