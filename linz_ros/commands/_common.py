"""What several verbs share: bundled files, loading a plant file or an artifact, safe text."""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

from linz_ros.errors import ConfigError

__all__ = ["DEFAULT_OUT", "Loaded", "bundled_params", "bundled_plant", "is_artifact", "load_source",
           "terminal_safe"]

#: Where the verbs write when no folder is given.
DEFAULT_OUT = "linz_out"

#: Exit code of a verb that ran and found runs or recordings that did not succeed, or lost some
#: (0: all succeeded, 2: bad input, 130: interrupted, 1: an internal fault).
EXIT_FINDINGS = 3


def terminal_safe(text: str) -> str:
    """The text with what a terminal would act on escaped.

    Line breaks, escape sequences, bidi controls and lone surrogates (from file names or
    YAML escapes) are shown as ``\\n``, ``\\x1b``...

    Parameters
    ----------
    text : str

    Returns
    -------
    str

    Examples
    --------
    >>> terminal_safe("a\\nb")
    'a\\\\nb'
    """
    return text if text.isprintable() else "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def _data_folders() -> list[Path]:
    """Where the package's config/ may be: a source checkout, then the install prefixes."""
    here = Path(__file__).resolve().parent.parent
    folders = [here.parent / "config"]
    if len(here.parents) >= 4:          # <prefix>/lib/python3.X/site-packages/linz_ros (colcon, pip)
        folders.append(here.parents[3] / "share" / "linz_ros" / "config")
    folders.append(Path(sys.prefix) / "share" / "linz_ros" / "config")
    for prefix in filter(None, os.environ.get("AMENT_PREFIX_PATH", "").split(os.pathsep)):
        folders.append(Path(prefix) / "share" / "linz_ros" / "config")
    return folders


def bundled_plant(name: str) -> Path:
    """The path of a bundled plant file, in a source checkout or as installed (colcon, pip).

    Parameters
    ----------
    name : str

    Returns
    -------
    pathlib.Path

    Raises
    ------
    ConfigError
        When it cannot be found.
    """
    candidates = [folder / "plants" / f"{name}.yaml" for folder in _data_folders()]
    for path in candidates:
        if path.is_file():
            return path
    raise ConfigError("plant", f"the bundled plant {name!r} was not found (looked in "
                               f"{', '.join(str(p.parent) for p in candidates)})")


def bundled_campaign(name: str) -> Path | None:
    """A bundled campaign file (``config/campaigns/<name>.yaml``), when there is one.

    Parameters
    ----------
    name : str

    Returns
    -------
    pathlib.Path or None
    """
    return next((p for p in (folder / "campaigns" / f"{name}.yaml" for folder in _data_folders()) if p.is_file()),
                None)


def bundled_params(name: str) -> Path | None:
    """The parameter file of a bundled plant's bringup, when there is one.

    Parameters
    ----------
    name : str

    Returns
    -------
    pathlib.Path or None
    """
    return next((p for p in (folder / f"{name}.yaml" for folder in _data_folders()) if p.is_file()), None)


def is_artifact(path: str) -> bool:
    """Whether a source names an artifact (``*.json``) rather than a plant file.

    Parameters
    ----------
    path : str

    Returns
    -------
    bool
    """
    return path.endswith(".json")


@dataclass
class Loaded:
    """An artifact to run, loaded from its file or built in memory from a plant file.

    Attributes
    ----------
    artifact : Artifact
    document : dict or None
        The artifact's document when it was built here (to write beside a run).
    plant : Plant or None
        The plant it was built from, when built here.
    """

    artifact: Any
    document: dict[str, Any] | None = None
    plant: Any = None


def load_source(source: str, design: Any, allow_plant_change: bool = False,
                trusted_keys: Sequence[str] = ()) -> Loaded:
    """An artifact file, loaded and checked, or a plant file built in memory.

    Parameters
    ----------
    source : str
        A plant file or an artifact (``*.json``).
    design : DesignChoices
        Design options; refused for an artifact, whose design is fixed.
    allow_plant_change : bool
        Accept an artifact whose plant file changed since the build.
    trusted_keys : sequence of str
        Public keys, one of which must have signed the artifact (none: not checked).

    Returns
    -------
    Loaded

    Raises
    ------
    LinzError
    """
    from linz_ros.artifact import artifact_from_text, load_artifact, seal

    if is_artifact(source):
        if not design.is_empty():
            raise ConfigError("design options", "an artifact's design is fixed; give the plant file to "
                                                "change poles, weights, rate or integral action")
        return Loaded(load_artifact(source, allow_plant_change=allow_plant_change,
                                    trusted_keys=list(trusted_keys) or None))
    if trusted_keys:
        raise ConfigError("--trusted-key", f"checks a signed artifact; {source} is a plant file, built here unsigned")
    from linz_ros.commands.build import synthesise_and_generate

    made = synthesise_and_generate(source, design)
    text = seal(made.document)
    return Loaded(artifact_from_text(text, source=f"{made.design.plant.name} (built from {source})"),
                  made.document, made.design.plant)
