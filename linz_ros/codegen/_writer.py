"""Assemble the artifact document from a Design: CSE'd programs, metadata, verification."""

from __future__ import annotations

import datetime
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import sympy as sp

from linz_ros import __version__
from linz_ros.artifact.document import FORMAT, FORMAT_VERSION, seal
from linz_ros.artifact.extension import Extension
from linz_ros.artifact.watchdog import artifact_settings, defaults_note
from linz_ros.codegen._printer import to_grammar
from linz_ros.codegen._chain_verify import CHAIN_POINTS, verify_chain_law
from linz_ros.codegen._verify import DEFAULT_TOLERANCE, Verification, sample_points, verify_programs
from linz_ros.errors import ArtifactError
from linz_ros.synthesis import Design, delayed_counts, transformed_symbols

__all__ = ["SymbolicProgram", "symbolic_programs", "build_document", "write_artifact", "artifact_path"]


@dataclass
class SymbolicProgram:
    """One program before printing: argument symbols and named symbolic outputs."""

    name: str
    arguments: list[tuple[str, list[sp.Symbol]]]
    outputs: list[tuple[str, tuple[int, ...], list[sp.Expr]]]


def symbolic_programs(design: Design) -> list[SymbolicProgram]:
    """The programs an artifact carries, as sympy expressions (before CSE and printing).

    Parameters
    ----------
    design : Design

    Returns
    -------
    list of SymbolicProgram
        ``law`` (A, b, chain), ``dynamics`` (f, G), and for input-state designs
        ``transform`` (T and its Jacobian) and, when found, ``inverse`` (x of z); and
        ``singular_set`` when the analysis gave one.
    """
    plant = design.plant
    x = list(plant.states)
    p = list(plant.parameters)
    state_args = [("x", x), ("p", p)]
    chain = [e for c in design.chains for e in c.derivatives]
    if design.mechanical:
        programs = _mechanical_programs(design, state_args, chain)
    else:
        programs = _explicit_programs(design, state_args, chain)
    singular = _singular_set_expression(design)
    if singular is not None:
        programs.append(SymbolicProgram("singular_set", state_args, [("s", (1,), [singular])]))
    return programs


def _mechanical_programs(design: Design, state_args, chain: list[sp.Expr]) -> list[SymbolicProgram]:
    """M, F, B and the output terms J, J' q': the runtime assembles A = J M^-1 B itself.

    J here is dy'/dv (J K with quasi-velocities) and c = (dy'/dq) q'; the simulator's
    program adds the coordinate rates q' = k(q, v).
    """
    plant = design.plant
    mech = plant.mechanics
    if mech.elastic is not None:
        return _elastic_programs(design, state_args, chain)
    h = sp.Matrix([c.expression for c in design.chains])
    J, c = mech.decoupling_jacobian(h), mech.output_bias(h)
    nq, m = mech.nq, plant.m
    structure = [("M", (nq, nq), list(mech.M)), ("F", (nq,), list(mech.F)), ("B", (nq, m), list(mech.B))]
    return [
        SymbolicProgram("law", state_args, structure + [
            ("J", (len(design.chains), nq), list(J)), ("c", (len(design.chains),), list(c)),
            ("chain", (len(chain),), chain)]),
        SymbolicProgram("dynamics", state_args, structure + [("qdot", (nq,), list(mech.coordinate_rates))]),
    ]


def _elastic_programs(design: Design, state_args, chain: list[sp.Expr]) -> list[SymbolicProgram]:
    """M, F and the motors' K, J, D of an elastic-joint arm; the chains carry y and y' only.

    The runtime (``artifact.elastic``) forms the chains' upper half, A = M^-1 K J^-1 and b from these, with
    the time derivatives of M and F from the jets of this same program.
    """
    mech = design.plant.mechanics
    nq, e = mech.nq, mech.elastic
    structure = [("M", (nq, nq), list(mech.M)), ("F", (nq,), list(mech.F)),
                 ("stiffness", (nq,), list(e.stiffness)), ("motor_inertia", (nq,), list(e.motor_inertia)),
                 ("motor_damping", (nq,), list(e.motor_damping))]
    return [SymbolicProgram("law", state_args, structure + [("chain", (len(chain),), chain)]),
            SymbolicProgram("dynamics", state_args, structure)]


