"""The plant file's ``design`` section: rate, poles or LQR weights, integral action, watchdog
settings (checked against the one table of :mod:`linz_ros.artifact.watchdog`) and the reference."""

from __future__ import annotations

import math
import re
from typing import Any, Mapping

from linz_ros.artifact.watchdog import PLANT_FILE_SETTINGS, watchdog_problem
from linz_ros.artifact.watchdog import setting as watchdog_setting
from linz_ros.model._reader import Reader, describe, kind_of

__all__ = ["read_design"]

_DESIGN_KEYS = ("rate", "poles", "lqr", "integral", "watchdog", "reference")


def read_design(reader: Reader, doc: Mapping, outputs: tuple[str, ...], states: list[str],
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


def _read_poles(reader: Reader, poles: Any, outputs: tuple[str, ...]) -> dict[str, list[complex]] | list[complex]:
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


def _read_watchdog(reader: Reader, section: Any, inputs: list[str], outputs: tuple[str, ...]) -> dict[str, Any]:
    """Watchdog settings, checked against the one table (:mod:`linz_ros.artifact.watchdog`).

    Per-input settings are mappings of input: value, stored as one entry per input (None
    where not given); ``divergence_error`` is one number for every output or a mapping of
    output: value.
    """
    if not isinstance(section, dict):
        raise reader.fail("design.watchdog", f"expected a mapping, got {kind_of(section)}")
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
        elif row.shape == "per_input":
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
        names = inputs if watchdog_setting(name).shape == "per_input" else list(result.get(name, {})) if name == "divergence_error" else []
        entry = re.fullmatch(r"entry (\d+): (.*)", problem)
        if entry and int(entry.group(1)) < len(names):
            raise reader.fail(f"design.watchdog.{name}.{names[int(entry.group(1))]}", entry.group(2))
        raise reader.fail(f"design.watchdog.{name}", problem)
    return result


def _checked_names(reader: Reader, field: str, value: Any, allowed: Any, what: str) -> dict:
    if not isinstance(value, dict):
        raise reader.fail(field, f"expected a mapping of {what}: value")
    for name in value:
        if name not in allowed:
            raise reader.fail(f"{field}.{name}", f"{str(name)!r} is not an {what}")
    return value


def _per_name(reader: Reader, field: str, value: Any, names: list[str], what: str) -> list[float | None]:
    """A mapping of name: number as one entry per name (None where not given)."""
    given = _checked_names(reader, field, value, names, what)
    return [None if name not in given else reader.number(f"{field}.{name}", given[name]) for name in names]


def _read_safe_command(reader: Reader, value: Any, inputs: list[str]) -> dict[str, Any]:
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
    raise reader.fail(field, f"expected zero, hold, or a mapping of input: value, got {describe(value)}")


def _read_pole(reader: Reader, field: str, value: Any) -> complex:
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
