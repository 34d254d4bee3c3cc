"""PNG plots of a run: the one home of every figure of ``linz sim``, ``linz demo`` and ``linz logs``.

A run is first put in a :class:`RunView` (from a ``SimResult`` by :func:`run_view`; from a
field log by ``logs.report.log_view``), and each figure is drawn from the view alone:

- ``outputs.png``: the outputs against their references;
- ``tracking_error.png``: |y - y_ref| per output on a log scale, with the divergence bound;
- ``states.png``: each state inside its envelope (the bounds, and the watchdog's widened ones);
- ``inputs.png``: each input against its limits, saturated stretches shaded;
- ``conditioning.png``: sigma_min of A(x) with the watchdog levels, and the mode.

Every axis names its signal's unit from the artifact's ``signal_units`` (``unit not stated``
where the plant file gave none). Every title carries the run's verdict (a word of
``runtime.VERDICTS``, in red unless the run tracked); the stretches where a watchdog acted are
shaded and named by mode and reason, records a machine watchdog flagged are marked by its
word (the words of ``MODES``, ``REASONS`` and ``ALARMS``, as in the text summaries).
matplotlib is imported when drawing, with the Agg backend (no screen needed).
The singular set s(x) = 0 on a grid is drawn by :mod:`linz_ros.plotting.singular` (field logs and
campaigns alike); the HTML report pages are put together by :mod:`linz_ros.plotting.page`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from linz_ros.runtime import ALARMS, MODES, SimResult, Verdict, WatchdogConfig, run_verdict
from linz_ros.runtime.extension import command_limits
from linz_ros.runtime.steprecord import ACTED_MODES
from linz_ros.plotting.singular import draw_singular_set

__all__ = ["RunView", "run_view", "plot_run", "write_plots", "unit_label", "title_figure", "save_figure",
           "pyplot", "outputs_figure", "tracking_error_figure", "states_figure", "inputs_figure",
           "conditioning_figure", "sigma_label", "draw_singular_set", "NO_UNIT",
           "LEVEL_NAMES"]

#: What an axis says of a signal whose unit the plant file does not state.
NO_UNIT = "unit not stated"
#: The singularity watchdog's levels, in the words of the watchdog table.
LEVEL_NAMES = ("sigma_warn", "sigma_act", "sigma_stop")
_LEVEL_STYLES = (":", "--", "-")
_DPI = 110


@dataclass
class RunView:
    """What the plots of one run show, from a simulation or a field log (row k is step k).

    Attributes
    ----------
    plant : str
    t : numpy.ndarray
        Step times, seconds.
    units : dict of str to str
        Signal name -> unit text (the artifact's ``signal_units``).
    outputs : list of str
    y : numpy.ndarray
        (steps, outputs).
    ref : numpy.ndarray or None
        y_ref, (steps, outputs); None when not recorded.
    inputs : list of str
    u : numpy.ndarray
        (steps, inputs).
    saturated : numpy.ndarray of bool
        (steps, inputs).
    input_limits : list of (float, float) or None
    states : list of str
    x : numpy.ndarray or None
        (steps, states); None when not recorded.
    envelope : dict of str to (float, float)
    envelope_margin : float
        The envelope watchdog's widening, a fraction of each state's range.
    sigma_min : numpy.ndarray
    mode, reason : list of str
        Words of ``MODES`` and ``REASONS`` (``unknown`` for a damaged code).
    alarms : numpy.ndarray of int
        Bit i for ``ALARMS`` [i].
    levels : tuple of float or None
        sigma_warn, sigma_act, sigma_stop; None when unknown.
    verdict : Verdict or None
        None when it cannot be judged (no artifact, no states).
    divergence_error : tuple of float
        Per output, the divergence watchdog's bound (inf or empty: none).
    relative_degree : list of int
    """

    plant: str
    t: np.ndarray
    units: dict[str, str]
    outputs: list[str]
    y: np.ndarray
    ref: np.ndarray | None
    inputs: list[str]
    u: np.ndarray
    saturated: np.ndarray
    input_limits: list[tuple[float, float]] | None
    states: list[str]
    x: np.ndarray | None
    sigma_min: np.ndarray
    mode: list[str]
    reason: list[str]
    alarms: np.ndarray
    envelope: dict[str, tuple[float, float]] = field(default_factory=dict)
    envelope_margin: float = 0.0
    levels: tuple[float, float, float] | None = None
    verdict: Verdict | None = None
    divergence_error: tuple[float, ...] = ()
    relative_degree: list[int] = field(default_factory=list)


def run_view(result: SimResult) -> RunView:
    """The plots' view of an offline run (or of a field log read back as a ``SimResult``).

    Parameters
    ----------
    result : SimResult

    Returns
    -------
    RunView
    """
    a = result.artifact
    config = result.config or WatchdogConfig.from_artifact(a)
    return RunView(
        plant=a.name, t=result.t, units=a.signal_units, outputs=list(a.outputs), y=result.y,
        ref=result.reference_values(), inputs=list(a.plant_inputs), u=result.u, saturated=result.saturated,
        input_limits=command_limits(a, config), states=list(a.states), x=result.x, sigma_min=result.sigma_min,
        mode=list(result.mode), reason=list(result.reason), alarms=result.alarm_mask(), envelope=a.envelope,
        envelope_margin=config.envelope_margin,
        levels=(config.sigma_warn, config.sigma_act, config.sigma_stop), verdict=run_verdict(result),
        divergence_error=tuple(config.divergence_error), relative_degree=list(a.relative_degree))


def plot_run(result: SimResult, out_dir: str | Path) -> list[Path]:
    """Write the plots of one run (see the module's list) to ``out_dir``.

    Parameters
    ----------
    result : SimResult
    out_dir : str or pathlib.Path

    Returns
    -------
    list of pathlib.Path
        The files written.
    """
    return write_plots(run_view(result), out_dir)


def write_plots(view: RunView, out_dir: str | Path) -> list[Path]:
    """Write every plot the view has data for: outputs and tracking error (outputs with their
    references), states (when recorded), inputs (when any) and conditioning (always).

    Parameters
    ----------
    view : RunView
    out_dir : str or pathlib.Path

    Returns
    -------
    list of pathlib.Path
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    figures = []
    if view.outputs:
        figures.append(("outputs.png", outputs_figure))
        if view.ref is not None:
            figures.append(("tracking_error.png", tracking_error_figure))
    if view.states and view.x is not None:
        figures.append(("states.png", states_figure))
    if view.inputs:          # a log of another layout may record no inputs: no panel to draw
        figures.append(("inputs.png", inputs_figure))
    figures.append(("conditioning.png", conditioning_figure))
    return [save_figure(draw(view), out / name) for name, draw in figures]


# -- the shared pieces ----------------------------------------------------------------------------
def pyplot() -> Any:
    """matplotlib's pyplot on the Agg backend.

    Returns
    -------
    module
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def save_figure(fig: Any, path: Path) -> Path:
    """Write ``fig`` as PNG and close it.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : pathlib.Path

    Returns
    -------
    pathlib.Path
    """
    fig.savefig(path, dpi=_DPI)
    pyplot().close(fig)
    return path


def unit_label(name: str, units: Mapping[str, str], text: str | None = None) -> str:
    """An axis label: the signal (or ``text`` about it) and its unit.

    Parameters
    ----------
    name : str
        The signal whose unit applies.
    units : mapping of str to str
    text : str, optional
        What the axis shows, when not the signal itself.

    Returns
    -------
    str

    Examples
    --------
    >>> unit_label("q1", {"q1": "rad"}), unit_label("q1", {})
    ('q1 [rad]', 'q1 (unit not stated)')
    >>> unit_label("q1", {"q1": "rad"}, "|q1 - ref|")
    '|q1 - ref| [rad]'
    """
    unit = units.get(name)
    return f"{text or name} [{unit}]" if unit else f"{text or name} ({NO_UNIT})"


def title_figure(fig: Any, view: RunView, what: str) -> None:
    """The figure's title: the plant, what it shows, and the run's verdict (in red unless tracked).

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    view : RunView
    what : str
    """
    v = view.verdict
    if v is None:
        line, colour = "verdict not known (no artifact, or no states recorded)", "black"
    else:
        at = "" if v.at is None else f" at t = {v.at:.4g} s"
        line, colour = f"verdict: {v.word}{at}", "black" if v.word == "tracked" else "tab:red"
        if v.word != "tracked":
            line += "\n" + (v.detail if len(v.detail) <= 110 else v.detail[:107] + "...")
    fig.suptitle(f"{view.plant}: {what}\n{line}", color=colour, fontsize=10)


def _stacked(count: int, height: float = 2.0, width: float = 9.0) -> tuple[Any, list[Any]]:
    fig, axes = pyplot().subplots(count, 1, figsize=(width, height * count + 1.2), sharex=True, squeeze=False,
                                  layout="constrained")
    return fig, list(axes[:, 0])


def _finish(fig: Any, axes: Sequence[Any], view: RunView, what: str) -> Any:
    for k, ax in enumerate(axes):
        _mark_watchdog(ax, view, labelled=k == 0)        # the shared marks named once, on the top panel
        ax.grid(True, which="both", alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(loc="best", fontsize=7)
    t = np.asarray(view.t, dtype=float)
    t = t[np.isfinite(t)]
    if t.size and t.max() > t.min():
        axes[-1].set_xlim(t.min(), t.max())
    axes[-1].set_xlabel("time [s]")
    title_figure(fig, view, what)
    return fig


def _acted(view: RunView) -> np.ndarray:
    return np.isin(np.asarray(view.mode, dtype=object), ACTED_MODES)


def _mark_watchdog(ax: Any, view: RunView, labelled: bool = True) -> None:
    """Shade the steps where a watchdog acted (named by mode and reason) and mark the verdict's time."""
    acted = _acted(view)
    if acted.any():
        pairs = sorted({f"{m} for {r}" for m, r, hit in zip(view.mode, view.reason, acted) if hit})
        ax.fill_between(view.t, 0, 1, where=acted, step="post", color="tab:red", alpha=0.12, lw=0,
                        transform=ax.get_xaxis_transform(),
                        label="watchdog acted: " + ", ".join(pairs) if labelled else None)
    v = view.verdict
    if v is not None and v.at is not None and math.isfinite(v.at):
        ax.axvline(v.at, color="tab:red", ls="-.", lw=1.0, label=f"{v.word} at t = {v.at:.4g} s" if labelled else None)


def _flagged(view: RunView, alarm: str) -> np.ndarray:
    return (np.asarray(view.alarms, dtype=np.int64) >> ALARMS.index(alarm) & 1).astype(bool)


# -- the figures ----------------------------------------------------------------------------------
def outputs_figure(view: RunView) -> Any:
    """The outputs against their references.

    Parameters
    ----------
    view : RunView
        Its outputs and their references.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per output: the output and its reference.
    """
    fig, axes = _stacked(len(view.outputs))
    for i, name in enumerate(view.outputs):
        axes[i].plot(view.t, view.y[:, i], lw=0.9, label=name)
        if view.ref is not None:
            axes[i].plot(view.t, view.ref[:, i], "--", lw=0.9, label=f"{name} reference")
        axes[i].set_ylabel(unit_label(name, view.units))
    return _finish(fig, axes, view, "outputs and references")


def tracking_error_figure(view: RunView) -> Any:
    """|y - y_ref| per output on a log scale, with the divergence watchdog's bound and its flags.

    Parameters
    ----------
    view : RunView
        Its outputs, references, divergence bounds and alarms (``ref`` must be set).

    Returns
    -------
    matplotlib.figure.Figure
        One panel per output, its error axis log-scaled.
    """
    fig, axes = _stacked(len(view.outputs))
    with np.errstate(invalid="ignore"):
        errors = np.abs(view.y - view.ref)
    diverging = _flagged(view, "diverging")
    for i, name in enumerate(view.outputs):
        ax, e = axes[i], errors[:, i]
        shown = np.where(e > 0, e, np.nan)          # an exact zero has no place on a log axis
        ax.plot(view.t, shown, lw=0.9, label=f"|{name} - reference|")
        bound = view.divergence_error[i] if i < len(view.divergence_error) else math.inf
        if bound is not None and math.isfinite(bound):
            ax.axhline(bound, color="tab:red", ls="--", lw=0.9, label=f"divergence_error {bound:.4g}")
        if diverging.any():
            ax.plot(view.t[diverging], shown[diverging], "r.", ms=3, label=ALARMS[1])
        if not np.isfinite(shown).any():
            ax.text(0.5, 0.5, "no error above zero recorded", transform=ax.transAxes, ha="center", fontsize=8)
            ax.set_ylim(1e-12, 1.0)
        ax.set_yscale("log")
        ax.set_ylabel(unit_label(name, view.units, f"|{name} - ref|"))
    return _finish(fig, axes, view, "tracking error |y - y_ref| (log scale)")


def states_figure(view: RunView) -> Any:
    """Each state with its envelope's bounds, the watchdog's widened bounds and the steps outside them.

    Parameters
    ----------
    view : RunView
        Its states (``x`` must be set), envelope and the watchdog's margin.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per state; bounded states with their envelope.
    """
    fig, axes = _stacked(len(view.states), height=1.5)
    for i, name in enumerate(view.states):
        ax, x = axes[i], view.x[:, i]
        ax.plot(view.t, x, lw=0.9, label=name)
        if name in view.envelope:
            lo, hi = view.envelope[name]
            for k, bound in enumerate((lo, hi)):
                ax.axhline(bound, color="tab:red", ls="--", lw=0.9, label=None if k else "envelope")
            extra = view.envelope_margin * (hi - lo)
            if extra > 0:
                for k, bound in enumerate((lo - extra, hi + extra)):
                    ax.axhline(bound, color="tab:red", ls=":", lw=0.8,
                               label=None if k else f"envelope widened by {100 * view.envelope_margin:g} % "
                                                    "(watchdog)")
            with np.errstate(invalid="ignore"):
                outside = (x < lo - extra) | (x > hi + extra)
            if outside.any():
                ax.plot(view.t[outside], x[outside], "r.", ms=3, label=ALARMS[0])
        ax.set_ylabel(unit_label(name, view.units))
    return _finish(fig, axes, view, "states and the envelope")


def inputs_figure(view: RunView) -> Any:
    """Each input against its limits, saturated stretches shaded.

    Parameters
    ----------
    view : RunView
        Its inputs, limits and saturation.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per input.
    """
    fig, axes = _stacked(len(view.inputs))
    for j, name in enumerate(view.inputs):
        ax = axes[j]
        ax.step(view.t, view.u[:, j], where="post", lw=0.9, label=name)
        if view.input_limits is not None and j < len(view.input_limits):
            finite = [b for b in view.input_limits[j] if math.isfinite(b)]
            for k, bound in enumerate(finite):
                ax.axhline(bound, color="tab:red", ls="--", lw=0.9, label=None if k else "limit")
        if view.saturated[:, j].any():
            ax.fill_between(view.t, 0, 1, where=view.saturated[:, j], step="post", color="tab:orange", alpha=0.3,
                            lw=0, transform=ax.get_xaxis_transform(), label="saturated")
        ax.set_ylabel(unit_label(name, view.units))
    return _finish(fig, axes, view, "inputs and their limits")


def conditioning_figure(view: RunView) -> Any:
    """sigma_min of the decoupling matrix with the watchdog levels (log scale), and the mode.

    Parameters
    ----------
    view : RunView
        Its sigma_min, watchdog levels and modes.

    Returns
    -------
    matplotlib.figure.Figure
        sigma_min above, the mode (words of ``MODES``) below.
    """
    fig, (ax, ax_mode) = pyplot().subplots(2, 1, figsize=(9, 5.5), sharex=True, layout="constrained",
                                           gridspec_kw={"height_ratios": [3, 1]})
    sigma = np.asarray(view.sigma_min, dtype=float)
    with np.errstate(invalid="ignore"):
        ax.plot(view.t, np.where(sigma > 0, sigma, np.nan), lw=0.9, label="sigma_min of A(x)")
    for value, name, style in zip(view.levels or (), LEVEL_NAMES, _LEVEL_STYLES):
        if value > 0:
            ax.axhline(value, color="tab:red", ls=style, lw=0.9, label=f"{name} {value:.4g}")
    ax.set_yscale("log")
    ax.set_ylabel(sigma_label(view))
    codes = np.array([MODES.index(m) if m in MODES else np.nan for m in view.mode], dtype=float)
    ax_mode.step(view.t, codes, where="post", lw=0.9)
    ax_mode.set_yticks(range(len(MODES)), MODES)
    ax_mode.set_ylim(-0.5, len(MODES) - 0.5)
    ax_mode.set_ylabel("mode")
    return _finish(fig, [ax, ax_mode], view, "conditioning of the decoupling matrix A(x), and the mode")


def sigma_label(view: RunView) -> str:
    """The label of sigma_min of A(x), with its unit where the outputs and inputs state one.

    Parameters
    ----------
    view : RunView

    Returns
    -------
    str
    """
    return "sigma_min of A(x) " + _sigma_unit(view)


def _sigma_unit(view: RunView) -> str:
    """A maps the inputs to the outputs' r-th derivatives: ``[m/s^2 per N m]`` when all share units.

    Examples
    --------
    >>> v = RunView("p", np.zeros(0), {"y": "m", "u": "N"}, ["y"], np.zeros((0, 1)), None, ["u"],
    ...             np.zeros((0, 1)), np.zeros((0, 1), bool), None, [], None, np.zeros(0), [], [], np.zeros(0),
    ...             relative_degree=[2])
    >>> _sigma_unit(v)
    '[m/s^2 per N]'
    """
    y_units = {view.units.get(name) for name in view.outputs}
    u_units = {view.units.get(name) for name in view.inputs}
    degrees = set(view.relative_degree)
    if None in y_units | u_units or not y_units or not u_units:
        return f"({NO_UNIT})"
    if len(y_units) > 1 or len(u_units) > 1 or len(degrees) != 1:
        return "(mixed units: y_i^(r_i) per input unit)"
    r = degrees.pop()
    per_time = "" if r == 0 else "/s" if r == 1 else f"/s^{r}"
    return f"[{y_units.pop()}{per_time} per {u_units.pop()}]"
