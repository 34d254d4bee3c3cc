"""The campaign section and the cases drawn from it.

A campaign section (``campaign:`` in a plant file, or a small file of its own) says what to
vary: initial states over ranges (the envelope by default), parameter mismatch ranges in
percent, a delay range, sensor noise, the references, and how long each run lasts. The
varied quantities are the campaign's *factors*; case k takes point k of a scrambled Sobol
sequence over them (scipy.stats.qmc), its reference is the k-th of the list (cycled) and
its noise seed is drawn from the campaign seed and k. Cases are drawn once, in one place,
so the results never depend on where or in which order the cases run.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError, quoted
from linz_ros.runtime.closed_loop import SimSettings
from linz_ros.runtime.plant import mismatch_problem
from linz_ros.runtime.verdict import VERDICTS

__all__ = ["CAMPAIGN_KEY", "CAMPAIGN_KEYS", "Factor", "CampaignSpec", "Case", "CaseResult", "CampaignOutcome",
           "read_campaign", "draw_cases", "case_seed", "REFUSED", "ERRORED", "OUTCOMES", "MAX_RUNS", "DEFAULT_RUNS"]

#: The key of the section in a plant file (a campaign file may hold the section under it or alone).
CAMPAIGN_KEY = "campaign"
CAMPAIGN_KEYS = ("runs", "seed", "duration", "initial", "mismatch", "delay", "noise", "references", "region",
                 "success", "watchdog")
#: A case whose run could not start (its state or reference refused, one line says why).
REFUSED = "refused"
#: A case whose run raised an unexpected error (a fault of linz_ros, not of the case: please report it).
ERRORED = "errored"
#: Every word a case may end with: the run verdicts, worst first, then a refused start, then an error.
OUTCOMES = VERDICTS + (REFUSED, ERRORED)
MAX_RUNS = 100_000
DEFAULT_RUNS = 256
DEFAULT_DURATION = SimSettings.duration         # as linz sim
#: Verdicts that count as a success unless the section says otherwise.
DEFAULT_SUCCESS = ("tracked",)


@dataclass(frozen=True)
class Factor:
    """One varied quantity: an initial state, a parameter's mismatch (percent) or the delay (s)."""

    kind: str          # "initial", "mismatch" or "delay"
    name: str          # state or parameter name; "delay"
    low: float
    high: float
    unit: str = ""

    @property
    def label(self) -> str:
        """How reports name it: ``q1 (initial, rad)``, ``m2 (mismatch, %)``, ``delay (s)``."""
        if self.kind == "delay":
            return "delay (s)"
        unit = "%" if self.kind == "mismatch" else self.unit
        return f"{self.name} ({self.kind}{', ' + unit if unit else ''})"


@dataclass(frozen=True)
class CampaignSpec:
    """What a campaign varies and how it judges a run.

    Attributes
    ----------
    source : str
        Where the section came from (named in errors and reports).
    runs, seed : int
    duration : float
        Seconds of each run.
    factors : tuple of Factor
        Sampled by scrambled Sobol, in this order: initial states (state order), mismatches
        (parameter order), delay. A factor given one number (low == high) is held there;
        initial states not named start at the operating point.
    delay : float
        The delay when it is not a factor.
    noise : tuple of str
        ``linz sim --noise`` items (one standard deviation, or ``STATE=SIGMA``).
    references : tuple of str
        ``linz sim --reference`` texts, cycled over the cases; empty: the artifact's own.
    region : tuple of str
        Two states for the region-of-attraction plot.
    success : tuple of str
        Verdicts that count as a success.
    watchdog : tuple of str
        ``linz sim --watchdog`` items.
    """

    source: str
    runs: int = DEFAULT_RUNS
    seed: int = 1
    duration: float = DEFAULT_DURATION
    factors: tuple[Factor, ...] = ()
    delay: float = 0.0
    noise: tuple[str, ...] = ()
    references: tuple[str, ...] = ()
    region: tuple[str, ...] = ()
    success: tuple[str, ...] = DEFAULT_SUCCESS
    watchdog: tuple[str, ...] = ()

    def factor(self, kind: str, name: str) -> Factor | None:
        """The factor of that kind and name, if varied."""
        return next((f for f in self.factors if f.kind == kind and f.name == name), None)


