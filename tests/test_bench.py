"""The benchmark's references compute what the core computes (so the ratios compare like with like)."""

import json
import shutil

import numpy as np
import pytest
import sympy as sp

from support import BUNDLED, REFERENCE, built_artifact
from linz_ros.bench import _c_library, _naive_step, law_expressions, run_bench
from linz_ros.model import load_plant
from linz_ros.runtime import ControllerCore


@pytest.fixture(scope="module")
def arm():
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    return artifact, law_expressions(artifact)


@pytest.mark.skipif(shutil.which("cc") is None and shutil.which("gcc") is None, reason="no C compiler on PATH")
def test_the_compiled_c_reference_evaluates_the_same_law(arm, tmp_path):
    artifact, expressions = arm
    c_law = _c_library(expressions, artifact, tmp_path)
    law = artifact.programs["law"]
    params = artifact.nominal_parameters.tolist()
    exprs = expressions.entries
    rng = np.random.default_rng(4)
    for _ in range(20):
        x = [rng.uniform(-0.6, 1.8), rng.uniform(0.15, 2.6), rng.uniform(-2, 2), rng.uniform(-2, 2)]
        c_law(x)
        out = np.array(c_law._keep[3][:len(exprs)])
        np.testing.assert_allclose(out, np.array(law(x, params)), rtol=1e-12, atol=1e-12)


def test_the_naive_pipeline_gives_the_core_command(arm):
    artifact, expressions = arm
    naive = _naive_step(expressions, artifact)
    core = ControllerCore(artifact, None)
    # random states over [-1, 1] leave the envelope: the envelope watchdog only warns here
    core.config = core.config.with_overrides(input_limits=((-1e9, 1e9), (-1e9, 1e9)), envelope_action="warn")
    rng = np.random.default_rng(8)
    for k in range(10):
        x = [rng.uniform(-0.6, 1.8), rng.uniform(0.6, 2.6), rng.uniform(-2, 2), rng.uniform(-2, 2)]
        ref = core.hold_reference([x[0] + 0.05, x[1], 0.0, 0.0])
        u, record = core.step(x, ref, t=float(k + 1))
        assert record.mode == "nominal"
        np.testing.assert_allclose(naive(np.array(x), artifact.nominal_parameters, np.array(ref)), u, rtol=1e-10)


def test_the_law_expressions_are_the_artifacts_own_program_not_a_new_design(arm):
    """Every reference is made from the artifact's law program: a law edited in the artifact is what is timed."""
    from linz_ros.artifact import artifact_from_text, seal

    artifact, expressions = arm
    document = json.loads(json.dumps(artifact.document))
    law = document["programs"]["law"]
    law["outputs"] = [[name, shape, [f"2*({e})" for e in entries]] for name, shape, entries in law["outputs"]]
    doubled = artifact_from_text(seal(document), source="doubled")
    rebuilt = law_expressions(doubled)
    params = doubled.nominal_parameters.tolist()
    x = [0.4, 1.2, 0.3, -0.2]
    plain = sp.lambdify([rebuilt.states, rebuilt.parameters], rebuilt.flat(), modules="math")
    np.testing.assert_allclose(plain(x, params), np.array(doubled.programs["law"](x, params)), rtol=1e-12)
    np.testing.assert_allclose(plain(x, params), 2 * np.array(artifact.programs["law"](x, params)), rtol=1e-12)


def test_run_bench_without_a_plant_times_every_reference_of_the_artifacts_law(arm):
    artifact, _ = arm
    result = run_bench(artifact, None, calls=20, rounds=1)
    expected = {"core", "law_only", "naive", "lambdify_numpy", "lambdify_cse_math"}
    if shutil.which("cc") or shutil.which("gcc"):
        # with a compiler the core timed is the native step, and the Python core is timed beside it
        expected |= {"compiled_c", "core_python"}
        assert "core: the native step" in result.notes
    assert set(result.microseconds) == expected
    assert "core_over_law_only" in result.ratios() and "linz bench pick_arm" in result.render_text()


def test_run_bench_of_the_python_backend_times_the_python_core_as_core(arm):
    artifact, _ = arm
    result = run_bench(artifact, None, calls=20, rounds=1, backend="python")
    assert "core_python" not in result.microseconds and "core: the python step" in result.notes


def test_run_bench_refuses_an_unknown_backend_by_its_option(arm):
    from linz_ros.errors import ConfigError

    with pytest.raises(ConfigError, match="--backend: expected one of native, python, got 'gpu'"):
        run_bench(arm[0], None, calls=20, rounds=1, backend="gpu")


