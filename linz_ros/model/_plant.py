"""The internal plant: a control-affine model dx/dt = f(x) + G(x) u with outputs y = h(x)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import sympy as sp

__all__ = ["Plant"]


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
    f : sympy.Matrix
        Drift vector field, n x 1.
    G : sympy.Matrix
        Input matrix, n x m; column j is the vector field g_j.
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
    """

    name: str
    description: str
    states: tuple[sp.Symbol, ...]
    inputs: tuple[sp.Symbol, ...]
    parameters: dict[sp.Symbol, float]
    units: dict[str, str]
    f: sp.Matrix
    G: sp.Matrix
    output_names: tuple[str, ...]
    h: sp.Matrix
    input_limits: dict[str, tuple[float, float]] = field(default_factory=dict)
    envelope: dict[str, tuple[float, float]] = field(default_factory=dict)
    operating_point: dict[str, float] = field(default_factory=dict)
    design: dict[str, Any] = field(default_factory=dict)
    source: str = "<string>"
    sha256: str = ""

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

    def closed_form_dynamics(self) -> sp.Matrix:
        """f(x) + G(x) u as one column."""
        return self.f + self.G * sp.Matrix(self.inputs)
