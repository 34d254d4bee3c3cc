"""Synthesis: from a plant and its analysis to a linearizing law with outer-loop gains.

The law is ``u = A(x)^-1 (v - b(x))`` with A the decoupling matrix and b the stacked
``L_f^(r_i) h_i`` (Isidori, Nonlinear Control Systems, sec. 5.3). A and b stay
expressions; the runtime solves ``A u = v - b`` numerically at each step, which keeps
the conditioning of A visible. Input-state linearization of a single-input plant is
the same law for the linearizing output T1 (relative degree n), with the coordinate
change ``z = T(x) = (T1, L_f T1, ..., L_f^(n-1) T1)`` (Isidori, sec. 4.2).

A mechanical plant ``M(q) q'' = F + B u`` with outputs h(q) keeps its structure: A = J M^-1 B
and b = J M^-1 F + J' q' are assembled numerically at run time from M, F, B, J and J' q'
(computed torque when h = q), so A and b are None here and M^-1 never appears in closed form.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import sympy as sp

from linz_ros.analysis import (Report, analyse, lie_chain, mechanical_terms, output_ranges, plant_context,
                               sample_envelope)
from linz_ros.artifact.watchdog import default_settings, watchdog_problem
from linz_ros.errors import DesignError, PlantFileError
from linz_ros.geometry import evaluate, lie_derivative
from linz_ros.model import Plant, expression_in
from linz_ros.synthesis._gains import (LQR_WEIGHT_RANGE, SampledLoop, closed_loop_poles, gains_from_lqr,
                                       gains_from_poles, sampled_loop)
from linz_ros.synthesis._transform import closed_form_inverse

__all__ = ["DesignOptions", "Chain", "Design", "synthesise", "DEFAULT_RATE"]

#: Control rate assumed when neither the plant file nor the command line gives one (Hz).
DEFAULT_RATE = 100.0
#: |p| T above this: the pole is too fast for the control rate (sample >= ~30x faster than
#: the fastest closed-loop pole; common practice, e.g. Franklin, Powell and Workman,
#: Digital Control of Dynamic Systems, ch. 11, from memory).
FAST_POLE_LIMIT = 0.2


@dataclass
class DesignOptions:
    """Choices that override the plant file's ``design`` section (e.g. from the command line).

    Attributes
    ----------
    poles : dict or list, optional
        Output name -> poles, or one list for a single chain.
    lqr : dict, optional
        ``{"q": [...], "r": [...]}``.
    rate : float, optional
        Control rate in Hz.
    integral : bool, optional
        Integral action on every chain.
    linearize : {"auto", "outputs", "state"}
        ``outputs``: input-output linearization of the plant's outputs; ``state``:
        input-state linearization through a linearizing output T1 (one input);
        ``auto``: outputs when the plant declares any, else state.
    linearizing_output : str, optional
        T1 as an expression; default the first one the analysis found.
    source : str
        Named in error messages about these options.
    """

    poles: dict[str, list[complex]] | list[complex] | None = None
    lqr: dict[str, list[float]] | None = None
    rate: float | None = None
    integral: bool | None = None
    linearize: str = "auto"
    linearizing_output: str | None = None
    source: str = "<command line>"


@dataclass
class Chain:
    """One output chain y, y', ..., y^(r-1) with its outer-loop gains."""

    name: str
    expression: sp.Expr
    derivatives: list[sp.Expr]
    degree: int
    gains: np.ndarray               # (K_I,) K_0 .. K_(r-1)
    poles: np.ndarray               # achieved continuous-time poles
    sampled: SampledLoop

    @property
    def order(self) -> int:
        """Number of outer-loop states (r, plus one with integral action)."""
        return len(self.gains)


