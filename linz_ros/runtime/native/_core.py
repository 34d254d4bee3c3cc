"""The native controller core: :class:`ControllerCore`'s step in compiled C, same interface.

The Python core is built first and kept: it owns the layout (offsets, chains, gains), checks
the settings, and answers the questions asked outside the hot loop (``hold_reference``,
``output_values``, ``outputs``). The step itself, its state between steps (integrators,
last commands, stamps, the controlled stop, the divergence episode) and every refusal live
in the C context, so the two never disagree about what happened.
"""

from __future__ import annotations

import math
import struct
import time
import weakref
from functools import partial
from typing import Any, Sequence

from linz_ros.artifact.document import Artifact
from linz_ros.runtime._arguments import refusal_stamps, sized_floats, state_arguments
from linz_ros.runtime.core import ControllerCore
from linz_ros.runtime.native._build import REPORT_FIELDS, codes, compiled_step, load_ffi, open_library
from linz_ros.runtime.steprecord import MODES, REASONS, StepRecord
from linz_ros.runtime.watchdogs import WatchdogConfig

__all__ = ["NativeCore"]

_isfinite = math.isfinite
_REASON_CODE = {name: i for i, name in enumerate(REASONS)}
_HEAD = len(REPORT_FIELDS)
(_MODE, _REASON, _SIGMA_MIN, _CONDITION, _WARN, _DAMPING, _ALARMS, _VALID) = (
    REPORT_FIELDS.index(name) for name in ("mode", "reason", "sigma_min", "condition", "warn", "damping", "alarms",
                                           "outputs_valid"))
_FFI: Any = None


def _careful_step(core: "weakref.ref[NativeCore]", *args: Any, **keywords: Any) -> tuple[list[float], StepRecord]:
    """The fast entry's way back for unusual arguments: :meth:`NativeCore.step` of a live core."""
    owner = core()
    if owner is None:
        raise ReferenceError("the controller core was deleted")
    return NativeCore.step(owner, *args, **keywords)


def _ffi() -> Any:
    global _FFI
    if _FFI is None:
        _FFI = load_ffi()
    return _FFI


