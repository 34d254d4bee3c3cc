"""The consistency check of a loaded artifact: every name, count, type and shape the runtime
relies on, each refused in one line; and the checked parts of one program."""

from __future__ import annotations

import math
import re
from typing import Any

from linz_ros.artifact.chainlaw import CHAIN_LAW_OUTPUTS, LAW_FORMS
from linz_ros.artifact.elastic import ELASTIC_CONSTANTS
from linz_ros.artifact.extension import extension_problem
from linz_ros.artifact.urdf import urdf_problem
from linz_ros.artifact.watchdog import PLANT_FILE_SETTINGS, setting, watchdog_problem
from linz_ros.errors import ArtifactError

__all__ = ["REQUIRED_PROGRAMS", "MAX_UNIT_TEXT", "check_consistency", "program_parts"]

REQUIRED_PROGRAMS = ("law", "dynamics")
_IDENTIFIER = re.compile(r"^[A-Za-z][A-Za-z0-9_]*\Z")
_Z_NAMES = re.compile(r"^_z[0-9]+\Z")
_PROGRAMS = ("law", "dynamics", "transform", "inverse", "singular_set")
#: Longest unit text of a signal (``plant.signal_units``; the plant-file loader applies it too).
MAX_UNIT_TEXT = 40


def check_consistency(document: dict[str, Any], source: str) -> None:
    """Names, counts, types and shapes that the runtime relies on; one line per problem."""
    plant, design, programs, watchdog = (document[k] for k in ("plant", "design", "programs", "watchdog"))

    def need(condition: bool, problem: str) -> None:
        if not condition:
            raise ArtifactError(source, problem)

    def names(value: Any) -> bool:
        return (isinstance(value, list) and bool(value) and all(isinstance(v, str) and _IDENTIFIER.match(v)
                                                                for v in value) and len(set(value)) == len(value))

    need(isinstance(plant.get("name"), str) and bool(_IDENTIFIER.match(plant["name"])),
         "plant.name: expected an identifier (letters, digits and _)")
    for key in ("states", "inputs"):
        need(names(plant.get(key)), f"plant.{key}: expected a non-empty list of distinct identifiers")
    params = plant.get("parameters")
    need(isinstance(params, list) and all(isinstance(p, list) and len(p) == 2 and isinstance(p[0], str)
                                          and _IDENTIFIER.match(p[0]) and _is_number(p[1]) for p in params)
         and len({p[0] for p in params}) == len(params),
         "plant.parameters: expected a list of [name, value] with distinct names")
    states, inputs, parameter_names = plant["states"], plant["inputs"], [p[0] for p in params]
    need(not (set(states) & set(inputs)) and not (set(parameter_names) & (set(states) | set(inputs))),
         "plant: states, inputs and parameters must have distinct names")
    n, m = len(states), len(inputs)
    point = plant.get("operating_point")
    need(isinstance(point, dict) and set(point) == set(states) and all(_is_number(v) for v in point.values()),
         "plant.operating_point: expected a number for every state")
    for key, allowed in (("input_limits", inputs), ("envelope", states)):
        bounds = plant.get(key, {})
        need(isinstance(bounds, dict) and all(k in allowed and isinstance(v, list) and len(v) == 2
                                              and all(_is_number(b) for b in v) and v[0] < v[1]
                                              for k, v in bounds.items()),
             f"plant.{key}: expected name: [lower, upper] with lower below upper")
    chains = design.get("chains")
    need(isinstance(chains, list) and len(chains) == m,
         f"design.chains: expected one chain per input ({m}); the law needs a square decoupling matrix")
    need(design.get("kind") in ("input_output", "input_state"), "design.kind: expected input_output or input_state")
    outputs = design.get("outputs")
    need(isinstance(outputs, list) and len(outputs) == len(chains) and all(
        isinstance(o, str) and _IDENTIFIER.match(o) for o in outputs) and len(set(outputs)) == len(outputs),
         "design.outputs: expected one distinct identifier per chain")
    extension = design.get("extension")
    plant_inputs = []
    if extension is not None:
        found = extension_problem(extension, states, inputs, lambda v: bool(_IDENTIFIER.match(v)))
        need(found is None, "" if found is None else f"design.extension{'.' if found[0] else ''}{found[0]}: {found[1]}")
        plant_inputs = extension["plant_inputs"]
    _check_signal_units(plant.get("signal_units", {}), states + inputs + plant_inputs + outputs, need)
    if plant.get("urdf") is not None:
        found = urdf_problem(plant["urdf"], states, inputs)
        need(found is None, "" if found is None else f"plant.urdf{'.' if found[0] else ''}{found[0]}: {found[1]}")
    need(_is_number(design.get("rate")) and design["rate"] > 0, "design.rate: expected a positive number")
    integral = design.get("integral")
    need(isinstance(integral, bool), "design.integral: expected true or false")
    need(design.get("reference") is None or isinstance(design["reference"], str),
         "design.reference: expected text or null")
    for i, chain in enumerate(chains):
        need(isinstance(chain, dict) and isinstance(chain.get("degree"), int)
             and not isinstance(chain["degree"], bool) and 1 <= chain["degree"] <= n,
             f"design.chains[{i}].degree: expected a whole number from 1 to {n}")
        gains = chain.get("gains")
        need(isinstance(gains, list) and len(gains) == chain["degree"] + int(integral)
             and all(_is_number(g) for g in gains),
             f"design.chains[{i}].gains: expected {chain['degree'] + int(integral)} numbers")
    total = sum(c["degree"] for c in chains)
    need(total <= n, f"design.chains: the relative degrees add up to {total}, more than the {n} states")
    need(isinstance(programs, dict), "programs: expected a mapping")
    for name in programs:
        need(name in _PROGRAMS, f"programs.{name}: unknown program; expected one of {', '.join(_PROGRAMS)}")
    for name in REQUIRED_PROGRAMS:
        need(name in programs, f"programs.{name}: missing")
    if design["kind"] == "input_state":
        need("transform" in programs, "programs.transform: missing (an input-state design carries T)")
    mechanics = design.get("mechanics")
    elastic = isinstance(mechanics, dict) and mechanics.get("elastic", False)
    need(elastic in (True, False), "design.mechanics.elastic: expected true or false")
    need(mechanics is None or (isinstance(mechanics, dict) and isinstance(mechanics.get("coordinates"), int)
                               and not isinstance(mechanics["coordinates"], bool)
                               and (4 if elastic else 2) * mechanics["coordinates"] == n),
         "design.mechanics: expected null or {coordinates: nq} with 2 nq states (4 nq when elastic)")
    need(not elastic or (mechanics["coordinates"] == m == len(chains) and not mechanics.get("computed_torque")
                         and all(c["degree"] == 4 for c in chains)),
         "design.mechanics.elastic: expected one input and one chain of degree 4 per coordinate")
    need(mechanics is None or mechanics.get("computed_torque", False) in (True, False)
         and (not mechanics.get("computed_torque") or mechanics["coordinates"] == m),
         "design.mechanics.computed_torque: expected true or false, true only with one input per coordinate")
    law_form = design.get("law_form", "expressions")
    need(law_form in LAW_FORMS and (law_form == "expressions" or (mechanics is None
                                                                   and design["kind"] == "input_output")),
         "design.law_form: expected expressions, or chain (an explicit plant's input-output law)")
    if mechanics is None:
        law_shapes, dynamics_shapes = {"A": [m, m], "b": [m], "chain": [total]}, {"f": [n], "G": [n, m]}
        if law_form == "chain":     # the outputs h only: A, b and the chains are evaluated from f, G, h at run time
            law_shapes = {CHAIN_LAW_OUTPUTS[0]: [m]}
    else:
        nq = mechanics["coordinates"]
        structure = {"M": [nq, nq], "F": [nq], "B": [nq, m]}
        dynamics_shapes = {**structure, "qdot": [nq]}
        law_shapes = {**structure, "J": [m, nq], "c": [m], "chain": [total]}
        if elastic:     # the link side and the motors' constants; the chains' higher derivatives come at run time
            structure = {"M": [nq, nq], "F": [nq], **{k: [nq] for k in ELASTIC_CONSTANTS}}
            dynamics_shapes, law_shapes = structure, {**structure, "chain": [2 * m]}
    expected_shapes = {"law": law_shapes,
                       "dynamics": dynamics_shapes,
                       "transform": {"T": [n], "jacobian": [n, n]},
                       "inverse": {"x": [n]},
                       "singular_set": {"s": [1]}}
    for name, spec in programs.items():
        program_parts(spec, source, name)   # types first
        shapes = {out[0]: list(out[1]) for out in spec["outputs"]}
        for output, shape in expected_shapes[name].items():
            need(shapes.get(output) == shape, f"programs.{name}: {output} must have shape {shape}")
        first = ["z", [f"_z{i}" for i in range(n)]] if name == "inverse" else ["x", states]
        need(spec["arguments"] == [first, ["p", parameter_names]],
             f"programs.{name}.arguments: expected [{first[0]!r}, the plant's {'linearizing coordinates' if name == 'inverse' else 'states'}] "
             "and ['p', its parameters], in the plant's order")
    _check_watchdog(watchdog, n_inputs=m, n_outputs=len(chains), need=need)


