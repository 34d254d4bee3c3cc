"""The controller artifact file: a data-only JSON document, its content hash, and its loader.

An artifact carries everything the runtime needs (the law's expressions, the plant's
f and G for simulation, the singular-set expression, gains, limits, watchdog levels)
and the metadata to trust it (plant-file hash, versions, verification residual). It is
plain JSON; the expressions in it are text of the whitelisted grammar and are compiled
by :mod:`linz_ros.artifact.compiler`, so loading one never runs code the file carries.

Layout (format version 1)::

    format, format_version, created, linz_ros_version
    plant:    name, description, source, source_sha256, states, inputs, parameters
              [[name, value], ...], units, input_limits, envelope, operating_point
    design:   kind, outputs, output_expressions, relative_degree, integral, rate, method,
              chains [{name, degree, gains, poles, sampled}], lqr, warnings, notes
    analysis: singular_set, singular_set_note, zero_dynamics_order, zero_dynamics_stability,
              sigma_reference, sigma_reference_note, envelope
    watchdog: sigma_warn, sigma_act, sigma_stop, damping, stale_after, integral_limit,
              rate_limits, safe_command {kind[, value]}
    programs: {name: {arguments [[vector, [names]]], temporaries [[name, expr]],
                      outputs [[name, shape, [expr, ...]]]}}
              law (A, b, chain), dynamics (f, G), and optionally transform (T, jacobian),
              inverse (x), singular_set (s)
    verification: points, skipped, tolerance, max_relative_residual, per_program, reference
    sha256:   SHA-256 of the canonical JSON of everything else

Public names
------------
seal, canonical_text, content_hash, read_document, Artifact, load_artifact, FORMAT, FORMAT_VERSION
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from linz_ros.artifact.compiler import Program, compile_program
from linz_ros.errors import ArtifactError

__all__ = ["FORMAT", "FORMAT_VERSION", "seal", "canonical_text", "content_hash", "read_document",
           "Artifact", "load_artifact", "artifact_from_text", "REQUIRED_PROGRAMS"]

FORMAT = "linz_ros controller artifact"
FORMAT_VERSION = 1
REQUIRED_PROGRAMS = ("law", "dynamics")
_MAX_BYTES = 64_000_000
_SECTIONS = ("plant", "design", "analysis", "watchdog", "programs", "verification")


def canonical_text(document: dict[str, Any]) -> str:
    """The canonical JSON text that the content hash covers (sorted keys, no spaces).

    Parameters
    ----------
    document : dict
        The artifact without its ``sha256`` field.

    Returns
    -------
    str
    """
    return json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)


def content_hash(document: dict[str, Any]) -> str:
    """SHA-256 of the canonical text of everything but the ``sha256`` field.

    Parameters
    ----------
    document : dict

    Returns
    -------
    str
        Hex digest.
    """
    body = {k: v for k, v in document.items() if k != "sha256"}
    return hashlib.sha256(canonical_text(body).encode("ascii")).hexdigest()


def seal(document: dict[str, Any]) -> str:
    """Add the content hash and return the file text (indented JSON, hash last).

    Parameters
    ----------
    document : dict
        A complete artifact without ``sha256``.

    Returns
    -------
    str
        The text to write.

    Examples
    --------
    >>> text = seal({"format": FORMAT, "format_version": 1})
    >>> json.loads(text)["sha256"] == content_hash(json.loads(text))
    True
    """
    body = {k: v for k, v in document.items() if k != "sha256"}
    sealed = dict(body, sha256=content_hash(body))
    return json.dumps(sealed, indent=1, ensure_ascii=True, allow_nan=False) + "\n"


def read_document(path: str | Path) -> dict[str, Any]:
    """Read an artifact file and check its format, version and content hash.

    Parameters
    ----------
    path : str or pathlib.Path

    Returns
    -------
    dict
        The parsed document.

    Raises
    ------
    ArtifactError
        One line naming the file: missing, not JSON, not an artifact, a newer format,
        a hash that does not match the content.
    """
    source = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise ArtifactError(source, "no such file") from None
    except IsADirectoryError:
        raise ArtifactError(source, "is a folder, not an artifact") from None
    except OSError as err:
        raise ArtifactError(source, f"cannot read: {err.strerror}") from None
    if len(raw) > _MAX_BYTES:
        raise ArtifactError(source, f"larger than {_MAX_BYTES // 1_000_000} MB")
    try:
        document = json.loads(raw.decode("utf-8"), parse_constant=_refuse_constant)
    except UnicodeDecodeError as err:
        raise ArtifactError(source, f"not UTF-8 text (byte {err.start})") from None
    except json.JSONDecodeError as err:
        raise ArtifactError(source, f"not valid JSON at line {err.lineno}, column {err.colno}: {err.msg}") from None
    except ValueError as err:
        raise ArtifactError(source, str(err)) from None
    _check_header(document, source)
    return document


def _check_header(document: Any, source: str) -> None:
    """Format, version, content hash and the presence of every section."""
    if not isinstance(document, dict) or document.get("format") != FORMAT:
        raise ArtifactError(source, "not a linz_ros controller artifact (no matching 'format' field)")
    version = document.get("format_version")
    if not isinstance(version, int) or isinstance(version, bool):
        raise ArtifactError(source, "format_version: expected a whole number")
    if version > FORMAT_VERSION:
        raise ArtifactError(source, f"format version {version} is newer than this linz_ros reads "
                                    f"({FORMAT_VERSION}); update linz_ros")
    if version < 1:
        raise ArtifactError(source, f"format version {version} is not valid")
    recorded = document.get("sha256")
    if not isinstance(recorded, str):
        raise ArtifactError(source, "sha256: missing; the file is not sealed")
    if content_hash(document) != recorded:
        raise ArtifactError(source, "content does not match its sha256: the file was modified or damaged "
                                    "after it was built; rebuild it with linz build")
    for section in _SECTIONS:
        if not isinstance(document.get(section), dict):
            raise ArtifactError(source, f"{section}: missing or not a mapping")


def _refuse_constant(name: str) -> float:
    raise ValueError(f"non-finite number {name} in the file")


@dataclass
class Artifact:
    """A loaded, verified artifact with its programs compiled for the math backend.

    Attributes
    ----------
    source : str
        The file.
    document : dict
        The parsed JSON.
    programs : dict of str -> Program
        Compiled with the ``math`` backend (scalars, one control step).
    plant_check : str
        What was found when comparing the plant file's hash ("matches", "changed
        (allowed)", "plant file not found; not compared", or "not checked").
    """

    source: str
    document: dict[str, Any]
    programs: dict[str, Program]
    plant_check: str
    _numpy: dict[str, Program] = field(default_factory=dict, repr=False)

    # -- names and numbers -------------------------------------------------------------
    @property
    def name(self) -> str:
        """The plant's identifier."""
        return self.document["plant"]["name"]

    @property
    def states(self) -> list[str]:
        """State names in order."""
        return list(self.document["plant"]["states"])

    @property
    def inputs(self) -> list[str]:
        """Input names in order."""
        return list(self.document["plant"]["inputs"])

    @property
    def outputs(self) -> list[str]:
        """Chain (output) names in order; ``["T1"]`` for input-state designs."""
        return list(self.document["design"]["outputs"])

    @property
    def parameter_names(self) -> list[str]:
        """Parameter names in the order the programs take them."""
        return [name for name, _ in self.document["plant"]["parameters"]]

    @property
    def nominal_parameters(self) -> np.ndarray:
        """Nominal parameter values, in :attr:`parameter_names` order."""
        return np.array([value for _, value in self.document["plant"]["parameters"]], dtype=float)

    @property
    def relative_degree(self) -> list[int]:
        """Relative degree of each chain."""
        return [int(c["degree"]) for c in self.document["design"]["chains"]]

    @property
    def gains(self) -> list[np.ndarray]:
        """Outer-loop gains of each chain, ``(K_I,) K_0 .. K_(r-1)``."""
        return [np.asarray(c["gains"], dtype=float) for c in self.document["design"]["chains"]]

    @property
    def integral(self) -> bool:
        """Whether the chains carry integral action."""
        return bool(self.document["design"]["integral"])

    @property
    def rate(self) -> float:
        """Control rate in Hz."""
        return float(self.document["design"]["rate"])

    @property
    def kind(self) -> str:
        """``input_output`` or ``input_state``."""
        return self.document["design"]["kind"]

    @property
    def watchdog(self) -> dict[str, Any]:
        """Watchdog levels as stored."""
        return dict(self.document["watchdog"])

    @property
    def input_limits(self) -> list[tuple[float, float]]:
        """Box limits per input (``(-inf, inf)`` where none)."""
        limits = self.document["plant"].get("input_limits", {})
        return [tuple(limits.get(u, (-math.inf, math.inf))) for u in self.inputs]  # type: ignore[misc]

    def numpy_program(self, name: str) -> Program:
        """The named program compiled for the numpy backend (vectorised), compiled once.

        Parameters
        ----------
        name : str

        Returns
        -------
        Program
        """
        if name not in self._numpy:
            self._numpy[name] = compile_program(f"{self.source}: {name}", *_program_parts(
                self.document["programs"][name], self.source, name), backend="numpy")
        return self._numpy[name]


