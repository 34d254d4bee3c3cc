"""Read and validate plant files; every mistake becomes a one-line PlantFileError."""

from __future__ import annotations

import difflib
import hashlib
import math
import re
import stat
from pathlib import Path
from typing import Any, Mapping

import sympy as sp
import yaml

from linz_ros.artifact.watchdog import PLANT_FILE_SETTINGS, watchdog_problem
from linz_ros.artifact.watchdog import setting as watchdog_setting
from linz_ros.artifact.grammar import RESERVED_NAMES, FUNCTIONS, names_in, parse_expression
from linz_ros.errors import ExpressionSyntaxError, PlantFileError
from linz_ros.model._mechanics import MECHANICAL_FORMS, check_mass_matrix, read_mechanics, velocity_names
from linz_ros.model._plant import Mechanics, Plant
from linz_ros.model._plausibility import check_expression_size, check_nominal_values, check_physical_sign
from linz_ros.model._symbolic import UnknownName, tree_to_sympy

__all__ = ["load_plant", "plant_from_text", "expression_in"]

_IDENTIFIER = re.compile(r"[A-Za-z][A-Za-z0-9_]*")  # used with fullmatch: no trailing newline
_TOP_LEVEL = ("plant", "description", "states", "coordinates", "velocities", "inputs", "parameters",
              "definitions", "dynamics", "mass_matrix", "kinetic_energy", "potential_energy", "serial_arm",
              "forces", "input_map", "kinematics", "outputs", "input_limits", "envelope", "operating_point", "design")
_REQUIRED = ("plant", "inputs")
#: Keys that only a mechanical form may carry, and the one key of each model form.
_MECHANICAL_ONLY = ("coordinates", "velocities", "forces", "input_map", "kinematics")
_MODEL_FORMS = ("dynamics",) + tuple(MECHANICAL_FORMS)
_DESIGN_KEYS = ("rate", "poles", "lqr", "integral", "watchdog", "reference")
_MAX_FILE_BYTES = 5_000_000
#: Longest plant name: it becomes file names (``<plant>.artifact.json``, field logs), 255 bytes at most.
_MAX_PLANT_NAME = 100


class _StrictLoader(yaml.SafeLoader):
    """A safe YAML loader that refuses duplicate keys instead of keeping the last one, and
    turns a scalar that its tag cannot hold (``!!int abc``, ``2020-13-45``) into a marked error."""

    def construct_object(self, node: yaml.Node, deep: bool = False) -> Any:
        try:
            return super().construct_object(node, deep=deep)
        except (ValueError, TypeError, LookupError, AttributeError, ArithmeticError):
            kind = node.tag.rsplit(":", 1)[-1]
            value = node.value if isinstance(node.value, str) else ""
            text = value if len(value) <= 40 else value[:37] + "..."
            raise yaml.constructor.ConstructorError(
                None, None, f"cannot read {text!r} as {kind}", node.start_mark) from None


def _construct_unique_mapping(loader: _StrictLoader, node: yaml.MappingNode, deep: bool = False):
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        try:
            hash(key)
        except TypeError:
            raise yaml.constructor.ConstructorError(
                None, None, f"{_kind(key)} cannot be a key", key_node.start_mark) from None
        if key in seen:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r} (first at line {seen[key]})", key_node.start_mark)
        seen[key] = key_node.start_mark.line + 1
    return yaml.SafeLoader.construct_mapping(loader, node, deep)


_StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_unique_mapping)


