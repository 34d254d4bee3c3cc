"""The analysis report: run every analysis on a plant, then render it as JSON or text."""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

from linz_ros.analysis._common import count, plant_context, show, show_bounded, show_matrix
from linz_ros.analysis._elastic import ELASTIC_LAW_TEXT, elastic_json
from linz_ros.analysis._envelope import EnvelopeResult, sample_envelope
from linz_ros.analysis._input_output import InputOutputResult, analyse_input_output
from linz_ros.analysis._input_state import (EVERYWHERE, InputStateResult, analyse_input_state,
                                            describe_singular_set, relative_degree_of)
from linz_ros.analysis._mechanical import (MechanicalTerms, analyse_mechanical_input_output,
                                           analyse_mechanical_input_state, mechanical_terms)
from linz_ros.analysis._numeric import NUMERIC_METHOD, numeric_chains, plant_jets
from linz_ros.geometry import BudgetExceeded, Monitor, checkpoint
from linz_ros.model import Plant

__all__ = ["Report", "analyse", "render_text", "MAX_ANALYSIS_STATES", "DEFAULT_BUDGET_SECONDS"]

#: States of an explicit plant at most for the geometric analysis. Beyond the symbolic
#: budget the decisions come from jets, whose cost grows about as states^4 (a 16-state
#: chain takes seconds); above this the verdicts are "could not decide", saying so.
MAX_ANALYSIS_STATES = 64
#: CPU seconds an analysis may take by default (``linz check --budget``).
DEFAULT_BUDGET_SECONDS = 600.0


@dataclass
class Report:
    """Everything ``linz check`` finds about a plant."""

    plant: Plant
    input_state: InputStateResult
    input_output: InputOutputResult | None
    envelope: EnvelopeResult | None
    mechanical_terms: MechanicalTerms | None = None    # numeric M, F, B, J of a mechanical plant

    def to_json(self) -> dict[str, Any]:
        """The contract object of ``linz check --json``."""
        p = self.plant
        return {
            "plant": p.name,
            **p.identity(),
            "sha256": p.sha256,
            "parameters": {s.name: v for s, v in p.parameters.items()},
            "control_affine": True,
            "drift": None if p.f is None else [show(e) for e in p.f],
            "input_matrix": None if p.G is None else show_matrix(p.G),
            "mechanics": _mechanics_json(p),
            "operating_point": dict(p.operating_point),
            "input_state": self.input_state.to_json(),
            "input_output": None if self.input_output is None else self.input_output.to_json(),
            "envelope": None if self.envelope is None else self.envelope.to_json(),
        }


def _mechanics_json(plant: Plant) -> dict[str, Any] | None:
    mech = plant.mechanics
    if mech is None:
        return None
    return {
        "form": mech.form,
        "coordinates": [q.name for q in mech.coordinates],
        "velocities": [v.name for v in mech.velocities],
        "mass_matrix": show_matrix(mech.M, bounded=True),
        "forces": [show_bounded(e) for e in mech.F],
        "input_map": show_matrix(mech.B, bounded=True),
        "elastic": None if mech.elastic is None else elastic_json(mech),
    }


def analyse(plant: Plant, samples: int = 1024, monitor: Monitor | None = None) -> Report:
    """Run the linearizability analyses on a plant.

    Parameters
    ----------
    plant : Plant
    samples : int
        Number of envelope samples for the conditioning sweep.
    monitor : Monitor or None
        CPU-time budget and progress reports; past the budget the verdicts are "could not
        decide within the budget", saying where the analysis stopped.

    Returns
    -------
    Report

    Examples
    --------
    >>> from linz_ros.model import plant_from_text
    >>> plant = plant_from_text("plant: p\\nstates: [x1, x2]\\ninputs: [u]\\n"
    ...                         "dynamics: {x1: sin(x2), x2: -x1**2 + u}")
    >>> analyse(plant).input_state.linearizable
    True
    """
    ctx = replace(plant_context(plant), monitor=monitor)
    if plant.mechanics is not None:
        return _analyse_mechanical(plant, ctx, samples)
    if plant.n > MAX_ANALYSIS_STATES:
        return _beyond_budget(plant, f"could not decide within the budget: {plant.n} states, the geometric "
                                     f"analysis handles at most {MAX_ANALYSIS_STATES}")
    try:
        return _analyse_explicit(plant, ctx, samples)
    except BudgetExceeded as stop:
        return _beyond_budget(plant, str(stop))


