"""The per-step record: what one control step did, its numeric layout, encoding, decoding and CSV.

The one home of the record the controller core returns each step (:class:`StepRecord`),
of the words it uses (:data:`MODES`, :data:`REASONS`, :data:`ALARMS`, stored by index, so
new ones are only ever appended), of the labels of its numeric layout (:data:`FIELDS`,
then ``y.<output>``, ``ref.<output>``, ``u.<input>`` and, in a field log, ``x.<state>``),
of :func:`encode` (a record to numbers: the controller's conditioning topic, the field
log and ``linz sim`` all use it), of :func:`decode` (numbers back to typed columns,
found by label, never by position, so a log written before a field was appended still
reads) and of :func:`write_csv`, the one CSV layout of every kind of run.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import numpy as np

if TYPE_CHECKING:
    from linz_ros.artifact.document import Artifact

__all__ = ["MODES", "ACTED_MODES", "REASONS", "ALARMS", "FIELDS", "UNKNOWN", "StepRecord", "StepColumns",
           "record_labels", "encode", "decode", "codes", "saturation_bits", "alarms_from_reasons", "csv_header",
           "write_csv"]

#: ``stopping``: a controlled stop (the law holds the outputs where the envelope was left). Only
#: ever appended to: logs store modes by index.
MODES = ("nominal", "damped", "held", "safe", "stopping")
#: Modes in which a watchdog acted: the safe or held command, or a controlled stop.
ACTED_MODES = ("safe", "held", "stopping")
#: Why a step ended as it did (``ok`` for a nominal step). Only ever appended to.
REASONS = ("ok", "near_singular", "singular", "wrong_length", "non_finite_state", "bad_reference",
           "bad_time", "out_of_order", "stale", "future_stamp", "model_not_finite", "non_finite_command",
           "no_state", "bad_message", "outside_envelope", "diverging")
#: Watchdogs that watch the machine rather than the message: bit i of ``StepRecord.alarms``.
#: Only ever appended to.
ALARMS = ("outside_envelope", "diverging")
#: Labels that open every per-step record, in order; then ``y.<output>`` and ``ref.<output>`` (the
#: output and its reference, nan when the state was refused), ``u.<input>`` (the command) and, in a
#: field log, ``x.<state>`` (the state the step used). Only ever appended to (``alarms`` came last).
FIELDS = ("t", "sigma_min", "condition", "mode", "reason", "damping", "compute_time_us", "saturated_mask",
          "warn", "alarms")
#: The word of a mode or reason code that is none of the known ones (damage, or a newer writer).
UNKNOWN = "unknown"
_MODE_CODE = {m: float(i) for i, m in enumerate(MODES)}
_REASON_CODE = {r: float(i) for i, r in enumerate(REASONS)}
#: What a fixed field missing from an older log reads as (the others read as nan).
_ABSENT = {"saturated_mask": 0.0, "warn": 0.0}


@dataclass(slots=True)
class StepRecord:
    """What one step did: the command, the conditioning, the mode and why, the cost.

    Attributes
    ----------
    t : float
        The state's time stamp (seconds).
    command : tuple of float
        The command sent.
    mode : str
        One of :data:`MODES`.
    reason : str
        One of :data:`REASONS`.
    sigma_min, condition : float
        Of the decoupling matrix at the state (nan when not evaluated).
    warn : bool
        sigma_min below ``sigma_warn``.
    damping : float
        lambda of the damped solve (0 in nominal mode).
    saturated : tuple of bool
        Per input, whether a rate or box limit cut the command.
    compute_time : float
        Seconds spent in the step.
    outputs : tuple of float
        The outputs y_i at the state (empty when the state was refused).
    alarms : int
        Bit i set when watchdog :data:`ALARMS` [i] found the machine in trouble at this
        step, whether it acted (the reason names it) or only warned.
    """

    t: float
    command: tuple[float, ...]
    mode: str
    reason: str
    sigma_min: float
    condition: float
    warn: bool
    damping: float
    saturated: tuple[bool, ...]
    compute_time: float
    outputs: tuple[float, ...] = ()
    alarms: int = 0


def record_labels(artifact: Artifact, states: bool = False) -> list[str]:
    """Labels of the per-step record of an artifact's controller.

    Parameters
    ----------
    artifact : Artifact
    states : bool
        Append ``x.<state>`` (the field log's layout).

    Returns
    -------
    list of str
    """
    return (list(FIELDS) + [f"y.{y}" for y in artifact.outputs] + [f"ref.{y}" for y in artifact.outputs]
            + [f"u.{u}" for u in artifact.plant_inputs] + ([f"x.{s}" for s in artifact.states] if states else []))


def encode(record: StepRecord, y_ref: Sequence[float], u: Sequence[float],
           no_outputs: Sequence[float] | None = None, x: Sequence[float] = ()) -> list[float]:
    """The per-step record as numbers, in :func:`record_labels` order.

    Parameters
    ----------
    record : StepRecord
    y_ref : sequence of float
        The reference of each output (nan when the state was refused).
    u : sequence of float
        The command sent.
    no_outputs : sequence of float, optional
        What stands for the outputs when the step has none (nan per output by default).
    x : sequence of float
        The state, for the field log's layout (empty for the conditioning topic).

    Returns
    -------
    list of float

    Examples
    --------
    >>> r = StepRecord(0.5, (1.0,), "damped", "near_singular", 0.1, 20.0, True, 0.3, (True,), 2e-6, (0.2,), 1)
    >>> encode(r, [0.0], [1.0])
    [0.5, 0.1, 20.0, 1.0, 1.0, 0.3, 2.0, 1.0, 1.0, 1.0, 0.2, 0.0, 1.0]
    """
    mask = 0
    for i, cut in enumerate(record.saturated):
        if cut:
            mask |= 1 << i
    outputs = record.outputs or (no_outputs if no_outputs is not None else [math.nan] * len(y_ref))
    return [record.t, record.sigma_min, record.condition, _MODE_CODE[record.mode], _REASON_CODE[record.reason],
            record.damping, record.compute_time * 1e6, float(mask), float(record.warn), float(record.alarms),
            *outputs, *y_ref, *u, *x]


def codes(values: np.ndarray, count: int) -> np.ndarray:
    """Mode or reason codes as whole numbers, -1 where a value is none of the ``count`` codes.

    Parameters
    ----------
    values : numpy.ndarray
        The recorded column (floats; nan or out of range in a damaged record).
    count : int
        How many codes there are (``len(MODES)``, ``len(REASONS)``).

    Returns
    -------
    numpy.ndarray of int64

    Examples
    --------
    >>> codes(np.array([0.0, 2.0, np.nan, 7.0, -1.0, 1.5]), 3).tolist()
    [0, 2, -1, -1, -1, -1]
    """
    values = np.asarray(values, dtype=float)
    with np.errstate(invalid="ignore"):
        valid = np.isfinite(values) & (values >= 0) & (values < count) & (values == np.floor(values))
    out = np.full(values.shape, -1, dtype=np.int64)
    out[valid] = values[valid].astype(np.int64)
    return out


def _words(found: np.ndarray, words: tuple[str, ...]) -> list[str]:
    return [words[c] if c >= 0 else UNKNOWN for c in found.tolist()]


def saturation_bits(mask: np.ndarray, inputs: int) -> np.ndarray:
    """The saturation bit mask as a (records, inputs) bool array (none where a mask is damaged).

    Parameters
    ----------
    mask : numpy.ndarray
        The ``saturated_mask`` column.
    inputs : int

    Returns
    -------
    numpy.ndarray of bool
    """
    raw = np.asarray(mask, dtype=float)
    with np.errstate(invalid="ignore"):
        whole = np.where(np.isfinite(raw) & (raw >= 0) & (raw < 2.0**62), raw, 0.0).astype(np.int64)
    return np.stack([(whole >> i) & 1 == 1 for i in range(inputs)], axis=1) if inputs else \
        np.zeros((len(whole), 0), dtype=bool)


def alarms_from_reasons(reasons: Sequence[str]) -> np.ndarray:
    """Alarm bits as far as the reasons tell them (a log written before the ``alarms`` field).

    Parameters
    ----------
    reasons : sequence of str

    Returns
    -------
    numpy.ndarray of int
        Bit i where the reason is :data:`ALARMS` [i] (the steps the watchdog acted on).
    """
    return np.array([sum(1 << bit for bit, name in enumerate(ALARMS) if reason == name) for reason in reasons],
                    dtype=int)


@dataclass
class StepColumns:
    """Per-step records as typed columns, one row per step (see :func:`decode`).

    Attributes
    ----------
    labels : list of str
        The labels the records were decoded by.
    t, sigma_min, condition, damping : numpy.ndarray
    compute_time : numpy.ndarray
        Seconds.
    mode_code, reason_code : numpy.ndarray of int
        Index in :data:`MODES` and :data:`REASONS`; -1 for a code none of them.
    saturated : numpy.ndarray of bool
        (steps, inputs).
    warn : numpy.ndarray of bool
    alarms : numpy.ndarray of int
        Bit i for :data:`ALARMS` [i]; from the reasons for logs without the field.
    y, ref, u : numpy.ndarray
        (steps, outputs), (steps, outputs) (y_ref only), (steps, inputs).
    x : numpy.ndarray or None
        (steps, states); None when the records carry no state.
    outputs, inputs, states : list of str
    """

    labels: list[str]
    t: np.ndarray
    sigma_min: np.ndarray
    condition: np.ndarray
    mode_code: np.ndarray
    reason_code: np.ndarray
    damping: np.ndarray
    compute_time: np.ndarray
    saturated: np.ndarray
    warn: np.ndarray
    alarms: np.ndarray
    y: np.ndarray
    ref: np.ndarray
    u: np.ndarray
    x: np.ndarray | None
    outputs: list[str]
    inputs: list[str]
    states: list[str]

    def __len__(self) -> int:
        return len(self.t)

    @property
    def mode(self) -> list[str]:
        """The mode of each step as a word (``unknown`` for a damaged code)."""
        return _words(self.mode_code, MODES)

    @property
    def reason(self) -> list[str]:
        """The reason of each step as a word (``unknown`` for a damaged or newer code)."""
        return _words(self.reason_code, REASONS)

    def result_fields(self, relative_degree: Sequence[int] | None = None, x: np.ndarray | None = None,
                      from_zero: bool = True) -> dict[str, Any]:
        """The columns as the signal fields of a ``SimResult`` (and of :func:`write_csv`).

        The reference gets ``y_ref`` only; its derivatives, which the record does not carry,
        are nan.

        Parameters
        ----------
        relative_degree : sequence of int, optional
            Per output chain (0 each when unknown: ``y_ref`` columns only).
        x : numpy.ndarray, optional
            The states, when the records carry none (a recorder matches them from the state
            topic); otherwise the records' own, as both the state and the measured state.
        from_zero : bool
            Count time from the first record.

        Returns
        -------
        dict
        """
        degrees = list(relative_degree) if relative_degree is not None else [0] * len(self.outputs)
        ref = np.full((len(self), sum(r + 1 for r in degrees)), math.nan)
        offsets = np.cumsum([0] + [r + 1 for r in degrees[:-1]]).astype(int)
        ref[:, offsets[:self.ref.shape[1]]] = self.ref
        states = self.x if x is None else np.asarray(x, dtype=float)
        if states is None:
            states = np.zeros((len(self), 0))
        return {"t": self.t - self.t[0] if from_zero and len(self) else self.t, "x": states, "x_measured": states,
                "ref": ref, "y": self.y, "u": self.u, "sigma_min": self.sigma_min, "condition": self.condition,
                "mode": self.mode, "reason": self.reason, "saturated": self.saturated,
                "compute_time": self.compute_time, "alarms": self.alarms, "damping": self.damping, "warn": self.warn}


def _names(labels: Sequence[str], prefix: str) -> list[int]:
    return [i for i, label in enumerate(labels) if label.startswith(prefix + ".")]


def decode(values: Any, labels: Sequence[str]) -> StepColumns:
    """Records (one, or a 2-D array of rows) back to typed columns, each found by its label.

    A fixed field an older log lacks reads as nan (``saturated_mask`` and ``warn`` as
    zero; ``alarms`` from the reasons, which name the alarms that acted).

    Parameters
    ----------
    values : array_like
        One record, or one row per record, in the order of ``labels``.
    labels : sequence of str

    Returns
    -------
    StepColumns

    Examples
    --------
    >>> steps = decode([[0.0, 1.0, 1.0, 1.0, 99.0]], ["t", "sigma_min", "condition", "mode", "reason"])
    >>> steps.mode, steps.reason, steps.saturated.shape
    (['damped'], ['unknown'], (1, 0))
    """
    labels = list(labels)
    rows = np.asarray(values, dtype=float).reshape(-1, len(labels))
    index = {label: i for i, label in enumerate(labels)}

    def column(name: str) -> np.ndarray:
        if name in index:
            return rows[:, index[name]]
        return np.full(len(rows), _ABSENT.get(name, math.nan))

    y, ref, u, x = (_names(labels, prefix) for prefix in ("y", "ref", "u", "x"))
    reason_code = codes(column("reason"), len(REASONS))
    if "alarms" in index:
        alarms = np.maximum(codes(column("alarms"), 1 << len(ALARMS)), 0)
    else:
        alarms = alarms_from_reasons(_words(reason_code, REASONS))
    with np.errstate(invalid="ignore"):
        warn = column("warn") > 0.5
    return StepColumns(
        labels=labels, t=column("t"), sigma_min=column("sigma_min"), condition=column("condition"),
        mode_code=codes(column("mode"), len(MODES)), reason_code=reason_code, damping=column("damping"),
        compute_time=column("compute_time_us") * 1e-6, saturated=saturation_bits(column("saturated_mask"), len(u)),
        warn=warn, alarms=alarms, y=rows[:, y], ref=rows[:, ref], u=rows[:, u], x=rows[:, x] if x else None,
        outputs=[labels[i][2:] for i in y], inputs=[labels[i][2:] for i in u], states=[labels[i][2:] for i in x])


def csv_header(states: Sequence[str], outputs: Sequence[str], inputs: Sequence[str],
               relative_degree: Sequence[int] | None = None) -> list[str]:
    """The columns of :func:`write_csv`, the same for every kind of run.

    Parameters
    ----------
    states, outputs, inputs : sequence of str
    relative_degree : sequence of int, optional
        Per output; ``ref_<output>_d<k>`` columns for its derivatives (none when unknown).

    Returns
    -------
    list of str
    """
    degrees = list(relative_degree) if relative_degree is not None else [0] * len(outputs)
    refs = [f"ref_{name}" + (f"_d{k}" if k else "") for name, r in zip(outputs, degrees) for k in range(r + 1)]
    return (["t", *states, *(f"measured_{s}" for s in states), *refs, *outputs, *inputs, "sigma_min", "condition",
             "mode", "reason", *(f"saturated_{u}" for u in inputs), "compute_time_us", "damping", "warn", "alarms"])


def _cell(value: Any) -> str:
    return repr(float(value))


def _alarm_names(bits: int) -> str:
    return "+".join(name for bit, name in enumerate(ALARMS) if bits >> bit & 1)


def write_csv(path: str | Path, table: Mapping[str, Any], states: Sequence[str], outputs: Sequence[str],
              inputs: Sequence[str], relative_degree: Sequence[int] | None = None,
              lead: Mapping[str, Sequence[Any]] | None = None) -> Path:
    """Write a run as one CSV row per control step, in the columns of :func:`csv_header`.

    Numbers are written so that they read back exactly (``nan`` where the run does not
    record one), modes and reasons as words, saturation and ``warn`` as 0 or 1, alarms as
    their names joined by ``+`` (empty for none). A run of an input-state design that
    carries the reference states adds ``ref_state_<state>`` at the end.

    Parameters
    ----------
    path : str or pathlib.Path
    table : mapping
        The signal fields of a ``SimResult`` (or :meth:`StepColumns.result_fields`): ``t``,
        ``x``, ``x_measured``, ``ref``, ``y``, ``u``, ``sigma_min``, ``condition``,
        ``mode``, ``reason``, ``saturated``, ``compute_time``; optional ``damping``,
        ``warn``, ``alarms`` (None: not recorded), ``ref_state``.
    states, outputs, inputs : sequence of str
    relative_degree : sequence of int, optional
    lead : mapping of str to sequence, optional
        Columns written first, as given (a field log's ``log_time`` and ``sequence``).

    Returns
    -------
    pathlib.Path
    """
    header = csv_header(states, outputs, inputs, relative_degree)
    steps = len(table["t"])
    nan = np.full(steps, math.nan)
    damping = nan if table.get("damping") is None else table["damping"]
    warn = None if table.get("warn") is None else np.asarray(table["warn"], dtype=bool)
    alarms = table.get("alarms")
    alarms = alarms_from_reasons(table["reason"]) if alarms is None else np.asarray(alarms, dtype=int)
    ref_state = table.get("ref_state")
    lead = dict(lead or {})
    header = list(lead) + header + ([f"ref_state_{s}" for s in states] if ref_state is not None else [])
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        for k in range(steps):
            row = [column[k] for column in lead.values()]
            row += [_cell(v) for part in ([table["t"][k]], table["x"][k], table["x_measured"][k], table["ref"][k],
                                          table["y"][k], table["u"][k], [table["sigma_min"][k]],
                                          [table["condition"][k]]) for v in part]
            row += [table["mode"][k], table["reason"][k], *(int(v) for v in table["saturated"][k]),
                    _cell(table["compute_time"][k] * 1e6), _cell(damping[k]),
                    "nan" if warn is None else int(warn[k]), _alarm_names(int(alarms[k]))]
            if ref_state is not None:
                row += [_cell(v) for v in ref_state[k]]
            writer.writerow(row)
    return path
