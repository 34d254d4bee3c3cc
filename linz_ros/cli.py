"""The ``linz`` command: analyse plants, build controllers, simulate and time them.

Verbs
-----
check   decide whether and where a plant can be feedback linearized
build   synthesise the law and write a verified controller artifact
sim     run the sampled closed loop offline; CSV, plots and a summary
bench   time the controller step against reference implementations
logs    summarise field logs: near-singular episodes, mode switches, saturation
campaign  many closed-loop runs over the envelope, mismatch, noise, delay; the success rate and what drives failure
keygen  make a key pair for signing artifacts (linz build --sign-key, trusted keys on the robot)
demo    the whole job on the bundled example (check, build, two simulations)
wire    write the bringup parameter file (the nodes' topics and rates) of a plant or an artifact

Exit codes, every verb: 0 the work ran and all it judged succeeded (``sim``, one-log ``logs``: 0 whatever the
verdict); 3 it ran and found runs or recordings that did not succeed, or lost some (``campaign``: failed, refused,
errored or lost cases; ``logs --fleet``: not read, lost or not ``tracked``); 2 bad input (one line naming the file,
field, problem); 130 interrupted (what finished is reported); 1 only an internal error (a fault of linz_ros).
The work of each verb is in :mod:`linz_ros.commands`; this module parses, calls, prints.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Sequence

from linz_ros import __version__
from linz_ros.commands._common import DEFAULT_OUT, terminal_safe
from linz_ros.commands._options import DesignChoices
from linz_ros.errors import ConfigError, LinzError, quoted
from linz_ros.executor import DEFAULT_ATTEMPTS, SCHEDULER_ENV

__all__ = ["main"]


class _OneLineParser(argparse.ArgumentParser):
    """Argument errors as one line and exit code 2, like every other user mistake."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(2, f"{self.prog}: {message} (see --help)\n")


#: Upper bounds of the counting options (more would run for days or exhaust memory).
MAX_SAMPLES = 1_000_000
MAX_BENCH_CALLS = 1_000_000
MAX_BENCH_ROUNDS = 1_000


