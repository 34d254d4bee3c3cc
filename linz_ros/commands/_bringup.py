"""The demo's bringup over DDS: the nodes and a listener as processes, then the controller's field log.

Every process gets the bringup's isolated environment explicitly (its own DDS domain,
localhost only); the demo's process joins no DDS domain and keeps its environment.
"""

from __future__ import annotations

import json
import re
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from linz_ros.errors import ConfigError

__all__ = ["BringupRun", "render_heard", "run_bringup", "warn_causes"]

#: Diagnostic levels by their number in diagnostic_msgs/DiagnosticStatus.
LEVELS = ("OK", "WARN", "ERROR", "STALE")
_LISTENER = "linz_listener"


@dataclass
class BringupRun:
    """What the bringup gave: the summary of the controller's field log and what was heard over DDS.

    Attributes
    ----------
    summary : dict
        :meth:`SimResult.summary` of the field log, with ``files`` and ``diagnostics``.
    heard : dict
        The listener's counts (``commands``, ``states``, ``records``).
    simulator : str
        The simulator's closing ``run:`` line.
    """

    summary: dict[str, Any]
    heard: dict[str, Any] = field(default_factory=dict)
    simulator: str = ""


def _simulator_summary(log_text: str) -> str:
    """The simulator's closing summary line from its log, or a note that there is none."""
    lines = [line for line in log_text.splitlines() if "]: run: " in line]
    return lines[-1].split("]: ", 1)[-1] if lines else "wrote no run summary"


def _overrides(executable: str, artifact_path: Path, params: Path, field_log: Path, lockstep: bool) -> dict:
    from linz_ros.bringup import node_parameters

    overrides: dict[str, object] = {"artifact": str(artifact_path.resolve())}
    if executable == "linz_plant_sim":
        overrides.update({"publish_clock": lockstep, "lockstep": lockstep})
    else:
        overrides["use_sim_time"] = lockstep
    if executable == "linz_controller":
        overrides["field_log_folder"] = str(field_log)
        if lockstep:
            overrides["reference"] = str(node_parameters(params, "linz_reference")["reference"])
    return overrides


def _run_nodes(artifact_path: Path, params: Path, out: Path, seconds: float, lockstep: bool,
               say: Callable[[str], None]) -> tuple[dict[str, Any], str]:
    """Start the listener and the nodes, wait for the run, stop them; what was heard and the simulator's line."""
    from linz_ros.bringup import Bringup, isolated_environment, node_parameters

    env = isolated_environment()
    field_log = (out / "field_log").resolve()
    say(f"  isolated DDS domain {env['ROS_DOMAIN_ID']}, localhost only; node logs in {out}")
    # in lockstep the reference is built into the controller, timed in simulated time: a reference
    # node's messages carry no stamp, so on a busy machine they would reach the controller late in it
    executables = ("linz_plant_sim", "linz_controller") if lockstep else \
        ("linz_plant_sim", "linz_reference", "linz_controller")
    if lockstep:
        say(f"  the reference built into the controller ({node_parameters(params, 'linz_reference')['reference']}); "
            "--wall-clock runs the reference node")
    heard_file = out / "heard.json"
    heard_file.unlink(missing_ok=True)
    wall_limit = 10.0 * seconds + 30.0
    with Bringup(out, env) as bringup:
        listener = bringup.start_module(_LISTENER, "linz_ros.commands._listen", [
            str(artifact_path.resolve()), str(params), repr(seconds), repr(wall_limit), str(heard_file)]
            + (["--lockstep"] if lockstep else []))
        for executable in executables:
            bringup.start(executable, params, _overrides(executable, artifact_path, params, field_log, lockstep))
        if not bringup.wait_for_log("linz_controller", "active: commanding", timeout=30):
            raise ConfigError("bringup", "the controller did not become active; see "
                                         f"{bringup.nodes['linz_controller'].log}")
        _wait_for_report(listener, heard_file, wall_limit + 120.0)
        # the controller first, so that its log ends with the loop, then the simulator's closing summary
        bringup.stop("linz_controller")
        bringup.stop("linz_plant_sim")
        simulator = _simulator_summary(bringup.nodes["linz_plant_sim"].log_text())
    say("  simulator " + simulator)
    if not heard_file.is_file():
        raise ConfigError("bringup", f"the DDS listener wrote no report; see {listener.log}")
    heard = json.loads(heard_file.read_text())
    if lockstep and heard["started"] and not heard["reached"]:
        say(f"  only {heard['controller_time']:.3g} s of simulated time in {wall_limit:g} s "
            "of wall time: the machine is very busy")
    return heard, simulator


def _wait_for_report(listener: Any, report: Path, timeout: float) -> None:
    """Wait until the listener has written its report (or ended, or time is up)."""
    end = time.monotonic() + timeout
    while not report.is_file() and listener.alive():
        if time.monotonic() > end:
            raise ConfigError("bringup", f"the DDS listener did not finish; see {listener.log}")
        time.sleep(0.05)


