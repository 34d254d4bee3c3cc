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
              chains [{name, degree, gains, poles, sampled}], lqr, warnings, notes, law_form
              (optional: "chain" when the chains are too large to print, else absent), extension
              (optional: the compensator of a dynamically extended law, artifact.extension)
    analysis: singular_set, singular_set_note, zero_dynamics_order, zero_dynamics_stability,
              sigma_reference, sigma_reference_note, envelope
    watchdog: sigma_warn, sigma_act, sigma_stop, damping, stale_after, integral_limit,
              rate_limits, safe_command {kind[, value]}
    programs: {name: {arguments [[vector, [names]]], temporaries [[name, expr]],
                      outputs [[name, shape, [expr, ...]]]}}
              law (A, b, chain; with law_form "chain" the outputs h only, A, b and the
              chains then evaluated from f, G and h by jets: artifact.chainlaw),
              dynamics (f, G), and optionally transform (T, jacobian),
              inverse (x), singular_set (s)
    verification: points, skipped, tolerance, max_relative_residual, per_program, reference
    signature: optional {algorithm: "ed25519", public_key_sha256, value (base64)}, over the
              same canonical text as the hash (see :mod:`linz_ros.artifact.signing`)
    sha256:   SHA-256 of the canonical JSON of everything but itself and the signature

The modules beside this one: ``_files`` (bounded reads, strict JSON, the recorded plant
file), ``_consistency`` (what the runtime relies on, checked before anything is compiled),
``_view`` (the :class:`Artifact` a load returns).

Public names
------------
seal, canonical_text, signed_body, content_hash, read_document, Artifact, load_artifact, FORMAT,
FORMAT_VERSION
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from linz_ros.artifact._consistency import MAX_UNIT_TEXT, REQUIRED_PROGRAMS, check_consistency, program_parts
from linz_ros.artifact._files import check_plant_file, parse_json, read_bounded
from linz_ros.artifact._view import Artifact
from linz_ros.artifact.compiler import Program, compile_program
from linz_ros.errors import ArtifactError

__all__ = ["FORMAT", "FORMAT_VERSION", "seal", "canonical_text", "signed_body", "content_hash", "read_document",
           "Artifact", "load_artifact", "artifact_from_text", "REQUIRED_PROGRAMS", "MAX_UNIT_TEXT"]

FORMAT = "linz_ros controller artifact"
FORMAT_VERSION = 1
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
    raw = read_bounded(Path(path), source)
    try:
        document = parse_json(raw.decode("utf-8"))
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


def _checked_programs(document: dict[str, Any], source: str) -> dict[str, Program]:
    """Check the document as a whole, then compile its programs; any surprise is an ArtifactError."""
    try:
        check_consistency(document, source)
        programs = {name: compile_program(f"{source}: {name}", *program_parts(spec, source, name))
                    for name, spec in document["programs"].items()}
        if (document["design"].get("mechanics") or {}).get("elastic"):
            _check_elastic_constants(document, programs["law"], source)
        return programs
    except ArtifactError:
        raise
    except (TypeError, ValueError, KeyError, AttributeError, IndexError, OverflowError) as err:
        raise ArtifactError(source, f"malformed artifact ({type(err).__name__}: {err})") from None


def _check_elastic_constants(document: dict[str, Any], law: Program, source: str) -> None:
    """Stiffness and motor inertia positive, motor damping not negative, at the stored parameters
    (the plant-file loader's rule, so a resealed file cannot bring a spring of zero or less)."""
    plant = document["plant"]
    x = [float(plant["operating_point"][s]) for s in plant["states"]]
    p = [float(value) for _, value in plant["parameters"]]
    try:
        values = law.evaluate(x, p)
    except (ArithmeticError, ValueError) as err:
        raise ArtifactError(source, f"programs.law: not defined at the operating point and the stored "
                                    f"parameters ({type(err).__name__}: {err})") from None
    for name, least in (("stiffness", "positive"), ("motor_inertia", "positive"), ("motor_damping", "not negative")):
        for i, value in enumerate(np.ravel(values[name]).tolist()):
            if not (value > 0 if least == "positive" else value >= 0):
                raise ArtifactError(source, f"programs.law: {name}[{i}] must be {least} at the stored parameters, "
                                            f"got {value:g}")


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
        document = parse_json(text)
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
    plant_check = check_plant_file(document, source, plant_path, allow_plant_change) if check_plant \
        else "not checked"
    return Artifact(source, document, programs, plant_check, signature_check)
