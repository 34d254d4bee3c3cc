"""What a design warns about and the watchdog levels it stores: the sampled loop, the zero
dynamics, the typical conditioning of A and every watchdog setting."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
import sympy as sp

from linz_ros.analysis import Report, mechanical_terms, output_ranges, sample_envelope
from linz_ros.artifact.watchdog import default_settings, watchdog_problem
from linz_ros.errors import DesignError
from linz_ros.geometry import evaluate
from linz_ros.model import Plant

if TYPE_CHECKING:
    from linz_ros.synthesis._design import Chain

__all__ = ["FAST_POLE_LIMIT", "sampling_warnings", "zero_dynamics_warnings", "sigma_reference", "watchdog_levels"]

#: |p| T above this: the pole is too fast for the control rate (sample >= ~30x faster than
#: the fastest closed-loop pole; common practice, e.g. Franklin, Powell and Workman,
#: Digital Control of Dynamic Systems, ch. 11, from memory).
FAST_POLE_LIMIT = 0.2


def sampling_warnings(chains: list[Chain], rate: float) -> list[str]:
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


def zero_dynamics_warnings(report: Report, kind: str) -> list[str]:
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


def sigma_reference(plant: Plant, report: Report, A: sp.Matrix, ctx, kind: str) -> tuple[float, str]:
    """The smallest singular value of A that counts as 'typical': the envelope median."""
    envelope = report.envelope
    if kind == "input_state" and plant.envelope:
        envelope = sample_envelope(plant, A, "L_g L_f^(n-1) T1", 256)
    if envelope is not None and envelope.median_sigma:
        return float(envelope.median_sigma), "median smallest singular value of A over the envelope"
    io = report.input_output
    if A is None and plant.mechanics is None and io is not None and io.decoupling_values is not None:
        values = io.decoupling_values(np.array([plant.operating_vector()]))[0]     # from jets (chain form)
    elif A is None:
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


def watchdog_levels(plant: Plant, sigma_ref: float, rate: float, chain_names: list[str],
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
