"""``linz demo``: the whole job on the bundled example, by calling the verbs' functions.

Check, build, a nominal simulation and (for the bundled pick arm) a reach past the
workspace stopped by the envelope watchdog, the same reach with that watchdog only
warning, and a short robustness campaign over the arm's working region; then the nodes over
DDS, the field logs read back one by one and as a fleet. The nodes' parameter file
is, in this order, the one named by ``--bringup``, the package's ``config/<plant>.yaml`` for a
bundled plant file, ``<plant stem>.bringup.yaml`` beside the plant file, or one written by
``linz wire`` into the demo's folder (:func:`choose_bringup`).
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from linz_ros.commands._common import DEFAULT_OUT, bundled_campaign, bundled_params, bundled_plant
from linz_ros.errors import ConfigError, LinzError
from linz_ros.commands.build import build, render_build
from linz_ros.commands.check import check
from linz_ros.commands.logs import LogsRequest, read_and_report, render_logs
from linz_ros.commands.sim import SimRequest, render_sim, simulate_run

__all__ = ["DEMO_PLANT", "DEMO_REACH", "DemoRequest", "choose_bringup", "run_demo"]

#: The bundled example and the reach that takes it through its singular set (sin q2 = 0).
DEMO_PLANT = "pick_arm"
DEMO_REACH = "smooth:tool_x=0.12,tool_y=0.16,duration=2,at=0.2"
#: The bundled campaign the demo runs (a part of its runs: the whole is ``linz campaign``'s job).
DEMO_CAMPAIGN, DEMO_CAMPAIGN_RUNS = "pick_arm_cell", 128


@dataclass
class DemoRequest:
    """What ``linz demo`` runs.

    Attributes
    ----------
    plant : str, optional
        A plant file (default: the bundled pick arm).
    out : str
        Folder for everything written.
    seconds : float
        Length of the bringup over DDS.
    ros : bool
        Run the bringup over DDS.
    wall_clock : bool
        Run the bringup on the wall clock instead of simulated time in lockstep.
    progress : bool
        Progress bars of the simulations on stderr.
    bringup : str, optional
        The bringup parameter file (default: see :func:`choose_bringup`).
    """

    plant: str | None = None
    out: str = str(Path(DEFAULT_OUT) / "demo")
    seconds: float = 6.0
    ros: bool = True
    wall_clock: bool = False
    progress: bool = False
    bringup: str | None = None


def _warn(text: str) -> None:
    print(f"linz: warning: {text}", file=sys.stderr)


class _Steps:
    """The demo's output: each step's text as it comes."""

    def __init__(self, request: DemoRequest, say: Callable[[str], None], warn: Callable[[str], None]) -> None:
        self.request, self.say, self.warn = request, say, warn

    def sim(self, artifact: Path, out: Path, **options) -> None:
        run = simulate_run(SimRequest(str(artifact), out=str(out), duration=4.0, progress=self.request.progress,
                                      **options))
        self.say(render_sim(run.summary))
        for warning in run.warnings:
            self.warn(warning)

    def campaign(self, artifact: Path, out: Path) -> None:
        from linz_ros.commands.campaign import CampaignRequest, render_campaign_run, run_campaign

        run = run_campaign(CampaignRequest(str(artifact), campaign=str(bundled_campaign(DEMO_CAMPAIGN)), out=str(out),
                                           runs=DEMO_CAMPAIGN_RUNS, worst=2, progress=self.request.progress))
        self.say(render_campaign_run(run))

    def fleet(self, folders: list[Path], out: Path) -> None:
        from linz_ros.commands.logs import FleetRequest, fleet_report

        self.say(render_logs(fleet_report(FleetRequest([str(f) for f in folders], str(out), plots=False,
                                                        progress=self.request.progress))))

    def logs(self, folder: Path) -> None:
        report = read_and_report(LogsRequest([str(folder)], plots=str(folder / "plots"),
                                             html=str(folder / "report.html")))
        self.say(render_logs(report))


def _say_when_still(request: DemoRequest, artifact: Path, params: Path, say: Callable[[str], None]) -> None:
    """Say so when the bringup ends before its built-in reference starts to move (a short ``--seconds``)."""
    from linz_ros.artifact import load_artifact
    from linz_ros.bringup import node_parameters
    from linz_ros.runtime.reference import parse_reference

    if request.wall_clock:      # the reference node's timeline starts when the controller subscribes
        return
    loaded = load_artifact(artifact)
    spec = str(node_parameters(params, "linz_reference")["reference"])
    start = parse_reference(spec, loaded.relative_degree, [0.0] * len(loaded.outputs), loaded.outputs).at
    if start >= request.seconds:
        say(f"  (the reference starts to move {start:g} s after activation: a {request.seconds:g} s run holds the "
            "outputs where they are; pass a longer --seconds to see the move)")


def _bringup(request: DemoRequest, artifact: Path, params: Path, out: Path, say: Callable[[str], None]) -> None:
    from linz_ros.commands._bringup import render_heard, run_bringup

    clock = "wall clock" if request.wall_clock else "simulated time, lockstep"
    nodes = "simulator, reference and controller nodes" if request.wall_clock else "simulator and controller nodes"
    say(f"\n== 5. simulation bringup over DDS: {nodes} ({request.seconds:g} s, {clock})")
    _say_when_still(request, artifact, params, say)
    run = run_bringup(artifact, params, out, request.seconds, lockstep=not request.wall_clock, say=say)
    say(render_sim(run.summary, title="bringup"))
    say(render_heard(run))


def _bundled_params_of(plant_file: Path, name: str) -> Path | None:
    """The package's config/<name>.yaml when ``plant_file`` is the bundled plant file of that name."""
    try:
        bundled = bundled_plant(name)
    except LinzError:
        return None
    return bundled_params(name) if bundled.resolve() == plant_file.resolve() else None


