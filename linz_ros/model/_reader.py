"""Reading a plant document: the strict YAML loader, the typed readers that turn every mistake
into a one-line ``PlantFileError``, and the bounded read of the file itself.

The :class:`Reader` is the object the section readers (``_loader``, ``_design_section``,
``_mechanics``, ``_plausibility``, ``_units``) receive: ``fail(field, problem)`` builds the
error, ``names`` and ``table`` hold what has been declared so far.
"""

from __future__ import annotations

import difflib
import math
import re
import stat
from pathlib import Path
from typing import Any, Mapping

import sympy as sp
import yaml

from linz_ros.artifact.grammar import RESERVED_NAMES, FUNCTIONS, names_in, parse_expression
from linz_ros.errors import ExpressionSyntaxError, PlantFileError
from linz_ros.model._plausibility import check_expression_size, check_nominal_values
from linz_ros.model._symbolic import UnknownName, tree_to_sympy

__all__ = ["Reader", "StrictLoader", "IDENTIFIER", "MAX_FILE_BYTES", "printable", "shortened", "kind_of", "describe",
           "stray_keys_problem", "yaml_problem", "read_bounded"]

IDENTIFIER = re.compile(r"[A-Za-z][A-Za-z0-9_]*")  # used with fullmatch: no trailing newline
#: Largest plant file read (bytes).
MAX_FILE_BYTES = 5_000_000


class StrictLoader(yaml.SafeLoader):
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


def _construct_unique_mapping(loader: StrictLoader, node: yaml.MappingNode, deep: bool = False):
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        try:
            hash(key)
        except TypeError:
            raise yaml.constructor.ConstructorError(
                None, None, f"{kind_of(key)} cannot be a key", key_node.start_mark) from None
        if key in seen:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r} (first at line {seen[key]})", key_node.start_mark)
        seen[key] = key_node.start_mark.line + 1
    return yaml.SafeLoader.construct_mapping(loader, node, deep)


StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_unique_mapping)


class Reader:
    """Validates one plant document; ``fail`` raises with the file name attached."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.names: dict[str, str] = {}  # name -> what it is (state, input, ...)
        self.table: dict[str, sp.Expr] = {}
        self.values: dict[sp.Symbol, float] = {}  # nominal parameter values, once read

    def fail(self, field: str, problem: str) -> PlantFileError:
        return PlantFileError(self.source, printable(field), printable(problem))

    # -- small typed readers -------------------------------------------------------
    def mapping(self, doc: Mapping, key: str, required: bool = False) -> dict:
        value = doc.get(key)
        if value is None:
            if required:
                raise self.fail(key, "missing (required)")
            return {}
        if not isinstance(value, dict):
            raise self.fail(key, f"expected a mapping of name: value, got {kind_of(value)}")
        return value

    def section(self, doc: Mapping, key: str, keys: tuple[str, ...], expected: str) -> dict:
        """A mapping section whose keys are all among ``keys``; ``expected`` says what it holds."""
        value = doc.get(key)
        if not isinstance(value, dict):
            raise self.fail(key, f"expected a mapping with {expected}")
        unknown = [str(k) for k in value if k not in keys]
        if unknown:
            raise self.fail(f"{key}.{unknown[0]}", "unknown key; expected one of " + ", ".join(keys))
        return value

    def number(self, field: str, value: Any) -> float:
        if isinstance(value, bool) or value is None:
            raise self.fail(field, f"expected a number, got {describe(value)}")
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
            raise self.fail(field, f"expected a number, got {kind_of(value)}")
        if not math.isfinite(number):
            raise self.fail(field, f"expected a finite number, got {value!r}")
        return number

    def interval(self, field: str, value: Any) -> tuple[float, float]:
        if not isinstance(value, (list, tuple)) or len(value) != 2:
            raise self.fail(field, f"expected [lower, upper], got {describe(value)}")
        lower = self.number(f"{field}[0]", value[0])
        upper = self.number(f"{field}[1]", value[1])
        if lower >= upper:
            raise self.fail(field, f"lower bound {lower:g} is not below upper bound {upper:g}")
        return lower, upper

    def declare(self, field: str, name: Any, kind: str) -> str:
        if not isinstance(name, str) or not IDENTIFIER.fullmatch(name):
            raise self.fail(field, f"{describe(name)} is not a valid name "
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
            raise self.fail(key, f"expected a non-empty list of names, got {describe(value)}")
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
            raise self.fail(field, f"cannot evaluate {shortened(text)!r}: {err}") from None
        if expr.has(sp.zoo, sp.oo, -sp.oo, sp.nan):
            raise self.fail(field, f"{shortened(text)!r} is infinite or undefined (division by zero?)")
        check_expression_size(self, field, expr)
        check_nominal_values(self, field, text, expr, self.values)
        return expr

    def text(self, doc: Mapping, key: str, field: str) -> str:
        """Free text (a number is taken as its text); lists and mappings are refused."""
        value = doc.get(key)
        if value is None:
            return ""
        if not isinstance(value, (str, int, float)):
            raise self.fail(field, f"expected text, got {kind_of(value)}")
        return str(value)


def printable(text: str) -> str:
    """The text with line breaks and other control characters escaped, so a message stays one line."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def shortened(text: Any, width: int = 60) -> str:
    """An expression as written, cut to ``width`` characters for messages."""
    text = text if isinstance(text, str) else repr(text)
    return text if len(text) <= width else text[:width - 3] + "..."


