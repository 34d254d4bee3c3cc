"""The plant model carried by an artifact, as numbers: dx/dt = f(x) + G(x) u, and integrators.

Used by the offline closed loop and by the plant simulator node. Parameters may differ
from the nominal ones (model mismatch) while the controller keeps the nominal values.
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np

from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime._linalg import spd_solve

__all__ = ["NumericPlant", "mismatched_parameters", "mismatch_problem", "parse_assignments", "IntegrationBudgetError",
           "MAX_ADAPTIVE_EVALUATIONS"]


def parse_assignments(items: Sequence[str], option: str) -> dict[str, float]:
    """Read ``name=value`` pairs (from repeated options or comma lists) into a mapping.

    Parameters
    ----------
    items : sequence of str
        e.g. ``["m2=10", "I2=-5,l1=2"]``.
    option : str
        Named in errors, e.g. ``"--mismatch"``.

    Returns
    -------
    dict of str -> float

    Raises
    ------
    ConfigError

    Examples
    --------
    >>> parse_assignments(["a=1", "b=2,c=-0.5"], "--x")
    {'a': 1.0, 'b': 2.0, 'c': -0.5}
    """
    result: dict[str, float] = {}
    for item in items:
        for part in filter(None, (p.strip() for p in item.split(","))):
            name, equals, value = part.partition("=")
            if not equals or not name.strip():
                raise ConfigError(option, f"expected name=value, got {part!r}")
            try:
                number = float(value)
            except ValueError:
                raise ConfigError(option, f"{name.strip()}: expected a number, got {value.strip()!r}") from None
            if not math.isfinite(number):
                raise ConfigError(option, f"{name.strip()}: expected a finite number, got {value.strip()!r}")
            if name.strip() in result:          # the last one silently winning hides a typo
                raise ConfigError(option, f"{name.strip()} given twice")
            result[name.strip()] = number
    return result


def mismatch_problem(percent: float) -> str | None:
    """What is wrong with a parameter change of ``percent`` (None: a mismatched machine, not another one).

    Parameters
    ----------
    percent : float

    Returns
    -------
    str or None
    """
    if percent > -100.0:
        return None
    return "a change of -100 % or less zeroes the parameter or flips its sign; expected more than -100"


def mismatched_parameters(artifact: Artifact, percent: Mapping[str, float]) -> list[float]:
    """Nominal parameters changed by the given percentages (``all`` applies to every one).

    Parameters
    ----------
    artifact : Artifact
    percent : mapping of str -> float
        Parameter name (or ``all``) -> change in percent.

    Returns
    -------
    list of float

    Raises
    ------
    ConfigError
        For a name that is not a parameter, or a change of -100 % or less (which would
        zero a parameter or flip its sign: a different machine, not a mismatched one).
    """
    names = artifact.parameter_names
    unknown = [k for k in percent if k not in names and k != "all"]
    if unknown:
        raise ConfigError("--mismatch", f"{unknown[0]!r} is not a parameter of {artifact.name} "
                                        f"({', '.join(names) or 'it has none'})")
    for name, value in percent.items():
        if not math.isfinite(value):
            raise ConfigError("--mismatch", f"{name}: expected a finite percentage, got {value}")
    too_low = [k for k, v in percent.items() if mismatch_problem(v)]
    if too_low:
        raise ConfigError("--mismatch", f"{too_low[0]}={percent[too_low[0]]:g}: {mismatch_problem(percent[too_low[0]])}")
    common = percent.get("all", 0.0)
    return [value * (1.0 + percent.get(name, common) / 100.0)
            for name, value in zip(names, artifact.nominal_parameters.tolist())]


#: Most evaluations of f the adaptive integrator may spend on one control period.
MAX_ADAPTIVE_EVALUATIONS = 20_000


class IntegrationBudgetError(ArithmeticError):
    """The adaptive integrator spent its budget of evaluations on one period."""


class NumericPlant:
    """``dx/dt = f(x) + G(x) u`` from an artifact's ``dynamics`` program.

    Parameters
    ----------
    artifact : Artifact
    parameters : sequence of float, optional
        The plant's parameters (nominal by default).
    """

    #: Which implementation integrates (:data:`linz_ros.runtime.native.BACKENDS`).
    backend = "python"

    def __init__(self, artifact: Artifact, parameters: Sequence[float] | None = None) -> None:
        self.artifact = artifact
        self.n = len(artifact.states)
        self.m = len(artifact.inputs)
        self.parameters = list(artifact.nominal_parameters.tolist() if parameters is None else parameters)
        if len(self.parameters) != len(artifact.parameter_names):
            raise ConfigError("parameters", f"expected {len(artifact.parameter_names)} values "
                                            f"({', '.join(artifact.parameter_names)}), got {len(self.parameters)}")
        self._dynamics = artifact.programs["dynamics"]
        slots = self._dynamics.slots
        self._nq = artifact.mechanical_coordinates
        self._elastic = artifact.elastic
        if self._elastic:
            self._structure = [(slots[k].offset, slots[k].offset + slots[k].size)
                               for k in ("M", "F", "stiffness", "motor_inertia", "motor_damping")]
        elif self._nq is None:
            self._f = slots["f"].offset
            self._g = slots["G"].offset
        else:
            self._structure = [(slots[k].offset, slots[k].offset + slots[k].size) for k in ("M", "F", "B", "qdot")]

    def derivative(self, x: Sequence[float], u: Sequence[float]) -> list[float]:
        """dx/dt at state x under input u.

        Parameters
        ----------
        x, u : sequence of float

        Returns
        -------
        list of float

        Raises
        ------
        ArithmeticError, ValueError
            Where the model is not defined (e.g. a square root of a negative number).
        """
        values = self._dynamics(x, self.parameters)
        if self._elastic:
            return self._elastic_derivative(x, u, values)
        if self._nq is not None:
            return self._mechanical_derivative(x, u, values)
        n, m, f0, g0 = self.n, self.m, self._f, self._g
        out = []
        for i in range(n):
            acc = values[f0 + i]
            row = g0 + i * m
            for j in range(m):
                acc += values[row + j] * u[j]
            out.append(acc)
        return out

    def _mechanical_derivative(self, x: Sequence[float], u: Sequence[float], values: Sequence[float]) -> list[float]:
        """(q' = k(q, v), v' = M^-1 (F + B u)) with a Cholesky solve (M is never inverted)."""
        nq, m = self._nq, self.m
        (m0, m1), (f0, _), (b0, _), (k0, k1) = self._structure
        rhs = [values[f0 + i] + sum(values[b0 + i * m + j] * u[j] for j in range(m)) for i in range(nq)]
        accelerations = spd_solve(values[m0:m1], [rhs], nq)[0]
        return list(values[k0:k1]) + accelerations

    def _elastic_derivative(self, x: Sequence[float], u: Sequence[float], values: Sequence[float]) -> list[float]:
        """Elastic joints: q'' = M^-1 (F + K (theta - q)), theta'' = (u - K (theta - q) - D theta') / J."""
        nq = self._nq
        (m0, m1), (f0, _), (k0, _), (j0, _), (d0, _) = self._structure
        spring = [values[k0 + i] * (x[2 * nq + i] - x[i]) for i in range(nq)]
        accelerations = spd_solve(values[m0:m1], [[values[f0 + i] + spring[i] for i in range(nq)]], nq)[0]
        motor = [(u[i] - spring[i] - values[d0 + i] * x[3 * nq + i]) / values[j0 + i] for i in range(nq)]
        return list(x[nq:2 * nq]) + accelerations + list(x[3 * nq:4 * nq]) + motor

    def rk4(self, x: Sequence[float], u: Sequence[float], h: float, steps: int = 1) -> list[float]:
        """Advance by ``steps`` classical Runge-Kutta steps of size h with u held constant.

        Parameters
        ----------
        x, u : sequence of float
        h : float
        steps : int

        Returns
        -------
        list of float
        """
        x = list(x)
        n = self.n
        for _ in range(steps):
            k1 = self.derivative(x, u)
            k2 = self.derivative([x[i] + 0.5 * h * k1[i] for i in range(n)], u)
            k3 = self.derivative([x[i] + 0.5 * h * k2[i] for i in range(n)], u)
            k4 = self.derivative([x[i] + h * k3[i] for i in range(n)], u)
            x = [x[i] + h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]) for i in range(n)]
        return x

    def adaptive(self, x: Sequence[float], u: Sequence[float], duration: float,
                 rtol: float = 1e-9, atol: float = 1e-12) -> list[float]:
        """Advance by ``duration`` with scipy's adaptive Runge-Kutta (RK45), u held constant.

        Parameters
        ----------
        x, u : sequence of float
        duration : float
        rtol, atol : float

        Returns
        -------
        list of float
        """
        from scipy.integrate import solve_ivp  # the runtime core never needs scipy

        u = list(u)
        calls = 0

        def derivative(_t: float, y: np.ndarray) -> list[float]:
            nonlocal calls
            calls += 1
            if calls > MAX_ADAPTIVE_EVALUATIONS:
                raise IntegrationBudgetError(f"the adaptive integrator needed more than {MAX_ADAPTIVE_EVALUATIONS:,} "
                                             f"evaluations of f in {duration:g} s (a stiff or diverging plant)")
            return self.derivative(y.tolist(), u)

        solution = solve_ivp(derivative, (0.0, duration), np.asarray(x, dtype=float), method="RK45",
                             rtol=rtol, atol=atol)
        if not solution.success:
            raise ArithmeticError(solution.message)
        return solution.y[:, -1].tolist()