@dataclass
class Design:
    """Everything the code generator needs: the law, the gains, the guards, the notes."""

    plant: Plant
    report: Report
    kind: str                        # "input_output" or "input_state"
    chains: list[Chain]
    A: sp.Matrix | None              # None for a mechanical plant (assembled at run time)
    b: sp.Matrix | None
    integral: bool
    rate: float
    method: str
    transform_inverse: sp.Matrix | None
    sigma_reference: float
    sigma_reference_note: str
    watchdog: dict[str, Any]
    lqr_weights: dict[str, list[float]] | None = None
    reference: str | None = None
    warnings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def relative_degree(self) -> list[int]:
        """Relative degree of each chain."""
        return [c.degree for c in self.chains]

    @property
    def mechanical(self) -> bool:
        """True when the law is assembled at run time from M, F, B, J (a mechanical plant)."""
        return self.plant.mechanics is not None

    @property
    def transform(self) -> list[sp.Expr]:
        """``z = T(x)`` for input-state designs (the chain of T1); empty otherwise."""
        return self.chains[0].derivatives if self.kind == "input_state" else []


def synthesise(plant: Plant, options: DesignOptions | None = None, report: Report | None = None) -> Design:
    """Synthesise the linearizing law, the outer-loop gains and the watchdog levels.

    Parameters
    ----------
    plant : Plant
    options : DesignOptions, optional
        Overrides of the plant file's ``design`` section.
    report : Report, optional
        The analysis of ``plant``; computed when not given.

    Returns
    -------
    Design

    Raises
    ------
    DesignError
        One line naming the file (or option), the field and the problem: an output
        that no input reaches, a decoupling matrix that is singular everywhere, a pole
        count that does not match the relative degree, ...

    Examples
    --------
    >>> from linz_ros.model import plant_from_text
    >>> plant = plant_from_text("plant: p\\nstates: [x1, x2]\\ninputs: [u]\\n"
    ...     "dynamics: {x1: x2, x2: -sin(x1) + u}\\noutputs: {y: x1}\\n"
    ...     "design: {rate: 200, poles: {y: [-2, -3]}}")
    >>> design = synthesise(plant)
    >>> design.relative_degree, design.chains[0].gains.tolist()
    ([2], [6.0, 5.0])
    """
    options = options or DesignOptions()
    report = report or analyse(plant, samples=256)
    ctx = plant_context(plant)
    kind = _kind_of_design(plant, options)
    warnings: list[str] = []
    notes: list[str] = []
    if kind == "input_output":
        terms = _mechanical_law_terms if plant.mechanics is not None else _input_output_terms
        names, expressions, chains_sym, degrees, A, b = terms(plant, report, warnings)
        inverse = None
    else:
        names, expressions, chains_sym, degrees, A, b = _input_state_terms(plant, report, options, ctx)
        inverse = closed_form_inverse(chains_sym[0], plant, ctx)
        notes.append("T^-1 in closed form" if inverse is not None else
                     "no closed form found for T^-1: the runtime inverts T by Newton's method")
    rate, integral = _rate_and_integral(plant, options, notes)
    gains, poles_note, method, lqr_weights = _outer_loop_gains(plant, options, names, degrees, integral)
    if poles_note:
        notes.append(poles_note)
    chains = [_checked_chain(name, expr, derivs, degree, k, rate, method, options, plant)
              for name, expr, derivs, degree, k in zip(names, expressions, chains_sym, degrees, gains)]
    warnings.extend(_sampling_warnings(chains, rate))
    warnings.extend(_zero_dynamics_warnings(report, kind))
    sigma_ref, sigma_note = _sigma_reference(plant, report, A, ctx, kind)
    watchdog = _watchdog_levels(plant, sigma_ref, rate, names, expressions)
    return Design(plant, report, kind, chains, A, b, integral, rate, method, inverse, sigma_ref, sigma_note,
                  watchdog, lqr_weights, plant.design.get("reference"), warnings, notes)


