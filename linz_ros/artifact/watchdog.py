"""The watchdog settings: one table and one check, for every layer that reads or writes them.

Each setting is declared once here (name, unit, bounds, default, whether it may change
while a controller runs, and its help text). The plant-file loader, synthesis, the
artifact loader, the runtime core (:class:`~linz_ros.runtime.WatchdogConfig`), the
controller node's parameter declarations and the field-log metadata all read this
table and call :func:`watchdog_problem`; none of them keeps a rule of its own.

Values are checked in their canonical form, the one the artifact stores:

- numbers as floats, ``None`` where the table allows "none" (no limit; the runtime
  writes ``inf``, which is accepted as the same);
- per-input and per-output settings as lists, one entry per input or output;
- ``safe_command`` as ``{"kind": "zero" | "hold" | "fixed"[, "value": [...]]}``.

Adding a watchdog: a row here, its use in ``ControllerCore.step`` and a test.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Iterable, Mapping

__all__ = ["WatchdogSetting", "WATCHDOG_SETTINGS", "SETTING_NAMES", "PLANT_FILE_SETTINGS", "RUNTIME_SETTINGS",
           "MAX_WATCHDOG_SECONDS", "LEVEL_FRACTIONS", "STALE_PERIODS", "ACTIONS", "SAFE_KINDS",
           "setting", "watchdog_problem", "setting_problem", "default_settings", "defaults_note",
           "artifact_settings", "is_real_number"]

#: Longest time a watchdog setting in seconds may take: an hour is past any control loop,
#: and timers of longer periods overflow.
MAX_WATCHDOG_SECONDS = 3600.0
#: Default sigma levels as fractions of the typical smallest singular value of A (the
#: envelope median, or the value at the operating point without an envelope).
LEVEL_FRACTIONS = {"sigma_warn": 0.25, "sigma_act": 0.1, "sigma_stop": 0.02}
#: Default ``stale_after``, in control periods.
STALE_PERIODS = 10
#: What a watchdog does when it trips: record it and go on (``warn``), stop the machine under
#: control (``stop``: the law holds the outputs where they were, until the state is back inside
#: the envelope itself, the margin serving as hysteresis), or send the safe command (``safe``).
ACTIONS = ("warn", "stop", "safe")
SAFE_KINDS = ("zero", "hold", "fixed")


@dataclass(frozen=True)
class WatchdogSetting:
    """One row of the table.

    Attributes
    ----------
    name : str
    unit : str
        ``A`` (units of the decoupling matrix), ``s``, ``1`` (a fraction), ``input/s``,
        ``output`` (units of each output), ``-`` for a choice.
    shape : str
        ``scalar``, ``per_input``, ``per_output``, ``choice`` or ``safe_command``.
    lower : float
        Smallest value allowed (numbers).
    lower_open : bool
        Whether ``lower`` itself is refused.
    upper : float
        Largest value allowed (numbers).
    none_means : str or None
        When ``None`` (or ``inf``) is allowed, what it means.
    default : Any
        The default when neither the plant file nor the node sets it (see ``default_rule``).
    default_rule : str
        How synthesis chooses the default when it is derived from the design.
    runtime : bool
        Whether the controller node accepts a change while it runs.
    plant_file : bool
        Whether a plant file's ``design.watchdog`` may set it.
    artifact : bool
        Whether the artifact stores it.
    choices : tuple of str
    help : str
    """

    name: str
    unit: str
    shape: str
    help: str
    lower: float = 0.0
    lower_open: bool = False
    upper: float = math.inf
    none_means: str | None = None
    default: Any = None
    default_rule: str = ""
    runtime: bool = True
    plant_file: bool = True
    artifact: bool = True
    choices: tuple[str, ...] = ()


WATCHDOG_SETTINGS: tuple[WatchdogSetting, ...] = (
    WatchdogSetting("sigma_warn", "A", "scalar", "flag steps with sigma_min(A) below this",
                    upper=1e300, default_rule="0.25 sigma_reference"),
    WatchdogSetting("sigma_act", "A", "scalar", "damped least squares below this",
                    upper=1e300, default_rule="0.1 sigma_reference"),
    WatchdogSetting("sigma_stop", "A", "scalar", "the safe command below this",
                    upper=1e300, default_rule="0.02 sigma_reference"),
    WatchdogSetting("damping", "A", "scalar", "damping lambda of the damped solve at sigma_min = 0",
                    lower_open=True, upper=1e300, default_rule="sigma_act"),
    WatchdogSetting("stale_after", "s", "scalar", "refuse states older than this",
                    lower_open=True, upper=MAX_WATCHDOG_SECONDS, default_rule=f"{STALE_PERIODS} control periods"),
    WatchdogSetting("future_tolerance", "s", "scalar", "accept stamps this far ahead of now",
                    upper=MAX_WATCHDOG_SECONDS, none_means="the same as stale_after", plant_file=False,
                    artifact=False, runtime=False),
    WatchdogSetting("hold_time", "s", "scalar", "how long the safe command 'hold' repeats the last good command",
                    upper=MAX_WATCHDOG_SECONDS, default=0.5),
    WatchdogSetting("integral_limit", "output s", "scalar", "bound on each integrator of the outer loop",
                    lower_open=True, none_means="no bound"),
    WatchdogSetting("rate_limits", "input/s", "per_input", "largest change of each input per second",
                    lower_open=True, none_means="no limit"),
    WatchdogSetting("safe_command", "-", "safe_command", "what is sent when the controller refuses to compute: "
                    "zero, hold (the last good command for hold_time, then zero) or fixed values",
                    default={"kind": "zero"}, runtime=False, choices=SAFE_KINDS),
    WatchdogSetting("envelope_margin", "1", "scalar", "the envelope is widened by this fraction of each "
                    "state's range before the envelope watchdog trips", upper=10.0, default=0.1),
    WatchdogSetting("envelope_action", "-", "choice", "outside the widened envelope: record it and go on "
                    "(warn), stop under control, holding the outputs where they were until the state is back "
                    "inside the envelope itself (stop), or send the safe command (safe)", default="stop",
                    choices=ACTIONS),
    WatchdogSetting("divergence_error", "output", "per_output", "tracking error of each output above which "
                    "the divergence watchdog starts its clock", lower_open=True, none_means="not watched",
                    default_rule="half the range of the output over the envelope"),
    WatchdogSetting("divergence_time", "s", "scalar", "a tracking error above divergence_error, and not "
                    "smaller than when it crossed it, for this long is divergence", lower_open=True,
                    upper=MAX_WATCHDOG_SECONDS, default=0.5),
    WatchdogSetting("compensator_floor", "input", "per_input", "smallest magnitude the compensator keeps for a "
                    "dynamically extended input (its first compensator state, the value the plant receives): a "
                    "speed floor that keeps a vehicle off the extended singular set where the law needs it "
                    "(det A = v for a wheeled cart); inputs without integrators ignore it",
                    lower_open=True, none_means="no floor: the singularity watchdog alone acts near the set"),
    WatchdogSetting("divergence_action", "-", "choice", "when diverging: record it and go on (warn) or send "
                    "the safe command until the controller is reset (safe); a diverging law is not trusted to "
                    "stop the machine", default="safe", choices=("warn", "safe")),
)

SETTING_NAMES = tuple(s.name for s in WATCHDOG_SETTINGS)
PLANT_FILE_SETTINGS = tuple(s.name for s in WATCHDOG_SETTINGS if s.plant_file)
RUNTIME_SETTINGS = tuple(s.name for s in WATCHDOG_SETTINGS if s.runtime)
_BY_NAME = {s.name: s for s in WATCHDOG_SETTINGS}
#: Ordering the sigma levels must keep.
_LEVELS = ("sigma_warn", "sigma_act", "sigma_stop")


def setting(name: str) -> WatchdogSetting:
    """The table's row for ``name``.

    Parameters
    ----------
    name : str

    Returns
    -------
    WatchdogSetting

    Raises
    ------
    KeyError
        For a name not in the table.
    """
    return _BY_NAME[name]


def is_real_number(value: Any) -> bool:
    """Whether ``value`` is an int or float (not a bool) and not nan; inf counts.

    Parameters
    ----------
    value : Any

    Returns
    -------
    bool
    """
    return isinstance(value, (int, float)) and not isinstance(value, bool) and not math.isnan(value)


def _number_problem(row: WatchdogSetting, value: Any) -> str | None:
    if value is None or (row.none_means is not None and value == math.inf):
        return None if row.none_means is not None else "expected a number, got none"
    if not is_real_number(value):
        return f"expected a number, got {value!r}"
    low = f"> {row.lower:g}" if row.lower_open else f">= {row.lower:g}"
    unit = "" if row.unit in ("-", "1", "A", "output") else f" {row.unit}"
    if (value <= row.lower) if row.lower_open else (value < row.lower):
        return f"expected a number {low}, got {value:g}"
    if not value <= row.upper:
        if value == math.inf and row.upper == math.inf:
            return None
        return f"expected at most {row.upper:g}{unit}, got {value:g}"
    return None


def setting_problem(name: str, value: Any, inputs: int | None = None, outputs: int | None = None) -> str | None:
    """What is wrong with one setting's value, or None when it is fine.

    Parameters
    ----------
    name : str
        A name of :data:`SETTING_NAMES`.
    value : Any
        In canonical form (see the module's docstring).
    inputs, outputs : int, optional
        Counts for per-input and per-output settings (not checked when None).

    Returns
    -------
    str or None
        The problem, worded to follow the setting's name.

    Examples
    --------
    >>> setting_problem("stale_after", 0.0)
    'expected a number > 0, got 0'
    >>> setting_problem("envelope_action", "safe") is None
    True
    """
    row = _BY_NAME.get(name)
    if row is None:
        return f"unknown watchdog setting; expected one of {', '.join(SETTING_NAMES)}"
    if row.shape == "scalar":
        return _number_problem(row, value)
    if row.shape == "choice":
        return None if value in row.choices else f"expected one of {', '.join(row.choices)}, got {value!r}"
    if row.shape in ("per_input", "per_output"):
        count = inputs if row.shape == "per_input" else outputs
        if value is None and row.shape == "per_output" and row.none_means is not None:
            return None                   # no output watched at all
        if not isinstance(value, (list, tuple)):
            return f"expected a list, one entry per {row.shape[4:]}"
        if count is not None and len(value) != count:
            return f"expected {count} entries, one per {row.shape[4:]}, got {len(value)}"
        for i, entry in enumerate(value):
            problem = _number_problem(row, entry)
            if problem:
                return f"entry {i}: {problem}"
        return None
    return _safe_command_problem(value, inputs)


def _safe_command_problem(value: Any, inputs: int | None) -> str | None:
    if not isinstance(value, Mapping) or value.get("kind") not in SAFE_KINDS:
        return f"expected kind {', '.join(SAFE_KINDS)}"
    if value["kind"] != "fixed":
        return None
    entries = value.get("value")
    if not isinstance(entries, (list, tuple)) or (inputs is not None and len(entries) != inputs):
        return f"a fixed safe command needs {inputs if inputs is not None else 'one'} value(s), one per input"
    if not all(is_real_number(v) and math.isfinite(v) for v in entries):
        return "a fixed safe command needs finite numbers"
    return None


def watchdog_problem(values: Mapping[str, Any], inputs: int | None = None,
                     outputs: int | None = None) -> tuple[str, str] | None:
    """The first setting that is wrong, alone or against the others, and why.

    Only the settings present in ``values`` are checked; the sigma levels must keep
    ``sigma_warn >= sigma_act >= sigma_stop`` among those present.

    Parameters
    ----------
    values : mapping of str
        Settings in canonical form.
    inputs, outputs : int, optional

    Returns
    -------
    (name, problem) or None

    Examples
    --------
    >>> watchdog_problem({"sigma_warn": 1.0, "sigma_act": 2.0})
    ('sigma_act', '2 is above sigma_warn 1; expected sigma_warn >= sigma_act >= sigma_stop')
    """
    for name, value in values.items():
        problem = setting_problem(name, value, inputs, outputs)
        if problem:
            return name, problem
    present = [(k, values[k]) for k in _LEVELS if k in values]
    for (high_key, high), (low_key, low) in zip(present, present[1:]):
        if low > high:
            return low_key, (f"{low:g} is above {high_key} {high:g}; "
                             "expected sigma_warn >= sigma_act >= sigma_stop")
    return None


def default_settings(sigma_reference: float, rate: float, inputs: int, outputs: int) -> dict[str, Any]:
    """Every artifact setting at its default for a design.

    Parameters
    ----------
    sigma_reference : float
        The typical smallest singular value of A.
    rate : float
        Control rate, Hz.
    inputs, outputs : int

    Returns
    -------
    dict
        In canonical form; ``divergence_error`` is None (synthesis derives it from the
        envelope when there is one).
    """
    values: dict[str, Any] = {k: f * sigma_reference for k, f in LEVEL_FRACTIONS.items()}
    values["damping"] = values["sigma_act"]
    values["stale_after"] = STALE_PERIODS / rate
    values["rate_limits"] = [None] * inputs
    values["compensator_floor"] = [None] * inputs
    values["divergence_error"] = None
    for row in WATCHDOG_SETTINGS:
        if row.artifact and row.name not in values:
            values[row.name] = row.default
    return values


def defaults_note() -> str:
    """One sentence on the derived defaults, stored in the artifact beside them.

    Returns
    -------
    str
    """
    derived = [f"{row.name} = {row.default_rule}" for row in WATCHDOG_SETTINGS if row.default_rule]
    return "defaults: " + "; ".join(derived)


def artifact_settings(values: Mapping[str, Any]) -> Iterable[str]:
    """Names of the settings the artifact stores, in table order (for writers).

    Parameters
    ----------
    values : mapping

    Returns
    -------
    iterable of str
    """
    return (row.name for row in WATCHDOG_SETTINGS if row.artifact and row.name in values)
