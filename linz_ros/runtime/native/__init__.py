"""The native control step: the artifact's law emitted as C from its parse tree, compiled with
the fixed step (``linz_step.c``) and called through cffi; the Python core is the fallback.

Public names
------------
BACKENDS           the control-step backends, the default first
make_core          a core of the chosen backend, or the Python core and the one-line reason
make_plant         a plant of the chosen backend, or the Python plant and the one-line reason
NativeCore         the compiled core (interface of ControllerCore)
NativePlant        the compiled plant (interface of NumericPlant)
NativeUnavailable  why the native step cannot be had here
"""

from __future__ import annotations

from typing import Sequence, Union

from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime.core import ControllerCore
from linz_ros.runtime.extended_plant import ExtendedPlant
from linz_ros.runtime.extension import ExtendedCore
from linz_ros.runtime.native._build import NativeUnavailable
from linz_ros.runtime.native._core import NativeCore
from linz_ros.runtime.native._plant import NativePlant
from linz_ros.runtime.plant import NumericPlant
from linz_ros.runtime.watchdogs import WatchdogConfig

__all__ = ["BACKENDS", "make_core", "make_plant", "NativeCore", "NativePlant", "NativeUnavailable", "AnyCore"]

#: ``native``: compiled C when it can be built here, else the Python core with a note; ``python``.
BACKENDS = ("native", "python")

AnyCore = Union[ControllerCore, NativeCore, ExtendedCore]


def make_core(artifact: Artifact, config: WatchdogConfig | None = None, parameters: Sequence[float] | None = None,
              backend: str = "native") -> tuple[AnyCore, str | None]:
    """The controller core of ``backend``; the Python core when the native one cannot be had.

    Parameters
    ----------
    artifact : Artifact
    config : WatchdogConfig, optional
    parameters : sequence of float, optional
    backend : {"native", "python"}

    Returns
    -------
    core : ControllerCore or NativeCore
        Wrapped in :class:`~linz_ros.runtime.extension.ExtendedCore` when the artifact carries a
        dynamic extension (the plant's own states and inputs).
    note : str or None
        One line when ``native`` was asked for and the Python core is used instead.

    Raises
    ------
    linz_ros.errors.ConfigError
        For an unknown backend (named ``backend``), bad settings or parameters.
    """
    _check_backend(backend)
    note = None
    if backend == "native":
        try:
            core = NativeCore(artifact, config, parameters)
        except NativeUnavailable as why:
            core, note = ControllerCore(artifact, config, parameters), f"native step unavailable, using Python: {why}"
    else:
        core = ControllerCore(artifact, config, parameters)
    extension = artifact.extension
    return (core if extension is None else ExtendedCore(core, extension)), note


def make_plant(artifact: Artifact, parameters: Sequence[float] | None = None,
               backend: str = "native") -> tuple[NumericPlant, str | None]:
    """The simulated plant of ``backend``; the Python plant when the native one cannot be had.

    Parameters
    ----------
    artifact : Artifact
    parameters : sequence of float, optional
    backend : {"native", "python"}

    Returns
    -------
    plant : NumericPlant or NativePlant
        Wrapped in :class:`~linz_ros.runtime.extension.ExtendedPlant` when the artifact carries a
        dynamic extension (the plant's own states and inputs).
    note : str or None
        One line when ``native`` was asked for and the Python plant is used instead.
    """
    _check_backend(backend)
    note = None
    if backend == "native":
        try:
            plant = NativePlant(artifact, parameters)
        except NativeUnavailable as why:
            plant, note = NumericPlant(artifact, parameters), f"native plant unavailable, using Python: {why}"
    else:
        plant = NumericPlant(artifact, parameters)
    extension = artifact.extension
    return (plant if extension is None else ExtendedPlant(plant, extension)), note


def _check_backend(backend: str) -> None:
    if backend not in BACKENDS:
        raise ConfigError("backend", f"expected one of {', '.join(BACKENDS)}, got {backend!r}")