def _analyse_explicit(plant: Plant, ctx, samples: int) -> Report:
    input_state = analyse_input_state(plant, ctx)
    input_output = analyse_input_output(plant, ctx, numeric=bool(input_state.method))
    envelope = None
    if plant.envelope:
        subject_matrix, subject = _envelope_subject(plant, input_state, input_output, ctx)
        if subject_matrix is not None:
            checkpoint(ctx, "envelope sweep", 0.0)
            envelope = sample_envelope(plant, subject_matrix, subject, samples)
    return Report(plant, input_state, input_output, envelope)


def _beyond_budget(plant: Plant, reason: str) -> Report:
    """The report of a plant the analysis could not finish: undecided, with the budget named."""
    outputs = None
    if plant.h.shape[0]:
        outputs = InputOutputResult(list(plant.output_names), None, [None] * plant.h.shape[0], reason,
                                    summary=reason.removeprefix("could not decide "))
    return Report(plant, InputStateResult(None, reason), outputs, None)


def _analyse_mechanical(plant: Plant, ctx, samples: int) -> Report:
    """The analyses on the mass-matrix structure (M^-1 is never formed symbolically)."""
    terms = mechanical_terms(plant)
    input_state = analyse_mechanical_input_state(plant, terms, ctx)
    input_output = analyse_mechanical_input_output(plant, terms, ctx)
    envelope = None
    if (plant.envelope and input_output is not None and None not in input_output.relative_degree_generic
            and plant.h.shape[0] <= plant.m):
        envelope = sample_envelope(plant, lambda points: terms.decoupling(points)[0],
                                   "decoupling matrix J M^-1 B of the outputs", samples)
    return Report(plant, input_state, input_output, envelope, terms)


def _envelope_subject(plant, input_state, input_output, ctx):
    if input_output is not None and input_output.decoupling_matrix is not None:
        return input_output.decoupling_matrix, "decoupling matrix of the outputs"
    if input_output is not None and input_output.decoupling_values is not None:
        if input_output.relative_degree_generic and None not in input_output.relative_degree_generic:
            return input_output.decoupling_values, f"decoupling matrix of the outputs ({NUMERIC_METHOD})"
    if input_state.linearizing_outputs and input_state.method:
        T1 = input_state.linearizing_outputs[0]
        chains = numeric_chains([T1], plant, ctx, plant_jets(plant, ctx))
        subject = f"L_g L_f^{plant.n - 1} T1 for T1 = {show(T1)} ({NUMERIC_METHOD})"
        return chains.decoupling(plant_jets(plant, ctx)), subject
    if input_state.linearizing_outputs:
        T1 = input_state.linearizing_outputs[0]
        _, coefficient = relative_degree_of(T1, plant, ctx)
        return coefficient, f"L_g L_f^{plant.n - 1} T1 for T1 = {show(T1)}"
    return None, ""


def _yes_no(value: bool | None) -> str:
    return {True: "yes", False: "no", None: "could not decide"}[value]


def _input_output_verdict(io: InputOutputResult) -> str:
    """The verdict line: yes with the relative degree, or no / could not decide with the reason's summary."""
    if io.linearizable:
        return f"yes (relative degree {io.relative_degree})"
    summary = io.summary or io.reason.removeprefix("could not decide: ")
    return f"{_yes_no(io.linearizable)} ({summary})"


def _fmt(value: float | None) -> str:
    return "n/a" if value is None else f"{value:.4g}"


def render_verdict(report: Report) -> str:
    """The report's ``VERDICT`` block alone (the head of :func:`render_text`'s verdicts).

    Parameters
    ----------
    report : Report

    Returns
    -------
    str
        ``VERDICT`` and one line per verdict.
    """
    io, env = report.input_output, report.envelope
    lines = ["VERDICT", f"  input-state linearizable:  {_yes_no(report.input_state.linearizable)}"]
    if io is not None:
        lines.append(f"  input-output linearizable: {_input_output_verdict(io)}")
    if env is not None and env.min_sigma is not None:
        lines.append(f"  envelope: min sigma {_fmt(env.min_sigma)}, "
                     f"max condition {_fmt(env.max_condition)}")
    return "\n".join(lines)


