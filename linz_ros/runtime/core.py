"""The ROS-free controller core: one linearizing control step, guarded by its watchdogs.

Each step evaluates the artifact's law at the measured state, closes the outer loop on
the Brunovsky chains, solves ``A(x) u = v - b(x)`` and passes the command through the
watchdogs:

- singularity: sigma_min of A below ``sigma_warn`` flags the record; below
  ``sigma_act`` the solve becomes a damped least-squares one whose damping grows as
  sigma_min falls, ``lambda^2 = lambda_max^2 (1 - (sigma_min / sigma_act)^2)``
  (variable damping of Chiaverini, Siciliano and Egeland, IEEE TCST 2(2), 1994, built
  on Nakamura and Hanafusa 1986); below ``sigma_stop`` the configured safe command;
- saturation: rate limits, then box limits, per input; integral action is frozen on
  steps that saturate or leave the nominal mode (conditional integration);
- bad input: a state of the wrong length, non-finite, older than the last one used,
  or older than ``stale_after``, and a model that is not finite at the state, all give
  the safe command and a record saying why; a step never raises;
- the machine (``ALARMS``): a state outside the envelope widened by ``envelope_margin``
  (by default a controlled stop: the outputs held where the envelope was left, until the
  state is back inside the envelope itself), and a tracking error that stays above
  ``divergence_error`` for ``divergence_time`` without shrinking (by default the safe
  command, until ``reset``).

Modes: ``nominal``, ``damped``, ``held`` (the safe command is "hold the last command",
within ``hold_time``), ``safe``, ``stopping`` (the controlled stop).
"""

from __future__ import annotations

import math
import operator
import time
from typing import Any, Callable, Sequence

from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime._linalg import (computed_torque, damped_solve, inverse_mass_singular_values, singular_values,
                                      solve, task_space_terms)
from linz_ros.runtime._arguments import refusal_stamps, sized_floats, state_arguments
from linz_ros.runtime.steprecord import ALARMS, StepRecord
from linz_ros.runtime.watchdogs import DivergenceWatch, WatchdogConfig, outside_check

__all__ = ["ControllerCore", "StepRecord", "WatchdogConfig", "settings_property"]

_isfinite = math.isfinite


def _all_finite(values: Sequence[float]) -> bool:
    """Whether every value is finite: a finite sum proves it, otherwise each is looked at."""
    # nan and +-inf make any float sum non-finite, so a finite sum needs no second look; a sum
    # that overflowed on finite values falls through to the exact check
    return _isfinite(sum(values)) or all(map(_isfinite, values))


def _straight_line_outer_loop(layout: list[tuple], b_offset: int | None = None) -> Callable:
    """The outer loop of :meth:`ControllerCore._outer_loop` as one function without loops.

    It returns ``(w, e)``: ``w = v - b`` with b read from the law's values at ``b_offset``
    (a plant whose law carries b), or ``w = v`` without it; e are the output errors. Built
    from the core's own numbers only (offsets and the artifact's gains, printed with
    ``repr`` of a float, which round-trips exactly), never from text in the file.
    """
    vs, errors = [], []
    for i, (k, j, r, k_integral, gains) in enumerate(layout):
        terms = [f"ref[{j + r}]"]
        if k_integral != 0.0:
            terms.append(f"{float(k_integral)!r} * integrators[{i}]")
        terms += [f"{float(gains[d])!r} * (values[{k + d}] - ref[{j + d}])" for d in range(r)]
        if b_offset is not None:
            terms.append(f"values[{b_offset + i}]")
        vs.append(" - ".join(terms))
        errors.append(f"values[{k}] - ref[{j}]")
    source = (f"def outer(values, ref, integrators):\n"
              f"    return [{', '.join(vs)}], [{', '.join(errors)}]\n")
    scope: dict = {}
    exec(compile(source, "<outer loop>", "exec"), {"__builtins__": {}}, scope)   # noqa: S102
    return scope["outer"]


def settings_property(load: Callable[[Any, WatchdogConfig], None], doc: str) -> property:
    """A core's ``config``: reading gives the watchdog settings in force; assigning has ``load(core, config)``
    check and load new ones (raising for settings that do not fit), then keeps them.

    Parameters
    ----------
    load : callable
        ``load(core, config)``, the core's own checks and set-up.
    doc : str
        The property's docstring.

    Returns
    -------
    property
    """
    def assign(core: Any, config: WatchdogConfig) -> None:
        load(core, config)
        core._config = config

    return property(operator.attrgetter("_config"), assign, doc=doc)


