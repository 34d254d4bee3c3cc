"""The offline closed loop: designed error dynamics on every bundled plant, and the effects of
mismatch, noise, delay, integrators and divergence."""

import csv

import numpy as np
import pytest
import yaml

from support import BUNDLED, MINIMAL, REFERENCE, built_artifact, sampled_chain_error
from linz_ros.errors import ConfigError
from linz_ros.runtime import (ControllerCore, SimSettings, fit_decay_rate, make_reference, mismatched_parameters,
                              simulate)

STEPS = {"pick_arm": (0.03, 3.0), "mast_camera": (0.2, 3.0), "survey_boat": (0.5, 16.0),
         "loader_arm": (0.01, 3.0), "survey_boat_thrusters": (0.2, 16.0)}
# sorting_arm is checked without its friction in tests/test_runtime_physics.py: its smoothed Coulomb friction
# (tanh over 0.05 rad/s) turns within a control period near rest, which the held command cannot cancel


@pytest.mark.parametrize("name", sorted(STEPS))
def test_tracking_error_follows_the_designed_error_dynamics(name):
    artifact = built_artifact(BUNDLED / f"{name}.yaml")
    amplitude, duration = STEPS[name]
    core = ControllerCore(artifact)
    x0 = [artifact.document["plant"]["operating_point"][s] for s in artifact.states]
    base = core.output_values(x0)
    reference = make_reference("step", artifact.relative_degree, base, amplitude, at=0.0)
    result = simulate(artifact, SimSettings(duration=duration, reference=reference))
    assert result.diverged_at is None and set(result.mode) == {"nominal"}
    summary = result.summary()
    # the poles as the plant file states them, read here without the loader or the artifact
    designed = yaml.safe_load((BUNDLED / f"{name}.yaml").read_text())["design"]["poles"]
    for i, (output, gains) in enumerate(zip(artifact.outputs, artifact.gains)):
        chain_poles = np.sort(np.real(np.roots(np.r_[1.0, gains[::-1]])))
        np.testing.assert_allclose(chain_poles, np.sort(designed[output]), rtol=1e-9, err_msg=output)
        expected = sampled_chain_error(gains, 1 / artifact.rate, -amplitude, len(result.t))
        error = result.errors()[:, i]
        assert np.max(np.abs(error - expected)) < 0.02 * amplitude, output
        expected_rate = fit_decay_rate(result.t, expected)
        assert summary["outputs"][output]["decay_rate"] == pytest.approx(expected_rate, rel=0.03), output
        # and the sampled design decays like the plant file's slowest pole (within sampling effects)
        assert expected_rate == pytest.approx(-max(designed[output]), rel=0.1)
        assert summary["outputs"][output]["final_error"] < 1e-3 * amplitude


def test_input_state_design_tracks_the_linearizing_output_and_reports_state_references():
    artifact = built_artifact(REFERENCE / "khalil_two_state.yaml")
    reference = make_reference("smooth", [2], [0.0], 0.5, duration=2.0)
    result = simulate(artifact, SimSettings(duration=6.0, reference=reference, initial=[0.0, 0.0]))
    assert np.max(np.abs(result.errors())) < 0.005 * 0.5        # sampling error at 100 Hz, under 0.5 %
    assert result.ref_state is not None
    # x_ref = T^-1(z_ref): x1 = z1 and a sin(x2) = z1' (Khalil, ch. 13)
    z = result.ref[:, :2]
    np.testing.assert_allclose(result.ref_state[:, 0], z[:, 0], atol=1e-12)
    np.testing.assert_allclose(1.5 * np.sin(result.ref_state[:, 1]), z[:, 1], atol=1e-12)


KEPLER_DRIVE = """\
plant: kepler_drive
states: [x1, x2]
inputs: [u]
parameters: {e: 0.5}
dynamics:
  x1: x2 + e*sin(x2)
  x2: u
envelope: {x1: [-1.0, 1.0], x2: [-1.0, 1.0]}
design: {rate: 200, poles: [-4, -5]}
"""


def test_an_input_state_design_without_a_closed_form_inverse_runs_on_newton():
    # z2 = x2 + e sin x2 is Kepler's equation in x2: no elementary inverse, so the artifact carries
    # no inverse program and the state references come from the warm-started Newton iteration
    artifact = built_artifact(KEPLER_DRIVE)
    assert "inverse" not in artifact.programs
    assert any("Newton" in note for note in artifact.document["design"]["notes"])
    reference = make_reference("smooth", [2], [0.0], 0.6, duration=2.0, at=0.2)
    result = simulate(artifact, SimSettings(duration=4.0, reference=reference, initial=[0.0, 0.0]))
    assert set(result.mode) == {"nominal"} and np.max(np.abs(result.errors())) < 0.005 * 0.6
    z = result.ref[:, :2]
    x_ref = result.ref_state
    np.testing.assert_allclose(x_ref[:, 0], z[:, 0], atol=1e-10)
    np.testing.assert_allclose(x_ref[:, 1] + 0.5 * np.sin(x_ref[:, 1]), z[:, 1], atol=1e-10)
    assert np.max(np.abs(x_ref[:, 1])) > 0.2                   # the move exercises the nonlinearity


