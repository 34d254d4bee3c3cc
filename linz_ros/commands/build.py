"""``linz build``: synthesise the law, generate and verify the expressions, write the artifact."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from linz_ros.commands._options import DesignChoices
from linz_ros.errors import ConfigError, DesignError

__all__ = ["Built", "Made", "build", "render_build", "synthesise_and_generate"]


@dataclass
class Made:
    """A design and its artifact document, verified against sympy, not yet written."""

    design: Any
    document: dict[str, Any]
    verification: Any


@dataclass
class Built:
    """What ``linz build`` made: the design, its verification, the artifact written and its signer.

    Attributes
    ----------
    design : linz_ros.synthesis.Design
    verification : linz_ros.codegen.Verification
    path : pathlib.Path
        The artifact written.
    signed_by : str, optional
        The signing key's fingerprint.
    sign_key : str, optional
        The private key file used.
    """

    design: Any
    verification: Any
    path: Path
    signed_by: str | None = None
    sign_key: str | None = None
    warnings: list[str] = field(default_factory=list)

    def summary(self) -> dict[str, Any]:
        """The ``linz build --json`` object.

        Returns
        -------
        dict
        """
        design = self.design
        return {
            "plant": design.plant.name,
            "artifact": str(self.path),
            "kind": design.kind,
            "outputs": [c.name for c in design.chains],
            "relative_degree": design.relative_degree,
            "rate": design.rate,
            "integral": design.integral,
            "method": design.method,
            "chains": [{"name": c.name, "gains": [float(k) for k in c.gains],
                        "poles": [[float(p.real), float(p.imag)] for p in c.poles],
                        "sampled_spectral_radius": c.sampled.spectral_radius,
                        "fastest_pole_times_period": c.sampled.fastest_pole_times_period} for c in design.chains],
            "watchdog": {k: design.watchdog[k] for k in ("sigma_warn", "sigma_act", "sigma_stop", "damping",
                                                         "stale_after")},
            "sigma_reference": design.sigma_reference,
            "verification": self.verification.to_json(),
            "warnings": design.warnings,
            "notes": design.notes,
            "signed_by": self.signed_by,
        }


def _check_reference_text(text: str | None, design: Any, source: str) -> None:
    """A reference in the plant file is checked at build time, naming the file and field."""
    if text is None:
        return
    from linz_ros.runtime import parse_reference

    orders = design.relative_degree
    try:
        parse_reference(text, orders, [0.0] * len(orders), [c.name for c in design.chains])
    except ConfigError as err:
        raise DesignError(source, "design.reference", err.problem) from None


def synthesise_and_generate(plant_file: str | Path, design: DesignChoices,
                            tolerance: float | None = None) -> Made:
    """Load a plant file, synthesise its law and generate the verified artifact document.

    Parameters
    ----------
    plant_file : str or pathlib.Path
    design : DesignChoices
    tolerance : float, optional
        Largest accepted residual of the generated code against sympy (default 1e-9).

    Returns
    -------
    Made

    Raises
    ------
    LinzError
    """
    from linz_ros.codegen import DEFAULT_TOLERANCE, build_document
    from linz_ros.model import load_plant
    from linz_ros.synthesis import synthesise

    plant = load_plant(plant_file)
    made = synthesise(plant, design.options())
    _check_reference_text(made.reference, made, plant.source)
    document, verification = build_document(made, tolerance=DEFAULT_TOLERANCE if tolerance is None else tolerance)
    return Made(made, document, verification)


def build(plant: str | Path, out: str | Path, design: DesignChoices | None = None, tolerance: float | None = None,
          sign_key: str | None = None) -> Built:
    """Synthesise a plant's controller and write its artifact into a folder.

    Parameters
    ----------
    plant : str or pathlib.Path
        The plant file.
    out : str or pathlib.Path
        Folder for ``<plant>.artifact.json``.
    design : DesignChoices, optional
        Overrides of the plant file's design section.
    tolerance : float, optional
        Largest accepted residual against sympy (default 1e-9).
    sign_key : str, optional
        An Ed25519 private key (from ``linz keygen``) to sign the artifact with; read
        before the synthesis, so a bad key costs none.

    Returns
    -------
    Built

    Raises
    ------
    LinzError
    """
    from linz_ros.codegen import artifact_path, write_artifact

    key = None
    if sign_key is not None:
        from linz_ros.artifact.signing import load_private_key

        key = load_private_key(sign_key)
    made = synthesise_and_generate(plant, design or DesignChoices(), tolerance)
    path = write_artifact(made.document, artifact_path(out, made.design.plant.name))
    signed_by = None
    if key is not None:
        from linz_ros.artifact.signing import sign_artifact_file

        signed_by = sign_artifact_file(path, key)
    return Built(made.design, made.verification, path, signed_by, sign_key, list(made.design.warnings))


def _pole_text(p: complex) -> str:
    return f"{p.real:.4g}{p.imag:+.3g}j" if abs(p.imag) > 1e-12 else f"{p.real:.4g}"


def render_build(built: Built, as_json: bool = False) -> str:
    """What ``linz build`` prints: the design, the watchdog levels, the verification, the file.

    Parameters
    ----------
    built : Built
    as_json : bool
        The ``--json`` object instead of the text.

    Returns
    -------
    str
    """
    if as_json:
        return json.dumps(built.summary(), indent=2)
    design, verification = built.design, built.verification
    kind = {"input_output": "input-output", "input_state": "input-state"}[design.kind]
    lines = [f"plant {design.plant.name}: {kind} linearization, relative degree {design.relative_degree}, "
             f"{design.rate:g} Hz{', integral action' if design.integral else ''}"]
    for c in design.chains:
        gains = ", ".join(f"{k:.5g}" for k in c.gains)
        lines.append(f"  {c.name} = {c.expression}: gains [{gains}], poles [{', '.join(map(_pole_text, c.poles))}] "
                     f"({design.method}); sampled loop spectral radius {c.sampled.spectral_radius:.5f}")
    w = design.watchdog
    lines.append(f"  watchdog: sigma warn {w['sigma_warn']:.4g}, act {w['sigma_act']:.4g}, stop {w['sigma_stop']:.4g} "
                 f"({design.sigma_reference_note} = {design.sigma_reference:.4g}); stale after {w['stale_after']:.4g} s")
    lines.append(f"  verified against sympy at {verification.points} points: worst relative residual "
                 f"{verification.max_relative_residual:.2e} (tolerance {verification.tolerance:g})")
    lines.extend(f"  note: {note}" for note in design.notes)
    lines.append(f"wrote {built.path}")
    if built.signed_by:
        lines.append(f"  signed with key {built.signed_by[:16]} ({built.sign_key})")
    return "\n".join(lines)
