"""Verify a chain-form law (A, b and the chains evaluated from f, G, h by jets at run time) against
an independent evaluation: Lie derivatives formed symbolically by symengine (the C++ symbolic
library; sympy when it is not installed) and evaluated at a few envelope points with 60-digit
MPFR numbers. Neither the grammar compiler's taylor backend nor :mod:`linz_ros.artifact.taylor`
takes part in the reference.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from linz_ros.artifact._consistency import program_parts
from linz_ros.artifact.chainlaw import chain_law
from linz_ros.codegen._printer import CodegenError
from linz_ros.synthesis import Design

__all__ = ["CHAIN_POINTS", "verify_chain_law"]

#: Points at which a chain-form law is compared (the reference's trees are large: a few suffice,
#: an analytic function agreeing at random points being the same with probability one).
CHAIN_POINTS = 3
_BITS = 200          # MPFR precision of the reference's evaluation (about 60 digits)


def _engine():
    try:
        import symengine as engine
        return engine, "symengine"
    except ImportError:             # optional (setup.py extra "fast"): sympy is the slower fallback
        import sympy as engine
        return engine, "sympy"


def _reference_terms(design: Design):
    """Symbolic A, b and chains (parameters at their nominal values) in the independent engine."""
    engine, name = _engine()
    plant = design.plant
    nominal = {engine.sympify(s): engine.sympify(float(v)) for s, v in plant.nominal.items()}
    x = [engine.sympify(s) for s in plant.states]
    f = [engine.sympify(e).subs(nominal) for e in plant.f]
    G = [[engine.sympify(plant.G[i, j]).subs(nominal) for j in range(plant.m)] for i in range(plant.n)]
    rows, drift, chains = [], [], []
    for chain in design.chains:
        value = engine.sympify(chain.expression).subs(nominal)
        for _ in range(chain.degree):
            chains.append(value)
            gradient = [engine.diff(value, s) for s in x]
            last = (value, gradient)
            value = sum((d * fi for d, fi in zip(gradient, f)), engine.Integer(0))
        drift.append(value)
        rows.append([sum((d * G[k][j] for k, d in enumerate(last[1])), engine.Integer(0))
                     for j in range(plant.m)])
    return engine, name, [e for row in rows for e in row], drift, chains


def _evaluate(engine, name: str, expressions: list, states, point: np.ndarray) -> np.ndarray:
    if name == "symengine":
        values = {engine.sympify(s): engine.RealMPFR(repr(float(v)), _BITS) for s, v in zip(states, point)}
    else:
        values = {s: engine.Float(repr(float(v)), 60) for s, v in zip(states, point)}
    return np.array([complex(e.subs(values)).real for e in expressions], dtype=float)


def verify_chain_law(design: Design, printed: dict[str, dict[str, Any]], points: np.ndarray,
                     tolerance: float) -> dict[str, Any]:
    """Compare the chain-form law of the printed programs with an independent evaluation.

    Parameters
    ----------
    design : Design
        With ``law_form`` "chain".
    printed : dict
        Program name -> the printed program (``law`` carries h, ``dynamics`` f and G).
    points : numpy.ndarray
        States (rows) to compare at.
    tolerance : float

    Returns
    -------
    dict
        The ``per_program`` entry: ``max_relative_residual``, ``skipped``, ``worst_point`` and
        ``reference`` (what the law was compared with).

    Raises
    ------
    CodegenError
        When the residual exceeds ``tolerance``.
    """
    law = chain_law("build", lambda name: program_parts(printed[name], "build", name), design.relative_degree)
    nominal = [float(v) for v in design.plant.parameters.values()]
    engine, name, A, b, chains = _reference_terms(design)
    worst, worst_at, skipped = 0.0, None, 0
    for point in points:
        expected = [_evaluate(engine, name, block, design.plant.states, point) for block in (A, b, chains)]
        if not all(np.all(np.isfinite(e)) for e in expected):
            skipped += 1
            continue
        try:
            got_A, got_b, got_chains = law.terms(list(point), nominal)
        except (ArithmeticError, ValueError):
            got_A, got_b, got_chains = (np.full(len(e), math.nan) for e in expected)
        for got, want in zip((np.ravel(got_A), np.ravel(got_b), np.asarray(got_chains)), expected):
            scale = float(np.max(np.abs(want)))
            residual = float(np.max(np.abs(got - want))) / (scale if scale > 0 else 1.0)
            residual = residual if math.isfinite(residual) else math.inf
            if residual > worst or worst_at is None:
                worst, worst_at = max(worst, residual), point
    if skipped == len(points):
        raise CodegenError("the chain-form law could not be checked at any envelope point (the reference is not "
                           "finite there); narrow the envelope to where the model is defined; artifact not written")
    if not worst <= tolerance:
        names = [s.name for s in design.plant.states]
        where = ", ".join(f"{n}={v:.4g}" for n, v in zip(names, worst_at))
        raise CodegenError(f"the chain-form law (A, b, chains from jets) differs from the {name} Lie derivatives "
                           f"by {worst:.3g} (tolerance {tolerance:g}) at {where}; artifact not written")
    return {"max_relative_residual": worst, "skipped": skipped,
            "worst_point": [float(v) for v in worst_at],
            "reference": f"Lie derivatives formed by {name}, evaluated with {_BITS}-bit MPFR numbers"
                         if name == "symengine" else "Lie derivatives formed by sympy, evaluated at 60 digits"}
