"""The internal plant: a control-affine model dx/dt = f(x) + G(x) u with outputs y = h(x)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import sympy as sp

__all__ = ["Plant", "Mechanics", "UrdfSource"]


@dataclass(frozen=True)
class UrdfSource:
    """The URDF a plant's model was read from (the ``urdf`` section of the plant file).

    Attributes
    ----------
    file : str
        As the plant file wrote it (relative to the plant file's folder, or absolute).
    path : str
        The file it resolved to.
    sha256 : str
        Of the URDF's bytes.
    base, tip : str
        The links that end the chain.
    joints : tuple of str
        The chain's movable joints (URDF names), in state order.
    gravity : tuple of float
        m/s^2 in the base link's frame (the plant file's ``urdf.gravity`` or its default).
    """

    file: str
    path: str
    sha256: str
    base: str
    tip: str
    joints: tuple[str, ...]
    gravity: tuple[float, float, float]

    def to_json(self) -> dict[str, Any]:
        """The artifact's ``plant.urdf`` section.

        Returns
        -------
        dict
            ``file``, ``sha256``, ``base``, ``tip``, ``joints``, ``gravity``.
        """
        return {"file": self.file, "sha256": self.sha256, "base": self.base, "tip": self.tip,
                "joints": list(self.joints), "gravity": [float(g) for g in self.gravity]}


@dataclass(frozen=True)
class Mechanics:
    """A mechanical plant's structure: ``M(q) v' = F(q, v) + B(q) u`` with ``q' = k(q, v)``.

    The states are the coordinates q followed by the velocities v (v = q' unless
    kinematics are given, as for a vessel in the vectorial form). M is never inverted
    symbolically: the analysis and the runtime work with M, F, B and the output
    Jacobian numerically.

    Attributes
    ----------
    form : {"mass_matrix", "energy", "serial_arm", "urdf"}
        The plant-file form the model came from.
    coordinates, velocities : tuple of sympy.Symbol
    M : sympy.Matrix
        Mass matrix, nq x nq, in q and the parameters.
    F : sympy.Matrix
        Generalized forces other than the inputs (Coriolis, gravity, friction), nq x 1.
    B : sympy.Matrix
        Input map, nq x m, in q and the parameters.
    links : tuple
        The DH table of a serial arm (``Link``), or the movable joints of a URDF chain
        (``model._urdf.UrdfJoint``; each has ``kind``, ``name``, ``damping``); empty for the other forms.
    gravity : sympy.Matrix or None
        A serial arm's gravity vector in its base frame.
    kinematics : sympy.Matrix or None
        q' = k(q, v) when the velocities v are quasi-velocities (a vessel's body-frame
        surge, sway and yaw rate); None when v = q'.
    elastic : Elastic or None
        The motor side of an elastic-joint arm (``model._elastic``): the states are then
        (q, q', theta, theta'), B is zero and the spring K (theta - q) drives the links.
    """

    form: str
    coordinates: tuple[sp.Symbol, ...]
    velocities: tuple[sp.Symbol, ...]
    M: sp.Matrix
    F: sp.Matrix
    B: sp.Matrix
    links: tuple[Any, ...] = ()
    gravity: sp.Matrix | None = None
    kinematics: sp.Matrix | None = None
    elastic: Any = None

    @property
    def nq(self) -> int:
        """Number of generalized coordinates."""
        return len(self.coordinates)

    @property
    def coordinate_rates(self) -> sp.Matrix:
        """q' as a column: the kinematics k(q, v) when given, else the velocities themselves."""
        return sp.Matrix(self.velocities) if self.kinematics is None else sp.Matrix(self.kinematics)

    def output_jacobian(self, h: sp.Matrix) -> sp.Matrix:
        """J(q) = dh/dq for outputs h(q)."""
        return sp.Matrix(h).jacobian(sp.Matrix(self.coordinates))

    def output_rates(self, h: sp.Matrix) -> sp.Matrix:
        """y' = J(q) q' (with q' = k(q, v) for quasi-velocities)."""
        return self.output_jacobian(h) * self.coordinate_rates

    def decoupling_jacobian(self, h: sp.Matrix) -> sp.Matrix:
        """dy'/dv: the factor in front of M^-1 B in y'' (J, or J K for quasi-velocities)."""
        return self.output_rates(h).jacobian(sp.Matrix(self.velocities))

    def output_bias(self, h: sp.Matrix) -> sp.Matrix:
        """The part of y'' that does not depend on v': (dy'/dq) q'."""
        return self.output_rates(h).jacobian(sp.Matrix(self.coordinates)) * self.coordinate_rates


