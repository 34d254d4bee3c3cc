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

from linz_ros.analysis import DynamicExtension, InputOutputResult, Report, analyse, lie_chain, plant_context
from linz_ros.errors import DesignError, PlantFileError
from linz_ros.geometry import evaluate, lie_derivative
from linz_ros.model import Plant, expression_in
from linz_ros.synthesis._gains import SampledLoop, closed_loop_poles, sampled_loop
from linz_ros.synthesis._guards import sampling_warnings, sigma_reference, watchdog_levels, zero_dynamics_warnings
from linz_ros.synthesis._options import DEFAULT_RATE, DesignOptions, given_poles, outer_loop_gains, rate_and_integral
from linz_ros.synthesis._transform import closed_form_inverse
from linz_ros.synthesis._extension import extended_design_plant, extended_report

__all__ = ["DesignOptions", "Chain", "Design", "synthesise", "DEFAULT_RATE", "CHAIN_FORM_NOTE"]

#: The note of a design whose chains exceed the symbolic budget (``Design.law_form`` "chain").
CHAIN_FORM_NOTE = ("the chains exceed the symbolic budget: A, b and the chains are evaluated at run time "
                   "from f, G and h by Taylor-mode jets (complex steps along G for A)")


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
    law_form: str = "expressions"    # "chain": A, b, chains too large to print, evaluated from f, G, h at run time
    extension: DynamicExtension | None = None    # the law is the extended plant's (``plant``); see ``base_plant``
    base_plant: Plant | None = None               # the plant as loaded, when ``plant`` is its extension

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
    kind = _kind_of_design(plant, options)
    extension = _found_extension(plant, report, kind)
    base_plant = None
    if extension is not None:
        base_plant, plant = plant, extended_design_plant(plant, extension)
        report = extended_report(base_plant, plant, report, extension)
    ctx = plant_context(plant)
    warnings: list[str] = []
    notes: list[str] = []
    if kind == "input_output":
        terms = _mechanical_law_terms if plant.mechanics is not None else _input_output_terms
        names, expressions, chains_sym, degrees, A, b = terms(plant, report, warnings)
        inverse = None
        if plant.mechanics is None and A is None:
            notes.append(CHAIN_FORM_NOTE)
    else:
        names, expressions, chains_sym, degrees, A, b = _input_state_terms(plant, report, options, ctx)
        inverse = closed_form_inverse(chains_sym[0], plant, ctx)
        notes.append("T^-1 in closed form" if inverse is not None else
                     "no closed form found for T^-1: the runtime inverts T by Newton's method")
    rate, integral = rate_and_integral(plant, options, notes)
    gains, poles_note, method, lqr_weights = outer_loop_gains(plant, options, names, degrees, integral)
    if poles_note:
        notes.append(poles_note)
    chains = [_checked_chain(name, expr, derivs, degree, k, rate, method, options, plant)
              for name, expr, derivs, degree, k in zip(names, expressions, chains_sym, degrees, gains)]
    warnings.extend(sampling_warnings(chains, rate))
    warnings.extend(zero_dynamics_warnings(report, kind))
    sigma_ref, sigma_note = sigma_reference(plant, report, A, ctx, kind)
    watchdog = watchdog_levels(plant, sigma_ref, rate, names, expressions)
    if extension is not None:
        notes.append(f"dynamic extension: {extension.text_line()}; the law is the extended plant's and the "
                     "runtime integrates the compensator states at its rate")
    return Design(plant, report, kind, chains, A, b, integral, rate, method, inverse, sigma_ref, sigma_note,
                  watchdog, lqr_weights, plant.design.get("reference"), warnings, notes,
                  "chain" if CHAIN_FORM_NOTE in notes else "expressions", extension, base_plant)


def _found_extension(plant: Plant, report: Report, kind: str) -> DynamicExtension | None:
    """The dynamic extension the analysis found for outputs static feedback cannot decouple."""
    io = report.input_output
    if kind != "input_output" or plant.mechanics is not None or io is None:
        return None
    extension = io.dynamic_extension
    return extension if extension is not None and extension.found else None


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
        poles = _in_given_order(poles, given_poles(name, options, plant))
    return Chain(name, expr, derivs, degree, gains, poles, loop)


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
    """Chains, A and b of an explicit plant; A and b None (the chain form) when the analysis decided
    from jets because the Lie derivatives exceed the symbolic budget."""
    io = report.input_output
    assert io is not None
    if io.decoupling_matrix is None and io.decoupling_values is not None:
        _check_square(plant, io, warnings, any(d is None for d in io.relative_degree_generic)
                      or "everywhere" in io.reason)
        degrees = [int(d) for d in io.relative_degree_generic]
        return list(plant.output_names), list(plant.h), [[] for _ in degrees], degrees, None, None
    if io.decoupling_matrix is None:
        raise DesignError(plant.source, "outputs", io.reason)
    _check_square(plant, io, warnings, any(d is None for d in io.relative_degree_generic)
                  or "everywhere" in io.reason)
    degrees = [int(d) for d in io.relative_degree_generic]
    return (list(plant.output_names), list(plant.h), io.chains, degrees, io.decoupling_matrix,
            io.drift_terms)


def _mechanical_law_terms(plant: Plant, report: Report, warnings: list[str]):
    """Chains (h, J q') of a mechanical plant; A and b stay None (assembled at run time)."""
    io = report.input_output
    assert io is not None
    if any(d is None for d in io.relative_degree_generic):
        raise DesignError(plant.source, "outputs", io.reason)
    _check_square(plant, io, warnings, "every sample" in io.reason or "could not decide" in io.reason)
    # relative degree 2 (rigid) or 4 (elastic joints: the chains' upper half is formed at run time)
    return (list(plant.output_names), list(plant.h), io.chains, [int(d) for d in io.relative_degree_generic],
            None, None)


def _check_square(plant: Plant, io: InputOutputResult, warnings: list[str], hopeless: bool) -> None:
    """As many outputs as inputs; a relative degree undefined at the operating point is refused when
    ``hopeless`` (singular everywhere, undecided), otherwise a warning (the generic degree is used)."""
    p, m = plant.h.shape[0], plant.m
    if p != m:
        raise DesignError(plant.source, "outputs", f"the law needs as many outputs as inputs "
                                                   f"({p} output(s), {m} input(s))")
    if io.relative_degree is None:
        if hopeless:
            raise DesignError(plant.source, "outputs", io.reason)
        warnings.append(f"{io.reason}; the law is built for the generic relative degree and the "
                        "singularity watchdog must keep the state away from the singular set")


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