def _explicit_programs(design: Design, state_args, chain: list[sp.Expr]) -> list[SymbolicProgram]:
    plant = design.plant
    x, p = state_args[0][1], state_args[1][1]
    if design.law_form == "chain":      # the outputs only: A, b and the chains come from f, G, h at run time
        law = SymbolicProgram("law", state_args, [("h", (len(design.chains),), [c.expression for c in design.chains])])
    else:
        law = SymbolicProgram("law", state_args, [
            ("A", tuple(design.A.shape), list(design.A)),
            ("b", (design.b.shape[0],), list(design.b)),
            ("chain", (len(chain),), chain)])
    programs = [
        law,
        SymbolicProgram("dynamics", state_args, [
            ("f", (plant.n,), list(plant.f)),
            ("G", (plant.n, plant.m), list(plant.G))]),
    ]
    if design.kind == "input_state":
        T = sp.Matrix(design.transform)
        programs.append(SymbolicProgram("transform", state_args, [
            ("T", (plant.n,), list(T)), ("jacobian", (plant.n, plant.n), list(T.jacobian(sp.Matrix(x))))]))
        if design.transform_inverse is not None:
            z = list(transformed_symbols(plant.n))
            programs.append(SymbolicProgram("inverse", [("z", z), ("p", p)],
                                            [("x", (plant.n,), list(design.transform_inverse))]))
    return programs


def _singular_set_expression(design: Design) -> sp.Expr | None:
    if design.kind == "input_output":
        io = design.report.input_output
        expr = None if io is None else io.singular_set
    else:
        expr = design.report.input_state.singular_set
    if expr is None or expr == 1:
        return None
    return expr


def _printed_program(program: SymbolicProgram) -> dict[str, Any]:
    """CSE over all outputs of one program, then print every piece in the grammar."""
    entries = [e for _, _, values in program.outputs for e in values]
    temporaries, reduced = sp.cse(entries, symbols=sp.numbered_symbols("_t"), order="none")
    printed = [to_grammar(e) for e in reduced]
    outputs, start = [], 0
    for name, shape, values in program.outputs:
        outputs.append([name, list(shape), printed[start:start + len(values)]])
        start += len(values)
    return {
        "arguments": [[vector, [s.name for s in symbols]] for vector, symbols in program.arguments],
        "temporaries": [[t.name, to_grammar(e)] for t, e in temporaries],
        "outputs": outputs,
    }


def _complex_pairs(values) -> list[list[float]]:
    return [[float(complex(v).real), float(complex(v).imag)] for v in values]


def _design_section(design: Design) -> dict[str, Any]:
    return {
        "kind": design.kind,
        "outputs": [c.name for c in design.chains],
        "output_expressions": [to_grammar(c.expression) for c in design.chains],
        "relative_degree": design.relative_degree,
        "integral": design.integral,
        "rate": design.rate,
        "method": design.method,
        "lqr": design.lqr_weights,
        "reference": design.reference,
        "chains": [{
            "name": c.name, "degree": c.degree, "gains": [float(k) for k in c.gains],
            "poles": _complex_pairs(c.poles),
            "sampled": {"spectral_radius": c.sampled.spectral_radius,
                        "equivalent_decay": c.sampled.equivalent_decay,
                        "designed_decay": c.sampled.designed_decay,
                        "fastest_pole_times_period": c.sampled.fastest_pole_times_period},
        } for c in design.chains],
        "warnings": list(design.warnings),
        "notes": list(design.notes),
        **({"law_form": "chain"} if design.law_form == "chain" else {}),
        **({"extension": _extension_section(design).to_json()} if design.extension is not None else {}),
        "mechanics": (None if not design.mechanical else
                      {"form": design.plant.mechanics.form, "coordinates": design.plant.mechanics.nq,
                       "computed_torque": _is_computed_torque(design),
                       **({"elastic": True} if design.plant.mechanics.elastic is not None else {})}),
    }


def _extension_section(design: Design) -> Extension:
    """The compensator of an extended design (:mod:`linz_ros.artifact.extension`)."""
    base, extended = design.base_plant, design.plant
    added = extended.state_names[base.n:]
    return Extension(tuple(base.state_names), tuple(base.input_names),
                     delayed_counts(base, design.extension), tuple(added),
                     tuple(float(extended.operating_point[s]) for s in added),
                     tuple(tuple(float(b) for b in base.input_limits.get(u, (-math.inf, math.inf)))
                           for u in base.input_names))


def _is_computed_torque(design: Design) -> bool:
    """Outputs are the coordinates in order, B = I and v = q': then A = M^-1 and u = M v - F."""
    mech = design.plant.mechanics
    return ([c.expression for c in design.chains] == list(mech.coordinates) and mech.kinematics is None
            and mech.B == sp.eye(mech.nq))


def _analysis_section(design: Design) -> dict[str, Any]:
    report = design.report
    io = report.input_output
    singular = _singular_set_expression(design)
    zd = None if io is None else io.zero_dynamics
    return {
        "input_state_linearizable": report.input_state.linearizable,
        "input_state_reason": report.input_state.reason,
        "input_output_reason": None if io is None else io.reason,
        "singular_set": None if singular is None else to_grammar(singular),
        "singular_set_note": ("where L_g L_f^(n-1) T1 vanishes" if design.kind == "input_state"
                              else (io.singular_set_note if io is not None else "")),
        "zero_dynamics_order": None if io is None or design.kind == "input_state" else io.zero_dynamics_order,
        "zero_dynamics_stability": None if zd is None or design.kind == "input_state" else zd.stability,
        "sigma_reference": design.sigma_reference,
        "sigma_reference_note": design.sigma_reference_note,
        "envelope": None if report.envelope is None else report.envelope.to_json(),
    }


