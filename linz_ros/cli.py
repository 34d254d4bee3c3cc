"""The ``linz`` command: analyse plants, build controllers, simulate and time them.

Verbs
-----
check   decide whether and where a plant can be feedback linearized
build   synthesise the law and write a verified controller artifact
sim     run the sampled closed loop offline; CSV, plots and a summary
bench   time the controller step against reference implementations
keygen  make a key pair for signing artifacts (linz build --sign-key, trusted keys on the robot)
demo    the whole job on the bundled example (check, build, two simulations)

Exit codes: 0 when the work ran (whatever the verdict), 2 for bad input (one line on
stderr naming the file, the field and the problem), 1 for an internal error.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
from pathlib import Path
from typing import Any, Sequence

from linz_ros import __version__
from linz_ros.errors import ConfigError, DesignError, LinzError, quoted

__all__ = ["main"]

DEFAULT_OUT = "linz_out"


class _OneLineParser(argparse.ArgumentParser):
    """Argument errors as one line and exit code 2, like every other user mistake."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(2, f"{self.prog}: {message} (see --help)\n")


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {quoted(text, 40)!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a number of at least 1, got {value}")
    return value


#: Upper bounds of the counting options (more would run for days or exhaust memory).
MAX_SAMPLES = 1_000_000
MAX_BENCH_CALLS = 1_000_000
MAX_BENCH_ROUNDS = 1_000


def _count_at_most(maximum: int):
    """An argparse type for whole numbers from 1 to ``maximum``."""

    def convert(text: str) -> int:
        value = _positive_int(text)
        if value > maximum:
            raise argparse.ArgumentTypeError(f"expected at most {maximum:_}, got {text[:20]}"
                                             f"{'...' if len(text) > 20 else ''}")
        return value

    return convert


def _nonnegative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {quoted(text, 40)!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 0, got {value}")
    return value


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


def _build_parser() -> argparse.ArgumentParser:
    parser = _OneLineParser(prog="linz", description="Feedback linearization, from plant file to ROS 2 node.")
    parser.add_argument("--version", action="version", version=f"linz_ros {__version__}")
    verbs = parser.add_subparsers(dest="verb", metavar="VERB", parser_class=_OneLineParser)
    verbs.required = True

    check = verbs.add_parser("check", help="analyse a plant's linearizability",
                             description="Decide whether and where a plant can be feedback linearized.")
    check.add_argument("plant", metavar="PLANT", help="plant file (YAML)")
    check.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    check.add_argument("--samples", type=_count_at_most(MAX_SAMPLES), default=1024,
                       help=f"envelope samples for the conditioning sweep (default 1024, at most {MAX_SAMPLES:_})")
    check.set_defaults(run=_run_check)

    build = verbs.add_parser("build", help="synthesise the controller and write its artifact",
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
    build.set_defaults(run=_run_build)

    keygen = verbs.add_parser("keygen", help="make a key pair for signing artifacts",
                              description="Write an Ed25519 private key (mode 0600; keep it on the build machine) "
                                          "and its public key (give it to the robots: trusted_keys) into DIR.")
    keygen.add_argument("folder", metavar="DIR", help="folder for the two PEM files (existing keys are kept)")
    keygen.set_defaults(run=_run_keygen)

    sim = verbs.add_parser("sim", help="simulate the closed loop offline",
                           description="Run the controller core at its rate against the plant (zero-order "
                                       "hold), with optional mismatch, noise and delay; write a CSV, plots "
                                       "and a summary.")
    sim.add_argument("source", metavar="PLANT_OR_ARTIFACT",
                     help="a plant file (built in memory) or an artifact (*.json)")
    sim.add_argument("-o", "--out", metavar="DIR", help=f"output folder (default {DEFAULT_OUT}/<plant>-sim)")
    sim.add_argument("--duration", type=_positive_float, default=5.0, metavar="S", help="seconds (default 5)")
    sim.add_argument("--reference", metavar="SPEC",
                     help="hold | step:amplitude=A,at=T | sine:amplitude=A,period=P,at=T | "
                          "smooth:amplitude=A,duration=D,at=T; per-output amplitudes as OUTPUT=A; "
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
    sim.add_argument("--integrator", choices=("rk4", "scipy"), default="rk4",
                     help="rk4: fixed-step RK4 sub-steps (default); scipy: adaptive RK45")
    sim.add_argument("--substeps", type=_positive_int, default=4, help="RK4 steps per control period (default 4)")
    sim.add_argument("--seed", type=_nonnegative_int, default=1, help="noise seed (a whole number >= 0)")
    sim.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    sim.add_argument("--progress", action="store_true", default=None,
                     help="show a progress bar even when stderr is not a terminal")
    sim.add_argument("--allow-plant-change", action="store_true",
                     help="accept an artifact whose plant file changed since the build")
    sim.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    sim.add_argument("--field-log", metavar="DIR",
                     help="also write every step's record to a field log in DIR, as the controller node does")
    sim.add_argument("--trusted-key", action="append", default=[], metavar="FILE",
                     help="accept the artifact only when signed with this public key (repeatable)")
    _add_design_options(sim)
    sim.set_defaults(run=_run_sim)

    bench = verbs.add_parser("bench", help="time the controller step against references",
                             description="Time ControllerCore.step and, on the same expressions, a naive "
                                         "numpy pipeline and a compiled-C evaluation; print the ratios.")
    bench.add_argument("source", metavar="PLANT_OR_ARTIFACT", help="a plant file or an artifact (*.json)")
    bench.add_argument("--calls", type=_count_at_most(MAX_BENCH_CALLS), default=2000,
                       help=f"calls per round (default 2000, at most {MAX_BENCH_CALLS:_})")
    bench.add_argument("--rounds", type=_count_at_most(MAX_BENCH_ROUNDS), default=7,
                       help=f"rounds (default 7, at most {MAX_BENCH_ROUNDS:_})")
    bench.add_argument("--allow-plant-change", action="store_true",
                       help="accept an artifact whose plant file changed since the build")
    bench.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    bench.add_argument("--trusted-key", action="append", default=[], metavar="FILE",
                       help="accept the artifact only when signed with this public key (repeatable)")
    bench.set_defaults(run=_run_bench)

    logs = verbs.add_parser("logs", help="summarise field logs: near-singular and saturated episodes",
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
    logs.set_defaults(run=_run_logs)

    demo = verbs.add_parser("demo", help="the whole job on the bundled example",
                            description="Check, build and simulate the bundled pick arm: a nominal move, and a "
                                        "reach past the workspace that drives the arm through its singular set.")
    demo.add_argument("plant", metavar="PLANT", nargs="?", help="plant file (default: the bundled pick_arm)")
    demo.add_argument("-o", "--out", default=str(Path(DEFAULT_OUT) / "demo"), metavar="DIR",
                      help=f"output folder (default {DEFAULT_OUT}/demo)")
    demo.add_argument("--seconds", type=_positive_float, default=6.0, metavar="S",
                      help="length of the ROS 2 simulation bringup (default 6)")
    demo.add_argument("--no-ros", action="store_true", help="skip the ROS 2 simulation bringup")
    demo.add_argument("--wall-clock", action="store_true",
                      help="run the bringup on the wall clock (default: simulated time, in lockstep with the "
                           "controller, so that a busy machine slows the run down instead of starving the loop)")
    demo.set_defaults(run=_run_demo)
    return parser


# -- check ------------------------------------------------------------------------------
def _run_check(args: argparse.Namespace) -> int:
    from linz_ros.analysis import analyse, render_text
    from linz_ros.model import load_plant

    report = analyse(load_plant(args.plant), samples=args.samples)
    if args.json:
        print(json.dumps(report.to_json(), indent=2))
    else:
        print(render_text(report))
    return 0


# -- design options ---------------------------------------------------------------------
def _numbers(text: str, option: str) -> list[float]:
    values = []
    for part in filter(None, (p.strip() for p in text.split(","))):
        try:
            values.append(float(part))
        except ValueError:
            raise DesignError("<command line>", option, f"expected numbers separated by commas, got {part!r}") \
                from None
    if not values:
        raise DesignError("<command line>", option, "expected at least one number")
    return values


def _poles(items: list[str]) -> dict[str, list[complex]] | list[complex] | None:
    if not items:
        return None
    named: dict[str, list[complex]] = {}
    unnamed: list[complex] | None = None
    for item in items:
        name, equals, values = item.partition("=")
        if not equals:
            name, values = "", item
        poles = []
        for part in filter(None, (p.strip() for p in values.split(","))):
            try:
                poles.append(complex(part.replace("i", "j")))
            except ValueError:
                raise DesignError("<command line>", "--poles", f"expected numbers such as -3 or -3+2j, got {part!r}") \
                    from None
        if not poles:
            raise DesignError("<command line>", "--poles", f"no poles in {item!r}")
        name = name.strip()
        if (name in named) if name else (unnamed is not None):
            raise DesignError("<command line>", "--poles", f"given twice for {('output ' + name) if name else 'the chain'}"
                                                           "; give each chain's poles once")
        if name:
            named[name] = poles
        else:
            unnamed = poles
    if unnamed is not None:
        if named:
            raise DesignError("<command line>", "--poles", "give every chain's poles with its name, or one "
                                                            "unnamed list for a single chain")
        return unnamed
    return named


def _design_options(args: argparse.Namespace):
    from linz_ros.synthesis import DesignOptions

    lqr = None
    if args.lqr_q is not None or args.lqr_r is not None:
        lqr = {}
        if args.lqr_q is not None:
            lqr["q"] = _numbers(args.lqr_q, "--lqr-q")
        if args.lqr_r is not None:
            lqr["r"] = _numbers(args.lqr_r, "--lqr-r")
    return DesignOptions(poles=_poles(args.poles), lqr=lqr, rate=args.rate, integral=args.integral,
                         linearize=args.linearize, linearizing_output=args.linearizing_output)


def _has_design_overrides(args: argparse.Namespace) -> bool:
    return bool(args.poles or args.lqr_q or args.lqr_r or args.rate or args.integral is not None
                or args.linearize != "auto" or args.linearizing_output)


def _design_and_document(plant_file: str, args: argparse.Namespace, tolerance: float | None = None):
    from linz_ros.codegen import DEFAULT_TOLERANCE, build_document
    from linz_ros.model import load_plant
    from linz_ros.synthesis import synthesise

    plant = load_plant(plant_file)
    design = synthesise(plant, _design_options(args))
    _check_reference_text(design.reference, design, plant.source)
    document, verification = build_document(design, tolerance=DEFAULT_TOLERANCE if tolerance is None else tolerance)
    return design, document, verification


def _check_reference_text(text: str | None, design, source: str) -> None:
    """A reference in the plant file is checked at build time, naming the file and field."""
    if text is None:
        return
    from linz_ros.runtime import parse_reference

    orders = design.relative_degree
    try:
        parse_reference(text, orders, [0.0] * len(orders), [c.name for c in design.chains])
    except ConfigError as err:
        raise DesignError(source, "design.reference", err.problem) from None


# -- build ------------------------------------------------------------------------------
def _run_build(args: argparse.Namespace) -> int:
    from linz_ros.codegen import artifact_path, write_artifact

    key = None
    if args.sign_key is not None:           # read before the build: a bad key costs no synthesis
        from linz_ros.artifact.signing import load_private_key, sign_artifact_file

        key = load_private_key(args.sign_key)
    design, document, verification = _design_and_document(args.plant, args, args.tolerance)
    path = write_artifact(document, artifact_path(args.out, design.plant.name))
    signed_by = sign_artifact_file(path, key) if key is not None else None
    if args.json:
        print(json.dumps(dict(_build_summary(design, verification, path), signed_by=signed_by), indent=2))
    else:
        print(_build_text(design, verification, path)
              + (f"\n  signed with key {signed_by[:16]} ({args.sign_key})" if signed_by else ""))
    for warning in design.warnings:
        print(f"linz: warning: {warning}", file=sys.stderr)
    return 0


def _build_summary(design, verification, path: Path) -> dict[str, Any]:
    return {
        "plant": design.plant.name,
        "artifact": str(path),
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
        "verification": verification.to_json(),
        "warnings": design.warnings,
        "notes": design.notes,
    }


def _build_text(design, verification, path: Path) -> str:
    kind = {"input_output": "input-output", "input_state": "input-state"}[design.kind]
    lines = [f"plant {design.plant.name}: {kind} linearization, relative degree {design.relative_degree}, "
             f"{design.rate:g} Hz{', integral action' if design.integral else ''}"]
    for c in design.chains:
        poles = ", ".join(f"{p.real:.4g}{p.imag:+.3g}j" if abs(p.imag) > 1e-12 else f"{p.real:.4g}" for p in c.poles)
        gains = ", ".join(f"{k:.5g}" for k in c.gains)
        lines.append(f"  {c.name} = {c.expression}: gains [{gains}], poles [{poles}] ({design.method}); "
                     f"sampled loop spectral radius {c.sampled.spectral_radius:.5f}")
    w = design.watchdog
    lines.append(f"  watchdog: sigma warn {w['sigma_warn']:.4g}, act {w['sigma_act']:.4g}, stop {w['sigma_stop']:.4g} "
                 f"({design.sigma_reference_note} = {design.sigma_reference:.4g}); stale after {w['stale_after']:.4g} s")
    lines.append(f"  verified against sympy at {verification.points} points: worst relative residual "
                 f"{verification.max_relative_residual:.2e} (tolerance {verification.tolerance:g})")
    lines.extend(f"  note: {note}" for note in design.notes)
    lines.append(f"wrote {path}")
    return "\n".join(lines)


# -- loading a plant file or an artifact ------------------------------------------------------
def _is_artifact(path: str) -> bool:
    return path.endswith(".json")


def _artifact_and_design(source: str, args: argparse.Namespace, need_design: bool):
    """An artifact (loaded, or built in memory from a plant file) and its design when at hand."""
    from linz_ros.artifact import artifact_from_text, load_artifact, seal

    trusted_keys = getattr(args, "trusted_key", None) or None
    if _is_artifact(source):
        if _has_design_overrides(args):
            raise ConfigError("design options", "an artifact's design is fixed; give the plant file to "
                                                "change poles, weights, rate or integral action")
        artifact = load_artifact(source, allow_plant_change=args.allow_plant_change, trusted_keys=trusted_keys)
        design = None
        if need_design:
            design = _design_from_artifact_plant(artifact, args)
        return artifact, design, None
    if trusted_keys:
        raise ConfigError("--trusted-key", f"checks a signed artifact; {source} is a plant file, built here unsigned")
    design, document, _ = _design_and_document(source, args)
    text = seal(document)
    return artifact_from_text(text, source=f"{design.plant.name} (built from {source})"), design, document


def _design_from_artifact_plant(artifact, args):
    """The symbolic design behind an artifact, rebuilt from its plant file when that is at hand."""
    from linz_ros.model import load_plant
    from linz_ros.synthesis import DesignOptions, synthesise

    if artifact.plant_check != "matches":      # a changed plant file would time another law
        return None
    recorded = artifact.document["plant"]
    candidates = [Path(artifact.source).resolve().parent / recorded.get("source_from_artifact", ""),
                  Path(recorded.get("source_absolute", ""))]
    plant_path = next((p for p in candidates if p.is_file()), None)
    if plant_path is None:
        return None
    plant = load_plant(plant_path)
    d = artifact.document["design"]
    chains = {c["name"]: [complex(*p) for p in c["poles"]] for c in d["chains"]}
    options = DesignOptions(poles=chains if d["kind"] == "input_output" else list(chains.values())[0],
                            rate=d["rate"], integral=d["integral"],
                            linearize="outputs" if d["kind"] == "input_output" else "state",
                            linearizing_output=None if d["kind"] == "input_output" else d["output_expressions"][0])
    return synthesise(plant, options)


# -- sim ----------------------------------------------------------------------------------------
class _Progress:
    """A one-line progress bar on stderr, redrawn at most ten times a second."""

    def __init__(self, enabled: bool, label: str) -> None:
        self.enabled = enabled
        self.label = label
        self.last = 0.0
        self.started = time.monotonic()

    def __call__(self, fraction: float) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if fraction < 1.0 and now - self.last < 0.1:
            return
        self.last = now
        filled = int(round(30 * fraction))
        sys.stderr.write(f"\r{self.label} [{'#' * filled}{'.' * (30 - filled)}] {100 * fraction:5.1f}% "
                         f"{now - self.started:5.1f} s")
        if fraction >= 1.0:
            sys.stderr.write("\n")
        sys.stderr.flush()


def _state_vector(artifact, items: list[str], option: str, start: list[float]) -> list[float]:
    from linz_ros.runtime import parse_assignments

    values = parse_assignments(items, option)
    unknown = [k for k in values if k not in artifact.states]
    if unknown:
        raise ConfigError(option, f"{unknown[0]!r} is not a state ({', '.join(artifact.states)})")
    return [values.get(s, v) for s, v in zip(artifact.states, start)]


def _noise(artifact, items: list[str]) -> list[float] | None:
    if not items:
        return None
    if len(items) == 1 and "=" not in items[0]:
        try:
            sigma = float(items[0])
        except ValueError:
            raise ConfigError("--noise", f"expected a number or STATE=SIGMA, got {items[0]!r}") from None
        if not (math.isfinite(sigma) and sigma >= 0):
            raise ConfigError("--noise", f"expected a standard deviation >= 0, got {items[0]!r}")
        return [sigma] * len(artifact.states)
    noise = _state_vector(artifact, items, "--noise", [0.0] * len(artifact.states))
    if any(s < 0 for s in noise):
        raise ConfigError("--noise", "standard deviations must be >= 0")
    return noise


def _reference(artifact, args: argparse.Namespace, x0: list[float]):
    from linz_ros.runtime import ControllerCore, parse_reference
    from linz_ros.runtime.closed_loop import initial_outputs

    base = initial_outputs(ControllerCore(artifact), x0)
    text = args.reference or artifact.design_reference or "hold"
    try:
        return parse_reference(text, artifact.relative_degree, base, artifact.outputs)
    except ConfigError as err:
        if args.reference:
            raise (err if err.field == "--reference" else ConfigError("--reference", str(err))) from None
        raise ConfigError(f"{artifact.plant_source}: design.reference", err.problem) from None


def _run_sim(args: argparse.Namespace) -> int:
    from linz_ros.runtime import SimSettings, mismatched_parameters, parse_assignments, simulate

    artifact, _, document = _artifact_and_design(args.source, args, need_design=False)
    x0 = _state_vector(artifact, args.initial, "--initial", artifact.operating_point)
    if not args.force_initial:
        _check_initial_inside_envelope(artifact, x0)
    settings = SimSettings(
        duration=args.duration, reference=_reference(artifact, args, x0), initial=x0,
        plant_parameters=mismatched_parameters(artifact, parse_assignments(args.mismatch, "--mismatch")),
        noise=_noise(artifact, args.noise), delay=args.delay, substeps=args.substeps,
        integrator=args.integrator, seed=args.seed, config=_watchdog_overrides(artifact, args.watchdog))
    show = args.progress if args.progress is not None else sys.stderr.isatty()
    field_log = None
    if args.field_log:
        from linz_ros.runtime import WatchdogConfig
        from linz_ros.runtime.fieldlog import FieldLogSettings, open_field_log

        config = settings.config or WatchdogConfig.from_artifact(artifact)
        field_log = open_field_log(FieldLogSettings(Path(args.field_log), prefix=f"{artifact.name}_sim"), artifact,
                                   config, {k: v for k, v in vars(args).items() if k != "run"},
                                   source="linz sim")
    try:
        result = simulate(artifact, settings, progress=_Progress(bool(show), f"sim {artifact.name}"),
                          field_log=field_log)
    finally:
        status = field_log.close() if field_log is not None else None
    if status is not None and status.state != "closed":
        raise ConfigError("--field-log", f"the field log was not written completely: {status.error or status.state}")
    out = Path(args.out or Path(DEFAULT_OUT) / f"{artifact.name}-sim")
    try:
        out.mkdir(parents=True, exist_ok=True)
        files = [result.write_csv(out / "run.csv")]
        if not args.no_plots:
            from linz_ros.plotting import plot_run

            files.extend(plot_run(result, out))
        if document is not None:
            from linz_ros.codegen import write_artifact

            files.append(write_artifact(document, out / f"{artifact.name}.artifact.json"))
        summary = result.summary()
        summary["design_warnings"] = artifact.design_warnings
        summary["mismatch_percent"] = parse_assignments(args.mismatch, "--mismatch")
        summary["files"] = [str(f) for f in files] + ([str(f) for f in status.files] if status else [])
        (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    except OSError as err:
        raise ConfigError("--out", f"cannot write to {out}: {err.strerror}") from None
    summary["files"].append(str(out / "summary.json"))
    print(json.dumps(summary, indent=2) if args.json else _sim_text(summary))
    for warning in summary["design_warnings"]:
        print(f"linz: warning: {warning}", file=sys.stderr)
    return 0


def _check_initial_inside_envelope(artifact, x0: list[float]) -> None:
    """Refuse an initial state outside the envelope (the design was checked only inside it)."""
    envelope = artifact.envelope
    for name, value in zip(artifact.states, x0):
        if name in envelope and not envelope[name][0] <= value <= envelope[name][1]:
            lo, hi = envelope[name]
            raise ConfigError("--initial", f"{name} = {value:g} lies outside the envelope [{lo:g}, {hi:g}]; "
                                           "add --force-initial to run it anyway")


def _watchdog_overrides(artifact, items: list[str]):
    """``--watchdog SETTING=VALUE`` as a checked WatchdogConfig, or None without overrides."""
    from linz_ros.artifact.watchdog import SETTING_NAMES
    from linz_ros.artifact.watchdog import setting as watchdog_setting
    from linz_ros.runtime import WatchdogConfig

    if not items:
        return None
    overrides: dict[str, Any] = {}
    for item in items:
        name, _, text = item.partition("=")
        name, text = name.strip(), text.strip()
        if name not in SETTING_NAMES or name == "safe_command":
            choices = ", ".join(n for n in SETTING_NAMES if n != "safe_command")
            raise ConfigError("--watchdog", f"{name[:40]!r} is not a watchdog setting; expected one of {choices}")
        if name in overrides:
            raise ConfigError("--watchdog", f"{name} given twice")
        row = watchdog_setting(name)
        if row.shape == "choice":
            overrides[name] = text
        elif row.shape == "scalar":
            values = _numbers(text, f"--watchdog {name}") if text else [math.nan]
            if len(values) != 1:            # never drop the rest of a list silently
                raise ConfigError("--watchdog", f"{name}: expected one number, got {len(values)}")
            overrides[name] = values[0]
        else:
            overrides[name] = tuple(math.inf if v == 0 else v for v in _numbers(text, f"--watchdog {name}"))
    try:
        return WatchdogConfig.from_artifact(artifact, **overrides)
    except ConfigError as err:
        raise ConfigError("--watchdog", f"{err.field}: {err.problem}") from None


def _fmt(value: float | None, spec: str = ".3g") -> str:
    return "n/a" if value is None else format(value, spec)


def _sim_text(summary: dict[str, Any]) -> str:
    lines = [f"sim {summary['plant']}: {summary['duration']:g} s at {summary['rate']:g} Hz, "
             f"{summary['steps']} steps"]
    at = "" if summary["verdict_at"] is None else f" at t = {summary['verdict_at']:.4g} s"
    lines.append(f"  verdict: {summary['verdict']}{at} ({summary['verdict_detail']})")
    for name, o in summary["outputs"].items():
        rate = (f"fitted decay rate {_fmt(o['decay_rate'])} 1/s" if summary["verdict"] == "tracked"
                else "no decay rate (the run did not track)")
        lines.append(f"  {name}: rms error {_fmt(o['rms_error'])}, final {_fmt(o['final_error'])}, "
                     f"max {_fmt(o['max_error'])}, {rate}")
    modes = ", ".join(f"{m} {t:.3g} s" for m, t in summary["time_in_mode"].items() if t > 0)
    lines.append(f"  min sigma {_fmt(summary['min_sigma'])}, max condition {_fmt(summary['max_condition'])}; "
                 f"modes: {modes}")
    saturated = ", ".join(f"{u} {100 * f:.1f}%" for u, f in summary["saturated_fraction"].items())
    lines.append(f"  saturated: {saturated}")
    alarms = ", ".join(f"{name.replace('_', ' ')} {count} step(s)" for name, count in summary["alarm_steps"].items()
                       if count)
    if alarms:
        lines.append(f"  watchdog alarms: {alarms}")
    ct = summary["compute_time_us"]
    if ct:
        lines.append(f"  step compute time: p50 {ct['p50']:.1f} us, p99 {ct['p99']:.1f} us")
    lines.extend(f"  note: {note}" for note in summary["notes"])
    lines.append("wrote " + ", ".join(summary["files"]))
    return "\n".join(lines)


# -- logs -----------------------------------------------------------------------------------------
def _run_logs(args: argparse.Namespace) -> int:
    from linz_ros.logs import plot_log, read_logs, summarise, summary_text, write_csv, write_html

    for option in ("csv", "plots", "html", "artifact"):
        if getattr(args, option) is not None and not getattr(args, option).strip():
            raise ConfigError(f"--{option}", "expected a file or folder name, got an empty one")
    log = read_logs(args.paths)
    _refuse_writing_over_logs(log, args)
    artifact = _log_artifact(log, args.artifact)
    summary = summarise(log, artifact)
    text = summary_text(summary)
    files: list[Path] = []
    try:
        if args.csv:
            files.append(write_csv(log, args.csv))
        images = plot_log(log, args.plots, artifact) if args.plots else []
        files.extend(images)
        if args.html:
            if not images:
                import tempfile

                with tempfile.TemporaryDirectory() as scratch:
                    files.append(write_html(summary, text, plot_log(log, scratch, artifact), args.html))
            else:
                files.append(write_html(summary, text, images, args.html))
    except OSError as err:
        raise ConfigError("logs output", f"cannot write {err.filename or ''}: {err.strerror}") from None
    summary["written"] = [str(f) for f in files]
    print(json.dumps(summary, indent=2) if args.json else text + ("\nwrote " + ", ".join(map(str, files))
                                                                    if files else ""))
    return 0


def _refuse_writing_over_logs(log: Any, args: argparse.Namespace) -> None:
    """An output named like one of the logs read (``--csv run.mcap``) would destroy that log."""
    from linz_ros.logs import log_files

    inputs = {p.resolve() for p in log_files(args.paths)}
    for option in ("csv", "html"):
        target = getattr(args, option)
        if target and Path(target).resolve() in inputs:
            raise ConfigError(f"--{option}", f"{target} is one of the logs being read; writing there would destroy it")


def _log_artifact(log: Any, path: str | None):
    """The artifact to read a log against: the one given, else the one attached to the log."""
    from linz_ros.artifact import artifact_from_text, load_artifact

    if path:
        return load_artifact(path, check_plant=False)
    if log.artifact_text is None:
        return None
    try:
        return artifact_from_text(log.artifact_text, source=f"{log.files[0]} (attached artifact)")
    except LinzError as err:
        log.problems.append(f"the attached artifact is not usable ({err}); plots without the singular set")
        return None


# -- keygen ---------------------------------------------------------------------------------------
def _run_keygen(args: argparse.Namespace) -> int:
    from linz_ros.artifact.signing import generate_keys, key_fingerprint, load_public_key

    private, public = generate_keys(args.folder)
    print(f"wrote {private} (private: keep it on the build machine; linz build --sign-key {private})")
    print(f"wrote {public} (public, key {key_fingerprint(load_public_key(public))[:16]}: give it to the robots, "
          "parameter trusted_keys, or --trusted-key)")
    return 0


# -- bench ----------------------------------------------------------------------------------------
def _run_bench(args: argparse.Namespace) -> int:
    from linz_ros.bench import run_bench

    args.poles, args.lqr_q, args.lqr_r, args.rate, args.integral = [], None, None, None, None
    args.linearize, args.linearizing_output = "auto", None
    artifact, design, _ = _artifact_and_design(args.source, args, need_design=True)
    result = run_bench(artifact, design, calls=args.calls, rounds=args.rounds)
    print(json.dumps(result.to_json(), indent=2) if args.json else result.render_text())
    return 0


# -- demo -----------------------------------------------------------------------------------------
#: The bundled example and the reach that takes it through its singular set (sin q2 = 0).
DEMO_PLANT = "pick_arm"
DEMO_REACH = "smooth:tool_x=0.12,tool_y=0.16,duration=2,at=0.2"


def _data_folders() -> list[Path]:
    """Where the package's config/ may be: a source checkout, then the install prefixes."""
    here = Path(__file__).resolve().parent
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


def _run_demo(args: argparse.Namespace) -> int:
    from linz_ros.analysis import analyse, render_text
    from linz_ros.model import load_plant

    plant_file = Path(args.plant) if args.plant is not None else bundled_plant(DEMO_PLANT)
    out = Path(args.out)
    print(f"== 1. check {plant_file}")
    report = analyse(load_plant(plant_file), samples=512)
    print(render_text(report).split("\n\n")[1])       # the VERDICT block
    print(f"\n== 2. build -> {out}")
    _run_build(_parse_sub(["build", str(plant_file), "-o", str(out)]))
    name = report.plant.name
    artifact = out / f"{name}.artifact.json"
    print("\n== 3. sim: the plant file's reference")
    _run_sim(_parse_sub(["sim", str(artifact), "-o", str(out / "nominal"), "--duration", "4"]))
    if name == DEMO_PLANT and not args.plant:
        print("\n== 4. sim: a reach past the workspace; the envelope watchdog stops the arm under control")
        _run_sim(_parse_sub(["sim", str(artifact), "-o", str(out / "reach_stopped"), "--duration", "4",
                             "--reference", DEMO_REACH]))
        print("\n== 4b. sim: the same reach with the envelope watchdog only warning, through the singular set "
              "(the singularity watchdog at work; never do this on a machine)")
        _run_sim(_parse_sub(["sim", str(artifact), "-o", str(out / "reach"), "--duration", "4",
                             "--reference", DEMO_REACH, "--watchdog", "envelope_action=warn",
                             "--field-log", str(out / "reach" / "field_log")]))
    params = bundled_params(name)
    if params is None:
        print(f"\n(no bringup parameter file config/{name}.yaml: the ROS 2 step is skipped)")
    elif not args.no_ros:
        clock = "wall clock" if args.wall_clock else "simulated time, lockstep"
        nodes = "simulator, reference and controller nodes" if args.wall_clock else "simulator and controller nodes"
        print(f"\n== 5. simulation bringup over DDS: {nodes} ({args.seconds:g} s, {clock})")
        _demo_bringup(artifact, params, out / "bringup", args.seconds, lockstep=not args.wall_clock)
    logs = [folder for folder in (out / "reach" / "field_log", out / "bringup" / "field_log") if folder.is_dir()]
    for step, folder in enumerate(logs, start=6):
        print(f"\n== {step}. logs: what the field log of {folder.parent.name} says")
        _run_logs(_parse_sub(["logs", str(folder), "--plots", str(folder / "plots"),
                              "--html", str(folder / "report.html")]))
    print(f"\nall results in {out}")
    return 0


def _demo_bringup(artifact_path: Path, params: Path, out: Path, seconds: float, lockstep: bool = True) -> None:
    """Start the nodes as processes, listen over DDS, summarise and plot the field log.

    With ``lockstep`` the simulator owns time (``/clock``) and waits for each command before
    it advances, so the run covers ``seconds`` of simulated time however busy the machine is.
    The summary, CSV and plots come from the controller's field log (every step); what was
    heard over DDS (diagnostics, commands, states) is reported beside it.
    """
    try:
        from linz_ros.nodes.recorder import TopicMap, recording
    except ImportError as err:
        raise ConfigError("bringup", f"rclpy is not available ({err}); install the [ros] extra, source a ROS 2 "
                                     "distribution, or pass --no-ros to skip this step") from None
    from linz_ros.artifact import load_artifact
    from linz_ros.bringup import Bringup, isolated_environment, node_parameters
    from linz_ros.logs import read_logs
    from linz_ros.logs.analysis import as_sim_result
    from linz_ros.plotting import plot_run

    artifact = load_artifact(artifact_path)
    c = node_parameters(params, "linz_controller")
    topics = TopicMap(str(c["state_topic"]), str(c["state_type"]), list(c.get("state_fields", [])),
                      str(c["command_topic"]), str(c["command_type"]), list(c.get("command_fields", [])),
                      str(c["reference_topic"]))
    env = isolated_environment()
    os.environ.update({k: env[k] for k in ("ROS_DOMAIN_ID", "ROS_AUTOMATIC_DISCOVERY_RANGE",
                                           "FASTDDS_BUILTIN_TRANSPORTS")})
    field_log = (out / "field_log").resolve()
    print(f"  isolated DDS domain {env['ROS_DOMAIN_ID']}, localhost only; node logs in {out}")
    # in lockstep the reference is built into the controller, timed in simulated time: a reference
    # node's messages carry no stamp, so on a busy machine they would reach the controller late in it
    executables = ("linz_plant_sim", "linz_controller") if lockstep else \
        ("linz_plant_sim", "linz_reference", "linz_controller")
    if lockstep:
        print(f"  the reference built into the controller ({node_parameters(params, 'linz_reference')['reference']}); "
              "--wall-clock runs the reference node")
    with recording(artifact, topics) as recorder, Bringup(out, env) as bringup:
        for executable in executables:
            overrides: dict[str, object] = {"artifact": str(artifact_path.resolve())}
            if executable == "linz_plant_sim":
                overrides.update({"publish_clock": lockstep, "lockstep": lockstep})
            else:
                overrides["use_sim_time"] = lockstep
            if executable == "linz_controller":
                overrides["field_log_folder"] = str(field_log)
                if lockstep:
                    overrides["reference"] = str(node_parameters(params, "linz_reference")["reference"])
            bringup.start(executable, params, overrides)
        if not bringup.wait_for_log("linz_controller", "active: commanding", timeout=30):
            raise ConfigError("bringup", "the controller did not become active; see "
                                         f"{bringup.nodes['linz_controller'].log}")
        if lockstep:       # simulated time may run slower than the wall clock: wait for it, within reason
            wall_limit = 10.0 * seconds + 30.0
            if not recorder.spin_for(wall_limit, until=lambda: _controller_time(recorder) >= seconds):
                print(f"  only {_controller_time(recorder):.3g} s of simulated time in {wall_limit:g} s "
                      "of wall time: the machine is very busy")
        else:
            recorder.spin_for(seconds)
        # the controller first, so that its log ends with the loop, then the simulator's closing summary
        bringup.stop("linz_controller")
        bringup.stop("linz_plant_sim")
        print("  simulator " + _simulator_summary(bringup.nodes["linz_plant_sim"].log_text()))
    if not field_log.is_dir():
        raise ConfigError("bringup", f"the controller wrote no field log; see the node logs in {out}")
    result = as_sim_result(read_logs([field_log]), artifact, "from the controller's field log (every step)")
    if len(result.t) == 0:
        raise ConfigError("bringup", f"no control steps were recorded; see the node logs in {out}")
    files = [result.write_csv(out / "run.csv")] + plot_run(result, out)
    summary = result.summary()
    summary["files"] = [str(f) for f in files]
    summary["diagnostics"] = [{"level": level, "message": message} for _, level, message, _ in
                              recorder.recording.diagnostics]
    (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    levels = sorted({("OK", "WARN", "ERROR", "STALE")[level] for _, level, _, _ in recorder.recording.diagnostics})
    print(_sim_text(summary).replace("sim ", "bringup ", 1))
    print(f"  heard over DDS: diagnostics {', '.join(levels) or 'none'}; {len(recorder.recording.commands)} "
          f"commands, {len(recorder.recording.states)} states, {len(recorder.recording.conditioning)} step records")


def _controller_time(recorder: Any) -> float:
    """The time (``t``) of the last per-step record the recorder has heard, 0 before any."""
    records = recorder.recording.conditioning
    return records[-1][1][0] if records else 0.0


def _simulator_summary(log_text: str) -> str:
    """The simulator's closing summary line from its log, or a note that there is none."""
    lines = [line for line in log_text.splitlines() if "]: run: " in line]
    return lines[-1].split("]: ", 1)[-1] if lines else "wrote no run summary"


def _terminal_safe(text: str) -> str:
    """The text with what a terminal would act on escaped: line breaks, escape sequences, bidi
    controls and lone surrogates (from file names or YAML escapes) are shown as ``\\n``, ``\\x1b``..."""
    return text if text.isprintable() else "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


#: Options naming a file or folder: an empty name would silently mean the current folder, or nothing.
_PATH_OPTIONS = (("out", "--out"), ("field_log", "--field-log"), ("folder", "keygen"), ("sign_key", "--sign-key"),
                 ("trusted_key", "--trusted-key"))


#: Options whose value is text (not a path) and may not be empty: an empty one would silently
#: fall back to a default.
_TEXT_OPTIONS = (("reference", "--reference"), ("linearizing_output", "--linearizing-output"),
                 ("lqr_q", "--lqr-q"), ("lqr_r", "--lqr-r"), ("poles", "--poles"), ("mismatch", "--mismatch"),
                 ("noise", "--noise"), ("initial", "--initial"), ("watchdog", "--watchdog"))


def _refuse_empty_paths(args: argparse.Namespace) -> None:
    for attribute, option in _PATH_OPTIONS + _TEXT_OPTIONS:
        values = getattr(args, attribute, None)
        for value in values if isinstance(values, list) else [values]:
            if value is not None and not value.strip():
                what = "a file or folder name" if (attribute, option) in _PATH_OPTIONS else "a value"
                raise ConfigError(option, f"expected {what}, got an empty one")


def _parse_sub(argv: list[str]) -> argparse.Namespace:
    return _build_parser().parse_args(argv)


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
        print(f"linz: {_terminal_safe(str(err))}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("linz: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
