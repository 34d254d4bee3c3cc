"""Design options (command-line overrides of the plant file's ``design`` section) and the
control rate, integral action and outer-loop gains they choose."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from linz_ros.artifact.watchdog import MAX_WATCHDOG_SECONDS, STALE_PERIODS
from linz_ros.errors import DesignError
from linz_ros.model import Plant
from linz_ros.synthesis._gains import LQR_WEIGHT_RANGE, gains_from_lqr, gains_from_poles

__all__ = ["DesignOptions", "DEFAULT_RATE", "rate_and_integral", "outer_loop_gains", "given_poles"]

#: Control rate assumed when neither the plant file nor the command line gives one (Hz).
DEFAULT_RATE = 100.0


@dataclass
class DesignOptions:
    """Choices that override the plant file's ``design`` section (e.g. from the command line).

    Attributes
    ----------
    poles : dict or list, optional
        Output name -> poles, or one list for a single chain.
    lqr : dict, optional
        ``{"q": [...], "r": [...]}``.
    rate : float, optional
        Control rate in Hz.
    integral : bool, optional
        Integral action on every chain.
    linearize : {"auto", "outputs", "state"}
        ``outputs``: input-output linearization of the plant's outputs; ``state``:
        input-state linearization through a linearizing output T1 (one input);
        ``auto``: outputs when the plant declares any, else state.
    linearizing_output : str, optional
        T1 as an expression; default the first one the analysis found.
    source : str
        Named in error messages about these options.
    """

    poles: dict[str, list[complex]] | list[complex] | None = None
    lqr: dict[str, list[float]] | None = None
    rate: float | None = None
    integral: bool | None = None
    linearize: str = "auto"
    linearizing_output: str | None = None
    source: str = "<command line>"


def given_poles(name: str, options: DesignOptions, plant: Plant) -> list[complex]:
    """The poles asked for chain ``name`` (command line over plant file), in the order given."""
    for poles in (options.poles, plant.design.get("poles")):
        if isinstance(poles, dict) and name in poles:
            return [complex(p) for p in poles[name]]
        if isinstance(poles, list):
            return [complex(p) for p in poles]
    return []


#: The lowest control rate a design takes (Hz).
MIN_RATE = STALE_PERIODS / MAX_WATCHDOG_SECONDS


def rate_and_integral(plant: Plant, options: DesignOptions, notes: list[str]) -> tuple[float, bool]:
    rate = options.rate if options.rate is not None else plant.design.get("rate")
    if rate is None:
        rate = DEFAULT_RATE
        notes.append(f"no control rate given: {DEFAULT_RATE:g} Hz assumed")
    source, field = (options.source, "--rate") if options.rate is not None else (plant.source, "design.rate")
    if not (isinstance(rate, (int, float)) and math.isfinite(rate) and rate > 0):
        raise DesignError(source, field, f"control rate must be a positive number, got {rate!r}")
    if rate < MIN_RATE:
        raise DesignError(source, field, f"control rate {rate:g} Hz is below {MIN_RATE:.3g} Hz (the stale-state "
                                         f"watchdog's default of {STALE_PERIODS} periods must fit in its "
                                         f"{MAX_WATCHDOG_SECONDS:g} s limit)")
    integral = options.integral if options.integral is not None else bool(plant.design.get("integral", False))
    return float(rate), integral


def outer_loop_gains(plant: Plant, options: DesignOptions, names: list[str], degrees: list[int],
                      integral: bool):
    orders = [d + int(integral) for d in degrees]
    if options.poles is not None and options.lqr is not None:
        raise DesignError(options.source, "--poles", "give either poles or LQR weights (--lqr-q, --lqr-r), not both")
    poles = options.poles if options.poles is not None else plant.design.get("poles")
    file_poles = plant.design.get("poles")
    if isinstance(options.poles, dict) and isinstance(file_poles, dict):
        poles = {**file_poles, **options.poles}      # the command line overrides chain by chain
    lqr = options.lqr if options.lqr is not None else plant.design.get("lqr")
    from_options = options.poles is not None or options.lqr is not None
    source = options.source if from_options else plant.source
    if options.poles is not None and options.lqr is None:
        lqr = None
    if options.lqr is not None and options.poles is None:
        poles = None
    if poles is not None:
        per_chain = _poles_per_chain(poles, names, orders, integral, source)
        gains = []
        for name, chain_poles in zip(names, per_chain):
            try:
                gains.append(gains_from_poles(chain_poles))
            except ValueError as err:
                raise DesignError(source, f"design.poles.{name}", str(err)) from None
        return gains, "", "poles", None
    note = ""
    if lqr is None:
        lqr = {}
        note = "no poles or LQR weights given: LQR with unit weights"
    q = lqr.get("q") or [1.0] * sum(orders)
    r = lqr.get("r") or [1.0] * len(names)
    labels = [label for name, k in zip(names, orders) for label in _state_labels(name, k, integral)]
    if len(q) != sum(orders):
        raise DesignError(source, "design.lqr.q", f"expected {sum(orders)} weights, one per chain state "
                                                  f"({', '.join(labels)}); got {len(q)}")
    if len(r) != len(names):
        raise DesignError(source, "design.lqr.r", f"expected {len(names)} weights, one per output chain "
                                                  f"({', '.join(names)}); got {len(r)}")
    if any(w <= 0 for w in r) or any(w < 0 for w in q):
        raise DesignError(source, "design.lqr", "weights must be positive (q may be zero)")
    low, high = LQR_WEIGHT_RANGE
    for key, weights in (("q", q), ("r", r)):
        outside = [w for w in weights if not (low <= w <= high or (key == "q" and w == 0))]
        if outside:
            field = ("--lqr-" + key) if options.lqr is not None else f"design.lqr.{key}"
            raise DesignError(source, field, f"weight {outside[0]:g} is outside [{low:g}, {high:g}]"
                                             + (" (or 0)" if key == "q" else ""))
    try:
        gains, _ = gains_from_lqr(orders, list(q), list(r))
    except (np.linalg.LinAlgError, ValueError) as err:
        raise DesignError(source, "design.lqr", f"the Riccati equation has no stabilising solution ({err}); "
                                                "give the first state of every chain a positive weight") from None
    return gains, note, "lqr", {"q": [float(w) for w in q], "r": [float(w) for w in r]}


def _state_labels(name: str, order: int, integral: bool) -> list[str]:
    labels = [f"int {name}"] if integral else []
    return labels + [name + "'" * k for k in range(order - int(integral))]


def _poles_per_chain(poles, names: list[str], orders: list[int], integral: bool, source: str):
    if isinstance(poles, list):
        if len(names) != 1:
            raise DesignError(source, "design.poles", "with several output chains, give poles per output")
        poles = {names[0]: poles}
    missing = [n for n in names if n not in poles]
    if missing:
        raise DesignError(source, "design.poles", f"no poles for output chain(s) {', '.join(missing)}")
    extra = [str(n) for n in poles if n not in names]
    if extra:
        raise DesignError(source, f"design.poles.{extra[0]}", f"{extra[0]!r} is not an output chain "
                                                              f"({', '.join(names)})")
    result = []
    for name, order in zip(names, orders):
        given = [complex(p) for p in poles[name]]
        if len(given) != order:
            with_integral = " including the integrator" if integral else ""
            raise DesignError(source, f"design.poles.{name}",
                              f"{len(given)} pole(s) given, but the chain has {order} states{with_integral} "
                              f"(relative degree {order - int(integral)})")
        if not all(math.isfinite(p.real) and math.isfinite(p.imag) for p in given):
            raise DesignError(source, f"design.poles.{name}", "poles must be finite numbers")
        if any(p.real >= 0 for p in given):
            raise DesignError(source, f"design.poles.{name}", "poles must lie in the open left half-plane")
        result.append(given)
    return result
