"""The demo's DDS listener, a process of its own: ``python -m linz_ros.commands._listen ...``.

It runs as a child of the bringup so that it joins the bringup's isolated DDS domain
through the environment it is started with (``bringup.isolated_environment``), like the
nodes, and the demo's own process never changes its environment. It records what the
nodes publish until the controller has run the asked-for time (simulated time in
lockstep, wall time otherwise), then writes what it heard as one JSON file.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path
from typing import Any, Sequence

__all__ = ["main", "topic_map"]

#: Wall seconds to wait for the controller's first step record.
FIRST_RECORD_TIMEOUT = 60.0


def topic_map(params: str | Path):
    """The controller's topics and message layouts, as its parameter file names them.

    Parameters
    ----------
    params : str or pathlib.Path

    Returns
    -------
    linz_ros.nodes.recorder.TopicMap
    """
    from linz_ros.bringup import node_parameters
    from linz_ros.nodes.recorder import TopicMap

    c = node_parameters(params, "linz_controller")
    return TopicMap(str(c["state_topic"]), str(c["state_type"]), list(c.get("state_fields", [])),
                    str(c["command_topic"]), str(c["command_type"]), list(c.get("command_fields", [])),
                    str(c["reference_topic"]))


def _controller_time(recorder: Any) -> float:
    """The time (``t``) of the last per-step record heard, 0 before any."""
    records = recorder.recording.conditioning
    return records[-1][1][0] if records else 0.0


def _listen(recorder: Any, seconds: float, lockstep: bool, wall_limit: float) -> dict[str, Any]:
    started = recorder.spin_for(FIRST_RECORD_TIMEOUT, until=lambda: bool(recorder.recording.conditioning))
    begun = time.monotonic()
    if not started:
        reached = False
    elif lockstep:      # simulated time may run slower than the wall clock: wait for it, within reason
        reached = recorder.spin_for(wall_limit, until=lambda: _controller_time(recorder) >= seconds)
    else:
        reached = recorder.spin_for(seconds)
    heard = recorder.recording
    return {"started": started, "reached": reached, "controller_time": _controller_time(recorder),
            "wall_seconds": time.monotonic() - begun,
            "diagnostics": [{"level": level, "message": message} for _, level, message, _ in heard.diagnostics],
            "commands": len(heard.commands), "states": len(heard.states), "records": len(heard.conditioning)}


def main(argv: Sequence[str] | None = None) -> int:
    """Listen to a bringup and write what was heard.

    Parameters
    ----------
    argv : sequence of str, optional
        ``ARTIFACT PARAMS SECONDS WALL_LIMIT OUT.json [--lockstep]``.

    Returns
    -------
    int
        The exit code.
    """
    from linz_ros.artifact import load_artifact
    from linz_ros.nodes.recorder import recording

    parser = argparse.ArgumentParser(prog="linz_ros.commands._listen")
    parser.add_argument("artifact")
    parser.add_argument("params")
    parser.add_argument("seconds", type=float)
    parser.add_argument("wall_limit", type=float)
    parser.add_argument("out")
    parser.add_argument("--lockstep", action="store_true")
    args = parser.parse_args(argv)
    artifact = load_artifact(args.artifact)
    out = Path(args.out)
    with recording(artifact, topic_map(args.params)) as recorder:
        heard = _listen(recorder, args.seconds, args.lockstep, args.wall_limit)
        # before the shutdown, which takes a while: the demo stops the nodes when the report appears
        scratch = out.with_suffix(".partial")
        scratch.write_text(json.dumps(heard) + "\n")
        scratch.replace(out)
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
