"""Plots of a closed-loop run: PNG files, units on every axis, the tracking error on a log scale,
the envelope's bounds, the watchdog levels, and the verdict in every title."""

import dataclasses

import numpy as np
import pytest

from support import BUNDLED, built_artifact
from linz_ros.plotting import (conditioning_figure, inputs_figure, outputs_figure, plot_run, pyplot, run_view,
                               states_figure, tracking_error_figure, unit_label)
from linz_ros.runtime import ControllerCore, SimSettings, WatchdogConfig, make_reference, simulate

FIGURES = (outputs_figure, tracking_error_figure, states_figure, inputs_figure, conditioning_figure)


@pytest.fixture(scope="module")
def pick_arm():
    return built_artifact(BUNDLED / "pick_arm.yaml")


@pytest.fixture(scope="module")
def moving_run(pick_arm):
    core = ControllerCore(pick_arm)
    base = core.output_values(pick_arm.operating_point)
    reference = make_reference("smooth", pick_arm.relative_degree, base, amplitude=[-0.08, 0.06], duration=1.0,
                               at=0.1)
    return simulate(pick_arm, SimSettings(duration=1.5, reference=reference))


@pytest.fixture(scope="module")
def diverged_run(pick_arm):
    """The controller's model is the nominal arm; the real forearm is three times as heavy."""
    core = ControllerCore(pick_arm)
    base = core.output_values(pick_arm.operating_point)
    reference = make_reference("smooth", pick_arm.relative_degree, base, amplitude=[0.12, 0.16], duration=2.0,
                               at=0.2)
    plant = list(pick_arm.nominal_parameters)
    plant[pick_arm.parameter_names.index("m2")] *= 3.0
    return simulate(pick_arm, SimSettings(duration=2.0, reference=reference, plant_parameters=plant))


def _drawn(figure_of, view):
    fig = figure_of(view)
    axes = [ax for ax in fig.axes if ax.get_label() != "<colorbar>"]
    return fig, axes


def _close(fig):
    pyplot().close(fig)


def test_plot_run_writes_five_png_images(moving_run, tmp_path):
    paths = plot_run(moving_run, tmp_path / "plots")
    assert [p.name for p in paths] == ["outputs.png", "tracking_error.png", "states.png", "inputs.png",
                                       "conditioning.png"]
    for path in paths:
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and path.stat().st_size > 10_000


def test_every_axis_names_its_unit_from_the_plant_file(moving_run):
    view = run_view(moving_run)
    expected = {outputs_figure: ["tool_x [m]", "tool_y [m]"],
                tracking_error_figure: ["|tool_x - ref| [m]", "|tool_y - ref| [m]"],
                states_figure: ["q1 [rad]", "q2 [rad]", "w1 [rad/s]", "w2 [rad/s]"],
                inputs_figure: ["tau1 [N m]", "tau2 [N m]"],
                # A maps torques to the tool's accelerations
                conditioning_figure: ["sigma_min of A(x) [m/s^2 per N m]", "mode"]}
    for figure_of, labels in expected.items():
        fig, axes = _drawn(figure_of, view)
        assert [ax.get_ylabel() for ax in axes] == labels
        assert axes[-1].get_xlabel() == "time [s]"
        _close(fig)


def test_a_signal_without_a_stated_unit_is_labelled_so(moving_run):
    view = dataclasses.replace(run_view(moving_run), units={"tau1": "N m"})
    fig, axes = _drawn(inputs_figure, view)
    assert [ax.get_ylabel() for ax in axes] == ["tau1 [N m]", "tau2 (unit not stated)"]
    _close(fig)
    fig, axes = _drawn(conditioning_figure, view)
    assert axes[0].get_ylabel() == "sigma_min of A(x) (unit not stated)"
    _close(fig)
    assert unit_label("q1", {}) == "q1 (unit not stated)"


