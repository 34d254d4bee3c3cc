"""The native plant: :class:`NumericPlant`'s dx/dt and RK4 in compiled C, same interface."""

from __future__ import annotations

from typing import Any, Sequence

from linz_ros.artifact.document import Artifact
from linz_ros.runtime.native._build import compiled_plant, load_ffi, open_library
from linz_ros.runtime._arguments import float_list
from linz_ros.runtime.plant import NumericPlant

__all__ = ["NativePlant"]

#: dx/dt forms of :c:type:`linz_plant`, by the outputs of the dynamics program.
_FORMS = {("f", "G"): 0, ("M", "F", "B", "qdot"): 1, ("M", "F", "stiffness", "motor_inertia", "motor_damping"): 2}


class NativePlant(NumericPlant):
    """``dx/dt = f(x) + G(x) u`` (or its mechanical and elastic-joint forms) in C.

    :meth:`derivative` and :meth:`rk4` run compiled; :meth:`adaptive` is the Python plant's
    (scipy's integrator calling the compiled derivative). Domain errors raise
    ArithmeticError, as the Python plant's do.

    Parameters
    ----------
    artifact : Artifact
    parameters : sequence of float, optional

    Raises
    ------
    NativeUnavailable
    """

    backend = "native"

    def __init__(self, artifact: Artifact, parameters: Sequence[float] | None = None) -> None:
        super().__init__(artifact, parameters)
        self._ffi = ffi = load_ffi()
        self._lib = open_library(ffi, compiled_plant(artifact).path)
        program = artifact.programs["dynamics"]
        slots = program.slots
        self._keep: list[Any] = []
        self._ctx = ctx = ffi.new("linz_plant *")
        ctx.n, ctx.m, ctx.values_size = self.n, self.m, program.size
        ctx.form = _FORMS[tuple(slots)]
        ctx.nq = artifact.mechanical_coordinates or 0
        for field, slot in (("f_off", "f"), ("g_off", "G"), ("mass_off", "M"), ("force_off", "F"), ("input_off", "B"),
                            ("qdot_off", "qdot"), ("stiffness_off", "stiffness"), ("inertia_off", "motor_inertia"),
                            ("damping_off", "motor_damping")):
            setattr(ctx, field, slots[slot].offset if slot in slots else 0)
        ctx.parameters = self._doubles(max(1, len(self.parameters)), self.parameters)
        ctx.values = self._doubles(max(1, program.size))
        ctx.work = self._doubles(2 * (ctx.nq + 1) ** 2 + 5 * self.n)
        self._out = self._doubles(self.n)
        self._derivative_c, self._rk4_c = self._lib.linz_derivative, self._lib.linz_rk4

    def _checked(self, x: Sequence[float], u: Sequence[float]) -> tuple[list[float], list[float]]:
        return _floats(x, self.n, "state values"), _floats(u, self.m, "inputs")

    def _doubles(self, count: int, values: Sequence[float] | None = None) -> Any:
        array = self._ffi.new("double[]", count)
        if values is not None:
            array[0:len(values)] = [float(v) for v in values]
        self._keep.append(array)
        return array

    def derivative(self, x: Sequence[float], u: Sequence[float]) -> list[float]:
        """dx/dt at state x under input u (as :meth:`NumericPlant.derivative`)."""
        x, u = self._checked(x, u)
        if self._derivative_c(self._ctx, x, u, self._out) != 0:
            raise ArithmeticError("the plant's model is not defined at this state")
        return self._ffi.unpack(self._out, self.n)

    def rk4(self, x: Sequence[float], u: Sequence[float], h: float, steps: int = 1) -> list[float]:
        """``steps`` classical Runge-Kutta steps of size h with u held (as :meth:`NumericPlant.rk4`)."""
        x, u = self._checked(x, u)
        if self._rk4_c(self._ctx, x, u, float(h), int(steps), self._out) != 0:
            raise ArithmeticError("the plant's model is not defined along the step")
        return self._ffi.unpack(self._out, self.n)


def _floats(values: Sequence[float], count: int, what: str) -> list[float]:
    if len(values) != count:         # the C code reads exactly count entries
        raise ValueError(f"expected {count} {what}, got {len(values)}")
    return float_list(values)