def choose_bringup(plant_file: Path, name: str, given: str | None, artifact: Path, out: Path) -> tuple[Path, str]:
    """The bringup parameter file of the demo's ROS 2 step, and where it came from.

    ``--bringup`` first (an explicit choice, such as the ros2_control layout of a bundled arm),
    then the package's ``config/<name>.yaml`` of a bundled plant file, then
    ``<plant stem>.bringup.yaml`` beside the plant file, else one written by ``linz wire`` from the
    artifact into ``out``.

    Parameters
    ----------
    plant_file : pathlib.Path
    name : str
        The plant's name.
    given : str or None
        ``--bringup``.
    artifact : pathlib.Path
        The artifact just built (for ``linz wire``).
    out : pathlib.Path
        The demo's folder.

    Returns
    -------
    (pathlib.Path, str)

    Raises
    ------
    ConfigError
        For a ``--bringup`` file that is not there.
    """
    from linz_ros.commands.wire import default_bringup_path, wire

    if given is not None:
        if not Path(given).is_file():
            raise ConfigError("--bringup", f"{given}: no such file")
        return Path(given), "named by --bringup"
    bundled = _bundled_params_of(plant_file, name)
    if bundled is not None:
        return bundled, "the package's, for the bundled plant"
    beside = default_bringup_path(plant_file)
    if beside.is_file():
        return beside, "beside the plant file"
    written = wire(str(artifact), str(out / f"{name}.bringup.yaml"), force=True)
    return written.path, f"written by `linz wire` (none beside the plant file: {beside.name})"


def run_demo(request: DemoRequest, say: Callable[[str], None] = print,
             warn: Callable[[str], None] = _warn) -> Path:
    """Run the demo's steps, saying each step's text as it comes.

    Parameters
    ----------
    request : DemoRequest
    say : callable
        Receives the text of each step (stdout in ``linz demo``).
    warn : callable
        Receives each design warning (stderr in ``linz demo``).

    Returns
    -------
    pathlib.Path
        The folder with every result.

    Raises
    ------
    LinzError
    """
    from linz_ros.analysis import render_verdict

    plant_file = Path(request.plant) if request.plant is not None else bundled_plant(DEMO_PLANT)
    out = Path(request.out)
    if request.bringup is not None and not Path(request.bringup).is_file():      # before the long steps
        raise ConfigError("--bringup", f"{request.bringup}: no such file")
    steps = _Steps(request, say, warn)
    say(f"== 1. check {plant_file}")
    say(render_verdict(check(plant_file, samples=512)))
    say(f"\n== 2. build -> {out}")
    built = build(plant_file, out)
    say(render_build(built))
    for warning in built.warnings:
        warn(warning)
    name, artifact = built.design.plant.name, built.path
    say("\n== 3. sim: the plant file's reference")
    steps.sim(artifact, out / "nominal")
    if plant_file.resolve() == bundled_plant(DEMO_PLANT).resolve():     # the reach is written for that file
        say("\n== 4. sim: a reach past the workspace; the envelope watchdog stops the arm under control")
        steps.sim(artifact, out / "reach_stopped", reference=DEMO_REACH)
        say("\n== 4b. sim: the same reach with the envelope watchdog only warning, through the singular set "
            "(the singularity watchdog at work; never do this on a machine)")
        steps.sim(artifact, out / "reach", reference=DEMO_REACH, watchdog=["envelope_action=warn"],
                  field_log=str(out / "reach" / "field_log"))
        if bundled_campaign(DEMO_CAMPAIGN) is not None:
            say(f"\n== 4c. campaign: {DEMO_CAMPAIGN_RUNS} runs over the arm's working region, with encoder noise "
                f"and input delay ({DEMO_CAMPAIGN}.yaml; linz campaign runs all 1000)")
            steps.campaign(artifact, out / "campaign")
    else:
        say(f"\n== 4. (skipped: the reach past the workspace is written for the bundled plant file "
            f"{DEMO_PLANT}.yaml, and {plant_file} is another file)")
    if request.ros:
        params, why = choose_bringup(plant_file, name, request.bringup, artifact, out)
        say(f"\nbringup parameter file: {params} ({why})")
        _bringup(request, artifact, params, out / "bringup", say)
    logs = [folder for folder in (out / "reach" / "field_log", out / "bringup" / "field_log") if folder.is_dir()]
    for step, folder in enumerate(logs, start=6):
        say(f"\n== {step}. logs: what the field log of {folder.parent.name} says")
        steps.logs(folder)
    if logs:
        say(f"\n== {6 + len(logs)}. logs --fleet: every field log of the demo, per recording, day and machine")
        steps.fleet(logs, out / "fleet")
    say(f"\nall results in {out}")
    return out