def kind_of(value: Any) -> str:
    return {dict: "a mapping", list: "a list", str: "text", bool: "true/false",
            type(None): "nothing"}.get(type(value), type(value).__name__)


def describe(value: Any) -> str:
    if isinstance(value, (str, int, float)) and not isinstance(value, bool):
        return repr(value)
    return kind_of(value)


def stray_keys_problem(extra: list[str], missing: list[str], kind: str, lacking: str) -> str:
    """``'x3' is not a state (did you mean 'x2'?); no equation for x2``: the stray keys first."""
    parts = []
    for key in extra[:3]:
        close = difflib.get_close_matches(key, missing, n=1, cutoff=0.5)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        parts.append(f"{shortened(key, 40)!r} is not a {kind}{hint}")
    if len(extra) > 3:
        parts.append(f"and {len(extra) - 3} more")
    problem = ", ".join(parts)
    return problem + (f"; {lacking} " + ", ".join(missing) if missing else "")


def yaml_problem(err: yaml.YAMLError, text: str) -> str:
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


def read_bounded(path: Path, source: str) -> bytes:
    """The bytes of a regular file of at most ``MAX_FILE_BYTES``; anything else is one line.

    A device (``/dev/zero``) would be read without end and a named pipe would block, so
    only regular files are opened, and never more than the limit is read.
    """
    too_large = f"larger than {MAX_FILE_BYTES // 1_000_000} MB"
    try:
        info = path.stat()
        if stat.S_ISDIR(info.st_mode):
            raise PlantFileError(source, "", "is a folder, not a plant file")
        if not stat.S_ISREG(info.st_mode):
            raise PlantFileError(source, "", "is not a regular file (a device, pipe or socket?)")
        if info.st_size > MAX_FILE_BYTES:
            raise PlantFileError(source, "", too_large)
        with path.open("rb") as handle:
            raw = handle.read(MAX_FILE_BYTES + 1)
    except PlantFileError:
        raise
    except FileNotFoundError:
        raise PlantFileError(source, "", "no such file") from None
    except OSError as err:
        raise PlantFileError(source, "", f"cannot read: {err.strerror or type(err).__name__}") from None
    except ValueError as err:      # a path with a NUL byte
        raise PlantFileError(source, "", f"cannot read: {err}") from None
    if len(raw) > MAX_FILE_BYTES:
        raise PlantFileError(source, "", too_large)
    return raw