def _plant_section(design: Design) -> dict[str, Any]:
    plant = design.plant
    return {
        "name": plant.name,
        **plant.identity(),
        "source_sha256": plant.sha256,
        "parameters": [[s.name, float(v)] for s, v in plant.parameters.items()],
        "units": dict(plant.units),
        "signal_units": _signal_units(design),
        "input_limits": {k: [float(a), float(b)] for k, (a, b) in plant.input_limits.items()},
        "envelope": {k: [float(a), float(b)] for k, (a, b) in plant.envelope.items()},
        "operating_point": {k: float(v) for k, v in plant.operating_point.items()},
        **({"urdf": plant.urdf.to_json()} if plant.urdf is not None else {}),
    }


def _signal_units(design: Design) -> dict[str, str]:
    """The plant's signal units of the names the artifact carries: states, inputs, the design's outputs."""
    plant = design.plant
    known = set(plant.state_names) | set(plant.input_names) | {c.name for c in design.chains}
    if design.base_plant is not None:
        known |= set(design.base_plant.input_names)
    return {name: unit for name, unit in plant.signal_units.items() if name in known}


def _watchdog_section(design: Design) -> dict[str, Any]:
    """Every setting the artifact stores, in canonical form, with the defaults named."""
    w = design.watchdog
    section = {name: _plain(w[name]) for name in artifact_settings(w)}
    section["defaults"] = list(w["defaults"])
    section["defaults_note"] = defaults_note()
    return section


def _plain(value: Any) -> Any:
    """Floats for numbers (JSON), None kept, lists and mappings entry by entry."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    return float(value)


def build_document(design: Design, tolerance: float = DEFAULT_TOLERANCE, points: int = 64,
                   created: str | None = None) -> tuple[dict[str, Any], Verification]:
    """Assemble the artifact document and verify its programs against sympy.

    Parameters
    ----------
    design : Design
    tolerance : float
        Largest accepted normwise relative residual of any generated output.
    points : int
        Random points in the envelope for the verification.
    created : str, optional
        Creation time (ISO 8601, UTC); now when not given.

    Returns
    -------
    document : dict
        Without ``sha256`` (see :func:`linz_ros.artifact.document.seal`).
    verification : Verification

    Raises
    ------
    CodegenError
        When an expression cannot be written in the grammar, or the residual exceeds
        ``tolerance`` (the artifact is then not written).
    """
    programs = symbolic_programs(design)
    printed = {program.name: _printed_program(program) for program in programs}
    verification = verify_programs(design, programs, printed, tolerance=tolerance, points=points)
    if design.law_form == "chain":
        verification.per_program["chain_law"] = verify_chain_law(
            design, printed, sample_points(design, CHAIN_POINTS), tolerance)
    document = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "created": created or datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "linz_ros_version": __version__,
        "plant": _plant_section(design),
        "design": _design_section(design),
        "analysis": _analysis_section(design),
        "watchdog": _watchdog_section(design),
        "programs": printed,
        "verification": verification.to_json(),
    }
    return document, verification


def artifact_path(out_dir: str | Path, plant_name: str) -> Path:
    """Where ``linz build`` writes the artifact of a plant: ``OUT/<plant>.artifact.json``.

    Parameters
    ----------
    out_dir : str or pathlib.Path
    plant_name : str

    Returns
    -------
    pathlib.Path
    """
    return Path(out_dir) / f"{plant_name}.artifact.json"


def write_artifact(document: dict[str, Any], path: str | Path) -> Path:
    """Seal the document with its hash and write it (atomically: temporary file, rename).

    The plant file's location relative to the artifact is recorded, so a moved pair of
    files still finds each other.

    Parameters
    ----------
    document : dict
        From :func:`build_document`.
    path : str or pathlib.Path

    Returns
    -------
    pathlib.Path
        The written file.

    Raises
    ------
    ArtifactError
        When the folder cannot be created or written.
    """
    path = Path(path)
    source = document["plant"].get("source", "")
    document = dict(document, plant=dict(document["plant"]))
    if source and Path(source).is_file():
        document["plant"]["source_absolute"] = str(Path(source).resolve())
        document["plant"]["source_from_artifact"] = os.path.relpath(Path(source).resolve(),
                                                                    path.resolve().parent)
    text = seal(document)
    temporary = path.with_name(path.name + ".partial")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        temporary.write_text(text)
        os.replace(temporary, path)
    except OSError as err:
        raise ArtifactError(str(path), f"cannot write: {err.strerror}") from None
    return path