def _slot_slice(slots: dict, name: str) -> slice:
    """Where output ``name`` of a compiled program lies in its flat result."""
    return slice(slots[name].offset, slots[name].offset + slots[name].size)


class ControllerCore:
    """One feedback-linearizing control step with watchdogs; no ROS, no sympy.

    Parameters
    ----------
    artifact : Artifact
        A loaded controller artifact.
    config : WatchdogConfig, optional
        Defaults to the artifact's levels.
    parameters : sequence of float, optional
        Model parameters for the law (the artifact's nominal values by default).

    Examples
    --------
    A pendulum-like plant x1'' = -sin(x1) + u with output x1 and poles -2, -3, built in
    memory (artifacts usually come from ``linz build``):

    >>> from linz_ros.artifact import artifact_from_text, seal
    >>> from linz_ros.codegen import build_document
    >>> from linz_ros.model import plant_from_text
    >>> from linz_ros.synthesis import synthesise
    >>> plant = plant_from_text("plant: p\\nstates: [x1, x2]\\ninputs: [u]\\n"
    ...     "dynamics: {x1: x2, x2: -sin(x1) + u}\\noutputs: {y: x1}\\ndesign: {poles: {y: [-2, -3]}}")
    >>> core = ControllerCore(artifact_from_text(seal(build_document(synthesise(plant))[0])))
    >>> u, record = core.step([0.1, 0.0], [0.0, 0.0, 0.0], t=0.0)   # u = v - b = -6 (0.1) + sin(0.1)
    >>> round(u[0], 6), record.mode, record.reason
    (-0.500167, 'nominal', 'ok')
    """

    #: Which implementation steps (:data:`linz_ros.runtime.native.BACKENDS`).
    backend = "python"

    def __init__(self, artifact: Artifact, config: WatchdogConfig | None = None,
                 parameters: Sequence[float] | None = None) -> None:
        self.artifact = artifact
        self.n = len(artifact.states)
        self.m = len(artifact.inputs)
        self.orders = artifact.relative_degree
        self.integral = artifact.integral
        self.gains = [[float(k) for k in g] for g in artifact.gains]
        self.reference_size = sum(r + 1 for r in self.orders)
        nominal = artifact.nominal_parameters.tolist()
        if parameters is None:
            parameters = nominal
        parameters = [float(v) for v in parameters]
        if len(parameters) != len(nominal) or not all(_isfinite(v) for v in parameters):
            raise ConfigError("parameters", f"expected {len(nominal)} finite values "
                                            f"({', '.join(artifact.parameter_names)})")
        self.parameters = parameters
        law = artifact.programs["law"]
        self._law = law.function
        slots = law.slots
        self._mechanical = artifact.mechanical_coordinates
        if artifact.elastic:
            # elastic joints: the law's values extended by A = M^-1 K J^-1, b and the chains (artifact.elastic)
            elastic = artifact.elastic_law()
            self._law, slots, self._mechanical = elastic, elastic.slots, None
        elif artifact.law_form == "chain":
            # chains too large to print: A, b and the chains from f, G and h by Taylor-mode jets (artifact.chainlaw)
            chain = artifact.chain_law()
            self._law, slots = chain, chain.slots
        if self._mechanical is None:
            self._a_slice = _slot_slice(slots, "A")
            self._b_slice = _slot_slice(slots, "b")
        else:
            # A = J M^-1 B and b = J M^-1 F + J' q' are assembled numerically at each step
            self._structure = [_slot_slice(slots, k) for k in ("M", "F", "B", "J", "c")]
        # joint-space outputs of an arm driven joint by joint (h = q, B = I): the computed-torque law
        self._computed_torque = artifact.computed_torque
        self._chain_offset = slots["chain"].offset
        self._period = 1.0 / artifact.rate
        self._output_offsets = [sum(self.orders[:i]) for i in range(len(self.orders))]
        outputs = [self._chain_offset + offset for offset in self._output_offsets]
        # the outputs y_i out of the law's values, as a tuple even for one chain
        self._outputs_of = (operator.itemgetter(*outputs) if len(outputs) > 1 else
                            (lambda values, i=outputs[0]: (values[i],)))
        # per chain: offset in the law's output, offset in the reference, degree, K_I, K_0..K_(r-1)
        self._layout = []
        k, j = self._chain_offset, 0
        for r, gains in zip(self.orders, self.gains):
            k_integral = gains[0] if self.integral else 0.0
            self._layout.append((k, j, r, k_integral, gains[1:] if self.integral else gains))
            k += r
            j += r + 1
        # w = v - b in one pass where the law carries b; v alone for mechanical plants
        self._outer = _straight_line_outer_loop(
            self._layout, self._b_slice.start if self._mechanical is None else None)
        self._divergence = DivergenceWatch()
        self.config = config or WatchdogConfig.from_artifact(artifact)
        self.reset()

    def _load_config(self, config: WatchdogConfig) -> None:
        """Check ``config`` against this artifact and set the watchdogs up from it."""
        config.validate()
        config.check_counts(self.n, self.m, len(self.orders))
        self._outside_widened = outside_check(config.widened_envelope())
        self._outside_plain = outside_check(config.widened_envelope(0.0))
        self._divergence.configure(config.divergence_error or (math.inf,) * len(self.orders), config.divergence_time)

    config = settings_property(_load_config, "The watchdog settings in force; assigning new ones checks them "
                                             "against this artifact.")

    # -- state ------------------------------------------------------------------------
    def reset(self) -> None:
        """Forget the integrators, the last command and the last time stamp."""
        self.integrators = [0.0] * len(self.orders)
        self.last_command = [0.0] * self.m
        self.last_good_command = [0.0] * self.m
        self.last_t: float | None = None          # stamp of the last accepted state
        self.last_good_t: float | None = None     # stamp of the last nominal or damped command
        self._last_errors: list[float] | None = None
        self._integrate_next = False
        self._divergence.reset()
        self._diverged = False                     # latched by a divergence with action "safe"
        self._stop_reference: list[float] | None = None   # held while a controlled stop lasts

    def freeze_integrators(self) -> None:
        """Skip the integral action's next update (a limit outside the core cut the command it sent)."""
        self._integrate_next = False

    def hold_reference(self, x: Sequence[float]) -> list[float]:
        """The reference that holds the outputs where they are at state ``x``.

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
            ``[y_i, 0, ..., 0]`` per chain.
        """
        return self._hold_reference_of(self._law_at(x))

    def output_values(self, x: Sequence[float]) -> list[float]:
        """The outputs ``y_i`` themselves at ``x`` (the first entry of each chain).

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        return list(self._outputs_of(self._law_at(x)))

    def outputs(self, x: Sequence[float]) -> list[float]:
        """The chains' values ``y_i, ..., y_i^(r_i - 1)`` at ``x``, flat.

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        values = self._law_at(x)
        return list(values[self._chain_offset:self._chain_offset + sum(self.orders)])

    def _law_at(self, x: Sequence[float]) -> Sequence[float]:
        """The law program's values at ``x`` with this core's parameters."""
        return self._law([float(v) for v in x], self.parameters)

    # -- the step ---------------------------------------------------------------------
    def step(self, x: Sequence[float], ref: Sequence[float], t: float,
             now: float | None = None) -> tuple[list[float], StepRecord]:
        """Compute the command for state ``x`` measured at time ``t``.

        Parameters
        ----------
        x : sequence of float
            The state, in the artifact's order.
        ref : sequence of float
            ``[y_ref_i, y_ref_i', ..., y_ref_i^(r_i)]`` for every chain, flat.
        t : float
            The state's time stamp, seconds.
        now : float, optional
            The current time, for the staleness check (``t`` when not given).

        Returns
        -------
        command : list of float
        record : StepRecord
        """
        start = time.perf_counter()
        config = self.config
        refused, x, t, now = state_arguments(x, self.n, t, now)
        if refused is not None:
            return self._refuse(refused, t, start, now)
        if not _all_finite(x):
            return self._refuse("non_finite_state", t, start, now)
        last_t = self.last_t
        if last_t is not None and t <= last_t:
            return self._refuse("out_of_order", t, start, now)
        if now - t > config.stale_after:
            return self._refuse("stale", t, start, now)
        if t - now > (config.stale_after if config.future_tolerance is None else config.future_tolerance):
            # a stamp from the future would be kept as the newest and block every real state
            return self._refuse("future_stamp", t, start, now)
        ref = sized_floats(ref, self.reference_size)
        if ref is None or not _all_finite(ref):
            return self._refuse("bad_reference", t, start, now)
        try:
            values = self._law(x, self.parameters)
        except (ArithmeticError, ValueError):
            return self._refuse("model_not_finite", t, start, now)
        if not _all_finite(values):
            return self._refuse("model_not_finite", t, start, now)
        m = self.m
        A = b = None
        try:
            if self._computed_torque:
                # A = M^-1: its singular values are 1 / eig(M), and u = M v - F needs no solve
                sigma_min, sigma_max = inverse_mass_singular_values(values[self._structure[0]], m)
            else:
                if self._mechanical is None:
                    A, b = values[self._a_slice], values[self._b_slice]
                else:
                    A, b = task_space_terms(*(values[k] for k in self._structure), self._mechanical, m)
                sigma_min, sigma_max = singular_values(A, m)
        except (ArithmeticError, ValueError):
            return self._refuse("model_not_finite", t, start, now)
        condition = sigma_max / sigma_min if sigma_min > 0.0 else math.inf
        accepted_t = t if t <= now else now     # a stamp from the future must not lock out the next states
        dt = 0.0 if last_t is None else min(t - last_t, config.max_dt)
        if self.integral and self._integrate_next and self._last_errors is not None:
            self._advance_integrators(dt)
        alarms = 0
        if self._outside_widened(x):
            alarms = 1
            if config.envelope_action == "stop" and self._stop_reference is None:
                self._stop_reference = self._hold_reference_of(values)
        elif self._stop_reference is not None and not self._outside_plain(x):
            self._stop_reference = None        # back inside the envelope itself: the margin is the hysteresis
        if self._stop_reference is not None:
            if config.envelope_action != "stop":   # the action was changed while stopping
                self._stop_reference = None
            else:
                ref = self._stop_reference
        w, errors = self._outer_loop(values, ref)
        warn = not sigma_min >= config.sigma_warn
        damping = 0.0
        if self._divergence.active and self._divergence.check(errors, t):
            alarms |= 2
        acted = "singular" if not sigma_min >= config.sigma_stop else self._acted_alarm(alarms)   # nan: singular
        if acted is not None:
            if acted != "diverging":
                self._divergence.end_episode()   # the law is not in command: its error says nothing of the model
            self.last_t = accepted_t
            return self._safe(acted, t, start, sigma_min, condition, warn, now, alarms)
        try:
            if sigma_min < config.sigma_act:
                ratio = sigma_min / config.sigma_act
                damping = config.damping * math.sqrt(1.0 - ratio * ratio)
                if A is None:
                    A, b = task_space_terms(*(values[k] for k in self._structure), self._mechanical, m)
                u = damped_solve(A, self._rhs(w, b), m, damping)
                mode, reason = "damped", "near_singular"
            elif A is None:
                u = computed_torque(values[self._structure[0]], values[self._structure[1]], w, m)
                mode, reason = "nominal", "ok"
            else:
                u = solve(A, self._rhs(w, b), m)
                mode, reason = "nominal", "ok"
        except (ArithmeticError, ValueError):
            self.last_t = accepted_t
            return self._safe("singular", t, start, sigma_min, condition, warn, now, alarms)
        # the first step after a reset is rate-limited from the resting (zero) command
        u, saturated = config.limit(u, self.last_command, dt if last_t is not None else self._period)
        if not all(map(_isfinite, u)):
            self.last_t = accepted_t
            return self._safe("non_finite_command", t, start, sigma_min, condition, warn, now, alarms)
        if self._stop_reference is not None:
            mode, reason = "stopping", ALARMS[0]
        elif alarms and reason == "ok":
            reason = ALARMS[0] if alarms & 1 else ALARMS[1]
        self.last_t = accepted_t
        self.last_good_t = t
        self.last_command = u
        self.last_good_command = u
        self._last_errors = errors
        frozen = mode == "stopping" or (config.anti_windup and (mode != "nominal" or any(saturated)))
        self._integrate_next = not frozen
        record = StepRecord(t, tuple(u), mode, reason, sigma_min, condition, warn, damping,
                            tuple(saturated), time.perf_counter() - start, self._outputs_of(values), alarms)
        return u, record

    def safe_step(self, now: float, reason: str = "no_state", final: bool = False) -> tuple[list[float], StepRecord]:
        """The safe command when no usable state arrived (a node's timer calls this).

        Parameters
        ----------
        now : float
            Current time, seconds.
        reason : str
            One of :data:`REASONS`, recorded.
        final : bool
            The last command before the controller stops (deactivate, shutdown): never the
            held one, which a driver would keep applying; zero or the fixed command.

        Returns
        -------
        command : list of float
        record : StepRecord
        """
        if final:
            self.last_good_t = None          # nothing left to hold
        return self._refuse(reason, now, time.perf_counter(), now)

    def is_stale(self, now: float) -> bool:
        """Whether the last accepted state (stamp) is older than ``stale_after`` at ``now``.

        Parameters
        ----------
        now : float

        Returns
        -------
        bool
        """
        return self.last_t is None or now - self.last_t > self.config.stale_after

    # -- pieces -------------------------------------------------------------------------
    def _hold_reference_of(self, values: Sequence[float]) -> list[float]:
        """Hold each output where it is: ``[y_i, 0, ..., 0]`` per chain, from the law's values."""
        ref: list[float] = []
        for y, r in zip(self._outputs_of(values), self.orders):
            ref.extend([y] + [0.0] * r)
        return ref

    def _acted_alarm(self, alarms: int) -> str | None:
        """The alarm whose action is the safe command, if one is raised (divergence latches)."""
        config = self.config
        if alarms & 2 and config.divergence_action == "safe":
            self._diverged = True
        if self._diverged:
            return "diverging"
        if alarms & 1 and config.envelope_action == "safe":
            return "outside_envelope"
        return None

    def _outer_loop(self, values: Sequence[float], ref: list[float]) -> tuple[list[float], list[float]]:
        """w_i = v_i - b_i (or v_i, mechanical plants) and the errors e_i, where
        v_i = y_ref_i^(r_i) - K_i . (eta_i, e_i, ..., e_i^(r_i - 1))."""
        return self._outer(values, ref, self.integrators)

    def _rhs(self, w: list[float], b: Sequence[float]) -> list[float]:
        """v - b: ``w`` already is where the law carries b; a mechanical plant's b is assembled."""
        if self._mechanical is None:
            return w
        return [w[i] - b[i] for i in range(self.m)]

    def _advance_integrators(self, dt: float) -> None:
        limit = self.config.integral_limit
        for i, e in enumerate(self._last_errors or ()):
            value = self.integrators[i] + e * dt
            self.integrators[i] = max(-limit, min(limit, value))

    def _safe_command(self, now: float) -> tuple[list[float], str]:
        config = self.config
        if config.safe_kind == "hold" and self.last_good_t is not None \
                and 0.0 <= now - self.last_good_t <= config.hold_time:
            return list(self.last_good_command), "held"
        if config.safe_kind == "fixed":
            return list(config.safe_value), "safe"
        return [0.0] * self.m, "safe"

    def _safe(self, reason: str, t: float, start: float, sigma_min: float = math.nan,
              condition: float = math.nan, warn: bool = False, now: float | None = None, alarms: int = 0
              ) -> tuple[list[float], StepRecord]:
        """The safe command (or the held one), clipped to the box limits, and its record.

        ``hold`` is measured against ``now``; without a valid ``now`` it is not trusted
        and the zero command is sent.
        """
        if now is not None and _isfinite(now):
            u, mode = self._safe_command(now)
        else:
            u, mode = self._safe_command(math.inf)
        u = [min(max(value, lo), hi) for value, (lo, hi) in zip(u, self.config.input_limits)]
        self.last_command = u
        self._integrate_next = False
        record = StepRecord(t, tuple(u), mode, reason, sigma_min, condition, warn, 0.0,
                            (False,) * self.m, time.perf_counter() - start, (), alarms)
        return u, record

    def _refuse(self, reason: str, t: Any, start: float, now: Any = None) -> tuple[list[float], StepRecord]:
        stamp, current = refusal_stamps(t, now)
        return self._safe(reason, stamp, start, now=current)