def _checked_chain(name: str, expr: sp.Expr, derivs: list[sp.Expr], degree: int, gains: np.ndarray, rate: float,
                   method: str, options: DesignOptions, plant: Plant) -> Chain:
    """A chain whose gains are finite and whose continuous closed loop is asymptotically stable."""
    field = f"design.{'poles' if method == 'poles' else 'lqr'}"
    source = options.source if (options.poles is not None or options.lqr is not None) else plant.source
    if not np.all(np.isfinite(gains)):
        raise DesignError(source, field, f"the gains of chain {name} are not finite numbers (poles far too large?)")
    poles = closed_loop_poles(gains)
    if not np.all(poles.real < 0):
        raise DesignError(source, field, f"chain {name} would not be asymptotically stable (closed-loop poles "
                                         f"{', '.join(f'{p.real:.3g}{p.imag:+.3g}j' for p in poles)}); with LQR, "
                                         "give the first state of every chain a positive weight")
    try:
        loop = sampled_loop(gains, 1.0 / rate)
    except (ArithmeticError, ValueError, np.linalg.LinAlgError):
        loop = None
    if loop is None or not (math.isfinite(loop.spectral_radius) and math.isfinite(loop.fastest_pole_times_period)):
        raise DesignError(options.source if options.rate is not None else plant.source, "design.rate",
                          f"the sampled loop of chain {name} cannot be evaluated at {rate:g} Hz "
                          "(rate far too low for the poles)")
    if method == "poles":
        poles = _in_given_order(poles, _given_poles(name, options, plant))
    return Chain(name, expr, derivs, degree, gains, poles, loop)


def _given_poles(name: str, options: DesignOptions, plant: Plant) -> list[complex]:
    """The poles asked for chain ``name`` (command line over plant file), in the order given."""
    for poles in (options.poles, plant.design.get("poles")):
        if isinstance(poles, dict) and name in poles:
            return [complex(p) for p in poles[name]]
        if isinstance(poles, list):
            return [complex(p) for p in poles]
    return []


def _in_given_order(achieved: np.ndarray, given: list[complex]) -> np.ndarray:
    """The achieved poles, each matched to the nearest given one, in the order they were given."""
    remaining = list(achieved)
    ordered = []
    for pole in given:
        if not remaining:
            break
        nearest = min(range(len(remaining)), key=lambda i: abs(remaining[i] - pole))
        ordered.append(remaining.pop(nearest))
    return np.array(ordered + remaining)


def _kind_of_design(plant: Plant, options: DesignOptions) -> str:
    if options.linearize not in ("auto", "outputs", "state"):
        raise DesignError(options.source, "--linearize", f"expected auto, outputs or state, got {options.linearize!r}")
    if plant.mechanics is not None:
        if options.linearize == "state" or options.linearizing_output is not None:
            raise DesignError(options.source, "--linearize", "a mechanical plant is linearized through its outputs "
                                                             "(computed torque on the coordinates when it declares "
                                                             "none); input-state synthesis does not apply")
        if plant.h.shape[0] == 0:
            raise DesignError(plant.source, "outputs", "a mechanical plant with fewer inputs than coordinates "
                                                       "needs outputs (as many as inputs)")
        return "input_output"
    if options.linearize == "outputs" or (options.linearize == "auto" and plant.h.shape[0] > 0
                                          and options.linearizing_output is None):
        if plant.h.shape[0] == 0:
            raise DesignError(plant.source, "outputs", "input-output linearization needs outputs; the plant "
                                                       "declares none")
        return "input_output"
    if plant.m != 1:
        raise DesignError(plant.source, "inputs", f"input-state synthesis covers single-input plants "
                                                  f"({plant.m} inputs); declare outputs for input-output "
                                                  "linearization")
    return "input_state"


def _input_output_terms(plant: Plant, report: Report, warnings: list[str]):
    io = report.input_output
    assert io is not None
    p, m = plant.h.shape[0], plant.m
    if io.decoupling_matrix is None:
        raise DesignError(plant.source, "outputs", io.reason)
    if p != m:
        raise DesignError(plant.source, "outputs", f"the law needs as many outputs as inputs "
                                                   f"({p} output(s), {m} input(s))")
    if io.relative_degree is None:
        if any(d is None for d in io.relative_degree_generic) or "everywhere" in io.reason:
            raise DesignError(plant.source, "outputs", io.reason)
        warnings.append(f"{io.reason}; the law is built for the generic relative degree and the "
                        "singularity watchdog must keep the state away from the singular set")
    degrees = [int(d) for d in io.relative_degree_generic]
    return (list(plant.output_names), list(plant.h), io.chains, degrees, io.decoupling_matrix,
            io.drift_terms)


