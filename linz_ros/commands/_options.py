"""The text of design and run options turned into values; every error names its option."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from linz_ros.errors import ConfigError, DesignError

__all__ = ["DesignChoices", "numbers", "poles", "noise_levels", "state_vector", "watchdog_overrides"]

_COMMAND_LINE = "<command line>"


def numbers(text: str, option: str) -> list[float]:
    """Numbers separated by commas.

    Parameters
    ----------
    text : str
    option : str
        Named in errors.

    Returns
    -------
    list of float

    Raises
    ------
    DesignError
    """
    values = []
    for part in filter(None, (p.strip() for p in text.split(","))):
        try:
            values.append(float(part))
        except ValueError:
            raise DesignError(_COMMAND_LINE, option, f"expected numbers separated by commas, got {part!r}") \
                from None
    if not values:
        raise DesignError(_COMMAND_LINE, option, "expected at least one number")
    return values


def _pole_list(item: str, values: str) -> list[complex]:
    found = []
    for part in filter(None, (p.strip() for p in values.split(","))):
        try:
            found.append(complex(part.replace("i", "j")))
        except ValueError:
            raise DesignError(_COMMAND_LINE, "--poles", f"expected numbers such as -3 or -3+2j, got {part!r}") \
                from None
    if not found:
        raise DesignError(_COMMAND_LINE, "--poles", f"no poles in {item!r}")
    return found


def poles(items: list[str]) -> dict[str, list[complex]] | list[complex] | None:
    """``--poles`` items: ``OUTPUT=P1,P2`` per chain, or one unnamed list for a single chain.

    Parameters
    ----------
    items : list of str

    Returns
    -------
    dict, list or None
        Output name -> poles, one list, or None when no poles were given.

    Raises
    ------
    DesignError
    """
    if not items:
        return None
    named: dict[str, list[complex]] = {}
    unnamed: list[complex] | None = None
    for item in items:
        name, equals, values = item.partition("=")
        if not equals:
            name, values = "", item
        found = _pole_list(item, values)
        name = name.strip()
        if (name in named) if name else (unnamed is not None):
            raise DesignError(_COMMAND_LINE, "--poles", f"given twice for {('output ' + name) if name else 'the chain'}"
                                                        "; give each chain's poles once")
        if name:
            named[name] = found
        else:
            unnamed = found
    if unnamed is not None:
        if named:
            raise DesignError(_COMMAND_LINE, "--poles", "give every chain's poles with its name, or one "
                                                        "unnamed list for a single chain")
        return unnamed
    return named


@dataclass
class DesignChoices:
    """Design options as given (they override the plant file's ``design`` section).

    Attributes
    ----------
    poles : list of str
        ``OUTPUT=P1,P2`` per chain, or one unnamed list.
    lqr_q, lqr_r : str, optional
        LQR weights, comma-separated.
    rate : float, optional
        Control rate in Hz.
    integral : bool, optional
    linearize : {"auto", "outputs", "state"}
    linearizing_output : str, optional
    """

    poles: list[str] = field(default_factory=list)
    lqr_q: str | None = None
    lqr_r: str | None = None
    rate: float | None = None
    integral: bool | None = None
    linearize: str = "auto"
    linearizing_output: str | None = None

    def is_empty(self) -> bool:
        """Whether nothing overrides the plant file's design section.

        Returns
        -------
        bool
        """
        return self == DesignChoices()

    def options(self):
        """The choices as synthesis options.

        Returns
        -------
        linz_ros.synthesis.DesignOptions

        Raises
        ------
        DesignError
        """
        from linz_ros.synthesis import DesignOptions

        lqr = None
        if self.lqr_q is not None or self.lqr_r is not None:
            lqr = {}
            if self.lqr_q is not None:
                lqr["q"] = numbers(self.lqr_q, "--lqr-q")
            if self.lqr_r is not None:
                lqr["r"] = numbers(self.lqr_r, "--lqr-r")
        return DesignOptions(poles=poles(self.poles), lqr=lqr, rate=self.rate, integral=self.integral,
                             linearize=self.linearize, linearizing_output=self.linearizing_output)


def state_vector(artifact: Any, items: list[str], option: str, start: list[float]) -> list[float]:
    """``STATE=VALUE`` items over a starting vector, each name checked against the states.

    Parameters
    ----------
    artifact : Artifact
    items : list of str
    option : str
        Named in errors.
    start : list of float

    Returns
    -------
    list of float

    Raises
    ------
    ConfigError
    """
    from linz_ros.runtime import parse_assignments

    values = parse_assignments(items, option)
    unknown = [k for k in values if k not in artifact.states]
    if unknown:
        raise ConfigError(option, f"{unknown[0]!r} is not a state ({', '.join(artifact.states)})")
    return [values.get(s, v) for s, v in zip(artifact.states, start)]


def noise_levels(artifact: Any, items: list[str]) -> list[float] | None:
    """``--noise``: one standard deviation for every state, or ``STATE=SIGMA`` items.

    Parameters
    ----------
    artifact : Artifact
    items : list of str

    Returns
    -------
    list of float or None
        One standard deviation per state; None without noise.

    Raises
    ------
    ConfigError
    """
    if not items:
        return None
    if len(items) == 1 and "=" not in items[0]:
        try:
            sigma = float(items[0])
        except ValueError:
            raise ConfigError("--noise", f"expected a number or STATE=SIGMA, got {items[0]!r}") from None
        if not (math.isfinite(sigma) and sigma >= 0):
            raise ConfigError("--noise", f"expected a standard deviation >= 0, got {items[0]!r}")
        measured = len(artifact.plant_states)      # a dynamic extension's compensator is not measured
        return [sigma] * measured + [0.0] * (len(artifact.states) - measured)
    noise = state_vector(artifact, items, "--noise", [0.0] * len(artifact.states))
    if any(s < 0 for s in noise):
        raise ConfigError("--noise", "standard deviations must be >= 0")
    return noise


def _watchdog_value(name: str, text: str) -> Any:
    from linz_ros.artifact.watchdog import setting as watchdog_setting

    row = watchdog_setting(name)
    if row.shape == "choice":
        return text
    if row.shape == "scalar":
        values = numbers(text, f"--watchdog {name}") if text else [math.nan]
        if len(values) != 1:            # never drop the rest of a list silently
            raise ConfigError("--watchdog", f"{name}: expected one number, got {len(values)}")
        return values[0]
    return tuple(math.inf if v == 0 else v for v in numbers(text, f"--watchdog {name}"))


def watchdog_overrides(artifact: Any, items: list[str]):
    """``--watchdog SETTING=VALUE`` items as a checked WatchdogConfig.

    Parameters
    ----------
    artifact : Artifact
    items : list of str

    Returns
    -------
    WatchdogConfig or None
        None without overrides.

    Raises
    ------
    ConfigError
    """
    from linz_ros.artifact.watchdog import SETTING_NAMES
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
        overrides[name] = _watchdog_value(name, text)
    try:
        return WatchdogConfig.from_artifact(artifact, **overrides)
    except ConfigError as err:
        raise ConfigError("--watchdog", f"{err.field}: {err.problem}") from None
