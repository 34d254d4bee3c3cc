"""The plant's physics: our own integrator of the artifact's dynamics, or MuJoCo on the artifact's URDF.

``model`` (the default) integrates the artifact's own f and G (or M, F, B) with
:class:`~linz_ros.runtime.plant.NumericPlant` or its native twin: the controller's model is
the plant, so only sampling, limits and a deliberate ``mismatch`` separate them.

``mujoco`` hands the plant to an independent physics engine: the arm's URDF (recorded in the
artifact, checked against its hash) compiled by MuJoCo's own URDF import. The engine brings
what our model leaves out: joint limits as constraints (the URDF's ``<limit lower upper>``,
enforced), Coulomb joint friction (``<dynamics friction>`` as ``frictionloss``, a constraint),
viscous damping (``<dynamics damping>``) and the URDF's inertias as MuJoCo reads them (fixed
links merged into their parents by the engine, not by us). Contacts are switched off: a
URDF's collision shapes are coarse and often overlap at rest, and no floor or object is
described. The engine integrates with its own RK4 (``mjINT_RK4``), the same order as ours,
so a difference between the two physics is the model's, not the integrator's; its time step
is the control period over the sub-steps. The URDF is the engine's truth: parameter
mismatches of the plant file (``--mismatch``) do not reach it and are refused; edit the
URDF (or the plant file) to make the two differ.

MuJoCo is optional (the ``physics`` extra): it is imported only when a MuJoCo plant is made,
and asking for one without it is one line naming the extra.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence
from xml.etree import ElementTree

import numpy as np

from linz_ros.artifact._files import read_bounded
from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime.native import make_plant

__all__ = ["PHYSICS", "INSTALL_HINT", "EngineArm", "MujocoPlant", "make_physics_plant", "engine_arm",
           "import_mujoco", "advance_period"]

#: ``model``: our integrator of the artifact's dynamics (default); ``mujoco``: MuJoCo on the URDF.
PHYSICS = ("model", "mujoco")

#: What to install for ``mujoco`` physics (4.x on PyPI is a stub without the engine).
INSTALL_HINT = "pip install 'linz_ros[physics]' (or pip install 'mujoco>=3.2,<4')"

#: How closely the artifact's input map B must be the identity for joint torques to be its inputs.
_IDENTITY_TOLERANCE = 1e-12


def import_mujoco(field: str) -> Any:
    """The ``mujoco`` module, or a one-line refusal naming the extra to install.

    Parameters
    ----------
    field : str
        The option or parameter named in the refusal.

    Returns
    -------
    module

    Raises
    ------
    ConfigError
    """
    try:
        import mujoco
    except ImportError:
        raise ConfigError(field, f"mujoco physics needs MuJoCo, which is not installed here: {INSTALL_HINT}") from None
    if not hasattr(mujoco, "MjSpec"):
        raise ConfigError(field, f"MuJoCo {getattr(mujoco, '__version__', '?')} is too old or a stub (no MjSpec): "
                                 f"{INSTALL_HINT}")
    return mujoco


@dataclass(frozen=True)
class EngineArm:
    """What the engine needs of an arm: its URDF, its movable joints in state order, base and gravity.

    Attributes
    ----------
    urdf : pathlib.Path
    joints : tuple of str
        Movable joints in the order of the states (q then q') and of the inputs.
    base : str
        The link the gravity vector is written in.
    gravity : tuple of float
        m/s^2 in the base link's frame.
    """

    urdf: Path
    joints: tuple[str, ...]
    base: str
    gravity: tuple[float, float, float]


def engine_arm(artifact: Artifact, field: str = "physics") -> EngineArm:
    """The arm behind an artifact's URDF record, or a one-line refusal.

    Parameters
    ----------
    artifact : Artifact
    field : str
        Named in refusals.

    Returns
    -------
    EngineArm

    Raises
    ------
    ConfigError
        When the artifact has no URDF (only URDF arms have a physics other than ``model``).
    linz_ros.errors.ArtifactError
        When the recorded URDF is missing or changed since the build.
    """
    record = getattr(artifact, "urdf", None)
    if record is None:
        raise ConfigError(field, f"mujoco needs an arm described by a URDF; {artifact.name} has none (its plant "
                                 "file has no urdf: section): use model")
    return EngineArm(urdf=record.path(artifact), joints=tuple(record.joints), base=record.base,
                     gravity=record.gravity)


class MujocoPlant:
    """An arm simulated by MuJoCo from its URDF, with the interface of :class:`NumericPlant`.

    States are ``q`` then ``q'`` of the arm's joints in the artifact's order; inputs are the
    generalized forces on them (``qfrc_applied``: torques of revolute, forces of prismatic
    joints). :meth:`rk4` runs the engine's own RK4 (``mjINT_RK4``) with its time step set to h; there
    is no ``adaptive`` (``linz sim`` refuses ``--integrator scipy`` with this physics).

    Parameters
    ----------
    artifact : Artifact
        The controller's artifact: states, inputs and the check that B is the identity.
    arm : EngineArm, optional
        Default: from the artifact's URDF record (:func:`engine_arm`).
    field : str
        Named in refusals.

    Raises
    ------
    ConfigError
        MuJoCo missing, a URDF it cannot read, joints that do not match the artifact's,
        inputs that are not one generalized force per joint.
    """

    #: The name ``linz sim`` and the simulator node report for this plant.
    backend = "mujoco"

    def __init__(self, artifact: Artifact, arm: EngineArm | None = None, field: str = "physics") -> None:
        self.arm = arm = arm if arm is not None else engine_arm(artifact, field)    # no URDF: say so, not "install"
        self.mujoco = mujoco = import_mujoco(field)
        self.artifact = artifact
        self.n, self.m = len(artifact.plant_states), len(artifact.plant_inputs)
        #: Not used by the engine (the URDF is its truth); kept for the plant interface.
        self.parameters = list(artifact.nominal_parameters.tolist())
        nq = len(arm.joints)
        if artifact.extension is not None or artifact.mechanical_coordinates != nq or self.n != 2 * nq \
                or self.m != nq:
            raise ConfigError(field, f"the URDF's {nq} joints ({', '.join(arm.joints)}) do not match the artifact's "
                                     f"{self.n} states and {self.m} inputs (expected q and q' of each joint, one "
                                     "torque each)")
        _check_identity_input_map(artifact, field)
        self.model = _compile(mujoco, arm, field)
        self.data = mujoco.MjData(self.model)
        self._qpos, self._dof = _joint_addresses(mujoco, self.model, arm, field)
        self.model.opt.gravity[:] = _world_gravity(mujoco, self.model, arm, field)
        self.model.opt.integrator = mujoco.mjtIntegrator.mjINT_RK4
        self.model.opt.disableflags |= int(mujoco.mjtDisableBit.mjDSBL_CONTACT)

    @property
    def description(self) -> str:
        """One line: engine, version, what it models (for summaries and logs)."""
        return (f"physics: MuJoCo {self.mujoco.__version__} on {self.arm.urdf.name} (its RK4; joint limits, damping "
                "and friction by the engine; contacts off)")

    def _load(self, x: Sequence[float], u: Sequence[float] | None = None) -> None:
        nq, d = len(self._dof), self.data
        d.qpos[self._qpos] = [float(v) for v in x[:nq]]
        d.qvel[self._dof] = [float(v) for v in x[nq:2 * nq]]
        d.qfrc_applied[:] = 0.0
        if u is not None:
            d.qfrc_applied[self._dof] = [float(v) for v in u]

    def _state(self) -> list[float]:
        return self.data.qpos[self._qpos].tolist() + self.data.qvel[self._dof].tolist()

    def rk4(self, x: Sequence[float], u: Sequence[float], h: float, steps: int = 1) -> list[float]:
        """Advance by ``steps`` of the engine's RK4 steps of size h with u held.

        Parameters
        ----------
        x, u : sequence of float
        h : float
            The engine's time step for these steps.
        steps : int

        Returns
        -------
        list of float

        Raises
        ------
        ArithmeticError
            When the engine's state stops being finite (MuJoCo's own warning counters).
        """
        mujoco, model, data = self.mujoco, self.model, self.data
        if not (math.isfinite(h) and h > 0):
            raise ArithmeticError(f"step size {h} is not a positive number")
        model.opt.timestep = float(h)
        self._load(x, u)
        data.time = 0.0
        for _ in range(int(steps)):
            mujoco.mj_step(model, data)
        state = self._state()
        if data.warning[mujoco.mjtWarning.mjWARN_BADQACC].number > 0 or not all(math.isfinite(v) for v in state):
            data.warning[mujoco.mjtWarning.mjWARN_BADQACC].number = 0
            raise ArithmeticError("MuJoCo's accelerations stopped being finite")
        return state

    def mass_matrix(self, q: Sequence[float]) -> np.ndarray:
        """M(q) of the joints in state order, by MuJoCo (``mj_fullM``, armature included).

        Parameters
        ----------
        q : sequence of float

        Returns
        -------
        numpy.ndarray
        """
        mujoco, model, data = self.mujoco, self.model, self.data
        self._load(list(q) + [0.0] * len(self._dof))
        mujoco.mj_forward(model, data)
        full = np.zeros((model.nv, model.nv))
        try:
            mujoco.mj_fullM(model, data, full)             # MuJoCo 3.3 and later
        except TypeError:
            mujoco.mj_fullM(model, full, data.qM)          # earlier: the sparse matrix itself
        return full[np.ix_(self._dof, self._dof)]

    def generalized_forces(self, x: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
        """The bias forces C(q, q') q' + g(q) (``qfrc_bias``) and the passive ones (``qfrc_passive``: damping).

        Parameters
        ----------
        x : sequence of float
            q then q'.

        Returns
        -------
        bias, passive : numpy.ndarray
            In state order; the engine's equation is M q'' = u + passive - bias + constraint forces.
        """
        self._load(x)
        self.mujoco.mj_forward(self.model, self.data)
        return self.data.qfrc_bias[self._dof].copy(), self.data.qfrc_passive[self._dof].copy()


def _check_identity_input_map(artifact: Artifact, field: str) -> None:
    """Refuse an artifact whose inputs are not one generalized force per joint (B = I)."""
    program = artifact.programs["dynamics"]
    if "B" not in program.slots:
        raise ConfigError(field, f"mujoco needs a mechanical artifact (M, F, B); {artifact.name}'s dynamics are not")
    values = program(artifact.operating_point, artifact.nominal_parameters.tolist())
    slot = program.slots["B"]
    nq = artifact.mechanical_coordinates
    B = np.asarray(values[slot.offset:slot.offset + slot.size], dtype=float).reshape(nq, nq)
    if not np.allclose(B, np.eye(nq), rtol=0.0, atol=_IDENTITY_TOLERANCE):
        raise ConfigError(field, f"mujoco applies one generalized force per joint, but {artifact.name}'s inputs "
                                 "reach the joints through an input map B that is not the identity")


def _dynamics_only(text: bytes) -> str:
    """The URDF without ``<visual>`` and ``<collision>``: their meshes (``package://``) are not needed with
    contacts off, and inertias come from ``<inertial>`` only."""
    root = ElementTree.fromstring(text)
    for link in root.iter("link"):
        for child in [c for c in link if c.tag in ("visual", "collision")]:
            link.remove(child)
    return ElementTree.tostring(root, encoding="unicode")


def _compile(mujoco: Any, arm: EngineArm, field: str) -> Any:
    """The URDF as MuJoCo reads it, geometry stripped, fixed links kept as bodies (the base's frame stays known)."""
    try:
        spec = mujoco.MjSpec.from_string(_dynamics_only(read_bounded(arm.urdf, str(arm.urdf))))
        spec.compiler.fusestatic = False       # welded bodies: the same dynamics, the base link still named
        spec.compiler.inertiafromgeom = mujoco.mjtInertiaFromGeom.mjINERTIAFROMGEOM_FALSE
        return spec.compile()
    except ElementTree.ParseError as err:
        raise ConfigError(field, f"MuJoCo cannot load {arm.urdf}: not well-formed XML ({err})") from None
    except (ValueError, RuntimeError) as err:   # MuJoCo's parse and compile errors
        first = (str(err).strip().splitlines() or ["unknown error"])[0]
        raise ConfigError(field, f"MuJoCo cannot load {arm.urdf}: {first}") from None


def _joint_addresses(mujoco: Any, model: Any, arm: EngineArm, field: str) -> tuple[list[int], list[int]]:
    """qpos and dof addresses of the arm's joints, by name; refuse joints that do not match."""
    names = [mujoco.mj_id2name(model, mujoco.mjtObj.mjOBJ_JOINT, j) for j in range(model.njnt)]
    missing = [j for j in arm.joints if j not in names]
    extra = [j for j in names if j not in arm.joints]
    if missing or extra:
        problem = (f"joint(s) {', '.join(missing)} of the artifact are not movable joints of the URDF" if missing
                   else f"the URDF has movable joint(s) {', '.join(extra)} the artifact does not know")
        raise ConfigError(field, f"{arm.urdf.name}: {problem} (MuJoCo reads {', '.join(names) or 'none'})")
    qpos, dof = [], []
    for name in arm.joints:
        j = names.index(name)
        if int(model.jnt_type[j]) not in (int(mujoco.mjtJoint.mjJNT_HINGE), int(mujoco.mjtJoint.mjJNT_SLIDE)):
            raise ConfigError(field, f"{arm.urdf.name}: joint {name} is not revolute, continuous or prismatic")
        qpos.append(int(model.jnt_qposadr[j]))
        dof.append(int(model.jnt_dofadr[j]))
    return qpos, dof


def _world_gravity(mujoco: Any, model: Any, arm: EngineArm, field: str) -> np.ndarray:
    """The base-frame gravity written in MuJoCo's world frame (the URDF's root link)."""
    body = mujoco.mj_name2id(model, mujoco.mjtObj.mjOBJ_BODY, arm.base)
    if body < 0:
        raise ConfigError(field, f"{arm.urdf.name}: no link {arm.base!r} (the base)")
    data = mujoco.MjData(model)
    mujoco.mj_kinematics(model, data)
    rotation = data.xmat[body].reshape(3, 3)
    return rotation @ np.asarray(arm.gravity, dtype=float)


def make_physics_plant(artifact: Artifact, physics: str = "model", parameters: Sequence[float] | None = None,
                       backend: str = "native", field: str = "physics", mismatch_field: str = "mismatch"
                       ) -> tuple[Any, str | None]:
    """The plant of the chosen physics (and, for ``model``, of the chosen backend).

    Parameters
    ----------
    artifact : Artifact
    physics : {"model", "mujoco"}
    parameters : sequence of float, optional
        A parameter mismatch of ``model`` physics (None: the nominal ones); refused for ``mujoco`` (the
        URDF is the truth), even when it changes nothing (a URDF arm has no parameters to change).
    backend : {"native", "python"}
        Of ``model`` physics.
    field : str
        Named in refusals (``--physics`` or ``physics``).
    mismatch_field : str
        Where the parameters came from, named when a mismatch meets ``mujoco`` (``--mismatch`` or ``mismatch``).

    Returns
    -------
    plant : NumericPlant, NativePlant, ExtendedPlant or MujocoPlant
    note : str or None
        Why the native plant was not used, or what the engine is.

    Raises
    ------
    ConfigError
    """
    if physics not in PHYSICS:
        raise ConfigError(field, f"expected one of {', '.join(PHYSICS)}, got {physics!r}")
    if physics == "model":
        return make_plant(artifact, parameters, backend=backend)
    if parameters is not None:
        raise ConfigError(mismatch_field, f"applies to {field} model only: mujoco simulates the URDF as written "
                                          "(edit the URDF, or the plant file, to make them differ)")
    plant = MujocoPlant(artifact, field=field)
    return plant, None


def advance_period(plant: Any, x: Sequence[float], commands: tuple[Sequence[float], Sequence[float]],
                   fraction: float, period: float, substeps: int, integrator: str = "rk4") -> list[float]:
    """One control period of any physics: ``commands[0]`` acts for ``fraction`` seconds, then ``commands[1]``.

    Parameters
    ----------
    plant : NumericPlant, NativePlant, ExtendedPlant or MujocoPlant
    x : sequence of float
    commands : (before, after)
        The command still acting (a delay's fraction of a period), and the one after it.
    fraction : float
        Seconds of ``before`` (0: ``after`` for the whole period).
    period : float
    substeps : int
        Fixed steps a whole period (RK4, ours or the engine's).
    integrator : {"rk4", "scipy"}
        ``scipy``: the plant's adaptive RK45 (model physics only).

    Returns
    -------
    list of float
    """
    before, after = commands
    segments = [(fraction, before), (period - fraction, after)] if fraction > 0 else [(period, after)]
    x = list(x)
    for length, u in segments:
        if length <= 0:
            continue
        if integrator == "scipy":
            x = plant.adaptive(x, u, length)
        else:
            steps = max(1, int(round(substeps * length / period)))
            x = plant.rk4(x, u, length / steps, steps)
    return x