def test_mismatch_noise_and_delay_degrade_tracking_but_stay_bounded():
    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    reference = make_reference("smooth", [2, 2], [0.0, 0.0], [0.6, -0.3], duration=1.5, at=0.1)
    nominal = simulate(artifact, SimSettings(duration=4.0, reference=reference)).summary()
    mismatch = simulate(artifact, SimSettings(duration=4.0, reference=reference, plant_parameters=
                        mismatched_parameters(artifact, {"J_cam": 40.0, "J_tilt": 25.0}))).summary()
    noisy = simulate(artifact, SimSettings(duration=4.0, reference=reference,
                                           noise=[1e-3, 1e-3, 1e-2, 1e-2])).summary()
    delayed = simulate(artifact, SimSettings(duration=4.0, reference=reference, delay=0.01)).summary()
    for summary in (mismatch, noisy, delayed):
        for output in ("pan_angle", "tilt_angle"):
            assert nominal["outputs"][output]["rms_error"] < summary["outputs"][output]["rms_error"] < 0.05
    assert nominal["outputs"]["tilt_angle"]["rms_error"] < 1e-4


def test_a_fractional_delay_shifts_the_response_by_that_delay():
    artifact = built_artifact(MINIMAL + "outputs: {y: x1}\ndesign: {rate: 100, poles: {y: [-3, -4]}}\n")
    reference = make_reference("step", [2], [0.0], 0.1, at=0.2)
    runs = [simulate(artifact, SimSettings(duration=1.0, reference=reference, initial=[0.0, 0.0], delay=d))
            for d in (0.0, 0.025, 0.05)]
    def first_move(r):
        return r.t[np.argmax(np.abs(r.y[:, 0]) > 1e-6)]
    assert first_move(runs[0]) < first_move(runs[1]) < first_move(runs[2])
    assert first_move(runs[2]) - first_move(runs[0]) == pytest.approx(0.05, abs=0.011)


def test_rk4_and_adaptive_integrators_agree():
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    core = ControllerCore(artifact)
    x0 = [0.4, 1.2, 0.0, 0.0]
    reference = make_reference("smooth", [2, 2], core.output_values(x0), 0.05, duration=1.0)
    rk4 = simulate(artifact, SimSettings(duration=1.5, reference=reference))
    adaptive = simulate(artifact, SimSettings(duration=1.5, reference=reference, integrator="scipy"))
    np.testing.assert_allclose(rk4.x, adaptive.x, atol=1e-8)


def test_divergence_stops_the_run_and_says_when():
    # a plant that escapes in finite time once the controller is off: x' = x^2 + u, no input limits
    artifact = built_artifact("plant: blow\nstates: [x]\ninputs: [u]\ndynamics: {x: x**2 + u}\n"
                              "outputs: {y: x}\ndesign: {rate: 100, poles: {y: [-1]}}\n"
                              "operating_point: {x: 0.5}\n")
    from linz_ros.runtime import WatchdogConfig
    config = WatchdogConfig.from_artifact(artifact, sigma_warn=2.0, sigma_act=2.0, sigma_stop=2.0)  # always safe
    result = simulate(artifact, SimSettings(duration=5.0, initial=[0.5], config=config))
    assert result.diverged_at is not None and 1.5 < result.diverged_at < 2.5       # x = 1/(2 - t)
    assert "stopped being finite" in result.summary()["notes"][0]


def test_csv_holds_every_step_with_named_columns(tmp_path):
    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    result = simulate(artifact, SimSettings(duration=0.2))
    path = result.write_csv(tmp_path / "run.csv")
    rows = list(csv.reader(path.open()))
    assert rows[0][:5] == ["t", "pan", "tilt", "pan_rate", "tilt_rate"]
    for column in ("ref_pan_angle", "ref_pan_angle_d2", "tau_pan", "sigma_min", "mode", "saturated_tau_tilt",
                   "compute_time_us"):
        assert column in rows[0]
    assert len(rows) == 1 + len(result.t) == 1 + 51
    assert rows[-1][rows[0].index("mode")] == "nominal"