def _program_parts(spec: Any, source: str, name: str):
    where = f"programs.{name}"
    if not isinstance(spec, dict):
        raise ArtifactError(source, f"{where}: expected a mapping")
    try:
        arguments = [(str(v), list(names)) for v, names in spec["arguments"]]
        temporaries = [(str(t), e) for t, e in spec["temporaries"]]
        outputs = [(str(o), list(shape), list(entries)) for o, shape, entries in spec["outputs"]]
    except (KeyError, TypeError, ValueError):
        raise ArtifactError(source, f"{where}: expected arguments, temporaries and outputs as lists") from None
    return arguments, temporaries, outputs


def _compile_all(document: dict[str, Any], source: str) -> dict[str, Program]:
    return {name: compile_program(f"{source}: {name}", *_program_parts(spec, source, name))
            for name, spec in document["programs"].items()}


def _check_plant_file(document: dict[str, Any], source: str, plant_path: str | Path | None,
                      allow_plant_change: bool) -> str:
    plant = document["plant"]
    recorded = plant.get("source_sha256")
    candidates: list[Path] = []
    if plant_path is not None:
        candidates.append(Path(plant_path))
    else:
        relative = plant.get("source_from_artifact")
        if isinstance(relative, str):
            candidates.append(Path(source).resolve().parent / relative)
        if isinstance(plant.get("source"), str):
            candidates.append(Path(plant["source"]))
    existing = next((p for p in candidates if p.is_file()), None)
    if existing is None:
        if plant_path is not None:
            raise ArtifactError(source, f"plant file {plant_path} not found")
        return "plant file not found; not compared"
    digest = hashlib.sha256(existing.read_bytes()).hexdigest()
    if digest == recorded:
        return "matches"
    if allow_plant_change:
        return f"plant file {existing} changed since the build (allowed)"
    raise ArtifactError(source, f"the plant file {existing} has changed since this artifact was built; "
                                "rebuild with linz build, or allow it explicitly")


