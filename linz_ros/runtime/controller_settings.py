"""The controller node's settings without ROS: its parameter table, watchdog overrides and their checks.

Every parameter of ``linz_controller`` is one :class:`ParameterSpec` of
:func:`controller_parameters` (the node declares them in order). The watchdog settings
come from the one table (:data:`linz_ros.artifact.WATCHDOG_SETTINGS`): a scalar set to
:data:`UNSET` (-1), a choice set to ``artifact`` and an empty list mean "the artifact's
value", and 0 in a per-input or per-output list means the row's "none" (no bound, no limit).
:func:`watchdog_overrides` turns the parameter values into ``WatchdogConfig.from_artifact``
overrides; :func:`parameter_problem` says why a change is refused.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

from linz_ros.artifact import MAX_WATCHDOG_SECONDS, WATCHDOG_SETTINGS, watchdog_problem
from linz_ros.artifact.watchdog import RUNTIME_SETTINGS, setting_problem
from linz_ros.artifact.watchdog import setting as watchdog_setting
from linz_ros.runtime.fieldlog import FieldLogSettings
from linz_ros.runtime.native import BACKENDS

__all__ = ["ParameterSpec", "controller_parameters", "table_override", "parameter_problem", "watchdog_overrides",
           "no_state_timeout", "field_log_settings", "UNSET", "DYNAMIC", "TABLE_PARAMETERS", "SIM_TIME_FUTURE_TOLERANCE",
           "SIM_TIME_NO_STATE_TIMEOUT"]

#: Watchdog settings that may change while the node is active (the table says which).
DYNAMIC = RUNTIME_SETTINGS
#: A scalar parameter at this value takes the artifact's (or the node's own default rule).
UNSET = -1.0
#: Watchdog settings declared from the table; future_tolerance and safe_command have node rules of their own.
TABLE_PARAMETERS = tuple(row for row in WATCHDOG_SETTINGS if row.name not in ("future_tolerance", "safe_command"))
#: In simulated time a state may be stamped ahead of the last /clock this node has handled.
SIM_TIME_FUTURE_TOLERANCE = 0.5
#: In simulated time, wall seconds without a state before the safe command, at the least: a slow
#: simulator holds simulated time still, and its next state is not late in it.
SIM_TIME_NO_STATE_TIMEOUT = 0.5


@dataclass(frozen=True)
class ParameterSpec:
    """One node parameter: what ``nodes._common.declare`` is given.

    Attributes
    ----------
    name : str
    default : object
        Its type fixes the parameter's type (lists need ``array_of``).
    description : str
    read_only : bool
        May not change after start-up.
    minimum, maximum : float or None
        Range of a number.
    array_of : type or None
        Element type of a list (float or str).
    """

    name: str
    default: Any
    description: str
    read_only: bool = True
    minimum: float | None = None
    maximum: float | None = None
    array_of: type | None = None


def controller_parameters(state_types: Sequence[str], command_types: Sequence[str],
                          executors: Sequence[str]) -> list[ParameterSpec]:
    """Every parameter of the controller node, in the order it declares them.

    Parameters
    ----------
    state_types, command_types : sequence of str
        The message types the adapters support, named in the descriptions.
    executors : sequence of str
        The executors ``spin_node`` offers.

    Returns
    -------
    list of ParameterSpec
    """
    P = ParameterSpec
    specs = [
        P("artifact", "", "controller artifact file (from linz build)"),
        P("plant_file", "", "plant file to compare with the artifact's hash (default: the one recorded at build time)"),
        P("allow_plant_change", False, "accept a changed plant file"),
        P("trusted_keys", [], "public keys (PEM files): accept only an artifact signed with one of them (empty: "
          "signatures not required)", array_of=str),
        P("state_topic", "state", "state topic"),
        P("state_type", "std_msgs/msg/Float64MultiArray", f"one of {', '.join(state_types)}"),
        P("state_fields", [], "field path of each state, in the artifact's order (empty: data.0, data.1, ...)",
          array_of=str),
        P("command_topic", "command", "command topic"),
        P("command_type", "std_msgs/msg/Float64MultiArray", f"one of {', '.join(command_types)}"),
        P("command_fields", [], "field path of each input, in the artifact's order (empty: data.0, ...)",
          array_of=str),
        P("compensator_fields", [], "with a dynamic extension: field path of the state message measuring each "
          "compensator state ('' for one not measured), used when the compensator restarts (empty: none)",
          array_of=str),
        P("reference_topic", "reference", "reference topic"),
        P("reference", "topic", "'topic', 'trajectory' (trajectory_msgs/msg/JointTrajectory on reference_topic), or "
          "a built-in reference such as 'smooth:tool_x=0.05,duration=2' (starts at activation)"),
        P("reference_timeout", 0.5, "hold the outputs when the reference topic is older than this (s)", minimum=0.0),
        P("reference_extrapolate", True, "carry the latest topic reference forward along its derivatives until the "
          "next one"),
        P("reference_joints", [], "with reference: trajectory, the name of each output among the trajectory's "
          "joint_names, in the artifact's output order (empty: the outputs' own names)", array_of=str),
        P("conditioning_topic", "~/conditioning", "per-step record topic"),
        P("diagnostics_period", 1.0, "seconds between diagnostics", minimum=0.01, maximum=60.0),
        P("autostart", False, "configure and activate at start-up"),
        P("backend", BACKENDS[0], f"the control step: {' or '.join(BACKENDS)} (native: compiled C, the Python core "
          "with a warning where it cannot be built here)"),
        P("executor", "single_threaded", f"one of {', '.join(executors)}"),
    ]
    specs += [_table_parameter(row) for row in TABLE_PARAMETERS]
    specs += [
        P("future_tolerance", UNSET, f"{watchdog_setting('future_tolerance').help} (s); -1: stale_after, or 0.5 s "
          "in simulated time, where /clock and the states travel apart", minimum=-1.0, maximum=MAX_WATCHDOG_SECONDS),
        P("no_state_timeout", UNSET, "wall-clock seconds without an accepted state before the safe command, "
          "whatever time says (a dead simulator stops /clock too); -1: stale_after, or the larger of stale_after and "
          "0.5 s in simulated time, where a slow simulator holds time still", minimum=-1.0,
          maximum=MAX_WATCHDOG_SECONDS),
        P("field_log_folder", "", "write every step's record to MCAP field logs in this folder ('': no field log)"),
        P("field_log_max_mb", 256.0, "start a new log file at this size (MB; 0: never)", minimum=0.0),
        P("field_log_max_minutes", 60.0, "start a new log file after this long (min; 0: never)", minimum=0.0),
        P("field_log_flush_period", 0.5, "close and flush a chunk at least this often (s; a crash loses at most "
          "this much)", minimum=0.01, maximum=1.0),
        P("field_log_queue", 20000, "records that may wait for the disk; more are dropped and counted", minimum=1),
        P("field_log_machine", "", "this machine's name in the field log ('': the LINZ_MACHINE environment "
          "variable, else the host name)"),
        P("safe_command", "artifact", f"{watchdog_setting('safe_command').help}: artifact (the artifact's), zero, "
          "hold or fixed (with safe_value)"),
        P("safe_value", [], "the fixed safe command, per input", array_of=float),
    ]
    return specs


def _table_parameter(row: Any) -> ParameterSpec:
    """The parameter of one row of the watchdog table (read-only unless the row may change at run time)."""
    text = f"{row.help} ({row.unit})"
    if row.shape == "scalar":
        return ParameterSpec(row.name, UNSET, f"{text}; -1: the artifact's value", not row.runtime, minimum=-1.0,
                             maximum=row.upper if row.upper <= MAX_WATCHDOG_SECONDS else None)
    if row.shape == "choice":
        return ParameterSpec(row.name, "artifact", f"{text}: artifact or one of {', '.join(row.choices)}",
                             not row.runtime)
    return ParameterSpec(row.name, [], f"{text}; one per {row.shape[4:]} (0: {row.none_means}); empty: the "
                         "artifact's", not row.runtime, array_of=float)


def table_override(shape: str, value: Any) -> Any:
    """A node parameter's value as a WatchdogConfig override, or None for "the artifact's".

    Parameters
    ----------
    shape : str
        The table row's shape: ``scalar``, ``choice``, ``per_input`` or ``per_output``.
    value : object
        The parameter's value.

    Returns
    -------
    float, str, tuple of float or None
        Lists with 0 read as infinity (the row's "none").

    Examples
    --------
    >>> table_override("scalar", -1.0), table_override("per_input", [2.0, 0.0])
    (None, (2.0, inf))
    """
    if shape == "scalar":
        return None if value == UNSET else float(value)
    if shape == "choice":
        return None if value == "artifact" else value
    values = list(value)
    return tuple(math.inf if v == 0 else float(v) for v in values) if values else None


def parameter_problem(changed: dict[str, Any], values: dict[str, Any]) -> str | None:
    """Why a change of watchdog parameters is refused, by the table's check, or None.

    Parameters
    ----------
    changed : dict
        The parameters being set, by name.
    values : dict
        Every parameter's value after the change (the sigma levels are checked together).

    Returns
    -------
    str or None
        One line naming the parameter.
    """
    rows = {row.name: row for row in TABLE_PARAMETERS}
    for name, value in changed.items():
        row = rows.get(name)
        if row is None:
            continue
        if row.shape == "scalar" and value != UNSET and not value >= 0:
            return f"{name} must be -1 (the artifact's value) or >= 0, got {value:g}"
        if row.shape in ("per_input", "per_output") and any(not v >= 0 for v in value):
            return f"{name} must be >= 0 (0: {row.none_means})"
        override = table_override(row.shape, value)
        canonical = list(override) if isinstance(override, tuple) else override
        problem = None if override is None else setting_problem(name, canonical)
        if problem:
            return f"{name}: {problem}"
    levels = {k: values[k] for k in ("sigma_warn", "sigma_act", "sigma_stop") if values[k] != UNSET}
    found = watchdog_problem(levels)
    return None if found is None else f"{found[0]}: {found[1]}"


def watchdog_overrides(values: dict[str, Any], sim_time: bool) -> dict[str, Any]:
    """The parameters that differ from "the artifact's", as ``WatchdogConfig.from_artifact`` overrides.

    Parameters
    ----------
    values : dict
        Parameter values by name.
    sim_time : bool
        The node runs on simulated time (``future_tolerance`` then defaults to
        :data:`SIM_TIME_FUTURE_TOLERANCE`).

    Returns
    -------
    dict
    """
    overrides: dict[str, Any] = {}
    for row in TABLE_PARAMETERS:
        value = table_override(row.shape, values[row.name])
        if value is not None:
            overrides[row.name] = value
    if values.get("future_tolerance", UNSET) >= 0:
        overrides["future_tolerance"] = float(values["future_tolerance"])
    elif sim_time:
        overrides["future_tolerance"] = SIM_TIME_FUTURE_TOLERANCE
    if values.get("safe_command", "artifact") != "artifact":
        overrides["safe_kind"] = values["safe_command"]
        if values["safe_command"] == "fixed":
            overrides["safe_value"] = tuple(float(v) for v in values["safe_value"])
    return overrides


def no_state_timeout(setting: float, stale_after: float, system_time: bool) -> float:
    """Wall-clock seconds without an accepted state before the stale check sends the safe command.

    Parameters
    ----------
    setting : float
        The ``no_state_timeout`` parameter (:data:`UNSET`: by the rule below).
    stale_after : float
        The watchdog's ``stale_after`` (0 before configure).
    system_time : bool
        The node runs on the system clock, not simulated time.

    Returns
    -------
    float
        ``setting`` when set; otherwise ``stale_after``, and in simulated time at least
        :data:`SIM_TIME_NO_STATE_TIMEOUT` (staleness proper is judged on the stamps against
        simulated time, which stands still while the simulator is slow).
    """
    if setting != UNSET:
        return float(setting)
    return stale_after if system_time else max(stale_after, SIM_TIME_NO_STATE_TIMEOUT)


def field_log_settings(values: dict[str, Any], prefix: str) -> FieldLogSettings:
    """The field log's settings from the ``field_log_*`` parameters.

    Parameters
    ----------
    values : dict
        Parameter values by name (``field_log_folder`` set).
    prefix : str
        Start of the file names (the node's name).

    Returns
    -------
    FieldLogSettings
    """
    return FieldLogSettings(Path(values["field_log_folder"]), prefix=prefix,
                            max_bytes=int(values["field_log_max_mb"] * 2**20),
                            max_seconds=60.0 * values["field_log_max_minutes"],
                            flush_period=values["field_log_flush_period"], queue_size=values["field_log_queue"],
                            **({"machine": values["field_log_machine"]} if values.get("field_log_machine") else {}))