@pytest.mark.parametrize("settings, words", [
    (SimSettings(duration=0.0), "--duration"), (SimSettings(integrator="euler"), "--integrator"),
    (SimSettings(substeps=0), "--substeps"), (SimSettings(delay=-1.0), "--delay"),
    (SimSettings(substeps=1_000_000_000), "--substeps: expected a whole number from 1 to 1000"),
    (SimSettings(duration=40_000.0, substeps=1000), "--substeps: 1000 sub-steps for each of 10,000,000"),
    (SimSettings(initial=[0.0]), "--initial: expected 4 values"), (SimSettings(noise=[-1.0] * 4), "--noise"),
])
def test_settings_out_of_range_are_refused(settings, words):
    with pytest.raises(ConfigError, match=words):
        simulate(built_artifact(BUNDLED / "mast_camera.yaml"), settings)


def test_fit_decay_rate_ignores_transient_and_noise_floor():
    t = np.linspace(0, 6, 3001)
    e = np.exp(-2.0 * t) * np.cos(5 * t) + 1e-7 * np.sin(300 * t)
    assert fit_decay_rate(t, e) == pytest.approx(2.0, rel=0.03)
    assert fit_decay_rate(t, np.ones_like(t)) is None
    assert fit_decay_rate(t[:3], e[:3]) is None


def _flexible_joint_under_mismatch(**overrides):
    """The flexible joint (Spong 1987) with its shaft 20 % softer than the design assumes."""
    from linz_ros.runtime import WatchdogConfig
    artifact = built_artifact((REFERENCE / "flexible_joint.yaml").read_text()
                              + "design: {rate: 200, poles: {y: [-4, -5, -6, -7]}}\n")
    core = ControllerCore(artifact)
    reference = make_reference("smooth", artifact.relative_degree, core.output_values([0.0] * 4),
                               amplitude=[1.0], duration=1.0, at=0.2)
    config = WatchdogConfig.from_artifact(artifact, **overrides)
    return artifact, simulate(artifact, SimSettings(duration=5.0, reference=reference, config=config,
                                                    plant_parameters=mismatched_parameters(artifact, {"k": -20.0})))


def test_a_run_that_leaves_its_envelope_is_flagged_as_it_happens():
    artifact, result = _flexible_joint_under_mismatch()
    summary = result.summary()
    from linz_ros.runtime.closed_loop import outside_envelope
    assert not outside_envelope(artifact, result.x[:1], 0.1).any()
    first_out = result.t[np.flatnonzero(outside_envelope(artifact, result.x, 0.1))[0]]
    assert np.max(np.abs(result.x[:, [0, 2]])) > 1.8                        # q1 or q2 beyond 1.5 widened by 10 %
    k = int(np.flatnonzero(result.alarm_mask() & 1)[0])
    assert result.t[k] == pytest.approx(first_out, abs=result.period)     # the watchdog saw it at once
    assert result.reason[k] == "outside_envelope" and result.mode[k] == "stopping"    # a controlled stop
    assert summary["verdict"] in ("diverged", "left_envelope") and summary["verdict_at"] is not None
    assert summary["alarm_steps"]["outside_envelope"] > 0
    assert summary["outputs"]["y"]["decay_rate"] is None                    # never a decay rate for this
    assert any("outside_envelope first at t" in note for note in summary["notes"])


def test_with_the_watchdogs_warning_only_the_run_still_reads_as_diverged():
    artifact, result = _flexible_joint_under_mismatch(envelope_action="warn", divergence_action="warn")
    summary = result.summary()
    assert summary["verdict"] in ("left_envelope", "diverged")
    assert summary["alarm_steps"]["outside_envelope"] > 0
    assert summary["time_in_mode"]["safe"] == 0.0 and "outside_envelope" in summary["reasons"]
    assert summary["outputs"]["y"]["decay_rate"] is None


def test_the_nominal_run_tracks_and_reports_its_decay_rate():
    artifact, result = _flexible_joint_under_mismatch()
    nominal = simulate(artifact, SimSettings(duration=5.0, reference=result.reference))
    summary = nominal.summary()
    assert (summary["verdict"], summary["verdict_at"]) == ("tracked", None)
    assert summary["outputs"]["y"]["decay_rate"] is not None
    assert summary["alarm_steps"] == {"outside_envelope": 0, "diverging": 0}