def _whole_number(minimum: int, words: str, maximum: int | None = None):
    """An argparse type for whole numbers from ``minimum`` (described by ``words``) to ``maximum``."""

    def convert(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {quoted(text, 40)!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"expected {words}, got {value}")
        if maximum is not None and value > maximum:
            raise argparse.ArgumentTypeError(f"expected at most {maximum:_}, got {text[:20]}"
                                             f"{'...' if len(text) > 20 else ''}")
        return value

    return convert


_positive_int = _whole_number(1, "a number of at least 1")
_nonnegative_int = _whole_number(0, "a whole number >= 0")


def _count_at_most(maximum: int):
    """An argparse type for whole numbers from 1 to ``maximum``."""
    return _whole_number(1, "a number of at least 1", maximum)


def _number_at_least(minimum: float, strict: bool):
    """An argparse type for finite numbers above (or at) ``minimum``."""
    words = "a positive number" if strict and minimum == 0 else f"a number >= {minimum:g}"

    def convert(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {quoted(text, 40)!r}") from None
        if not (math.isfinite(value) and (value > minimum if strict else value >= minimum)):
            raise argparse.ArgumentTypeError(f"expected {words}, got {quoted(text, 40)!r}")
        return value

    return convert


_positive_float = _number_at_least(0.0, strict=True)
_nonnegative_float = _number_at_least(0.0, strict=False)


def _add_design_options(parser: argparse.ArgumentParser) -> None:
    group = parser.add_argument_group("design (overrides the plant file's design section)")
    group.add_argument("--poles", action="append", default=[], metavar="OUTPUT=P1,P2",
                       help="closed-loop poles of one output chain, e.g. tool_x=-6,-7 or -3+2j,-3-2j; "
                            "repeat per output (a single chain may omit the name: --poles=-4,-5)")
    group.add_argument("--lqr-q", metavar="W1,W2,...", help="LQR state weights, one per chain state")
    group.add_argument("--lqr-r", metavar="W1,...", help="LQR input weights, one per chain")
    group.add_argument("--rate", type=_positive_float, metavar="HZ", help="control rate")
    integral = group.add_mutually_exclusive_group()
    integral.add_argument("--integral", dest="integral", action="store_true", default=None,
                          help="add integral action on every chain")
    integral.add_argument("--no-integral", dest="integral", action="store_false")
    group.add_argument("--linearize", choices=("auto", "outputs", "state"), default="auto",
                       help="outputs: input-output linearization; state: input-state through a linearizing "
                            "output T1 (one input); auto (default): outputs when the plant declares any")
    group.add_argument("--linearizing-output", metavar="EXPR", help="T1 for input-state linearization")


def _add_run_options(parser: argparse.ArgumentParser) -> None:
    """How a closed-loop run integrates and what runs it (linz sim, and every run of linz campaign)."""
    parser.add_argument("--integrator", choices=("rk4", "scipy"), default="rk4",
                        help="rk4: fixed-step RK4 sub-steps (default); scipy: adaptive RK45")
    parser.add_argument("--substeps", type=_positive_int, default=4, help="RK4 steps per control period (default 4)")
    _add_backend(parser, "the control step and the plant")
    parser.add_argument("--physics", default="model", metavar="NAME",
                        help="the plant: model (our integrator of the artifact's dynamics, the default) or mujoco "
                             "(MuJoCo on the arm's URDF: joint limits, damping and friction by the engine)")


def _add_backend(parser: argparse.ArgumentParser, what: str) -> None:
    # the names are checked where they live (linz_ros.runtime.native.BACKENDS), not here: importing the
    # runtime would slow every command's start
    parser.add_argument("--backend", default="native", metavar="NAME",
                        help=f"{what}: native (compiled C, the default; Python with a note where no C compiler "
                             "is found) or python")


def _add_artifact_checks(parser: argparse.ArgumentParser) -> None:
    """The options of verbs that load an artifact: a changed plant file, trusted signing keys."""
    parser.add_argument("--allow-plant-change", action="store_true",
                        help="accept an artifact whose plant file changed since the build")
    parser.add_argument("--trusted-key", action="append", default=[], metavar="FILE",
                        help="accept the artifact only when signed with this public key (repeatable)")


def _verb(verbs, run, name: str, **texts: str) -> argparse.ArgumentParser:
    """A verb's parser, with the function that runs it."""
    parser = verbs.add_parser(name, **texts)
    parser.set_defaults(run=run)
    return parser


def _add_executor_options(parser: argparse.ArgumentParser) -> None:
    """Where many runs go: local worker processes, or a Dask scheduler."""

    parser.add_argument("--workers", type=_positive_int, default=None, metavar="N",
                        help="local worker processes (default: one per core)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help=f"a Dask scheduler (tcp://host:8786) to run on instead of local processes; default "
                             f"the environment variable {SCHEDULER_ENV} when set (needs the 'cluster' extra)")
    parser.add_argument("--attempts", type=_positive_int, default=None, metavar="N",
                        help=f"runs of one task at most when its worker dies (default {DEFAULT_ATTEMPTS}); "
                             "then it is reported lost")


def _add_campaign(verbs) -> None:
    campaign = _verb(verbs, _run_campaign, "campaign", help="many closed-loop runs: envelope, mismatch, noise, delay",
                     description="Run the closed loop from initial states drawn over the envelope (scrambled "
                                 "Sobol), with parameter mismatch, noise, delay and references from a campaign "
                                 "section; report the success rate with its confidence interval, the worst cases "
                                 "with the command that reruns each, what drives failure and the region of "
                                 "attraction. Exit 0: every run succeeded; 3: failures or lost runs; 130: "
                                 "interrupted (what finished is reported).")
    campaign.add_argument("source", metavar="PLANT_OR_ARTIFACT",
                          help="a plant file (built here; its campaign: section is read) or an artifact (*.json)")
    campaign.add_argument("--campaign", metavar="FILE", help="a campaign file (a campaign: section, or its keys)")
    campaign.add_argument("-o", "--out", metavar="DIR", help=f"output folder (default {DEFAULT_OUT}/<plant>-campaign)")
    campaign.add_argument("--runs", type=_positive_int, default=None, help="number of runs (overrides the section)")
    campaign.add_argument("--seed", type=_nonnegative_int, default=None, help="campaign seed (overrides the section)")
    campaign.add_argument("--worst", type=_nonnegative_int, default=5, help="worst cases listed (default 5)")
    _add_executor_options(campaign)
    _add_run_options(campaign)
    campaign.add_argument("--no-plots", action="store_true", help="skip the CSV, PNG and HTML files")
    campaign.add_argument("--progress", action="store_true", default=None,
                          help="show a progress bar even when stderr is not a terminal")
    campaign.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    _add_artifact_checks(campaign)
    _add_design_options(campaign)


def _build_parser() -> argparse.ArgumentParser:
    parser = _OneLineParser(prog="linz", description="Feedback linearization, from plant file to ROS 2 node.")
    parser.add_argument("--version", action="version", version=f"linz_ros {__version__}")
    verbs = parser.add_subparsers(dest="verb", metavar="VERB", parser_class=_OneLineParser)
    verbs.required = True

    check = _verb(verbs, _run_check, "check", help="analyse a plant's linearizability",
                  description="Decide whether and where a plant can be feedback linearized.")
    check.add_argument("plant", metavar="PLANT", help="plant file (YAML)")
    check.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    check.add_argument("--samples", type=_count_at_most(MAX_SAMPLES), default=1024,
                       help=f"envelope samples for the conditioning sweep (default 1024, at most {MAX_SAMPLES:_})")
    check.add_argument("--budget", type=_positive_float, default=None, metavar="SECONDS",
                       help="CPU seconds for the analysis (default 600); past them the verdicts are "
                            "'could not decide within the budget'")
    check.add_argument("--progress", action="store_true", default=None,
                       help="show each step's progress even when stderr is not a terminal")

    build = _verb(verbs, _run_build, "build", help="synthesise the controller and write its artifact",
                  description="Synthesise the linearizing law and outer loop, generate the "
                              "expressions, verify them against sympy and write the artifact.")
    build.add_argument("plant", metavar="PLANT", help="plant file (YAML)")
    build.add_argument("-o", "--out", default=DEFAULT_OUT, metavar="DIR",
                       help=f"folder for PLANT_NAME.artifact.json (default {DEFAULT_OUT})")
    build.add_argument("--tolerance", type=_positive_float, default=None, metavar="TOL",
                       help="largest accepted residual of the generated code against sympy (default 1e-9)")
    build.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    build.add_argument("--sign-key", metavar="PRIVATE.pem",
                       help="sign the artifact with this Ed25519 private key (from linz keygen)")
    _add_design_options(build)

    keygen = _verb(verbs, _run_keygen, "keygen", help="make a key pair for signing artifacts",
                   description="Write an Ed25519 private key (mode 0600; keep it on the build machine) "
                               "and its public key (give it to the robots: trusted_keys) into DIR.")
    keygen.add_argument("folder", metavar="DIR", help="folder for the two PEM files (existing keys are kept)")

    sim = _verb(verbs, _run_sim, "sim", help="simulate the closed loop offline",
                description="Run the controller core at its rate against the plant (zero-order "
                            "hold), with optional mismatch, noise and delay; write a CSV, plots "
                            "and a summary.")
    sim.add_argument("source", metavar="PLANT_OR_ARTIFACT",
                     help="a plant file (built in memory) or an artifact (*.json)")
    sim.add_argument("-o", "--out", metavar="DIR", help=f"output folder (default {DEFAULT_OUT}/<plant>-sim)")
    sim.add_argument("--duration", type=_positive_float, default=5.0, metavar="S", help="seconds (default 5)")
    sim.add_argument("--reference", metavar="SPEC",
                     help="hold | step:amplitude=A,at=T | sine:amplitude=A,period=P,at=T | "
                          "smooth:amplitude=A,duration=D,at=T | ring:amplitude=A,period=P,at=T | "
                          "eight:amplitude=A,period=P,at=T (paths drawn by the first two outputs); "
                          "per-output amplitudes as OUTPUT=A; "
                          "default: the plant's design.reference, else hold")
    sim.add_argument("--mismatch", action="append", default=[], metavar="PARAM=PCT",
                     help="plant parameter off by PCT percent (repeatable; all=PCT for every parameter)")
    sim.add_argument("--noise", action="append", default=[], metavar="SIGMA|STATE=SIGMA",
                     help="Gaussian sensor noise: one standard deviation for all states, or per state")
    sim.add_argument("--delay", type=_nonnegative_float, default=0.0, metavar="S", help="input delay, seconds")
    sim.add_argument("--initial", action="append", default=[], metavar="STATE=VALUE",
                     help="initial state (default: the operating point)")
    sim.add_argument("--force-initial", action="store_true",
                     help="accept an --initial state outside the plant's envelope")
    sim.add_argument("--watchdog", action="append", default=[], metavar="SETTING=VALUE",
                     help="override a watchdog setting for this run (e.g. envelope_action=warn, "
                          "divergence_time=1; lists as comma-separated values)")
    _add_run_options(sim)
    sim.add_argument("--seed", type=_nonnegative_int, default=1, help="noise seed (a whole number >= 0)")
    sim.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    sim.add_argument("--progress", action="store_true", default=None,
                     help="show a progress bar even when stderr is not a terminal")
    sim.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    sim.add_argument("--field-log", metavar="DIR",
                     help="also write every step's record to a field log in DIR, as the controller node does")
    _add_artifact_checks(sim)
    _add_design_options(sim)

    _add_campaign(verbs)

    bench = _verb(verbs, _run_bench, "bench", help="time the controller step against references",
                  description="Time ControllerCore.step and, on the same expressions, a naive "
                              "numpy pipeline and a compiled-C evaluation; print the ratios.")
    bench.add_argument("source", metavar="PLANT_OR_ARTIFACT", help="a plant file or an artifact (*.json)")
    bench.add_argument("--calls", type=_count_at_most(MAX_BENCH_CALLS), default=2000,
                       help=f"calls per round (default 2000, at most {MAX_BENCH_CALLS:_})")
    bench.add_argument("--rounds", type=_count_at_most(MAX_BENCH_ROUNDS), default=7,
                       help=f"rounds (default 7, at most {MAX_BENCH_ROUNDS:_})")
    bench.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    _add_backend(bench, "the core step timed as 'core'")
    _add_artifact_checks(bench)

    logs = _verb(verbs, _run_logs, "logs", help="summarise field logs: near-singular and saturated episodes",
                 description="Read field logs of the controller node (or bags of its conditioning "
                             "topic): near-singular episodes, mode switches, saturation per input, "
                             "refused states, compute time; optional CSV, PNG plots and HTML report.")
    logs.add_argument("paths", metavar="LOG", nargs="+", help="field-log files (.mcap), bags (.mcap, .db3) or "
                                                              "folders holding them; joined in time order")
    logs.add_argument("--artifact", metavar="FILE", help="the controller's artifact, for a bag of the "
                                                         "conditioning topic (a field log carries its own)")
    logs.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    logs.add_argument("--csv", metavar="FILE", help="write every record as CSV")
    logs.add_argument("--plots", metavar="DIR", help="write the PNG plots in DIR")
    logs.add_argument("--html", metavar="FILE", help="write one self-contained HTML report")
    logs.add_argument("--fleet", metavar="DIR", help="each recording (the files of one field-log writer) on its own, "
                      "summed per day and machine: DIR/fleet.json, .csv, .html and DIR/<recording>/ reports")
    _add_executor_options(logs)
    logs.add_argument("--no-plots", action="store_true", help="with --fleet: no PNG plots per recording")
    logs.add_argument("--no-csv", action="store_true", help="with --fleet: no records.csv per recording")
    logs.add_argument("--progress", action="store_true", default=None, help="with --fleet: a progress bar always")

    demo = _verb(verbs, _run_demo, "demo", help="the whole job on the bundled example",
                 description="Check, build and simulate the bundled pick arm: a nominal move, and a "
                             "reach past the workspace that drives the arm through its singular set.")
    demo.add_argument("plant", metavar="PLANT", nargs="?", help="plant file (default: the bundled pick_arm)")
    demo.add_argument("-o", "--out", default=str(Path(DEFAULT_OUT) / "demo"), metavar="DIR",
                      help=f"output folder (default {DEFAULT_OUT}/demo)")
    demo.add_argument("--seconds", type=_positive_float, default=6.0, metavar="S",
                      help="length of the ROS 2 simulation bringup (default 6)")
    demo.add_argument("--no-ros", action="store_true", help="skip the ROS 2 simulation bringup")
    demo.add_argument("--bringup", metavar="FILE",
                      help="the bringup parameter file of the ROS 2 step (default: config/<plant>.yaml of a bundled "
                           "plant, else <plant stem>.bringup.yaml beside the plant file, else one written by "
                           "linz wire)")
    demo.add_argument("--wall-clock", action="store_true",
                      help="run the bringup on the wall clock (default: simulated time, in lockstep with the "
                           "controller, so that a busy machine slows the run down instead of starving the loop)")

    # "wire": the file wires the three nodes to their topics; "bringup" would read as starting them
    wire = _verb(verbs, _run_wire, "wire", help="write the bringup parameter file of a plant or an artifact",
                 description="Write the controller's, simulator's and reference node's parameters (topics named "
                             "after the plant, JointState for an arm's joints, the design rate, the plant's reference) "
                             "as the bundled config/<plant>.yaml files have them.")
    wire.add_argument("source", metavar="PLANT_OR_ARTIFACT",
                      help="a plant file (built in memory) or an artifact (*.json)")
    wire.add_argument("-o", "--out", metavar="FILE", help="the file to write (default: <stem>.bringup.yaml beside it)")
    wire.add_argument("--force", action="store_true", help="replace an existing file")
    return parser


# -- the verbs: parsed arguments to typed calls, then printing ------------------------------
def _design(args: argparse.Namespace) -> DesignChoices:
    return DesignChoices(poles=args.poles, lqr_q=args.lqr_q, lqr_r=args.lqr_r, rate=args.rate,
                         integral=args.integral, linearize=args.linearize,
                         linearizing_output=args.linearizing_output)


def _warn(warnings: list[str]) -> None:
    for warning in warnings:
        print(f"linz: warning: {warning}", file=sys.stderr)


def _progress(args: argparse.Namespace) -> bool:
    return bool(args.progress if args.progress is not None else sys.stderr.isatty())


def _run_check(args: argparse.Namespace) -> int:
    from linz_ros.commands.check import check, render_check

    print(render_check(check(args.plant, samples=args.samples, budget=args.budget, progress=_progress(args)),
                       as_json=args.json))
    return 0


def _run_build(args: argparse.Namespace) -> int:
    from linz_ros.commands.build import build, render_build

    built = build(args.plant, args.out, _design(args), tolerance=args.tolerance, sign_key=args.sign_key)
    print(render_build(built, as_json=args.json))
    _warn(built.warnings)
    return 0


def sim_request(args: argparse.Namespace):
    """The ``linz sim`` request of parsed options.

    Parameters
    ----------
    args : argparse.Namespace

    Returns
    -------
    SimRequest
    """
    from linz_ros.commands.sim import SimRequest

    return SimRequest(
        source=args.source, out=args.out, duration=args.duration, reference=args.reference, mismatch=args.mismatch,
        noise=args.noise, delay=args.delay, initial=args.initial, force_initial=args.force_initial,
        watchdog=args.watchdog, integrator=args.integrator, substeps=args.substeps, seed=args.seed,
        backend=args.backend, physics=args.physics, plots=not args.no_plots, progress=_progress(args),
        allow_plant_change=args.allow_plant_change, field_log=args.field_log, trusted_keys=args.trusted_key,
        design=_design(args))


def parse(argv: Sequence[str]) -> argparse.Namespace:
    """Parse a ``linz`` command line (without the program name).

    Parameters
    ----------
    argv : sequence of str

    Returns
    -------
    argparse.Namespace
    """
    return _build_parser().parse_args(list(argv))


def _run_sim(args: argparse.Namespace) -> int:
    from linz_ros.commands.sim import render_sim, simulate_run

    run = simulate_run(sim_request(args))
    print(render_sim(run.summary, as_json=args.json))
    _warn(run.warnings)
    return 0


def _run_campaign(args: argparse.Namespace) -> int:
    from linz_ros.commands.campaign import CampaignRequest, render_campaign_run, run_campaign

    run = run_campaign(CampaignRequest(
        args.source, args.campaign, args.out, args.runs, args.seed, args.worst, args.workers, args.scheduler,
        DEFAULT_ATTEMPTS if args.attempts is None else args.attempts, args.integrator, args.backend, args.physics,
        args.substeps, not args.no_plots, _progress(args), args.allow_plant_change, args.trusted_key, _design(args)))
    print(render_campaign_run(run, as_json=args.json))
    return run.exit_code


def _run_bench(args: argparse.Namespace) -> int:
    from linz_ros.commands.bench import bench, render_bench

    result = bench(args.source, calls=args.calls, rounds=args.rounds, allow_plant_change=args.allow_plant_change,
                   trusted_keys=args.trusted_key, backend=args.backend)
    print(render_bench(result, as_json=args.json))
    return 0


def _run_logs(args: argparse.Namespace) -> int:
    from linz_ros.commands.logs import run_logs_options

    text, code = run_logs_options(vars(args), terminal=sys.stderr.isatty())
    print(text)
    return code


def _run_keygen(args: argparse.Namespace) -> int:
    from linz_ros.commands.keygen import keygen, render_keygen

    print(render_keygen(keygen(args.folder)))
    return 0


def _run_demo(args: argparse.Namespace) -> int:
    from linz_ros.commands.demo import DemoRequest, run_demo

    run_demo(DemoRequest(plant=args.plant, out=args.out, seconds=args.seconds, ros=not args.no_ros,
                         wall_clock=args.wall_clock, progress=sys.stderr.isatty(), bringup=args.bringup))
    return 0


def _run_wire(args: argparse.Namespace) -> int:
    from linz_ros.commands.wire import render_wire, wire

    print(render_wire(wire(args.source, args.out, force=args.force)))
    return 0


#: Options naming a file or folder: an empty name would silently mean the current folder, or nothing.
_PATH_OPTIONS = (("out", "--out"), ("bringup", "--bringup"), ("field_log", "--field-log"), ("folder", "keygen"),
                 ("campaign", "--campaign"), ("fleet", "--fleet"), ("sign_key", "--sign-key"),
                 ("trusted_key", "--trusted-key"))


#: Options whose value is text (not a path) and may not be empty: an empty one would silently
#: fall back to a default.
_TEXT_OPTIONS = (("reference", "--reference"), ("linearizing_output", "--linearizing-output"),
                 ("lqr_q", "--lqr-q"), ("lqr_r", "--lqr-r"), ("poles", "--poles"), ("mismatch", "--mismatch"),
                 ("noise", "--noise"), ("initial", "--initial"), ("watchdog", "--watchdog"), ("scheduler", "--scheduler"))


def _refuse_empty_paths(args: argparse.Namespace) -> None:
    for attribute, option in _PATH_OPTIONS + _TEXT_OPTIONS:
        values = getattr(args, attribute, None)
        for value in values if isinstance(values, list) else [values]:
            if value is not None and not value.strip():
                what = "a file or folder name" if (attribute, option) in _PATH_OPTIONS else "a value"
                raise ConfigError(option, f"expected {what}, got an empty one")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``linz`` console script.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name; ``sys.argv[1:]`` when None.

    Returns
    -------
    int
        The exit code.
    """
    args = _build_parser().parse_args(argv)
    try:
        _refuse_empty_paths(args)
        return args.run(args)
    except LinzError as err:
        print(f"linz: {terminal_safe(str(err))}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("linz: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