class NativeCore:
    """One control step in compiled C, with the interface of :class:`ControllerCore`.

    Parameters
    ----------
    artifact : Artifact
    config : WatchdogConfig, optional
    parameters : sequence of float, optional
        As for :class:`ControllerCore`.

    Raises
    ------
    NativeUnavailable
        When the step cannot be compiled or loaded here (the message says why in one line).
    linz_ros.errors.ConfigError
        For bad settings or parameters, as the Python core.
    """

    backend = "native"

    def __init__(self, artifact: Artifact, config: WatchdogConfig | None = None,
                 parameters: Sequence[float] | None = None) -> None:
        ffi = _ffi()
        self._ffi = ffi
        compiled = compiled_step(artifact)
        self._lib = open_library(ffi, compiled.path)
        self._python = python = ControllerCore(artifact, config, parameters)
        self.artifact, self.n, self.m, self.orders = artifact, python.n, python.m, python.orders
        self.integral, self.gains, self.reference_size = python.integral, python.gains, python.reference_size
        self.parameters = python.parameters
        self._keep: list[Any] = []          # cffi arrays the context points into
        self._settings: dict[str, Any] = {}
        self._ctx = ctx = ffi.new("linz_ctx *")
        self._layout(python)
        m, chains = self.m, len(self.orders)
        self._ref = self._doubles(max(1, self.reference_size))    # stands in for a reference refused
        ctx.parameters = self._doubles(max(1, len(python.parameters)), python.parameters)
        ctx.values = self._doubles(max(1, self._law_size(python)))
        nq = ctx.nq if ctx.nq > 0 else m
        size = max(nq, m) + 1
        ctx.work = self._doubles(4 * m * m + 4 * m + chains + 4 * size * size + 8 * size)
        head = len(REPORT_FIELDS)
        self._report_size = head + 2 * m + chains
        ctx.report = self._report = self._doubles(self._report_size)
        self._report_buffer = ffi.buffer(self._report)
        self._unpack_report = struct.Struct(f"={self._report_size}d").unpack_from
        ctx.u, ctx.saturated, ctx.y = self._report + head, self._report + head + m, self._report + head + 2 * m
        self._not_saturated = (False,) * m
        for name in ("integrators", "last_errors", "stop_reference"):
            setattr(ctx, name, self._doubles(max(1, self.reference_size, chains)))
        ctx.last_command, ctx.last_good_command = self._doubles(m), self._doubles(m)
        self._step, self._refuse_c = self._lib.linz_step, self._lib.linz_refuse
        self._chains = chains
        self.config = python.config
        self.reset()
        if compiled.module is not None:
            # the fast entry: the common case straight into C, the rest through careful_step;
            # it holds the context's memory, and this core only weakly (no cycle through C)
            address = int(ffi.cast("uintptr_t", ctx))
            self.step = compiled.module.bind(address, (ctx, self._keep, self._settings, self._lib), StepRecord,
                                             MODES, REASONS, partial(_careful_step, weakref.ref(self)))

    # -- set-up ------------------------------------------------------------------------
    def _doubles(self, count: int, values: Sequence[float] | None = None, setting: str | None = None) -> Any:
        """A C array of doubles kept alive as long as the context points to it (a setting's
        array until that setting is loaded again)."""
        array = self._ffi.new("double[]", count)
        if values is not None:
            array[0:len(values)] = list(values)
        self._hold(array, setting)
        return array

    def _ints(self, values: Sequence[int], setting: str | None = None) -> Any:
        array = self._ffi.new("int[]", max(1, len(values)))
        array[0:len(values)] = list(values)
        self._hold(array, setting)
        return array

    def _hold(self, array: Any, setting: str | None) -> None:
        if setting is None:
            self._keep.append(array)
        else:
            self._settings[setting] = array

    @staticmethod
    def _law_size(python: ControllerCore) -> int:
        """Entries of the law's values as the core reads them (an elastic law's extended layout included)."""
        slots = getattr(python._law, "slots", None) or python.artifact.programs["law"].slots
        return max(slot.offset + slot.size for slot in slots.values())

    def _layout(self, python: ControllerCore) -> None:
        """Sizes, the law's form and offsets, and the outer loop's chains, from the Python core."""
        ctx = self._ctx
        ctx.n, ctx.m, ctx.chains = self.n, self.m, len(self.orders)
        ctx.law_size = self._law_size(python)
        ctx.ref_size, ctx.integral = self.reference_size, int(bool(self.integral))
        ctx.period = python._period
        if python._mechanical is None:
            ctx.form, ctx.nq = 0, 0
            ctx.a_off, ctx.b_off = python._a_slice.start, python._b_slice.start
        else:
            ctx.form = 2 if python._computed_torque else 1
            ctx.nq = python._mechanical
            (ctx.mass_off, ctx.force_off, ctx.input_off, ctx.jacobian_off,
             ctx.bias_off) = (piece.start for piece in python._structure)
        ctx.chain_off = python._chain_offset
        ctx.output_off = self._ints(python._output_offsets)
        layout = python._layout
        ctx.chain_k = self._ints([k for k, _, _, _, _ in layout])
        ctx.chain_j = self._ints([j for _, j, _, _, _ in layout])
        ctx.chain_r = self._ints([r for _, _, r, _, _ in layout])
        ctx.k_integral = self._doubles(len(layout), [float(k_i) for _, _, _, k_i, _ in layout])
        gains = [float(g) for *_, chain_gains in layout for g in chain_gains]
        offsets = [sum(len(g) for *_, g in layout[:i]) for i in range(len(layout))]
        ctx.gain_off = self._ints(offsets)
        ctx.gains = self._doubles(max(1, len(gains)), gains)

    # -- settings and state --------------------------------------------------------------
    @property
    def config(self) -> WatchdogConfig:
        """The watchdog settings in force; assigning checks them (as the Python core) and loads them."""
        return self._python.config

    @config.setter
    def config(self, config: WatchdogConfig) -> None:
        self._python.config = config
        ctx, table = self._ctx, codes()
        for name in ("sigma_warn", "sigma_act", "sigma_stop", "damping", "stale_after", "max_dt", "hold_time",
                     "integral_limit"):
            setattr(ctx, name, float(getattr(config, name)))
        ctx.future_tolerance = float(config.stale_after if config.future_tolerance is None
                                     else config.future_tolerance)
        ctx.envelope_action = table["ENVELOPE"][config.envelope_action]
        ctx.divergence_action = table["DIVERGENCE"][config.divergence_action]
        ctx.safe_kind = table["SAFE"][config.safe_kind]
        ctx.anti_windup = int(config.anti_windup)
        m = self.m
        ctx.safe_value = self._doubles(m, [float(v) for v in (config.safe_value or (0.0,) * m)], "safe_value")
        ctx.lower = self._doubles(m, [float(lo) for lo, _ in config.input_limits], "lower")
        ctx.upper = self._doubles(m, [float(hi) for _, hi in config.input_limits], "upper")
        ctx.rate_limit = self._doubles(m, [float(r) for r in config.rate_limits], "rate_limit")
        for prefix, bounds in (("widened", config.widened_envelope()), ("plain", config.widened_envelope(0.0))):
            count = max(1, len(bounds))
            setattr(ctx, f"n_{prefix}", len(bounds))
            setattr(ctx, f"{prefix}_index", self._ints([i for i, _, _ in bounds], f"{prefix}_index"))
            setattr(ctx, f"{prefix}_lower", self._doubles(count, [lo for _, lo, _ in bounds], f"{prefix}_lower"))
            setattr(ctx, f"{prefix}_upper", self._doubles(count, [hi for _, _, hi in bounds], f"{prefix}_upper"))
        bounds = config.divergence_error or (math.inf,) * self._chains
        scale = [0.0 if not _isfinite(b) else 1.0 / b for b in bounds]
        ctx.divergence_active = int(any(scale))
        ctx.divergence_scale = self._doubles(max(1, len(scale)), scale, "divergence_scale")
        ctx.divergence_span = float(config.divergence_time)

    def reset(self) -> None:
        """Forget the integrators, the last command, the last time stamp and the episodes."""
        ctx = self._ctx
        for name, count in (("integrators", self._chains), ("last_errors", self._chains),
                            ("last_command", self.m), ("last_good_command", self.m)):
            getattr(ctx, name)[0:count] = [0.0] * count
        for flag in ("has_last_t", "has_last_good_t", "has_last_errors", "integrate_next", "diverged", "stopping",
                     "above", "below"):
            setattr(ctx, flag, 0)
        ctx.first_peak, ctx.last_high = 0.0, -math.inf

    def freeze_integrators(self) -> None:
        """Skip the integral action's next update (a limit outside the core cut the command it sent)."""
        self._ctx.integrate_next = 0

    @property
    def last_t(self) -> float | None:
        """Stamp of the last accepted state."""
        return self._ctx.last_t if self._ctx.has_last_t else None

    @property
    def last_good_t(self) -> float | None:
        """Stamp of the last nominal or damped command."""
        return self._ctx.last_good_t if self._ctx.has_last_good_t else None

    @property
    def integrators(self) -> list[float]:
        """The integrator states."""
        return list(self._ffi.unpack(self._ctx.integrators, self._chains))

    @property
    def last_command(self) -> list[float]:
        """The command sent last."""
        return list(self._ffi.unpack(self._ctx.last_command, self.m))

    # -- questions outside the loop, from the compiled law ------------------------------------
    def _law_at(self, x: Sequence[float]) -> list[float]:
        """The law's values at ``x``; raises ArithmeticError where the law is not defined (as Python's)."""
        if len(x) != self.n:
            raise ValueError(f"expected {self.n} state values, got {len(x)}")
        if self._lib.linz_evaluate(self._ctx, [float(v) for v in x]) != 0:
            raise ArithmeticError("the law is not defined at this state")
        return self._ffi.unpack(self._ctx.values, self._ctx.law_size)

    def hold_reference(self, x: Sequence[float]) -> list[float]:
        """As :meth:`ControllerCore.hold_reference`."""
        return self._python._hold_reference_of(self._law_at(x))

    def output_values(self, x: Sequence[float]) -> list[float]:
        """As :meth:`ControllerCore.output_values`."""
        return list(self._python._outputs_of(self._law_at(x)))

    def outputs(self, x: Sequence[float]) -> list[float]:
        """As :meth:`ControllerCore.outputs`."""
        start = self._python._chain_offset
        return self._law_at(x)[start:start + sum(self.orders)]

    def is_stale(self, now: float) -> bool:
        """As :meth:`ControllerCore.is_stale`."""
        return not self._ctx.has_last_t or now - self._ctx.last_t > self.config.stale_after

    # -- the step ---------------------------------------------------------------------------
    def step(self, x: Sequence[float], ref: Sequence[float], t: float,
             now: float | None = None) -> tuple[list[float], StepRecord]:
        """As :meth:`ControllerCore.step`: the command for state ``x`` measured at ``t``, and its record.

        The arguments are converted as the Python core converts them; every check after that
        (finite, order, stale, future, reference, model, watchdogs) is the C step's. Where the
        fast entry was built, it replaces this method on the instance and comes back here for
        anything but lists of floats and finite float stamps.
        """
        start = time.perf_counter()
        refused, x, t, now = state_arguments(x, self.n, t, now)
        if refused is not None:
            return self._refuse(refused, t, start, now)
        ref = sized_floats(ref, self.reference_size)
        reference_ok = 1
        if ref is None:
            reference_ok, ref = 0, self._ref     # the C step refuses it as bad_reference
        self._step(self._ctx, x, ref, t, now, reference_ok)
        return self._result(t, start)

    def safe_step(self, now: float, reason: str = "no_state", final: bool = False) -> tuple[list[float], StepRecord]:
        """As :meth:`ControllerCore.safe_step`."""
        if final:
            self._ctx.has_last_good_t = 0
        return self._refuse(reason, now, time.perf_counter(), now)

    def _refuse(self, reason: str, t: Any, start: float, now: Any = None) -> tuple[list[float], StepRecord]:
        stamp, current = refusal_stamps(t, now)
        self._refuse_c(self._ctx, _REASON_CODE[reason], math.inf if current is None else current)
        return self._result(stamp, start)

    def _result(self, t: float, start: float) -> tuple[list[float], StepRecord]:
        m, head = self.m, _HEAD
        r = self._unpack_report(self._report_buffer)
        u = list(r[head:head + m])
        saturated = r[head + m:head + 2 * m]
        record = StepRecord(t, tuple(u), MODES[int(r[_MODE])], REASONS[int(r[_REASON])], r[_SIGMA_MIN],
                            r[_CONDITION], r[_WARN] != 0.0, r[_DAMPING],
                            tuple([v != 0.0 for v in saturated]) if any(saturated) else self._not_saturated,
                            time.perf_counter() - start, tuple(r[head + 2 * m:]) if r[_VALID] else (),
                            int(r[_ALARMS]))
        return u, record