class _Reader:
    """Validates one plant document; ``fail`` raises with the file name attached."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.names: dict[str, str] = {}  # name -> what it is (state, input, ...)
        self.table: dict[str, sp.Expr] = {}
        self.values: dict[sp.Symbol, float] = {}  # nominal parameter values, once read

    def fail(self, field: str, problem: str) -> PlantFileError:
        return PlantFileError(self.source, _printable(field), _printable(problem))

    # -- small typed readers -------------------------------------------------------
    def mapping(self, doc: Mapping, key: str, required: bool = False) -> dict:
        value = doc.get(key)
        if value is None:
            if required:
                raise self.fail(key, "missing (required)")
            return {}
        if not isinstance(value, dict):
            raise self.fail(key, f"expected a mapping of name: value, got {_kind(value)}")
        return value

    def number(self, field: str, value: Any) -> float:
        if isinstance(value, bool) or value is None:
            raise self.fail(field, f"expected a number, got {_describe(value)}")
        if isinstance(value, (int, float)):
            try:
                number = float(value)
            except OverflowError:
                raise self.fail(field, "expected a finite number, got a whole number too large for a float") from None
        elif isinstance(value, str):
            try:
                number = float(value)  # YAML 1.1 reads 1e3 as text
            except ValueError:
                raise self.fail(field, f"expected a number, got {value!r}") from None
        else:
            raise self.fail(field, f"expected a number, got {_kind(value)}")
        if not math.isfinite(number):
            raise self.fail(field, f"expected a finite number, got {value!r}")
        return number

    def interval(self, field: str, value: Any) -> tuple[float, float]:
        if not isinstance(value, (list, tuple)) or len(value) != 2:
            raise self.fail(field, f"expected [lower, upper], got {_describe(value)}")
        lower = self.number(f"{field}[0]", value[0])
        upper = self.number(f"{field}[1]", value[1])
        if lower >= upper:
            raise self.fail(field, f"lower bound {lower:g} is not below upper bound {upper:g}")
        return lower, upper

    def declare(self, field: str, name: Any, kind: str) -> str:
        if not isinstance(name, str) or not _IDENTIFIER.fullmatch(name):
            raise self.fail(field, f"{_describe(name)} is not a valid name "
                                   "(letters, digits and _; starting with a letter)")
        if name in FUNCTIONS:
            raise self.fail(field, f"{name!r} is the name of a function; choose another name")
        if name in RESERVED_NAMES:
            raise self.fail(field, f"{name!r} is a reserved constant; choose another name")
        if name in self.names:
            raise self.fail(field, f"duplicate name {name!r} (already a {self.names[name]})")
        self.names[name] = kind
        return name

    def name_list(self, doc: Mapping, key: str, kind: str) -> list[str]:
        value = doc.get(key)
        if not isinstance(value, list) or not value:
            raise self.fail(key, f"expected a non-empty list of names, got {_describe(value)}")
        return [self.declare(f"{key}[{i}]", name, kind) for i, name in enumerate(value)]

    def expression(self, field: str, text: Any, allowed: set[str]) -> sp.Expr:
        try:
            tree = parse_expression(text)
        except ExpressionSyntaxError as err:
            raise self.fail(field, str(err)) from None
        for name in sorted(names_in(tree)):
            if name not in allowed and name not in RESERVED_NAMES:
                if name in self.names:
                    raise self.fail(field, f"{self.names[name]} {name!r} may not appear here")
                raise self.fail(field, f"unknown symbol {name!r} (not a declared "
                                       "state, input, parameter or definition)")
        try:
            expr = tree_to_sympy(tree, self.table)
        except UnknownName as err:  # pragma: no cover - names were checked above
            raise self.fail(field, f"unknown symbol {err.args[0]!r}") from None
        except (ZeroDivisionError, ValueError, TypeError) as err:
            raise self.fail(field, f"cannot evaluate {_short(text)!r}: {err}") from None
        if expr.has(sp.zoo, sp.oo, -sp.oo, sp.nan):
            raise self.fail(field, f"{_short(text)!r} is infinite or undefined (division by zero?)")
        check_expression_size(self, field, expr)
        check_nominal_values(self, field, text, expr, self.values)
        return expr

    def text(self, doc: Mapping, key: str, field: str) -> str:
        """Free text (a number is taken as its text); lists and mappings are refused."""
        value = doc.get(key)
        if value is None:
            return ""
        if not isinstance(value, (str, int, float)):
            raise self.fail(field, f"expected text, got {_kind(value)}")
        return str(value)


def _printable(text: str) -> str:
    """The text with line breaks and other control characters escaped, so a message stays one line."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def _short(text: Any, width: int = 60) -> str:
    """An expression as written, cut to ``width`` characters for messages."""
    text = text if isinstance(text, str) else repr(text)
    return text if len(text) <= width else text[:width - 3] + "..."