def _mechanical_law_terms(plant: Plant, report: Report, warnings: list[str]):
    """Chains (h, J q') of a mechanical plant; A and b stay None (assembled at run time)."""
    io = report.input_output
    assert io is not None
    p, m = plant.h.shape[0], plant.m
    if any(d is None for d in io.relative_degree_generic):
        raise DesignError(plant.source, "outputs", io.reason)
    if p != m:
        raise DesignError(plant.source, "outputs", f"the law needs as many outputs as inputs "
                                                   f"({p} output(s), {m} input(s))")
    if io.relative_degree is None:
        if "every sample" in io.reason or "could not decide" in io.reason:
            raise DesignError(plant.source, "outputs", io.reason)
        warnings.append(f"{io.reason}; the law is built for the generic relative degree and the "
                        "singularity watchdog must keep the state away from the singular set")
    return list(plant.output_names), list(plant.h), io.chains, [2] * p, None, None


def _input_state_terms(plant: Plant, report: Report, options: DesignOptions, ctx):
    iss = report.input_state
    if options.linearizing_output is not None:
        try:
            T1 = expression_in(plant, options.linearizing_output, options.source, "--linearizing-output")
        except PlantFileError as err:
            raise DesignError(err.source, err.field, err.problem) from None
        source, fieldname = options.source, "--linearizing-output"
    elif iss.linearizing_outputs:
        T1 = iss.linearizing_outputs[0]
        source, fieldname = plant.source, "dynamics"
    else:
        raise DesignError(plant.source, "dynamics", "input-state synthesis needs a linearizing output and "
                                                    f"none was found ({iss.reason}); supply one with "
                                                    "--linearizing-output")
    degree, row, chain = lie_chain(T1, plant, ctx)
    if degree != plant.n:
        shown = "infinite" if degree is None else str(degree)
        raise DesignError(source, fieldname, f"T1 = {T1} has relative degree {shown}, not n = {plant.n}: "
                                             "it is not a linearizing output")
    value = evaluate(row, ctx, plant.operating_vector())[0, 0]
    if not abs(value) > 1e-12:
        raise DesignError(source, fieldname, f"L_g L_f^{plant.n - 1} T1 vanishes at the operating point "
                                             "(it lies on the singular set)")
    A = row
    b = sp.Matrix([lie_derivative(chain[-1], plant.f, plant.states)])
    return ["T1"], [T1], [chain], [plant.n], A, b


def _rate_and_integral(plant: Plant, options: DesignOptions, notes: list[str]) -> tuple[float, bool]:
    rate = options.rate if options.rate is not None else plant.design.get("rate")
    if rate is None:
        rate = DEFAULT_RATE
        notes.append(f"no control rate given: {DEFAULT_RATE:g} Hz assumed")
    if not (isinstance(rate, (int, float)) and math.isfinite(rate) and rate > 0):
        raise DesignError(options.source, "--rate", f"control rate must be a positive number, got {rate!r}")
    integral = options.integral if options.integral is not None else bool(plant.design.get("integral", False))
    return float(rate), integral


