"""The controller artifact file: a data-only JSON document, its content hash, and its loader.

An artifact carries everything the runtime needs (the law's expressions, the plant's
f and G for simulation, the singular-set expression, gains, limits, watchdog levels)
and the metadata to trust it (plant-file hash, versions, verification residual). It is
plain JSON; the expressions in it are text of the whitelisted grammar and are compiled
by :mod:`linz_ros.artifact.compiler`, so loading one never runs code the file carries.

Layout (format version 1)::

    format, format_version, created, linz_ros_version
    plant:    name, description, source, source_sha256, states, inputs, parameters
              [[name, value], ...], units (of parameters), signal_units (of states, inputs
              and outputs; optional), input_limits, envelope, operating_point
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
    signature: optional {algorithm: "ed25519", public_key_sha256, value (base64)}, over the
              same canonical text as the hash (see :mod:`linz_ros.artifact.signing`)
    sha256:   SHA-256 of the canonical JSON of everything but itself and the signature

Public names
------------
seal, canonical_text, signed_body, content_hash, read_document, Artifact, load_artifact, FORMAT,
FORMAT_VERSION
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Sequence

import numpy as np

from linz_ros.artifact.compiler import Program, compile_program
from linz_ros.artifact.watchdog import MAX_WATCHDOG_SECONDS, PLANT_FILE_SETTINGS, setting, watchdog_problem
from linz_ros.errors import ArtifactError

__all__ = ["FORMAT", "FORMAT_VERSION", "seal", "canonical_text", "signed_body", "content_hash", "read_document",
           "Artifact", "load_artifact", "artifact_from_text", "REQUIRED_PROGRAMS"]

FORMAT = "linz_ros controller artifact"
FORMAT_VERSION = 1
REQUIRED_PROGRAMS = ("law", "dynamics")
_MAX_BYTES = 64_000_000       # an artifact, a plant file compared with it
_BLOCK = 1 << 20
_SECTIONS = ("plant", "design", "analysis", "watchdog", "programs", "verification")
#: The fields that neither the content hash nor the signature covers: themselves. A signature is
#: added to a sealed artifact without changing its hash, and an unsigned one hashes as before.
_UNCOVERED = ("sha256", "signature")


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


def signed_body(document: dict[str, Any]) -> dict[str, Any]:
    """Everything the content hash and the signature cover: all but ``sha256`` and ``signature``.

    Parameters
    ----------
    document : dict

    Returns
    -------
    dict
    """
    return {k: v for k, v in document.items() if k not in _UNCOVERED}


def content_hash(document: dict[str, Any]) -> str:
    """SHA-256 of the canonical text of everything but the ``sha256`` and ``signature`` fields.

    Parameters
    ----------
    document : dict

    Returns
    -------
    str
        Hex digest.
    """
    return hashlib.sha256(canonical_text(signed_body(document)).encode("ascii")).hexdigest()


def seal(document: dict[str, Any]) -> str:
    """Add the content hash and return the file text (indented JSON, signature if any, hash last).

    Parameters
    ----------
    document : dict
        A complete artifact; a ``sha256`` in it is replaced, a ``signature`` kept (it
        verifies only while the covered content is unchanged).

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
    sealed = signed_body(document)
    if "signature" in document:
        sealed["signature"] = document["signature"]
    sealed["sha256"] = content_hash(sealed)
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
    raw = _read_bounded(Path(path), source)
    try:
        document = _parse_json(raw.decode("utf-8"))
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
    try:
        actual = content_hash(document)
    except (ValueError, TypeError):
        raise ArtifactError(source, "content cannot be hashed (a non-finite number?)") from None
    if actual != recorded:
        raise ArtifactError(source, "content does not match its sha256: the file was modified or damaged "
                                    "after it was built; rebuild it with linz build")
    for section in _SECTIONS:
        if not isinstance(document.get(section), dict):
            raise ArtifactError(source, f"{section}: missing or not a mapping")


def _refuse_constant(name: str) -> float:
    raise ValueError(f"non-finite number {name} in the file")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"number {text} in the file is out of range")
    return value


