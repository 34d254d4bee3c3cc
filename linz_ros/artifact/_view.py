"""The typed view of a loaded artifact: names, numbers and build facts as properties, the compiled
programs, and the document's parts for the few readers that need them as written."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from linz_ros.artifact._consistency import program_parts
from linz_ros.artifact._files import recorded_plant_paths
from linz_ros.artifact.compiler import Program, compile_program
from linz_ros.artifact.chainlaw import ChainLaw, chain_law
from linz_ros.artifact.elastic import ElasticLaw, elastic_law
from linz_ros.artifact.extension import Extension, read_extension
from linz_ros.artifact.urdf import UrdfRecord

__all__ = ["Artifact"]


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
        """State names in order (with a dynamic extension: the plant's, then the compensator's)."""
        return list(self.document["plant"]["states"])

    @property
    def extension(self) -> Extension | None:
        """The compensator of a dynamically extended law (``design.extension``), else None."""
        section = self.document["design"].get("extension")
        return None if section is None else read_extension(section)

    @property
    def urdf(self) -> UrdfRecord | None:
        """The URDF the plant was built from (``plant.urdf``; :meth:`UrdfRecord.path` finds it), else None."""
        section = self.document["plant"].get("urdf")
        return None if section is None else UrdfRecord.from_json(section)

    @property
    def plant_states(self) -> list[str]:
        """The states a state message carries: the plant's own (``states`` without an extension)."""
        extension = self.extension
        return self.states if extension is None else list(extension.plant_states)

    @property
    def plant_inputs(self) -> list[str]:
        """The inputs a command carries: the plant's own (``inputs`` without an extension)."""
        extension = self.extension
        return self.inputs if extension is None else list(extension.plant_inputs)

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
    def mechanics_form(self) -> str | None:
        """The mechanical model's form (``mass_matrix``, ``kinetic_energy``, ``serial_arm``, ``urdf``),
        None for an explicit plant or an artifact that does not record it."""
        mechanics = self.document["design"].get("mechanics")
        form = mechanics.get("form") if mechanics else None
        return None if form is None else str(form)

    @property
    def elastic(self) -> bool:
        """True for an elastic-joint arm: the law is assembled by :meth:`elastic_law` (relative degree 4)."""
        mechanics = self.document["design"].get("mechanics")
        return bool(mechanics and mechanics.get("elastic"))

    def elastic_law(self) -> ElasticLaw:
        """The elastic-joint law (the law program compiled once more, with the jet2 backend).

        Returns
        -------
        ElasticLaw
            ``law(x, p)`` gives the law program's values, then A, b and the chains.
        """
        return elastic_law(self.source, self.program_text, int(self.mechanical_coordinates))

    @property
    def law_form(self) -> str:
        """``chain`` when the law's terms are evaluated from f, G and h at run time (:meth:`chain_law`),
        else ``expressions`` (the law program carries A, b and the chains)."""
        return str(self.document["design"].get("law_form", "expressions"))

    def chain_law(self) -> ChainLaw:
        """The chain-form law: f and h compiled with the taylor backend (Lie derivatives by jets).

        Returns
        -------
        ChainLaw
            ``law(x, p)`` gives A, b and the chains, laid out as the law program of the expression form.
        """
        return chain_law(self.source, self.program_text, self.relative_degree)

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
            self._numpy[name] = compile_program(f"{self.source}: {name}", *program_parts(
                self.document["programs"][name], self.source, name), backend="numpy")
        return self._numpy[name]

    def program_text(self, name: str) -> tuple[list, list, list]:
        """The named program as written: arguments, temporaries and outputs (expression text).

        Parameters
        ----------
        name : str

        Returns
        -------
        tuple
            ``([(vector, [names])], [(temporary, expression)], [(output, shape, [expression])])``.
        """
        return program_parts(self.document["programs"][name], self.source, name)

    def recorded_plant_files(self) -> list[Path]:
        """Where the plant file was at build time: beside the artifact as then, then the absolute path.

        Returns
        -------
        list of pathlib.Path
        """
        return recorded_plant_paths(self.document["plant"], self.source)