def _outer_loop_gains(plant: Plant, options: DesignOptions, names: list[str], degrees: list[int],
                      integral: bool):
    orders = [d + int(integral) for d in degrees]
    if options.poles is not None and options.lqr is not None:
        raise DesignError(options.source, "--poles", "give either poles or LQR weights (--lqr-q, --lqr-r), not both")
    poles = options.poles if options.poles is not None else plant.design.get("poles")
    file_poles = plant.design.get("poles")
    if isinstance(options.poles, dict) and isinstance(file_poles, dict):
        poles = {**file_poles, **options.poles}      # the command line overrides chain by chain
    lqr = options.lqr if options.lqr is not None else plant.design.get("lqr")
    from_options = options.poles is not None or options.lqr is not None
    source = options.source if from_options else plant.source
    if options.poles is not None and options.lqr is None:
        lqr = None
    if options.lqr is not None and options.poles is None:
        poles = None
    if poles is not None:
        per_chain = _poles_per_chain(poles, names, orders, integral, source)
        gains = []
        for name, chain_poles in zip(names, per_chain):
            try:
                gains.append(gains_from_poles(chain_poles))
            except ValueError as err:
                raise DesignError(source, f"design.poles.{name}", str(err)) from None
        return gains, "", "poles", None
    note = ""
    if lqr is None:
        lqr = {}
        note = "no poles or LQR weights given: LQR with unit weights"
    q = lqr.get("q") or [1.0] * sum(orders)
    r = lqr.get("r") or [1.0] * len(names)
    labels = [label for name, k in zip(names, orders) for label in _state_labels(name, k, integral)]
    if len(q) != sum(orders):
        raise DesignError(source, "design.lqr.q", f"expected {sum(orders)} weights, one per chain state "
                                                  f"({', '.join(labels)}); got {len(q)}")
    if len(r) != len(names):
        raise DesignError(source, "design.lqr.r", f"expected {len(names)} weights, one per output chain "
                                                  f"({', '.join(names)}); got {len(r)}")
    if any(w <= 0 for w in r) or any(w < 0 for w in q):
        raise DesignError(source, "design.lqr", "weights must be positive (q may be zero)")
    low, high = LQR_WEIGHT_RANGE
    for key, weights in (("q", q), ("r", r)):
        outside = [w for w in weights if not (low <= w <= high or (key == "q" and w == 0))]
        if outside:
            field = ("--lqr-" + key) if options.lqr is not None else f"design.lqr.{key}"
            raise DesignError(source, field, f"weight {outside[0]:g} is outside [{low:g}, {high:g}]"
                                             + (" (or 0)" if key == "q" else ""))
    try:
        gains, _ = gains_from_lqr(orders, list(q), list(r))
    except (np.linalg.LinAlgError, ValueError) as err:
        raise DesignError(source, "design.lqr", f"the Riccati equation has no stabilising solution ({err}); "
                                                "give the first state of every chain a positive weight") from None
    return gains, note, "lqr", {"q": [float(w) for w in q], "r": [float(w) for w in r]}


def _state_labels(name: str, order: int, integral: bool) -> list[str]:
    labels = [f"int {name}"] if integral else []
    return labels + [name + "'" * k for k in range(order - int(integral))]


def _poles_per_chain(poles, names: list[str], orders: list[int], integral: bool, source: str):
    if isinstance(poles, list):
        if len(names) != 1:
            raise DesignError(source, "design.poles", "with several output chains, give poles per output")
        poles = {names[0]: poles}
    missing = [n for n in names if n not in poles]
    if missing:
        raise DesignError(source, "design.poles", f"no poles for output chain(s) {', '.join(missing)}")
    extra = [str(n) for n in poles if n not in names]
    if extra:
        raise DesignError(source, f"design.poles.{extra[0]}", f"{extra[0]!r} is not an output chain "
                                                              f"({', '.join(names)})")
    result = []
    for name, order in zip(names, orders):
        given = [complex(p) for p in poles[name]]
        if len(given) != order:
            with_integral = " including the integrator" if integral else ""
            raise DesignError(source, f"design.poles.{name}",
                              f"{len(given)} pole(s) given, but the chain has {order} states{with_integral} "
                              f"(relative degree {order - int(integral)})")
        if not all(math.isfinite(p.real) and math.isfinite(p.imag) for p in given):
            raise DesignError(source, f"design.poles.{name}", "poles must be finite numbers")
        if any(p.real >= 0 for p in given):
            raise DesignError(source, f"design.poles.{name}", "poles must lie in the open left half-plane")
        result.append(given)
    return result


def _sampling_warnings(chains: list[Chain], rate: float) -> list[str]:
    warnings = []
    for chain in chains:
        loop = chain.sampled
        if loop.spectral_radius >= 1:
            warnings.append(f"chain {chain.name}: the sampled loop at {rate:g} Hz is UNSTABLE (spectral radius "
                            f"{loop.spectral_radius:.3f}); slow the poles down or raise the rate")
        elif loop.fastest_pole_times_period > FAST_POLE_LIMIT:
            warnings.append(f"chain {chain.name}: poles too fast for {rate:g} Hz (|p| T = "
                            f"{loop.fastest_pole_times_period:.2f} > {FAST_POLE_LIMIT}); the sampled loop decays "
                            f"at {loop.equivalent_decay:.3g}/s instead of {loop.designed_decay:.3g}/s")
    return warnings