def render_text(report: Report) -> str:
    """The human-readable report: verdicts first, then the reasons and the details.

    Parameters
    ----------
    report : Report

    Returns
    -------
    str
        Several lines; the fourth is ``VERDICT``.
    """
    p = report.plant
    iss, io, env = report.input_state, report.input_output, report.envelope
    at = ", ".join(f"{k}={v:g}" for k, v in p.operating_point.items())
    lines = [f"plant {p.name}: {count(p.n, 'state')}, {count(p.m, 'input')}, "
             f"{count(len(p.output_names), 'output')}  [{p.source}]",
             f"operating point: {at}", "", *render_verdict(report).split("\n")]
    if p.mechanics is not None:
        form = {"mass_matrix": "mass-matrix form", "energy": "energy form (Lagrange's equations)",
                "serial_arm": "serial arm (DH table)", "urdf": "URDF chain"}[p.mechanics.form]
        law = ("M(q) q'' = F(q, q') + B(q) u" if p.mechanics.kinematics is None
               else "M(q) v' = F(q, v) + B(q) u with q' = k(q, v)")
        if p.mechanics.elastic is not None:
            law = ELASTIC_LAW_TEXT
        lines += ["", "MODEL", f"  {form}: {law}, {p.mechanics.nq} coordinates; M^-1 is never formed"]
    lines += ["", "INPUT-STATE", f"  {iss.reason}"]
    if iss.method:
        lines.append(f"  method: {iss.method}")
    for d in iss.distributions:
        inv = {True: "involutive", False: "NOT involutive", None: "-"}[d.involutive]
        witness = f" ({d.witness} leaves it)" if d.witness else ""
        lines.append(f"  D_{d.order}: rank {d.rank} here, {d.rank_generic} generic, {inv}{witness}")
    if iss.controllability_indices:
        lines.append(f"  controllability indices: {iss.controllability_indices}")
    if iss.singular_set is not None:
        where = describe_singular_set(iss.singular_set, f"det[g, ..., ad_f^{p.n - 1} g]")
        lines.append(f"  [g, ..., ad_f^{p.n - 1} g] loses rank {where}")
    elif iss.singular_set_note:
        lines.append(f"  singular set: {iss.singular_set_note}")
    for T1 in iss.linearizing_outputs:
        lines.append(f"  linearizing output T1 = {show(T1)}")
    if iss.linearizing_output_note:
        lines.append(f"  ({iss.linearizing_output_note})")
    if io is not None:
        lines += ["", "INPUT-OUTPUT", f"  {io.reason}",
                  f"  generic relative degree: {io.relative_degree_generic}"]
        if io.method:
            lines.append(f"  method: {io.method}")
        if io.decoupling_structure is not None:
            lines.append(f"  decoupling matrix A(x) = {io.decoupling_structure['form']}, with J = dh/dq:")
            for row in io.decoupling_structure["J"]:
                lines.append(f"    [{', '.join(row)}]")
        if io.decoupling_matrix is not None:
            lines.append("  decoupling matrix A(x):")
            for i in range(io.decoupling_matrix.shape[0]):
                row = ", ".join(show(e) for e in io.decoupling_matrix.row(i))
                lines.append(f"    [{row}]")
        if io.singular_set is not None:
            where = describe_singular_set(io.singular_set, "det A" if len(io.outputs) > 1 else "L_g L_f^(r-1) h")
            note = "" if io.singular_set == EVERYWHERE else f"  ({io.singular_set_note})"
            lines.append(f"  singular set: {where.removeprefix('where ')}{note}")
        elif io.singular_set_note:
            lines.append(f"  singular set: {io.singular_set_note}")
        if io.zero_dynamics_order is not None:
            lines.append(f"  zero dynamics order: {io.zero_dynamics_order}")
        zd = io.zero_dynamics
        if zd is not None and zd.eigenvalues:
            eig = ", ".join(f"{z.real:.4g}{z.imag:+.4g}j" for z in zd.eigenvalues)
            lines.append(f"  zero dynamics at the equilibrium: {zd.stability}; eigenvalues {eig}")
        if zd is not None and zd.reason and not zd.eigenvalues:
            lines.append(f"  zero dynamics: {zd.reason}")
        extension = io.dynamic_extension
        if extension is not None:        # of the extended plant, which linz build designs for
            lines.append(f"  dynamic extension: {extension.text_line()}")
        if extension is not None and extension.envelope is not None and extension.envelope.min_sigma is not None:
            lines.append(f"  extended decoupling matrix over the envelope: smallest singular value "
                         f"{_fmt(extension.envelope.min_sigma)}, median {_fmt(extension.envelope.median_sigma)}")
    if env is not None:
        lines += ["", "ENVELOPE", f"  {env.subject}; {env.method}"]
        if env.min_sigma is None:
            lines.append("  not finite at any sample")
        else:
            worst = ", ".join(f"{k}={v:.4g}" for k, v in (env.worst_state or {}).items())
            lines.append(f"  smallest singular value {_fmt(env.min_sigma)} at {worst}")
            lines.append(f"  largest condition number {_fmt(env.max_condition)}"
                         f"{' (singular sample)' if env.max_condition is None else ''}")
            lines.append(f"  median smallest singular value {_fmt(env.median_sigma)}")
        if env.skipped:
            lines.append(f"  {count(env.skipped, 'sample')} where the matrix is not finite "
                         f"{'was' if env.skipped == 1 else 'were'} skipped")
    return "\n".join(lines)