def _bounded_int(text: str) -> int:
    if len(text.lstrip("-")) > 15:
        raise ValueError(f"whole number {text[:20]} in the file is out of range")
    return int(text)


def _parse_json(text: str) -> Any:
    """JSON with every number finite and every whole number of at most 15 digits."""
    try:
        return json.loads(text, parse_constant=_refuse_constant, parse_float=_finite_float, parse_int=_bounded_int)
    except RecursionError:
        raise ValueError("arrays or mappings nested too deeply") from None


def _open_regular(path: Path, source: str) -> int:
    """A descriptor of ``path``, refusing anything but a regular file of at most the size limit.

    Opened without blocking (a FIFO or a device put in a file's place never hangs the
    load) and checked on the open descriptor, so the file cannot be swapped in between.
    """
    try:
        mode = path.stat().st_mode
        if stat.S_ISREG(mode):                          # devices are never opened: opening some acts
            descriptor = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    except FileNotFoundError:
        raise ArtifactError(source, "no such file") from None
    except OSError as err:
        raise ArtifactError(source, f"cannot read: {err.strerror or err}") from None
    except ValueError as err:                           # a NUL byte in the name
        raise ArtifactError(source, f"cannot read: {err}") from None
    if not stat.S_ISREG(mode):
        raise ArtifactError(source, "is a folder, not a file" if stat.S_ISDIR(mode) else "is not a regular file")
    info = os.fstat(descriptor)
    if not stat.S_ISREG(info.st_mode) or info.st_size > _MAX_BYTES:
        os.close(descriptor)
        raise ArtifactError(source, "is not a regular file" if not stat.S_ISREG(info.st_mode)
                            else f"larger than {_MAX_BYTES // 1_000_000} MB")
    return descriptor


def _bounded_blocks(path: Path, source: str) -> Iterator[bytes]:
    """The file's bytes in blocks (see :func:`_open_regular`); at most the size limit, whatever the
    file says its size is (files under /proc say 0)."""
    with os.fdopen(_open_regular(path, source), "rb", buffering=0) as handle:
        total = 0
        while True:
            try:
                block = handle.read(_BLOCK)
            except OSError as err:
                raise ArtifactError(source, f"cannot read: {err.strerror or err}") from None
            if not block:
                return
            total += len(block)
            if total > _MAX_BYTES:
                raise ArtifactError(source, f"larger than {_MAX_BYTES // 1_000_000} MB")
            yield block


def _read_bounded(path: Path, source: str) -> bytes:
    """The file's bytes, refusing anything but a regular file of at most the size limit."""
    return b"".join(_bounded_blocks(path, source))


def _bounded_sha256(path: Path, source: str) -> str:
    """SHA-256 of a regular file of at most the size limit, read in blocks (never whole)."""
    digest = hashlib.sha256()
    for block in _bounded_blocks(path, source):
        digest.update(block)
    return digest.hexdigest()


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
        (allowed)", "plant file not found; not compared", "plant file ... cannot be read
        (...); not compared", or "not checked").
    signature_check : str
        "signed by trusted key <fingerprint>" when trusted keys were given (the load
        refuses anything else), otherwise "not checked".
    """

    source: str
    document: dict[str, Any]
    programs: dict[str, Program]
    plant_check: str
    signature_check: str = "not checked"
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
    def mechanical_coordinates(self) -> int | None:
        """nq for a mechanical plant (programs carry M, F, B, J), None for an explicit one."""
        mechanics = self.document["design"].get("mechanics")
        return None if mechanics is None else int(mechanics["coordinates"])

    @property
    def computed_torque(self) -> bool:
        """True when the law is u = M v - F: outputs are the coordinates and B is the identity."""
        mechanics = self.document["design"].get("mechanics")
        return bool(mechanics and mechanics.get("computed_torque"))

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

    @property
    def sha256(self) -> str:
        """The content hash the file carries."""
        return str(self.document.get("sha256", ""))

    @property
    def created(self) -> str:
        """When the artifact was built (ISO 8601 text, as stored)."""
        return str(self.document.get("created", ""))

    @property
    def built_by(self) -> str:
        """The linz_ros version that built it."""
        return str(self.document.get("linz_ros_version", ""))

    @property
    def plant_source(self) -> str:
        """The plant file as written when the artifact was built (empty when built from memory)."""
        return str(self.document["plant"].get("source", ""))

    @property
    def operating_point(self) -> list[float]:
        """The plant's operating point, in :attr:`states` order."""
        point = self.document["plant"]["operating_point"]
        return [float(point[s]) for s in self.states]

    @property
    def envelope(self) -> dict[str, tuple[float, float]]:
        """Bounds of the states the envelope limits (state name -> (low, high))."""
        bounds = self.document["plant"].get("envelope", {})
        return {s: (float(bounds[s][0]), float(bounds[s][1])) for s in self.states if s in bounds}

    @property
    def signal_units(self) -> dict[str, str]:
        """Units of the states, inputs and outputs the plant file states (signal name -> unit text)."""
        return dict(self.document["plant"].get("signal_units", {}))

    @property
    def design_reference(self) -> str | None:
        """The reference the design names for runs without one of their own."""
        return self.document["design"].get("reference")

    @property
    def design_warnings(self) -> list[str]:
        """What synthesis warned about, as stored."""
        return list(self.document["design"].get("warnings", []))

    def has_program(self, name: str) -> bool:
        """Whether the artifact carries the named program.

        Parameters
        ----------
        name : str

        Returns
        -------
        bool
        """
        return name in self.programs

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