def _zero_dynamics_warnings(report: Report, kind: str) -> list[str]:
    io = report.input_output
    if kind != "input_output" or io is None or io.zero_dynamics is None:
        return []
    if io.zero_dynamics.stability == "unstable":
        return ["the zero dynamics are UNSTABLE at the operating point (non-minimum phase): the exact "
                "linearizing law drives the internal states away; it is unsafe on the machine"]
    if io.zero_dynamics.stability == "critical":
        return ["the zero dynamics are only critically stable at the operating point; check the internal "
                "states in simulation"]
    return []


def _sigma_reference(plant: Plant, report: Report, A: sp.Matrix, ctx, kind: str) -> tuple[float, str]:
    """The smallest singular value of A that counts as 'typical': the envelope median."""
    envelope = report.envelope
    if kind == "input_state" and plant.envelope:
        envelope = sample_envelope(plant, A, "L_g L_f^(n-1) T1", 256)
    if envelope is not None and envelope.median_sigma:
        return float(envelope.median_sigma), "median smallest singular value of A over the envelope"
    if A is None:
        terms = report.mechanical_terms or mechanical_terms(plant)
        values = terms.decoupling(np.array([plant.operating_vector()]))[0][0]
    else:
        values = evaluate(A, ctx, plant.operating_vector())
    if np.all(np.isfinite(values)):
        sigma = float(np.linalg.svd(values, compute_uv=False)[-1])
        if sigma > 0:
            return sigma, "smallest singular value of A at the operating point"
    raise DesignError(plant.source, "design.watchdog", "cannot choose default singularity thresholds: A is "
                                                       "singular at the operating point and the plant has no "
                                                       "envelope; set sigma_warn, sigma_act and sigma_stop")


def _watchdog_levels(plant: Plant, sigma_ref: float, rate: float, chain_names: list[str],
                     outputs: list[sp.Expr]) -> dict[str, Any]:
    """Every watchdog setting: the plant file's where given, else the table's defaults.

    ``divergence_error`` defaults to half the range of each output over the envelope
    (not watched without an envelope).
    """
    given = dict(plant.design.get("watchdog", {}))
    values = default_settings(sigma_ref, rate, plant.m, len(chain_names))
    explicit = sorted(k for k in given if k in values)
    if "sigma_act" in given and "damping" not in given:
        given["damping"] = given["sigma_act"]
    values.update({k: v for k, v in given.items() if k != "divergence_error"})
    values["divergence_error"] = _divergence_bounds(plant, given.get("divergence_error"), chain_names, outputs)
    found = watchdog_problem(values, plant.m, len(chain_names))
    if found is not None:
        raise DesignError(plant.source, f"design.watchdog.{found[0]}",
                          f"{found[1]} (with the defaults for the settings not given)")
    safe = values["safe_command"]
    if safe["kind"] == "fixed":
        for name, value in zip(plant.input_names, safe["value"]):
            lo, hi = plant.input_limits.get(name, (-math.inf, math.inf))
            if not lo <= value <= hi:
                raise DesignError(plant.source, f"design.watchdog.safe_command.{name}",
                                  f"{value:g} lies outside the input limits [{lo:g}, {hi:g}]")
    values["defaults"] = sorted(k for k in values if k not in explicit and k != "safe_command")
    return values


def _divergence_bounds(plant: Plant, given: Any, chain_names: list[str], outputs: list[sp.Expr]) -> list | None:
    """Per chain: the bound given in the plant file, or half the output's range over the envelope."""
    if isinstance(given, (int, float)):
        return [float(given)] * len(chain_names)
    given = dict(given or {})
    ranges = output_ranges(plant, outputs)
    bounds = []
    for i, name in enumerate(chain_names):
        if name in given:
            bounds.append(float(given[name]))
        elif ranges is not None and ranges[i] > 0:
            bounds.append(0.5 * ranges[i])
        else:
            bounds.append(None)
    return None if all(b is None for b in bounds) else bounds