def test_a_serial_arm_is_timed_against_pinocchio_computed_torque():
    from support import REFERENCE

    from linz_ros.bench import _pinocchio_step

    path = REFERENCE / "pick_arm_serial.yaml"
    artifact, plant = built_artifact(path), load_plant(path)
    # tool-point outputs are not joint-space computed torque: no Pinocchio candidate
    assert _pinocchio_step(plant, artifact) is None
    joint_space = path.read_text().replace("outputs:\n  tool_x: tip_x\n  tool_y: tip_y\n", "").replace(
        "poles: {tool_x: [-6, -7], tool_y: [-6, -7]}", "poles: {y_q1: [-6, -7], y_q2: [-6, -7]}")
    artifact = built_artifact(joint_space)
    from linz_ros.model import plant_from_text

    plant = plant_from_text(joint_space)
    step = _pinocchio_step(plant, artifact)
    core = ControllerCore(artifact)
    # random states over [-1, 1] leave the envelope: the envelope watchdog only warns here
    core.config = core.config.with_overrides(input_limits=((-1e9, 1e9), (-1e9, 1e9)), envelope_action="warn")
    naive = _naive_step(law_expressions(artifact), artifact)
    rng = np.random.default_rng(2)
    for k in range(10):
        x = list(rng.uniform(-1, 1, 4))
        ref = [x[0] + 0.02, 0.1, 0.5, x[1] - 0.02, 0.0, -0.3]
        u, record = core.step(x, ref, t=0.002 * (k + 1))
        np.testing.assert_allclose(step(np.array(x), np.array(ref)), u, rtol=1e-9)
        np.testing.assert_allclose(naive(np.array(x), artifact.nominal_parameters, np.array(ref)), u, rtol=1e-9)
    result = run_bench(artifact, plant, calls=50, rounds=1)
    assert "pinocchio_computed_torque" in result.microseconds and "core_over_pinocchio" in result.ratios()


def test_the_plain_lambdify_references_evaluate_the_same_law(arm):
    artifact, expressions = arm
    x, p, exprs = expressions.states, expressions.parameters, expressions.flat()
    params = artifact.nominal_parameters.tolist()
    plain = sp.lambdify([x, p], exprs, modules="numpy")
    cse_math = sp.lambdify([x, p], exprs, modules="math", cse=True)
    law = artifact.programs["law"]
    rng = np.random.default_rng(5)
    for _ in range(10):
        state = [rng.uniform(-0.6, 1.8), rng.uniform(0.15, 2.6), rng.uniform(-2, 2), rng.uniform(-2, 2)]
        expected = np.array(law(state, params))
        np.testing.assert_allclose(np.array(plain(np.array(state), np.array(params)), dtype=float), expected,
                                   rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(np.array(cse_math(state, params)), expected, rtol=1e-12, atol=1e-12)


def test_run_bench_ratios_are_of_one_run(arm):
    artifact, _ = arm
    result = run_bench(artifact, None, calls=20, rounds=1)
    assert all(v > 0 for v in result.microseconds.values())
    ratios = result.ratios()
    assert ratios["naive_over_core"] == pytest.approx(result.microseconds["naive"] / result.microseconds["core"])
    text = result.render_text()
    assert "naive_over_core" in text and "goal >= 4" in text


@pytest.mark.parametrize("compiler, words", [(None, "no C compiler found (cc or gcc)"),
                                             ("/bin/false", "/bin/false failed on the printed law")])
def test_a_missing_or_failing_compiler_is_named_in_the_notes(arm, monkeypatch, compiler, words):
    import linz_ros.bench as bench

    artifact, _ = arm
    monkeypatch.setattr(bench.shutil, "which", lambda name: compiler)
    result = run_bench(artifact, None, calls=20, rounds=1)
    assert "compiled_c" not in result.microseconds
    assert any(note.startswith(words) and note.endswith("compiled_c not measured") for note in result.notes), \
        result.notes


def test_goals_are_judged_met_or_missed_in_text_and_json():
    from linz_ros.bench import BenchResult
    result = BenchResult("p", 10, 2, {"core": 12.1, "compiled_c": 1.0, "naive": 100.0, "law_only": 3.0})
    text = result.render_text()
    assert "core_over_compiled_c               12.10  (goal <= 2: MISSED)" in text
    assert "naive_over_core                     8.26  (goal >= 4: met)" in text
    goals = result.to_json()["goals"]
    assert goals["core_over_compiled_c"]["met"] is False and goals["naive_over_core"]["met"] is True
    assert "core_over_law_only" not in goals


def test_an_elastic_arm_is_timed_on_its_core_and_law_and_says_why_no_more():
    artifact = built_artifact(REFERENCE / "elastic_joint.yaml")
    result = run_bench(artifact, None, calls=20, rounds=1, backend="python")
    assert set(result.microseconds) == {"core", "law_only"}
    assert all(v > 0 for v in result.microseconds.values())
    assert any("elastic joints" in note for note in result.notes)


def test_a_chain_form_artifact_is_timed_on_its_core_and_law_and_says_why_no_more(monkeypatch):
    from test_runtime_core import _chain_form_artifact, pendulum_chain_text

    artifact = _chain_form_artifact(pendulum_chain_text(2), monkeypatch)
    result = run_bench(artifact, None, calls=10, rounds=1, backend="python")
    assert set(result.microseconds) == {"core", "law_only"}
    assert any(note.startswith("chain form:") for note in result.notes)


def test_the_naive_pipeline_of_a_law_with_integral_action_matches_the_core_on_its_first_step():
    # regression: the integral gain K_I leads each chain's gains; the naive pipeline has no integrator
    # state, which is zero on the core's first step, so both give the same command there
    text = ("plant: p\nstates: [x1, x2]\ninputs: [u]\ndynamics: {x1: x2, x2: -sin(x1) + u}\n"
            "outputs: {y: x1}\ndesign: {poles: {y: [-1, -2, -3]}, integral: true}\n")
    artifact = built_artifact(text)
    naive = _naive_step(law_expressions(artifact), artifact)
    core = ControllerCore(artifact, None)
    x, ref = [0.2, -0.1], [0.5, 0.0, 0.0]
    u, record = core.step(x, ref, t=0.0)
    assert record.mode == "nominal"
    np.testing.assert_allclose(naive(np.array(x), artifact.nominal_parameters, np.array(ref)), u, rtol=1e-12)