def warn_causes(summary: dict[str, Any], levels: list[int], simulator: str) -> str | None:
    """Why the bringup was not all OK, in the runtime's words; None when every diagnostic was OK.

    Parameters
    ----------
    summary : dict
        The field log's summary, with ``diagnostics`` (level and message of each heard).
    levels : list of int
        The levels heard.
    simulator : str
        The simulator's closing line (late ticks, lockstep timeouts).

    Returns
    -------
    str or None
    """
    from linz_ros.runtime import REASONS, VERDICTS

    if all(level == 0 for level in levels):
        return None
    said = Counter((d["level"], d["message"]) for d in summary["diagnostics"] if d["level"] != 0)
    parts = [f"{LEVELS[level] if 0 <= level < len(LEVELS) else level} '{message}' x{count}"
             for (level, message), count in sorted(said.items())]
    reasons = summary["reasons"]
    steps = ", ".join(f"{word} {reasons[word]}" for word in REASONS if word != "ok" and reasons.get(word))
    parts.append(f"field log: {'steps refused or acted on: ' + steps if steps else 'every step ok'}")
    verdict = summary["verdict"]
    parts.append(f"verdict {verdict if verdict in VERDICTS else repr(verdict)}")
    late = re.search(r"(\d+) late ticks", simulator)
    timeouts = re.search(r"lockstep timeouts (\d+)", simulator)
    # in lockstep simulated time waits for the controller: a tick late on the wall clock is no cause
    if late and int(late.group(1)) and not timeouts:
        parts.append(f"simulator {late.group(1)} late ticks")
    if timeouts and int(timeouts.group(1)):
        parts.append(f"lockstep timeouts {timeouts.group(1)}")
    return "  why not OK: " + "; ".join(parts)


def run_bringup(artifact_path: Path, params: Path, out: Path, seconds: float, lockstep: bool = True,
                say: Callable[[str], None] = print) -> BringupRun:
    """Bring up the simulator and controller (and, on the wall clock, the reference node) and summarise.

    With ``lockstep`` the simulator owns time (``/clock``) and waits for each command before
    it advances, so the run covers ``seconds`` of simulated time however busy the machine is.
    The summary, CSV and plots come from the controller's field log (every step); what was
    heard over DDS (diagnostics, commands, states) is reported beside it.

    Parameters
    ----------
    artifact_path, params : pathlib.Path
        The artifact and the bringup's parameter file.
    out : pathlib.Path
        Folder for the node logs, the field log, CSV, plots and ``summary.json``.
    seconds : float
    lockstep : bool
    say : callable
        Receives each line of progress.

    Returns
    -------
    BringupRun

    Raises
    ------
    ConfigError
        Without rclpy, or when the controller does not start or records nothing.
    """
    try:
        import linz_ros.nodes.recorder  # noqa: F401 - the listener needs it; say so before starting anything
    except ImportError as err:
        raise ConfigError("bringup", f"rclpy is not available ({err}); install the [ros] extra, source a ROS 2 "
                                     "distribution, or pass --no-ros to skip this step") from None
    from linz_ros.artifact import load_artifact
    from linz_ros.logs import read_logs
    from linz_ros.logs.analysis import as_sim_result
    from linz_ros.plotting import plot_run

    artifact = load_artifact(artifact_path)
    heard, simulator = _run_nodes(artifact_path, params, out, seconds, lockstep, say)
    field_log = (out / "field_log").resolve()
    if not field_log.is_dir():
        raise ConfigError("bringup", f"the controller wrote no field log; see the node logs in {out}")
    result = as_sim_result(read_logs([field_log]), artifact, "from the controller's field log (every step)")
    if len(result.t) == 0:
        raise ConfigError("bringup", f"no control steps were recorded; see the node logs in {out}")
    files = [result.write_csv(out / "run.csv")] + plot_run(result, out)
    summary = result.summary()
    summary["physics"] = _simulator_physics(params)
    summary["files"] = [str(f) for f in files]
    summary["diagnostics"] = heard["diagnostics"]
    (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    return BringupRun(summary, heard, simulator)


def _simulator_physics(params: Path) -> str:
    """The physics the bringup's simulator node ran (its ``physics`` parameter; ``model`` by default),
    read as the node reads its parameter file (``/**`` and the node's own section)."""
    from linz_ros.bringup import node_parameters
    from linz_ros.runtime.physics import PHYSICS

    try:
        value = node_parameters(params, "linz_plant_sim").get("physics", PHYSICS[0])
    except ConfigError:
        return PHYSICS[0]          # the simulator refused the file itself; its own log says why
    return value if value in PHYSICS else PHYSICS[0]


def render_heard(run: BringupRun) -> str:
    """What was heard over DDS, and why any diagnostic was not OK.

    Parameters
    ----------
    run : BringupRun

    Returns
    -------
    str
    """
    levels = [d["level"] for d in run.summary["diagnostics"]]
    names = sorted({LEVELS[level] for level in levels if 0 <= level < len(LEVELS)})
    heard = run.heard
    lines = [f"  heard over DDS: diagnostics {', '.join(names) or 'none'}; {heard['commands']} commands, "
             f"{heard['states']} states, {heard['records']} step records"]
    why = warn_causes(run.summary, levels, run.simulator)
    return "\n".join(lines + ([why] if why else []))