def _checked_programs(document: dict[str, Any], source: str) -> dict[str, Program]:
    """Check the document as a whole, then compile its programs; any surprise is an ArtifactError."""
    try:
        _check_consistency(document, source)
        return {name: compile_program(f"{source}: {name}", *_program_parts(spec, source, name))
                for name, spec in document["programs"].items()}
    except ArtifactError:
        raise
    except (TypeError, ValueError, KeyError, AttributeError, IndexError, OverflowError) as err:
        raise ArtifactError(source, f"malformed artifact ({type(err).__name__}: {err})") from None


def _check_plant_file(document: dict[str, Any], source: str, plant_path: str | Path | None,
                      allow_plant_change: bool) -> str:
    """Compare the plant file with the hash recorded at build time.

    A plant file given by the caller must be readable: anything else is an
    ``ArtifactError``. The recorded locations are only hints (a deployed artifact travels
    without its plant file, and a resealed one may name any path): the first that exists
    is compared, and one that cannot be read (not a regular file, too large, an I/O error)
    is reported as "cannot be read (...); not compared", never read whole or followed
    into a device.
    """
    plant = document["plant"]
    recorded = plant.get("source_sha256")
    if plant_path is not None:
        where = str(plant_path)
        try:
            digest = _bounded_sha256(Path(plant_path), where)
        except ArtifactError as err:
            problem = " not found" if err.problem == "no such file" else f": {err.problem}"
            raise ArtifactError(source, f"plant file {where}{problem}") from None
        return _compare_plant(digest, recorded, where, source, allow_plant_change)
    for candidate in _recorded_plant_paths(plant, source):
        try:
            digest = _bounded_sha256(candidate, str(candidate))
        except ArtifactError as err:
            if err.problem == "no such file":
                continue
            return f"plant file {candidate} cannot be read ({err.problem}); not compared"
        return _compare_plant(digest, recorded, str(candidate), source, allow_plant_change)
    return "plant file not found; not compared"


def _recorded_plant_paths(plant: dict[str, Any], source: str) -> list[Path]:
    # beside the artifact as it was at build time, then where it was built; never
    # relative to the current folder, which may hold an unrelated file of that name
    candidates: list[Path] = []
    relative = plant.get("source_from_artifact")
    if isinstance(relative, str) and relative:
        candidates.append(Path(source).resolve().parent / relative)    # the artifact was read: it resolves
    absolute = plant.get("source_absolute")
    if isinstance(absolute, str) and os.path.isabs(absolute):
        candidates.append(Path(absolute))
    return candidates