@dataclass(frozen=True)
class Case:
    """One run of a campaign, fully determined (the same case runs the same anywhere).

    Attributes
    ----------
    index : int
    values : tuple of float
        The factors' values, in the order of ``CampaignSpec.factors``.
    reference : str
        Empty: the artifact's own reference.
    seed : int
        Of the sensor noise.
    """

    index: int
    values: tuple[float, ...]
    reference: str
    seed: int

    def factor_values(self, spec: CampaignSpec) -> dict[str, float]:
        """Factor label -> value."""
        return {f.label: v for f, v in zip(spec.factors, self.values)}

    def of_kind(self, spec: CampaignSpec, kind: str) -> dict[str, float]:
        """Name -> value of the factors of one kind."""
        return {f.name: v for f, v in zip(spec.factors, self.values) if f.kind == kind}

    def delay(self, spec: CampaignSpec) -> float:
        """The delay of this run (s)."""
        return self.of_kind(spec, "delay").get("delay", spec.delay)


@dataclass(frozen=True)
class CaseResult:
    """How one case went, in numbers that are the same wherever it ran.

    Attributes
    ----------
    index : int
    verdict : str
        A run verdict (:data:`~linz_ros.runtime.verdict.VERDICTS`) or ``refused``.
    verdict_at : float or None
    detail : str
    severity : float or None
        Largest tracking error over the run in units of each output's divergence bound
        (max over outputs of max|e_i| / divergence_error_i; the raw error where no bound is set).
    max_error, rms_error : dict
        Output -> float or None.
    min_sigma : float or None
    saturated : float
        Largest fraction of steps any input sat on a limit.
    steps : int
    backend : str
        ``STEP/PLANT``: the control step and the plant that ran (``native/native``, or
        ``python/...`` where a worker could not build the native step); empty when refused.
    """

    index: int
    verdict: str
    verdict_at: float | None
    detail: str
    severity: float | None
    max_error: dict[str, float | None] = field(default_factory=dict)
    rms_error: dict[str, float | None] = field(default_factory=dict)
    min_sigma: float | None = None
    saturated: float = 0.0
    steps: int = 0
    backend: str = ""


@dataclass
class CampaignOutcome:
    """A campaign's cases and what became of them.

    Attributes
    ----------
    spec : CampaignSpec
    cases : list of Case
        Every drawn case (index order).
    results : dict of int -> CaseResult
        The finished ones.
    lost : dict of int -> str
        Cases whose worker died on every attempt, with why.
    interrupted : bool
        Stopped (Ctrl-C) before every case finished: the rest were never run.
    executor : str
        Where the runs went (``4 local processes``, ``dask scheduler tcp://...``).
    workers : int
    wall_seconds : float
    rerun : dict of int -> str
        The one command that reruns a case alone.
    artifact_path : str
        The artifact the runs used (written beside the report when built from a plant file).
    notes : list of str
        What the report must say about how the runs were made (forced initial states ...).
    attempts : dict of int -> int
        How many times each case was started (more than one: a worker died under it); empty when
        not known.
    """

    spec: CampaignSpec
    cases: list[Case]
    results: dict[int, CaseResult]
    lost: dict[int, str] = field(default_factory=dict)
    interrupted: bool = False
    executor: str = ""
    workers: int = 1
    wall_seconds: float = 0.0
    rerun: dict[int, str] = field(default_factory=dict)
    artifact_path: str = ""
    attempts: dict[int, int] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    def succeeded(self, result: CaseResult) -> bool:
        """Whether a finished case counts as a success."""
        return result.verdict in self.spec.success


# ---------------------------------------------------------------- reading the section

def _fail(source: str, key: str, problem: str) -> ConfigError:
    return ConfigError(f"{source}: {CAMPAIGN_KEY}" + (f".{key}" if key else ""), problem)


def _shown(value: Any) -> str:
    """A value for a message: a number or short text as written, a container by its kind only
    (the repr of a YAML alias bomb would be gigabytes)."""
    if isinstance(value, (list, dict)):
        return f"a {'list' if isinstance(value, list) else 'mapping'} of {len(value)}"
    return quoted(repr(value) if isinstance(value, (str, int, float, bool)) or value is None
                  else type(value).__name__, 60)


def _number(source: str, key: str, value: Any) -> float:
    if isinstance(value, str):          # YAML 1.1 reads 1e-5 (no dot) as text; take what float() reads
        try:
            value = float(value)
        except ValueError:
            pass
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise _fail(source, key, f"expected a finite number, got {_shown(value)}")
    return float(value)


