"""Read and validate plant files; every mistake becomes a one-line PlantFileError.

This module reads the model sections (names, parameters, definitions, dynamics and the
affine split, outputs, bounds) and builds the :class:`Plant`; the typed readers and the
YAML loader are in ``_reader``, the ``design`` section in ``_design_section``, the
mechanical forms in ``_mechanics``.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any, Mapping

import sympy as sp
import yaml

from linz_ros.errors import PlantFileError
from linz_ros.model._design_section import read_design
from linz_ros.model._elastic import ELASTIC_KEY, motor_names
from linz_ros.model._mechanics import MECHANICAL_FORMS, check_mass_matrix, read_mechanics, velocity_names
from linz_ros.model._plant import Mechanics, Plant
from linz_ros.model._plausibility import check_physical_sign
from linz_ros.model._reader import (IDENTIFIER, Reader, StrictLoader, describe, kind_of, printable, read_bounded,
                                    stray_keys_problem, yaml_problem)
from linz_ros.model._units import read_signal_units
from linz_ros.model._urdf import URDF_KEY, read_urdf

__all__ = ["load_plant", "plant_from_text", "expression_in", "read_yaml_file"]

_TOP_LEVEL = ("plant", "description", "states", "coordinates", "velocities", "inputs", "parameters",
              "definitions", "dynamics", "mass_matrix", "kinetic_energy", "potential_energy", "serial_arm",
              "forces", "input_map", "kinematics", "outputs", "input_limits", "envelope", "operating_point", "design",
              "units", "elastic_joints", URDF_KEY, "campaign")
_REQUIRED = ("plant", "inputs")
#: Keys that only a mechanical form may carry, and the one key of each model form.
_MECHANICAL_ONLY = ("coordinates", "velocities", "forces", "input_map", "kinematics", ELASTIC_KEY)
_MODEL_FORMS = ("dynamics",) + tuple(MECHANICAL_FORMS)
#: Longest plant name: it becomes file names (``<plant>.artifact.json``, field logs), 255 bytes at most.
_MAX_PLANT_NAME = 100


def _split_affine(reader: Reader, state: str, rhs: sp.Expr, inputs: list[sp.Symbol]
                  ) -> tuple[sp.Expr, list[sp.Expr]]:
    """Split one right-hand side into f_i + sum_j G_ij u_j, or name the non-affine term."""
    input_set = set(inputs)
    columns = []
    for u in inputs:
        coefficient = sp.diff(rhs, u)
        if coefficient.free_symbols & input_set:
            raise reader.fail(f"dynamics.{state}", _non_affine_problem(rhs, inputs))
        columns.append(coefficient)
    drift = rhs.subs({u: 0 for u in inputs})
    if drift.free_symbols & input_set or drift.has(sp.nan, sp.zoo):
        raise reader.fail(f"dynamics.{state}", _non_affine_problem(rhs, inputs))
    return drift, columns


def _non_affine_problem(rhs: sp.Expr, inputs: list[sp.Symbol]) -> str:
    input_set = set(inputs)
    for term in sp.Add.make_args(rhs):
        used = sorted((term.free_symbols & input_set), key=str)
        if any(sp.diff(term, u).free_symbols & input_set for u in used):
            names = ", ".join(u.name for u in used)
            return f"not affine in the inputs: term '{term}' is nonlinear in {names}"
    return f"not affine in the inputs: '{rhs}'"


def _read_parameters(reader: Reader, doc: Mapping) -> tuple[dict[sp.Symbol, float], dict[str, str]]:
    values: dict[sp.Symbol, float] = {}
    units: dict[str, str] = {}
    for name, spec in reader.mapping(doc, "parameters").items():
        field = f"parameters.{name}"
        reader.declare(field, name, "parameter")
        if isinstance(spec, dict):
            extra = set(spec) - {"value", "unit"}
            if extra or "value" not in spec:
                raise reader.fail(field, "expected a number or {value: number, unit: text}")
            if "unit" in spec:
                units[name] = reader.text(spec, "unit", f"{field}.unit")
            spec = spec["value"]
        symbol = sp.Symbol(name, real=True)
        values[symbol] = reader.number(field, spec)
        reader.table[name] = symbol
    return values, units


def _read_definitions(reader: Reader, doc: Mapping) -> None:
    """Named sub-expressions, each usable by the later ones and by dynamics and outputs."""
    for name, text in reader.mapping(doc, "definitions").items():
        field = f"definitions.{name}"
        reader.declare(field, name, "definition")
        allowed = {k for k, kind in reader.names.items() if k != name}
        reader.table[name] = reader.expression(field, text, allowed)


def _read_dynamics(reader: Reader, doc: Mapping, states: list[str], inputs: list[sp.Symbol]
                   ) -> tuple[sp.Matrix, sp.Matrix]:
    dynamics = reader.mapping(doc, "dynamics", required=True)
    missing = [s for s in states if s not in dynamics]
    extra = [str(k) for k in dynamics if k not in states]
    if extra:
        raise reader.fail("dynamics", stray_keys_problem(extra, missing, "state", "no equation for"))
    if missing:
        raise reader.fail("dynamics", "missing an entry for state(s) " + ", ".join(missing))
    allowed = set(reader.names)
    drift, columns = [], []
    for state in states:
        rhs = reader.expression(f"dynamics.{state}", dynamics[state], allowed)
        f_i, g_i = _split_affine(reader, state, rhs, inputs)
        drift.append(f_i)
        columns.append(g_i)
    return sp.Matrix(drift), sp.Matrix(columns)


def _model_form(reader: Reader, doc: Mapping) -> str:
    """Which model form the document uses: ``dynamics`` or one of the mechanical forms."""
    given = [key for key in _MODEL_FORMS if doc.get(key) is not None]
    if not given:
        raise reader.fail("dynamics", "missing (required): give the model as dynamics (explicit form), "
                                      "mass_matrix, kinetic_energy, serial_arm or urdf")
    if len(given) > 1:
        raise reader.fail(given[1], f"give one model form; {given[0]} is given as well")
    form = given[0]
    if form == "dynamics":
        extra = [k for k in _MECHANICAL_ONLY + ("potential_energy",) if doc.get(k) is not None]
        if extra:
            raise reader.fail(extra[0], "belongs to the mechanical forms (mass_matrix, kinetic_energy, "
                                        "serial_arm), not to dynamics")
        if doc.get("states") is None:
            raise reader.fail("states", "missing (required)")
    elif form == URDF_KEY:
        derived = [k for k in ("states", "coordinates", "velocities", "inputs", "input_map", "kinematics",
                               "potential_energy") if doc.get(k) is not None]
        if derived:
            raise reader.fail(derived[0], "a URDF plant's states (q_<joint>, qd_<joint>) and inputs (tau_<joint>) "
                                          "come from the URDF's movable joints; remove this field")
    else:
        if doc.get("states") is not None:
            raise reader.fail("states", "a mechanical plant's states are its coordinates and velocities; "
                                        "give coordinates (and optionally velocities) instead")
        if doc.get("coordinates") is None:
            raise reader.fail("coordinates", "missing (required with " + form + ")")
        if form != "kinetic_energy" and doc.get("potential_energy") is not None:
            raise reader.fail("potential_energy", "belongs to the energy form (with kinetic_energy)")
    return form


def _read_mechanical_outputs(reader: Reader, doc: Mapping, mechanics: Mechanics
                             ) -> tuple[tuple[str, ...], sp.Matrix]:
    """Outputs of a mechanical plant: functions of the coordinates (the joints when none are given)."""
    if doc.get("outputs") is None:
        if len(mechanics.coordinates) != mechanics.B.shape[1]:
            return (), sp.zeros(0, 1)
        names = tuple(reader.declare("outputs (default: the coordinates)", f"y_{q.name}", "output")
                      for q in mechanics.coordinates)
        return names, sp.Matrix(mechanics.coordinates)
    names, h = _read_outputs(reader, doc)
    velocities = set(mechanics.velocities)
    for name, expr in zip(names, h):
        used = sorted(expr.free_symbols & velocities, key=str)
        if used:
            raise reader.fail(f"outputs.{name}", f"depends on velocity {used[0]}; outputs of a mechanical plant "
                                                 "are functions of the coordinates (relative degree 2)")
    return names, h


def _read_outputs(reader: Reader, doc: Mapping) -> tuple[tuple[str, ...], sp.Matrix]:
    outputs = reader.mapping(doc, "outputs")
    allowed = set(reader.names)  # inputs are refused below, with the reason
    names, exprs = [], []
    for name, text in outputs.items():
        field = f"outputs.{name}"
        reader.declare(field, name, "output")
        expr = reader.expression(field, text, allowed)
        uses_input = [k for k in sorted(map(str, expr.free_symbols)) if reader.names.get(k) == "input"]
        if uses_input:
            raise reader.fail(field, f"depends on input {uses_input[0]!r}; "
                                     "outputs with direct feedthrough are not supported")
        names.append(name)
        exprs.append(expr)
    return tuple(names), sp.Matrix(exprs) if exprs else sp.zeros(0, 1)


def _read_bounds(reader: Reader, doc: Mapping, key: str, allowed: list[str], what: str
                 ) -> dict[str, tuple[float, float]]:
    bounds = {}
    for name, value in reader.mapping(doc, key).items():
        if name not in allowed:
            raise reader.fail(f"{key}.{name}", f"{name!r} is not {what}")
        bounds[name] = reader.interval(f"{key}.{name}", value)
    return bounds


def _read_operating_point(reader: Reader, doc: Mapping, states: list[str],
                          envelope: dict[str, tuple[float, float]]) -> dict[str, float]:
    point = {s: 0.0 for s in states}
    for name, value in reader.mapping(doc, "operating_point").items():
        field = f"operating_point.{name}"
        if name not in states:
            raise reader.fail(field, f"{name!r} is not a state")
        point[name] = reader.number(field, value)
        if name in envelope and not envelope[name][0] <= point[name] <= envelope[name][1]:
            lo, hi = envelope[name]
            raise reader.fail(field, f"{point[name]:g} lies outside the envelope [{lo:g}, {hi:g}]")
    return point


def _read_document(doc: Any, source: str, digest: str) -> Plant:
    reader = Reader(source)
    if not isinstance(doc, dict):
        raise reader.fail("", f"expected a mapping at the top level, got {kind_of(doc)}")
    unknown = [str(k) for k in doc if k not in _TOP_LEVEL]
    if unknown:
        raise reader.fail(unknown[0], "unknown field; expected one of " + ", ".join(_TOP_LEVEL))
    for key in _REQUIRED:
        if doc.get(key) is None and not (key == "inputs" and doc.get(URDF_KEY) is not None):
            raise reader.fail(key, "missing (required)")
    name = doc["plant"]
    if not isinstance(name, str) or not IDENTIFIER.fullmatch(name):
        raise reader.fail("plant", f"{describe(name)} is not a valid identifier")
    if len(name) > _MAX_PLANT_NAME:
        raise reader.fail("plant", f"a name of {len(name)} characters; at most {_MAX_PLANT_NAME} (it names the "
                                   "artifact and output files)")
    description = reader.text(doc, "description", "description")
    form = _model_form(reader, doc)
    chain = None
    if form == "dynamics":
        states = reader.name_list(doc, "states", "state")
        coordinates: list[str] = []
    elif form == URDF_KEY:
        chain = read_urdf(reader, doc)
        coordinates, rates, torques = chain.names()
        states = [reader.declare(f"{URDF_KEY} (joint {j.name!r})", name, "state")
                  for j, name in zip(chain.joints + chain.joints, coordinates + rates)]
        if ELASTIC_KEY in doc:
            states += motor_names(reader, doc, coordinates)
    else:
        coordinates = reader.name_list(doc, "coordinates", "state")
        states = coordinates + velocity_names(reader, doc, coordinates)
        if ELASTIC_KEY in doc:                   # present but empty is refused by the section reader
            states += motor_names(reader, doc, coordinates)
    if chain is None:
        inputs = reader.name_list(doc, "inputs", "input")
    else:
        inputs = [reader.declare(f"{URDF_KEY} (joint {j.name!r})", u, "input") for j, u in zip(chain.joints, torques)]
    state_symbols = [sp.Symbol(s, real=True) for s in states]
    input_symbols = [sp.Symbol(u, real=True) for u in inputs]
    reader.table.update({s.name: s for s in state_symbols + input_symbols})
    parameters, units = _read_parameters(reader, doc)
    if form == "dynamics":      # the mechanical forms check M positive definite instead
        check_physical_sign(reader, parameters, units)
    reader.values = parameters
    _read_definitions(reader, doc)
    mechanics = None
    if form == "dynamics":
        f, G = _read_dynamics(reader, doc, states, input_symbols)
        output_names, h = _read_outputs(reader, doc)
    else:
        nq = len(coordinates)
        mechanics = read_mechanics(reader, doc, form, state_symbols[:nq], state_symbols[nq:2 * nq], input_symbols,
                                   state_symbols[2 * nq:], chain)
        f = G = None
        output_names, h = _read_mechanical_outputs(reader, doc, mechanics)
    input_limits = _read_bounds(reader, doc, "input_limits", inputs, "an input")
    envelope = _read_bounds(reader, doc, "envelope", states, "a state")
    if chain is not None:        # the URDF's limits, under what the plant file says
        input_limits, envelope = {**chain.input_limits(), **input_limits}, {**chain.envelope(), **envelope}
    operating_point = _read_operating_point(reader, doc, states, envelope)
    if mechanics is not None:
        check_mass_matrix(reader, form, mechanics, parameters, envelope, operating_point)
    design = read_design(reader, doc, output_names, states, inputs)
    signal_units = read_signal_units(reader, doc, states, inputs, output_names, h, mechanics)
    return Plant(
        name=name, description=description, states=tuple(state_symbols),
        inputs=tuple(input_symbols), parameters=parameters, units=units, f=f, G=G,
        output_names=output_names, h=h, input_limits=input_limits, envelope=envelope,
        operating_point=operating_point, design=design, source=source, sha256=digest, mechanics=mechanics,
        signal_units=signal_units, urdf=None if chain is None else chain.source)


def plant_from_text(text: str, source: str = "<string>") -> Plant:
    """Load a plant from the text of a plant file.

    Parameters
    ----------
    text : str
        YAML text in the plant-file format.
    source : str
        Name used in error messages.

    Returns
    -------
    Plant

    Raises
    ------
    PlantFileError
        One line naming the source, the field and the problem.

    Examples
    --------
    >>> p = plant_from_text("plant: p\\nstates: [x]\\ninputs: [u]\\ndynamics: {x: -x + u}")
    >>> p.f, p.G
    (Matrix([[-x]]), Matrix([[1]]))
    """
    digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()
    return _read_document(_parsed_yaml(text, source), source, digest)


def _parsed_yaml(text: str, source: str) -> Any:
    try:
        return yaml.load(text, Loader=StrictLoader)  # noqa: S506 - a SafeLoader subclass
    except yaml.YAMLError as err:
        raise PlantFileError(source, "", printable(yaml_problem(err, text))) from None
    except RecursionError:
        raise PlantFileError(source, "", "not valid YAML: nested too deeply") from None


def _file_text(path: str | Path, what: str) -> str:
    source = str(path)
    if not source.strip():          # Path("") would read as the current folder
        raise PlantFileError(repr(source), "", f"expected {what} name, got an empty one")
    raw = read_bounded(Path(path), source)
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise PlantFileError(source, "", f"not UTF-8 text (byte {err.start})") from None


def read_yaml_file(path: str | Path) -> Any:
    """A YAML file as plain data, read under the plant file's rules (bounded, no aliases or duplicate keys).

    For the sections other verbs read (a campaign file, a plant file's ``campaign:``).

    Parameters
    ----------
    path : str or pathlib.Path

    Returns
    -------
    Any

    Raises
    ------
    PlantFileError
        One line naming the file and the problem.
    """
    return _parsed_yaml(_file_text(path, "a YAML file"), str(path))


def load_plant(path: str | Path) -> Plant:
    """Load and validate a plant file.

    Parameters
    ----------
    path : str or pathlib.Path
        The YAML plant file.

    Returns
    -------
    Plant
        With f, G and h split out and the file's SHA-256 recorded.

    Raises
    ------
    PlantFileError
        For a missing, unreadable or invalid file; one line naming the file, the field
        and the problem.
    """
    return plant_from_text(_file_text(path, "a plant file"), str(path))


def expression_in(plant: Plant, text: Any, source: str, field: str) -> sp.Expr:
    """Read an expression over a plant's states and parameters (e.g. a candidate output).

    Parameters
    ----------
    plant : Plant
    text : str
        An expression in the plant-file grammar.
    source, field : str
        Named in the error message (e.g. ``"<command line>"``, ``"--linearizing-output"``).

    Returns
    -------
    sympy.Expr

    Raises
    ------
    PlantFileError
        For text outside the grammar or a name that is not a state or parameter.

    Examples
    --------
    >>> p = plant_from_text("plant: p\\nstates: [x]\\ninputs: [u]\\nparameters: {k: 2}\\ndynamics: {x: u}")
    >>> expression_in(p, "k*sin(x)", "<test>", "T1")
    k*sin(x)
    """
    reader = Reader(source)
    for symbol in plant.states:
        reader.names[symbol.name] = "state"
        reader.table[symbol.name] = symbol
    for symbol in plant.inputs:
        reader.names[symbol.name] = "input"
    for symbol in plant.parameters:
        reader.names[symbol.name] = "parameter"
        reader.table[symbol.name] = symbol
    allowed = {s.name for s in plant.states} | {s.name for s in plant.parameters}
    reader.values = dict(plant.parameters)
    return reader.expression(field, text, allowed)