def _check_signal_units(units: Any, signals: list[str], need) -> None:
    """``plant.signal_units``: unit text by state, input or output name (older artifacts have none)."""
    need(isinstance(units, dict), "plant.signal_units: expected a mapping of signal name: unit text")
    for name, unit in units.items():
        need(name in signals, f"plant.signal_units: {str(name)[:40]!r} is not a state, input or output")
        need(isinstance(unit, str) and 0 < len(unit) <= MAX_UNIT_TEXT and unit.isprintable() and unit.strip() == unit,
             f"plant.signal_units.{name}: expected unit text of 1 to {MAX_UNIT_TEXT} printable characters")


def _check_watchdog(watchdog: dict[str, Any], n_inputs: int, n_outputs: int, need) -> None:
    """Every stored watchdog setting against the one table (older artifacts lack the newer ones)."""
    for key in ("sigma_warn", "sigma_act", "sigma_stop", "damping", "stale_after", "rate_limits", "safe_command"):
        need(key in watchdog, f"watchdog.{key}: missing")
    stored = {k: v for k, v in watchdog.items() if k in PLANT_FILE_SETTINGS}
    for key, value in stored.items():
        if setting(key).shape not in ("choice", "safe_command"):
            numbers = value if isinstance(value, list) else [value]
            need(all(v is None or _is_number(v) for v in numbers), f"watchdog.{key}: expected numbers (or null)")
    found = watchdog_problem(stored, n_inputs, n_outputs)
    need(found is None, "" if found is None else f"watchdog.{found[0]}: {found[1]}")