def _compare_plant(digest: str, recorded: Any, where: str, source: str, allow_plant_change: bool) -> str:
    if digest == recorded:
        return "matches"
    if allow_plant_change:
        return f"plant file {where} changed since the build (allowed)"
    raise ArtifactError(source, f"the plant file {where} has changed since this artifact was built; "
                                "rebuild with linz build, or accept it with --allow-plant-change")


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
        document = _parse_json(text)
    except (json.JSONDecodeError, ValueError) as err:
        raise ArtifactError(source, f"not valid JSON: {err}") from None
    _check_header(document, source)
    programs = _checked_programs(document, source)
    return Artifact(source, document, programs, "not checked")


def load_artifact(path: str | Path, plant_path: str | Path | None = None, allow_plant_change: bool = False,
                  check_plant: bool = True, trusted_keys: Sequence[str | Path | bytes] | None = None) -> Artifact:
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
    trusted_keys : sequence of path or bytes, optional
        Ed25519 public keys (PEM files, or PEM text as bytes). When given, the artifact
        must carry a signature by one of them over its covered content, checked before
        anything in it is compiled; when None or empty, signatures are not checked.

    Returns
    -------
    Artifact

    Raises
    ------
    ArtifactError
        For a file that is damaged, tampered with, of a newer format, inconsistent
        (names, shapes), whose plant file changed, or, with trusted keys, unsigned or
        signed by no trusted key or not matching its signature.
    ConfigError
        Trusted keys given but the ``cryptography`` package is missing.
    """
    source = str(path)
    document = read_document(path)
    signature_check = "not checked"
    if trusted_keys:
        from linz_ros.artifact.signing import verify_signature    # it imports this module

        signature_check = verify_signature(document, trusted_keys, source)
    programs = _checked_programs(document, source)
    plant_check = _check_plant_file(document, source, plant_path, allow_plant_change) if check_plant \
        else "not checked"
    return Artifact(source, document, programs, plant_check, signature_check)


_IDENTIFIER = re.compile(r"^[A-Za-z][A-Za-z0-9_]*\Z")
_Z_NAMES = re.compile(r"^_z[0-9]+\Z")
_PROGRAMS = ("law", "dynamics", "transform", "inverse", "singular_set")


def _check_consistency(document: dict[str, Any], source: str) -> None:
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
    need(mechanics is None or (isinstance(mechanics, dict) and isinstance(mechanics.get("coordinates"), int)
                               and not isinstance(mechanics["coordinates"], bool)
                               and 2 * mechanics["coordinates"] == n),
         "design.mechanics: expected null or {coordinates: nq} with 2 nq states")
    need(mechanics is None or mechanics.get("computed_torque", False) in (True, False)
         and (not mechanics.get("computed_torque") or mechanics["coordinates"] == m),
         "design.mechanics.computed_torque: expected true or false, true only with one input per coordinate")
    if mechanics is None:
        law_shapes, dynamics_shapes = {"A": [m, m], "b": [m], "chain": [total]}, {"f": [n], "G": [n, m]}
    else:
        nq = mechanics["coordinates"]
        structure = {"M": [nq, nq], "F": [nq], "B": [nq, m]}
        dynamics_shapes = {**structure, "qdot": [nq]}
        law_shapes = {**structure, "J": [m, nq], "c": [m], "chain": [total]}
    expected_shapes = {"law": law_shapes,
                       "dynamics": dynamics_shapes,
                       "transform": {"T": [n], "jacobian": [n, n]},
                       "inverse": {"x": [n]},
                       "singular_set": {"s": [1]}}
    for name, spec in programs.items():
        _program_parts(spec, source, name)   # types first
        shapes = {out[0]: list(out[1]) for out in spec["outputs"]}
        for output, shape in expected_shapes[name].items():
            need(shapes.get(output) == shape, f"programs.{name}: {output} must have shape {shape}")
        first = ["z", [f"_z{i}" for i in range(n)]] if name == "inverse" else ["x", states]
        need(spec["arguments"] == [first, ["p", parameter_names]],
             f"programs.{name}.arguments: expected [{first[0]!r}, the plant's {'linearizing coordinates' if name == 'inverse' else 'states'}] "
             "and ['p', its parameters], in the plant's order")
    _check_watchdog(watchdog, n_inputs=m, n_outputs=len(chains), need=need)


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