def test_verdicts_for_held_safe_saturated_and_not_settled():
    from linz_ros.runtime import WatchdogConfig, run_verdict
    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    core = ControllerCore(artifact)
    y0 = core.output_values([0.0] * 4)
    move = make_reference("smooth", artifact.relative_degree, y0, amplitude=[0.8, -0.4], duration=2.0, at=0.25)
    assert run_verdict(simulate(artifact, SimSettings(duration=3.0, reference=move))).word == "tracked"
    cut = simulate(artifact, SimSettings(duration=3.0, reference=move, config=WatchdogConfig.from_artifact(
        artifact, input_limits=((-0.05, 0.05), (-0.05, 0.05)))))
    assert run_verdict(cut).word in ("saturated", "held_safe", "left_envelope")
    step = make_reference("step", artifact.relative_degree, y0, amplitude=[0.3, 0.0], at=0.0)
    short = simulate(artifact, SimSettings(duration=0.3, reference=step))      # ends mid-transient
    assert run_verdict(short).word == "not_settled"
    stop = WatchdogConfig.from_artifact(artifact, sigma_warn=1e9, sigma_act=1e9, sigma_stop=1e9)
    held = run_verdict(simulate(artifact, SimSettings(duration=0.5, config=stop)))
    assert (held.word, held.at) == ("held_safe", 0.0)


def test_the_adaptive_integrator_has_a_budget():
    from linz_ros.runtime.plant import IntegrationBudgetError, NumericPlant
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    plant = NumericPlant(artifact)
    with pytest.raises(IntegrationBudgetError, match="more than 20,000 evaluations"):
        plant.adaptive([0.4, 1.2, 1e6, 0.0], [0.0, 0.0], 0.002)   # Coriolis terms ~ w1^2 = 1e12
    result = simulate(artifact, SimSettings(duration=0.05, integrator="scipy", initial=[0.4, 1.2, 1e6, 0.0]))
    assert result.diverged_at is not None and "adaptive integrator needed more than" in result.summary()["notes"][-1]


def test_a_controlled_stop_that_the_machine_runs_away_from_is_not_called_a_stop(recwarn):
    # the elastic joint's spring made almost zero (a 99.999 % mismatch): the law pushes the motor, the
    # link falls away past the envelope, and the stop cannot hold it
    artifact = built_artifact(REFERENCE / "elastic_joint.yaml")
    reference = make_reference("step", artifact.relative_degree, [0.0], 0.1, at=0.1)
    result = simulate(artifact, SimSettings(duration=1.0, reference=reference,
                                            plant_parameters=mismatched_parameters(artifact, {"k": -99.999})))
    note = next(n for n in result.notes if n.startswith("watchdog outside_envelope"))
    assert "ran away" in note and "stopped under control" not in note
    assert result.summary()["verdict"] in ("left_envelope", "diverged")
    assert not [w for w in recwarn if issubclass(w.category, RuntimeWarning)]


def test_a_step_slower_than_the_control_period_is_noted():
    from linz_ros.runtime.closed_loop import _note_slow_steps

    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    result = simulate(artifact, SimSettings(duration=0.05))
    result.notes.clear()
    result.compute_time = np.full(len(result.t), 0.5 / artifact.rate)      # half a period: nothing to say
    _note_slow_steps(result)
    assert result.notes == []
    result.compute_time = np.full(len(result.t), 3.0 / artifact.rate)      # three periods a step
    _note_slow_steps(result)
    assert len(result.notes) == 1 and "longer than the control period" in result.notes[0]
    assert f"{3e6 / artifact.rate:.0f} us against {1e6 / artifact.rate:.0f} us" in result.notes[0]


def test_elastic_arm_follows_its_designed_error_dynamics_up_to_a_hold_error_first_order_in_the_period():
    """The elastic-joint law is exact in continuous time (its A and b are checked against a closed
    form in test_artifact_elastic); held over a period, the spring modes move y'''' within it, so
    the deviation from the sampled design shrinks as the period (halving it halves the deviation)."""
    text = (BUNDLED / "flex_loader_arm.yaml").read_text()
    amplitude, deviations = 0.01, {}
    for rate in (1000, 2000):
        artifact = built_artifact(text.replace("rate: 2000", f"rate: {rate}"))
        assert artifact.rate == rate
        core = ControllerCore(artifact)
        base = core.output_values([artifact.document["plant"]["operating_point"][s] for s in artifact.states])
        reference = make_reference("step", artifact.relative_degree, base, amplitude, at=0.0)
        result = simulate(artifact, SimSettings(duration=1.0, reference=reference, substeps=2))
        assert result.diverged_at is None and set(result.mode) == {"nominal"}
        errors = result.errors()
        deviations[rate] = np.array([
            np.max(np.abs(errors[:, i] - sampled_chain_error(gains, 1 / rate, -amplitude, len(result.t))))
            for i, gains in enumerate(artifact.gains)])
    ratio = deviations[1000] / deviations[2000]
    assert np.all((ratio > 1.7) & (ratio < 2.3)), ratio
    assert np.all(deviations[2000] < 0.05 * amplitude), deviations[2000]