def test_the_tracking_error_is_its_magnitude_on_a_log_axis(moving_run):
    view = run_view(moving_run)
    fig, axes = _drawn(tracking_error_figure, view)
    errors = np.abs(moving_run.y - moving_run.reference_values())
    for i, ax in enumerate(axes):
        assert ax.get_yscale() == "log"
        (line,) = [line for line in ax.get_lines() if line.get_label() == f"|{view.outputs[i]} - reference|"]
        drawn = np.asarray(line.get_ydata(), dtype=float)
        positive = errors[:, i] > 0
        np.testing.assert_allclose(drawn[positive], errors[positive, i])
        assert np.isnan(drawn[~positive]).all()          # an exact zero is left out, not drawn at 1e-300
        bound = WatchdogConfig.from_artifact(moving_run.artifact).divergence_error[i]
        assert [line.get_ydata()[0] for line in ax.get_lines()
                if line.get_label().startswith("divergence_error")] == [pytest.approx(bound)]
    _close(fig)


def test_the_states_plot_draws_the_envelope_at_its_bounds(moving_run):
    view = run_view(moving_run)
    fig, axes = _drawn(states_figure, view)
    margin = WatchdogConfig.from_artifact(moving_run.artifact).envelope_margin
    assert margin > 0
    for ax, name in zip(axes, view.states):
        lo, hi = moving_run.artifact.envelope[name]
        dashed = sorted(line.get_ydata()[0] for line in ax.get_lines() if line.get_linestyle() == "--")
        dotted = sorted(line.get_ydata()[0] for line in ax.get_lines() if line.get_linestyle() == ":")
        assert dashed == [pytest.approx(lo), pytest.approx(hi)]
        extra = margin * (hi - lo)
        assert dotted == [pytest.approx(lo - extra), pytest.approx(hi + extra)]
    _close(fig)


def test_the_conditioning_plot_draws_the_watchdog_levels_on_a_log_axis(moving_run):
    fig, axes = _drawn(conditioning_figure, run_view(moving_run))
    config = WatchdogConfig.from_artifact(moving_run.artifact)
    levels = {line.get_label().split()[0]: line.get_ydata()[0] for line in axes[0].get_lines()
              if line.get_label().split()[0] in ("sigma_warn", "sigma_act", "sigma_stop")}
    assert levels == {"sigma_warn": pytest.approx(config.sigma_warn), "sigma_act": pytest.approx(config.sigma_act),
                      "sigma_stop": pytest.approx(config.sigma_stop)}
    assert axes[0].get_yscale() == "log"
    assert [t.get_text() for t in axes[1].get_yticklabels()] == ["nominal", "damped", "held", "safe", "stopping"]
    _close(fig)


def test_a_run_that_tracked_says_so_in_every_title(moving_run):
    view = run_view(moving_run)
    assert view.verdict.word == "tracked"
    for figure_of in FIGURES:
        fig = figure_of(view)
        assert "verdict: tracked" in fig._suptitle.get_text()
        _close(fig)


def test_a_run_that_diverged_does_not_look_fine(diverged_run):
    """Every title says the verdict in red; the watchdog's action and the alarms are named with their words."""
    view = run_view(diverged_run)
    verdict = diverged_run.summary()
    assert verdict["verdict"] == "diverged"
    for figure_of in FIGURES:
        fig, axes = _drawn(figure_of, view)
        title = fig._suptitle
        assert f"verdict: diverged at t = {verdict['verdict_at']:.4g} s" in title.get_text()
        assert verdict["verdict_detail"][:60] in title.get_text()
        assert title.get_color() == "tab:red"
        labels = axes[0].get_legend_handles_labels()[1]
        assert any(label.startswith("watchdog acted: ") and "safe for diverging" in label for label in labels)
        assert f"diverged at t = {verdict['verdict_at']:.4g} s" in labels
        _close(fig)
    fig, axes = _drawn(tracking_error_figure, view)
    assert "diverging" in axes[0].get_legend_handles_labels()[1]          # the divergence watchdog's flags
    _close(fig)
    fig, axes = _drawn(states_figure, view)
    assert any("outside_envelope" in ax.get_legend_handles_labels()[1] for ax in axes)
    _close(fig)