@dataclass(frozen=True)
class Plant:
    """A validated plant, symbolic in its states, inputs and parameters.

    Attributes
    ----------
    name, description : str
        Identifier and free text from the plant file.
    states, inputs : tuple of sympy.Symbol
        In the order of the file.
    parameters : dict
        Parameter symbol -> nominal value (float, SI units).
    units : dict
        Parameter name -> unit text, where the file gave one.
    signal_units : dict
        State, input and output name -> unit text: the ``units`` section over the
        defaults of the form (a serial arm's joints); empty when nothing says.
    f : sympy.Matrix or None
        Drift vector field, n x 1; None for a mechanical plant (see ``mechanics``).
    G : sympy.Matrix or None
        Input matrix, n x m; column j is the vector field g_j; None for a mechanical
        plant, whose f and G would need M(q)^-1 in closed form.
    output_names : tuple of str
    h : sympy.Matrix
        Outputs, p x 1 (p may be 0).
    input_limits, envelope : dict
        Name -> (lower, upper).
    operating_point : dict
        State name -> value, for every state (0 where the file is silent).
    design : dict
        The validated ``design`` section, as plain data.
    source : str
        File the plant came from.
    sha256 : str
        Hash of the file's bytes.
    mechanics : Mechanics or None
        The mass-matrix structure of a mechanical plant (mass-matrix, energy,
        serial-arm or URDF form); None for the explicit form.
    urdf : UrdfSource or None
        The URDF of a plant in the URDF form.
    """

    name: str
    description: str
    states: tuple[sp.Symbol, ...]
    inputs: tuple[sp.Symbol, ...]
    parameters: dict[sp.Symbol, float]
    units: dict[str, str]
    f: sp.Matrix | None
    G: sp.Matrix | None
    output_names: tuple[str, ...]
    h: sp.Matrix
    input_limits: dict[str, tuple[float, float]] = field(default_factory=dict)
    envelope: dict[str, tuple[float, float]] = field(default_factory=dict)
    operating_point: dict[str, float] = field(default_factory=dict)
    design: dict[str, Any] = field(default_factory=dict)
    source: str = "<string>"
    sha256: str = ""
    mechanics: Mechanics | None = None
    signal_units: dict[str, str] = field(default_factory=dict)
    urdf: UrdfSource | None = None

    def identity(self) -> dict[str, Any]:
        """What names the plant and where it came from, as JSON values (the check report and the
        artifact write these under keys of their own).

        Returns
        -------
        dict
            ``description``, ``source``, ``states``, ``inputs``.
        """
        return {"description": self.description, "source": self.source, "states": self.state_names,
                "inputs": self.input_names}

    @property
    def n(self) -> int:
        """Number of states."""
        return len(self.states)

    @property
    def m(self) -> int:
        """Number of inputs."""
        return len(self.inputs)

    @property
    def state_names(self) -> list[str]:
        """State names in order."""
        return [s.name for s in self.states]

    @property
    def input_names(self) -> list[str]:
        """Input names in order."""
        return [u.name for u in self.inputs]

    @property
    def nominal(self) -> dict[sp.Symbol, sp.Rational]:
        """Parameter substitution with exact rationals of the nominal values."""
        return {p: sp.Rational(repr(v)) for p, v in self.parameters.items()}

    def operating_vector(self) -> list[float]:
        """The operating point as a list in state order."""
        return [self.operating_point[s.name] for s in self.states]

    @property
    def is_mechanical(self) -> bool:
        """True for a plant in mass-matrix structure (f and G are not formed)."""
        return self.mechanics is not None

    def closed_form_dynamics(self) -> sp.Matrix:
        """f(x) + G(x) u as one column (explicit plants only)."""
        if self.f is None or self.G is None:
            raise ValueError(f"plant {self.name} is mechanical: f and G are not formed symbolically")
        return self.f + self.G * sp.Matrix(self.inputs)