def artifact_from_text(text: str, source: str = "<memory>") -> Artifact:
    """Load an artifact from its text (as :func:`seal` returns it), without a plant-file check.

    Parameters
    ----------
    text : str
    source : str
        Named in error messages.

    Returns
    -------
    Artifact

    Raises
    ------
    ArtifactError
    """
    try:
        document = json.loads(text, parse_constant=_refuse_constant)
    except (json.JSONDecodeError, ValueError) as err:
        raise ArtifactError(source, f"not valid JSON: {err}") from None
    _check_header(document, source)
    _check_consistency(document, source)
    programs = _compile_all(document, source)
    return Artifact(source, document, programs, "not checked")


def load_artifact(path: str | Path, plant_path: str | Path | None = None, allow_plant_change: bool = False,
                  check_plant: bool = True) -> Artifact:
    """Load, verify and compile a controller artifact (numpy only; never sympy).

    Parameters
    ----------
    path : str or pathlib.Path
        The artifact file.
    plant_path : str or pathlib.Path, optional
        The plant file to compare against; by default the one recorded at build time
        (relative to the artifact, then as recorded). A recorded file that no longer
        exists is not an error (artifacts are deployed without their sources).
    allow_plant_change : bool
        Accept a plant file whose hash differs from the recorded one.
    check_plant : bool
        Compare with the plant file at all.

    Returns
    -------
    Artifact

    Raises
    ------
    ArtifactError
        For a file that is damaged, tampered with, of a newer format, inconsistent
        (names, shapes), or whose plant file changed.
    """
    source = str(path)
    document = read_document(path)
    _check_consistency(document, source)
    plant_check = _check_plant_file(document, source, plant_path, allow_plant_change) if check_plant \
        else "not checked"
    programs = _compile_all(document, source)
    return Artifact(source, document, programs, plant_check)