def _kind(value: Any) -> str:
    return {dict: "a mapping", list: "a list", str: "text", bool: "true/false",
            type(None): "nothing"}.get(type(value), type(value).__name__)


def _describe(value: Any) -> str:
    if isinstance(value, (str, int, float)) and not isinstance(value, bool):
        return repr(value)
    return _kind(value)


def _stray_keys_problem(extra: list[str], missing: list[str], kind: str, lacking: str) -> str:
    """``'x3' is not a state (did you mean 'x2'?); no equation for x2``: the stray keys first."""
    parts = []
    for key in extra[:3]:
        close = difflib.get_close_matches(key, missing, n=1, cutoff=0.5)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        parts.append(f"{_short(key, 40)!r} is not a {kind}{hint}")
    if len(extra) > 3:
        parts.append(f"and {len(extra) - 3} more")
    problem = ", ".join(parts)
    return problem + (f"; {lacking} " + ", ".join(missing) if missing else "")


def _split_affine(reader: _Reader, state: str, rhs: sp.Expr, inputs: list[sp.Symbol]
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


def _read_parameters(reader: _Reader, doc: Mapping) -> tuple[dict[sp.Symbol, float], dict[str, str]]:
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


def _read_definitions(reader: _Reader, doc: Mapping) -> None:
    """Named sub-expressions, each usable by the later ones and by dynamics and outputs."""
    for name, text in reader.mapping(doc, "definitions").items():
        field = f"definitions.{name}"
        reader.declare(field, name, "definition")
        allowed = {k for k, kind in reader.names.items() if k != name}
        reader.table[name] = reader.expression(field, text, allowed)


def _read_dynamics(reader: _Reader, doc: Mapping, states: list[str], inputs: list[sp.Symbol]
                   ) -> tuple[sp.Matrix, sp.Matrix]:
    dynamics = reader.mapping(doc, "dynamics", required=True)
    missing = [s for s in states if s not in dynamics]
    extra = [str(k) for k in dynamics if k not in states]
    if extra:
        raise reader.fail("dynamics", _stray_keys_problem(extra, missing, "state", "no equation for"))
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


def _model_form(reader: _Reader, doc: Mapping) -> str:
    """Which model form the document uses: ``dynamics`` or one of the mechanical forms."""
    given = [key for key in _MODEL_FORMS if doc.get(key) is not None]
    if not given:
        raise reader.fail("dynamics", "missing (required): give the model as dynamics (explicit form), "
                                      "mass_matrix, kinetic_energy or serial_arm")
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
    else:
        if doc.get("states") is not None:
            raise reader.fail("states", "a mechanical plant's states are its coordinates and velocities; "
                                        "give coordinates (and optionally velocities) instead")
        if doc.get("coordinates") is None:
            raise reader.fail("coordinates", "missing (required with " + form + ")")
        if form != "kinetic_energy" and doc.get("potential_energy") is not None:
            raise reader.fail("potential_energy", "belongs to the energy form (with kinetic_energy)")
    return form


def _read_mechanical_outputs(reader: _Reader, doc: Mapping, mechanics: Mechanics
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


def _read_outputs(reader: _Reader, doc: Mapping) -> tuple[tuple[str, ...], sp.Matrix]:
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


def _read_bounds(reader: _Reader, doc: Mapping, key: str, allowed: list[str], what: str
                 ) -> dict[str, tuple[float, float]]:
    bounds = {}
    for name, value in reader.mapping(doc, key).items():
        if name not in allowed:
            raise reader.fail(f"{key}.{name}", f"{name!r} is not {what}")
        bounds[name] = reader.interval(f"{key}.{name}", value)
    return bounds


def _read_operating_point(reader: _Reader, doc: Mapping, states: list[str],
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


def _read_design(reader: _Reader, doc: Mapping, outputs: tuple[str, ...], states: list[str],
                 inputs: list[str]) -> dict[str, Any]:
    design = reader.mapping(doc, "design")
    unknown = [str(k) for k in design if k not in _DESIGN_KEYS]
    if unknown:
        raise reader.fail(f"design.{unknown[0]}", "unknown key; expected one of " + ", ".join(_DESIGN_KEYS))
    result: dict[str, Any] = {}
    if "rate" in design:
        rate = reader.number("design.rate", design["rate"])
        if rate <= 0:
            raise reader.fail("design.rate", f"control rate must be positive, got {rate:g}")
        result["rate"] = rate
    if "poles" in design and "lqr" in design:
        raise reader.fail("design", "give either poles or lqr, not both")
    if "poles" in design:
        result["poles"] = _read_poles(reader, design["poles"], outputs)
    if "lqr" in design:
        lqr = design["lqr"]
        if not isinstance(lqr, dict) or set(lqr) - {"q", "r"}:
            raise reader.fail("design.lqr", "expected {q: [weights], r: [weights]}")
        result["lqr"] = {}
        for key in ("q", "r"):
            weights = lqr.get(key)
            if weights is None:
                continue
            if not isinstance(weights, list) or not weights:
                raise reader.fail(f"design.lqr.{key}", "expected a non-empty list of weights")
            values = [reader.number(f"design.lqr.{key}[{i}]", w) for i, w in enumerate(weights)]
            if any(w < 0 for w in values) or (key == "r" and any(w == 0 for w in values)):
                raise reader.fail(f"design.lqr.{key}", "weights must be positive" + ("" if key == "r" else " or zero"))
            result["lqr"][key] = values
    if "integral" in design:
        if not isinstance(design["integral"], bool):
            raise reader.fail("design.integral", "expected true or false")
        result["integral"] = design["integral"]
    if "watchdog" in design:
        result["watchdog"] = _read_watchdog(reader, design["watchdog"], inputs, outputs)
    if "reference" in design:
        if not isinstance(design["reference"], str) or not design["reference"].strip():
            raise reader.fail("design.reference", "expected text such as 'step:amplitude=0.1,at=0.5'")
        result["reference"] = design["reference"].strip()
    return result


def _read_poles(reader: _Reader, poles: Any, outputs: tuple[str, ...]) -> dict[str, list[complex]] | list[complex]:
    """Poles per output chain (a mapping), or one list for a single chain."""
    if isinstance(poles, list):
        if len(outputs) > 1:
            raise reader.fail("design.poles", "with several outputs, give a mapping of output: [poles]")
        if not poles:
            raise reader.fail("design.poles", "expected a non-empty list of poles")
        return [_read_pole(reader, f"design.poles[{i}]", v) for i, v in enumerate(poles)]
    if not isinstance(poles, dict):
        raise reader.fail("design.poles", "expected a mapping of output: [poles]")
    result = {}
    for name, values in poles.items():
        field = f"design.poles.{name}"
        if name not in outputs:
            raise reader.fail(field, f"{name!r} is not an output")
        if not isinstance(values, list) or not values:
            raise reader.fail(field, "expected a non-empty list of poles")
        result[name] = [_read_pole(reader, f"{field}[{i}]", v) for i, v in enumerate(values)]
    return result


def _read_watchdog(reader: _Reader, section: Any, inputs: list[str], outputs: tuple[str, ...]) -> dict[str, Any]:
    """Watchdog settings, checked against the one table (:mod:`linz_ros.artifact.watchdog`).

    Per-input settings are mappings of input: value, stored as one entry per input (None
    where not given); ``divergence_error`` is one number for every output or a mapping of
    output: value.
    """
    if not isinstance(section, dict):
        raise reader.fail("design.watchdog", f"expected a mapping, got {_kind(section)}")
    unknown = [str(k) for k in section if k not in PLANT_FILE_SETTINGS]
    if unknown:
        raise reader.fail(f"design.watchdog.{unknown[0]}",
                          "unknown key; expected one of " + ", ".join(PLANT_FILE_SETTINGS))
    result: dict[str, Any] = {}
    for key, value in section.items():
        row = watchdog_setting(key)
        field = f"design.watchdog.{key}"
        if key == "safe_command":
            result[key] = _read_safe_command(reader, value, inputs)
        elif row.shape == "choice":
            result[key] = value
        elif key == "rate_limits":
            result[key] = _per_name(reader, field, value, inputs, "input")
        elif key == "divergence_error" and not isinstance(value, dict):
            result[key] = reader.number(field, value)
        elif key == "divergence_error":
            result[key] = {name: reader.number(f"{field}.{name}", v)
                           for name, v in _checked_names(reader, field, value, outputs, "output").items()}
        else:
            result[key] = reader.number(field, value)
    canonical = {k: (list(v.values()) if isinstance(v, dict) and k == "divergence_error" else v)
                 for k, v in result.items()}
    found = watchdog_problem(canonical, len(inputs))
    if found is not None:
        name, problem = found
        names = inputs if name == "rate_limits" else list(result.get(name, {})) if name == "divergence_error" else []
        entry = re.fullmatch(r"entry (\d+): (.*)", problem)
        if entry and int(entry.group(1)) < len(names):
            raise reader.fail(f"design.watchdog.{name}.{names[int(entry.group(1))]}", entry.group(2))
        raise reader.fail(f"design.watchdog.{name}", problem)
    return result


def _checked_names(reader: _Reader, field: str, value: Any, allowed: Any, what: str) -> dict:
    if not isinstance(value, dict):
        raise reader.fail(field, f"expected a mapping of {what}: value")
    for name in value:
        if name not in allowed:
            raise reader.fail(f"{field}.{name}", f"{str(name)!r} is not an {what}")
    return value


def _per_name(reader: _Reader, field: str, value: Any, names: list[str], what: str) -> list[float | None]:
    """A mapping of name: number as one entry per name (None where not given)."""
    given = _checked_names(reader, field, value, names, what)
    return [None if name not in given else reader.number(f"{field}.{name}", given[name]) for name in names]


def _read_safe_command(reader: _Reader, value: Any, inputs: list[str]) -> dict[str, Any]:
    field = "design.watchdog.safe_command"
    if value in ("zero", "hold"):
        return {"kind": value}
    if isinstance(value, dict):
        missing = [u for u in inputs if u not in value]
        extra = [str(k) for k in value if k not in inputs]
        if extra:
            raise reader.fail(f"{field}.{extra[0]}", f"{extra[0]!r} is not an input")
        if missing:
            raise reader.fail(field, "a fixed safe command needs a value for every input; missing "
                                     + ", ".join(missing))
        return {"kind": "fixed", "value": [reader.number(f"{field}.{u}", value[u]) for u in inputs]}
    raise reader.fail(field, f"expected zero, hold, or a mapping of input: value, got {_describe(value)}")


def _read_pole(reader: _Reader, field: str, value: Any) -> complex:
    if isinstance(value, str):
        try:
            pole = complex(value.replace(" ", "").replace("i", "j"))
        except ValueError:
            raise reader.fail(field, f"expected a number, got {value!r}") from None
    else:
        pole = complex(reader.number(field, value))
    if not (math.isfinite(pole.real) and math.isfinite(pole.imag)):
        raise reader.fail(field, f"expected a finite pole, got {value!r}")
    if pole.real >= 0:
        raise reader.fail(field, f"pole {value} is not in the open left half-plane")
    return pole


def _read_document(doc: Any, source: str, digest: str) -> Plant:
    reader = _Reader(source)
    if not isinstance(doc, dict):
        raise reader.fail("", f"expected a mapping at the top level, got {_kind(doc)}")
    unknown = [str(k) for k in doc if k not in _TOP_LEVEL]
    if unknown:
        raise reader.fail(unknown[0], "unknown field; expected one of " + ", ".join(_TOP_LEVEL))
    for key in _REQUIRED:
        if doc.get(key) is None:
            raise reader.fail(key, "missing (required)")
    name = doc["plant"]
    if not isinstance(name, str) or not _IDENTIFIER.fullmatch(name):
        raise reader.fail("plant", f"{_describe(name)} is not a valid identifier")
    if len(name) > _MAX_PLANT_NAME:
        raise reader.fail("plant", f"a name of {len(name)} characters; at most {_MAX_PLANT_NAME} (it names the "
                                   "artifact and output files)")
    description = reader.text(doc, "description", "description")
    form = _model_form(reader, doc)
    if form == "dynamics":
        states = reader.name_list(doc, "states", "state")
        coordinates: list[str] = []
    else:
        coordinates = reader.name_list(doc, "coordinates", "state")
        states = coordinates + velocity_names(reader, doc, coordinates)
    inputs = reader.name_list(doc, "inputs", "input")
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
        mechanics = read_mechanics(reader, doc, form, state_symbols[:nq], state_symbols[nq:], input_symbols)
        f = G = None
        output_names, h = _read_mechanical_outputs(reader, doc, mechanics)
    input_limits = _read_bounds(reader, doc, "input_limits", inputs, "an input")
    envelope = _read_bounds(reader, doc, "envelope", states, "a state")
    operating_point = _read_operating_point(reader, doc, states, envelope)
    if mechanics is not None:
        check_mass_matrix(reader, form, mechanics, parameters, envelope, operating_point)
    design = _read_design(reader, doc, output_names, states, inputs)
    return Plant(
        name=name, description=description, states=tuple(state_symbols),
        inputs=tuple(input_symbols), parameters=parameters, units=units, f=f, G=G,
        output_names=output_names, h=h, input_limits=input_limits, envelope=envelope,
        operating_point=operating_point, design=design, source=source, sha256=digest, mechanics=mechanics)


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
    try:
        doc = yaml.load(text, Loader=_StrictLoader)  # noqa: S506 - a SafeLoader subclass
    except yaml.YAMLError as err:
        raise PlantFileError(source, "", _printable(_yaml_problem(err, text))) from None
    except RecursionError:
        raise PlantFileError(source, "", "not valid YAML: nested too deeply") from None
    return _read_document(doc, source, digest)


def _yaml_problem(err: yaml.YAMLError, text: str) -> str:
    """One line for a YAML error: where (line and column) and what."""
    if isinstance(err, yaml.MarkedYAMLError):
        mark = err.problem_mark or err.context_mark
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        return f"not valid YAML{where}: {err.problem or err.context or 'cannot be read'}"
    if isinstance(err, yaml.reader.ReaderError) and isinstance(err.character, int):
        line = text.count("\n", 0, err.position) + 1
        column = err.position - (text.rfind("\n", 0, err.position) + 1) + 1
        return f"not valid YAML at line {line}, column {column}: character #x{err.character:04x} is not allowed"
    return "not valid YAML: " + (" ".join(str(err).split()) or type(err).__name__)


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
    source = str(path)
    if not source.strip():          # Path("") would read as the current folder
        raise PlantFileError(repr(source), "", "expected a plant file name, got an empty one")
    raw = _read_bounded(Path(path), source)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise PlantFileError(source, "", f"not UTF-8 text (byte {err.start})") from None
    plant = plant_from_text(text, source)
    return plant


def _read_bounded(path: Path, source: str) -> bytes:
    """The bytes of a regular file of at most ``_MAX_FILE_BYTES``; anything else is one line.

    A device (``/dev/zero``) would be read without end and a named pipe would block, so
    only regular files are opened, and never more than the limit is read.
    """
    too_large = f"larger than {_MAX_FILE_BYTES // 1_000_000} MB"
    try:
        info = path.stat()
        if stat.S_ISDIR(info.st_mode):
            raise PlantFileError(source, "", "is a folder, not a plant file")
        if not stat.S_ISREG(info.st_mode):
            raise PlantFileError(source, "", "is not a regular file (a device, pipe or socket?)")
        if info.st_size > _MAX_FILE_BYTES:
            raise PlantFileError(source, "", too_large)
        with path.open("rb") as handle:
            raw = handle.read(_MAX_FILE_BYTES + 1)
    except PlantFileError:
        raise
    except FileNotFoundError:
        raise PlantFileError(source, "", "no such file") from None
    except OSError as err:
        raise PlantFileError(source, "", f"cannot read: {err.strerror or type(err).__name__}") from None
    except ValueError as err:      # a path with a NUL byte
        raise PlantFileError(source, "", f"cannot read: {err}") from None
    if len(raw) > _MAX_FILE_BYTES:
        raise PlantFileError(source, "", too_large)
    return raw


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
    reader = _Reader(source)
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
