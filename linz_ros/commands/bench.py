"""``linz bench``: time the artifact's controller step against references of the same law."""

from __future__ import annotations

import json
from typing import Sequence

from linz_ros.commands._common import load_source
from linz_ros.commands._options import DesignChoices

__all__ = ["bench", "render_bench"]


def bench(source: str, calls: int = 2000, rounds: int = 7, allow_plant_change: bool = False,
          trusted_keys: Sequence[str] = (), backend: str = "native"):
    """Time the step of an artifact (or of a plant file's law, built in memory).

    Every reference is made from the artifact's own law program; the Pinocchio reference of
    a serial arm also needs the plant, which is the plant file just built from, or the
    artifact's recorded plant file when its hash matches (the notes say which).

    Parameters
    ----------
    source : str
        A plant file or an artifact (``*.json``).
    calls, rounds : int
        Calls per round and rounds.
    allow_plant_change : bool
        Accept an artifact whose plant file changed (the Pinocchio reference is then left out).
    trusted_keys : sequence of str
    backend : {"native", "python"}
        Of the step timed as ``core``.

    Returns
    -------
    linz_ros.bench.BenchResult

    Raises
    ------
    LinzError
    """
    from linz_ros.bench import plant_behind, run_bench

    loaded = load_source(source, DesignChoices(), allow_plant_change, trusted_keys)
    plant, notes = loaded.plant, []
    if plant is None and loaded.artifact.computed_torque:
        plant, note = plant_behind(loaded.artifact)
        notes.append(note)
    return run_bench(loaded.artifact, plant, calls=calls, rounds=rounds, notes=notes, backend=backend)


def render_bench(result, as_json: bool = False) -> str:
    """The table of microseconds per call and the ratios, or the ``--json`` object.

    Parameters
    ----------
    result : linz_ros.bench.BenchResult
    as_json : bool

    Returns
    -------
    str
    """
    return json.dumps(result.to_json(), indent=2) if as_json else result.render_text()