def _whole(source: str, key: str, value: Any, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
        raise _fail(source, key, f"expected a whole number from {low} to {high:,}, got {_shown(value)}")
    return value


def _range(source: str, key: str, value: Any) -> tuple[float, float]:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        number = _number(source, key, value)
        return number, number
    if not isinstance(value, list) or len(value) != 2:
        raise _fail(source, key, f"expected [low, high] or one number, got {_shown(value)}")
    low, high = (_number(source, key, v) for v in value)
    if low > high:
        raise _fail(source, key, f"low {low:g} is above high {high:g}")
    return low, high


def _mapping(source: str, key: str, value: Any) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise _fail(source, key, f"expected a mapping of names to ranges, got {type(value).__name__}")
    return value


def _strings(source: str, key: str, value: Any) -> tuple[str, ...]:
    items = [value] if isinstance(value, str) else value
    if not isinstance(items, list) or not all(isinstance(v, str) and v.strip() for v in items):
        raise _fail(source, key, "expected a text or a list of non-empty texts")
    return tuple(v.strip() for v in items)


def _initial_factors(source: str, section: Mapping[str, Any], artifact: Artifact) -> list[Factor]:
    """Initial-state factors: the ranges given, else every state the envelope bounds."""
    envelope = artifact.envelope
    units = artifact.signal_units
    own = artifact.plant_states        # a dynamic extension's compensator starts where the law puts it
    if "initial" not in section:
        return [Factor("initial", s, *envelope[s], units.get(s) or "") for s in own if s in envelope]
    given = _mapping(source, "initial", section["initial"])
    stray = [k for k in given if k not in own]
    if stray:
        raise _fail(source, f"initial.{quoted(str(stray[0]), 40)}", f"not a state of {artifact.name} "
                                                                   f"({', '.join(own)})")
    factors = []
    for name in own:                    # state order, whatever the order written
        if name in given:
            low, high = _range(source, f"initial.{name}", given[name])
            factors.append(Factor("initial", name, low, high, units.get(name) or ""))
    return factors


def _mismatch_factors(source: str, section: Mapping[str, Any], artifact: Artifact) -> list[Factor]:
    given = _mapping(source, "mismatch", section.get("mismatch") or {})
    names = artifact.parameter_names
    stray = [k for k in given if k not in names]
    if stray:
        raise _fail(source, f"mismatch.{quoted(str(stray[0]), 40)}",
                    f"not a parameter of {artifact.name} ({', '.join(names) or 'it has none'})")
    factors = []
    for name in names:
        if name in given:
            low, high = _range(source, f"mismatch.{name}", given[name])
            if mismatch_problem(low):
                raise _fail(source, f"mismatch.{name}", f"{low:g} %: {mismatch_problem(low)}")
            factors.append(Factor("mismatch", name, low, high, "%"))
    return factors


def _region(source: str, section: Mapping[str, Any], artifact: Artifact, factors: list[Factor]) -> tuple[str, ...]:
    if "region" not in section:
        varied = [f.name for f in factors if f.kind == "initial"]
        return tuple(varied[:2])
    region = _strings(source, "region", section["region"])
    if len(region) != 2 or region[0] == region[1]:
        raise _fail(source, "region", "expected two different states")
    for name in region:
        if name not in artifact.plant_states:
            raise _fail(source, "region", f"{quoted(name, 40)} is not a state of {artifact.name}")
    return region


def read_campaign(section: Mapping[str, Any] | None, artifact: Artifact, source: str) -> CampaignSpec:
    """Check a campaign section against the artifact and read it.

    Parameters
    ----------
    section : mapping or None
        The section as parsed from YAML (None: every default).
    artifact : Artifact
    source : str
        Named in errors (the file holding the section).

    Returns
    -------
    CampaignSpec

    Raises
    ------
    ConfigError
        One line naming the file, the key and the problem.
    """
    section = {} if section is None else _mapping(source, "", section)
    stray = [str(k) for k in section if k not in CAMPAIGN_KEYS]
    if stray:
        raise _fail(source, quoted(stray[0], 40), "unknown key; expected one of " + ", ".join(CAMPAIGN_KEYS))
    runs = _whole(source, "runs", section.get("runs", DEFAULT_RUNS), 1, MAX_RUNS)
    seed = _whole(source, "seed", section.get("seed", 1), 0, 2**63 - 1)
    duration = _number(source, "duration", section.get("duration", DEFAULT_DURATION))
    if not duration > 0:
        raise _fail(source, "duration", f"expected a positive number of seconds, got {duration:g}")

    factors = _initial_factors(source, section, artifact) + _mismatch_factors(source, section, artifact)
    low, high = _range(source, "delay", section.get("delay", 0.0))
    if low < 0:
        raise _fail(source, "delay", f"expected seconds >= 0, got {low:g}")

    if high > low:
        factors.append(Factor("delay", "delay", low, high, "s"))
    noise = section.get("noise")
    if isinstance(noise, Mapping):
        noise_items = tuple(f"{k}={_number(source, f'noise.{k}', v)!r}" for k, v in noise.items())
    elif noise is None:
        noise_items = ()
    else:
        noise_items = (repr(_number(source, "noise", noise)),)
    references = _strings(source, "references", section["references"]) if "references" in section else ()
    success = _strings(source, "success", section.get("success", list(DEFAULT_SUCCESS)))
    wrong = [s for s in success if s not in VERDICTS]
    if wrong:
        raise _fail(source, "success", f"{quoted(wrong[0], 40)} is not a run verdict ({', '.join(VERDICTS)})")
    watchdog = section.get("watchdog") or {}
    watchdog_items = tuple(f"{k}={_watchdog_text(v)}" for k, v in _mapping(source, "watchdog", watchdog).items())
    return CampaignSpec(source=source, runs=runs, seed=seed, duration=duration, factors=tuple(factors),
                        delay=low if high == low else 0.0, noise=noise_items, references=references,
                        region=_region(source, section, artifact, factors), success=success,
                        watchdog=watchdog_items)


def _watchdog_text(value: Any) -> str:
    """A watchdog value as ``linz sim --watchdog`` takes it (lists comma-separated)."""
    if isinstance(value, list):
        return ",".join(repr(float(v)) if isinstance(v, (int, float)) else str(v) for v in value)
    return repr(float(value)) if isinstance(value, (int, float)) and not isinstance(value, bool) else str(value)


# ---------------------------------------------------------------- drawing the cases

def case_seed(campaign_seed: int, index: int) -> int:
    """The noise seed of case ``index``: independent streams per case (numpy SeedSequence).

    Parameters
    ----------
    campaign_seed, index : int

    Returns
    -------
    int
        Below 2**32.
    """
    return int(np.random.SeedSequence([campaign_seed, index]).generate_state(1)[0])


def sobol_points(dimensions: int, count: int, seed: int) -> np.ndarray:
    """``count`` points of a scrambled Sobol sequence in [0, 1)^dimensions.

    The first ``count`` of the next power of two (Sobol's balance holds for powers of two;
    a prefix keeps the low discrepancy), so case k is the same point whatever ``count`` is.

    Parameters
    ----------
    dimensions, count, seed : int

    Returns
    -------
    numpy.ndarray
        count x dimensions.
    """
    from scipy.stats import qmc

    if dimensions == 0:
        return np.zeros((count, 0))
    sampler = qmc.Sobol(dimensions, scramble=True, seed=np.random.default_rng(seed))
    return sampler.random_base2(max(0, math.ceil(math.log2(count))))[:count]


def draw_cases(spec: CampaignSpec) -> list[Case]:
    """Every case of the campaign, in index order.

    Parameters
    ----------
    spec : CampaignSpec

    Returns
    -------
    list of Case
    """
    points = sobol_points(len(spec.factors), spec.runs, spec.seed)
    low = np.array([f.low for f in spec.factors])
    span = np.array([f.high - f.low for f in spec.factors])
    cases = []
    for k in range(spec.runs):
        values = tuple(float(v) for v in low + points[k] * span) if spec.factors else ()
        reference = spec.references[k % len(spec.references)] if spec.references else ""
        cases.append(Case(k, values, reference, case_seed(spec.seed, k)))
    return cases


def factor_matrix(spec: CampaignSpec, cases: Sequence[Case]) -> np.ndarray:
    """The factors' values of the cases (rows) as an array.

    Parameters
    ----------
    spec : CampaignSpec
    cases : sequence of Case

    Returns
    -------
    numpy.ndarray
        len(cases) x len(spec.factors).
    """
    return np.array([c.values for c in cases], dtype=float).reshape(len(cases), len(spec.factors))