def _is_number(value: Any) -> bool:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return False
    try:
        return math.isfinite(value)
    except OverflowError:          # a whole number too large for a float
        return False


def program_parts(spec: Any, source: str, name: str):
    where = f"programs.{name}"
    if not isinstance(spec, dict):
        raise ArtifactError(source, f"{where}: expected a mapping")
    arguments, temporaries, outputs = spec.get("arguments"), spec.get("temporaries"), spec.get("outputs")
    if not (isinstance(arguments, list) and all(isinstance(a, list) and len(a) == 2 and isinstance(a[0], str)
                                                and isinstance(a[1], list) and all(isinstance(n, str) for n in a[1])
                                                for a in arguments)):
        raise ArtifactError(source, f"{where}.arguments: expected [[vector, [names]], ...]")
    if not (isinstance(temporaries, list) and all(isinstance(t, list) and len(t) == 2 and isinstance(t[0], str)
                                                  and isinstance(t[1], str) for t in temporaries)):
        raise ArtifactError(source, f"{where}.temporaries: expected [[name, expression], ...]")
    if not (isinstance(outputs, list) and all(_is_output(o) for o in outputs)):
        raise ArtifactError(source, f"{where}.outputs: expected [[name, [shape], [expression, ...]], ...]")
    return ([(v, list(names)) for v, names in arguments], [(t, e) for t, e in temporaries],
            [(o, list(shape), list(entries)) for o, shape, entries in outputs])


def _is_output(item: Any) -> bool:
    return (isinstance(item, list) and len(item) == 3 and isinstance(item[0], str) and isinstance(item[1], list)
            and all(isinstance(k, int) and not isinstance(k, bool) and 0 <= k <= 10_000 for k in item[1])
            and isinstance(item[2], list) and all(isinstance(e, str) for e in item[2]))