def _check_consistency(document: dict[str, Any], source: str) -> None:
    """Names, counts and shapes that the runtime relies on; one line per problem."""
    plant, design, programs, watchdog = (document[k] for k in ("plant", "design", "programs", "watchdog"))

    def need(condition: bool, problem: str) -> None:
        if not condition:
            raise ArtifactError(source, problem)

    for key in ("states", "inputs"):
        need(isinstance(plant.get(key), list) and plant[key] and all(isinstance(s, str) for s in plant[key]),
             f"plant.{key}: expected a non-empty list of names")
    params = plant.get("parameters")
    need(isinstance(params, list) and all(isinstance(p, list) and len(p) == 2 and isinstance(p[0], str)
                                          and _is_number(p[1]) for p in params),
         "plant.parameters: expected a list of [name, value]")
    n, m = len(plant["states"]), len(plant["inputs"])
    chains = design.get("chains")
    need(isinstance(chains, list) and chains, "design.chains: expected a non-empty list")
    need(design.get("kind") in ("input_output", "input_state"), "design.kind: expected input_output or input_state")
    need(isinstance(design.get("outputs"), list) and len(design["outputs"]) == len(chains),
         "design.outputs: expected one name per chain")
    need(_is_number(design.get("rate")) and design["rate"] > 0, "design.rate: expected a positive number")
    integral = design.get("integral")
    need(isinstance(integral, bool), "design.integral: expected true or false")
    for i, chain in enumerate(chains):
        need(isinstance(chain, dict) and isinstance(chain.get("degree"), int) and chain["degree"] >= 1,
             f"design.chains[{i}].degree: expected a whole number >= 1")
        gains = chain.get("gains")
        need(isinstance(gains, list) and len(gains) == chain["degree"] + int(integral)
             and all(_is_number(g) for g in gains),
             f"design.chains[{i}].gains: expected {chain['degree'] + int(integral)} numbers")
    total = sum(c["degree"] for c in chains)
    for name in REQUIRED_PROGRAMS:
        need(name in programs, f"programs.{name}: missing")
    shapes = {out[0]: list(out[1]) for out in programs["law"].get("outputs", []) if isinstance(out, list) and out}
    p = len(chains)
    need(shapes.get("A") == [p, m], f"programs.law: A must have shape [{p}, {m}]")
    need(shapes.get("b") == [p], f"programs.law: b must have shape [{p}]")
    need(shapes.get("chain") == [total], f"programs.law: chain must have shape [{total}]")
    shapes = {out[0]: list(out[1]) for out in programs["dynamics"].get("outputs", [])
              if isinstance(out, list) and out}
    need(shapes.get("f") == [n] and shapes.get("G") == [n, m], f"programs.dynamics: f must be [{n}], G [{n}, {m}]")
    for key in ("sigma_warn", "sigma_act", "sigma_stop", "damping", "stale_after"):
        need(_is_number(watchdog.get(key)) and watchdog[key] >= 0, f"watchdog.{key}: expected a number >= 0")
    need(watchdog["sigma_warn"] >= watchdog["sigma_act"] >= watchdog["sigma_stop"],
         "watchdog: expected sigma_warn >= sigma_act >= sigma_stop")
    rate_limits = watchdog.get("rate_limits")
    need(isinstance(rate_limits, list) and len(rate_limits) == m
         and all(r is None or (_is_number(r) and r > 0) for r in rate_limits),
         f"watchdog.rate_limits: expected {m} entries, each null or a positive number")
    safe = watchdog.get("safe_command")
    need(isinstance(safe, dict) and safe.get("kind") in ("zero", "hold", "fixed"),
         "watchdog.safe_command: expected kind zero, hold or fixed")
    if safe["kind"] == "fixed":
        need(isinstance(safe.get("value"), list) and len(safe["value"]) == m
             and all(_is_number(v) for v in safe["value"]),
             f"watchdog.safe_command.value: expected {m} numbers")
    limits = plant.get("input_limits", {})
    need(isinstance(limits, dict) and all(k in plant["inputs"] and isinstance(v, list) and len(v) == 2
                                          and all(_is_number(b) for b in v) and v[0] < v[1]
                                          for k, v in limits.items()),
         "plant.input_limits: expected input: [lower, upper]")


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
