"""The native control step and plant: the same commands, modes and records as the Python core,
the fallback when no native code can be had, the cache, and code emitted only from the parse tree."""

import gc
import math
import os
import subprocess
import sys
import weakref
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from support import BUNDLED, REFERENCE, built_artifact, c_words_not_ours
from linz_ros.errors import ConfigError
from linz_ros.runtime import ControllerCore, SimSettings, WatchdogConfig, make_reference, simulate
from linz_ros.runtime.native import NativeCore, NativePlant, NativeUnavailable, make_core, make_plant
from linz_ros.runtime.native import _build
from linz_ros.runtime.plant import NumericPlant

#: Every bundled plant (the elastic arm's law runs as its jet2 form in C).
NATIVE = ["pick_arm", "mast_camera", "survey_boat", "loader_arm", "survey_boat_thrusters", "flex_loader_arm"]
#: Agreement asked of the two backends: the issue's 1e-12, relative to the value's size (at least 1); a
#: vector's size is its largest entry, since rounding in A^-1 (v - b) scales with the whole vector (the
#: elastic arm's torques of 150 N m beside one of 2 N m differed by 2.6e-12 in one run: 1.7e-14 of the vector).
TOLERANCE = 1e-12
FIELDS = ("t", "mode", "reason", "sigma_min", "condition", "warn", "damping", "saturated", "outputs", "alarms")


def _same(a, b, scale: float = 1.0) -> bool:
    if isinstance(a, (tuple, list)):
        sizes = [abs(v) for v in a if isinstance(v, float) and math.isfinite(v)]
        scale = max([scale, *sizes])
        return isinstance(b, (tuple, list)) and len(a) == len(b) and all(_same(p, q, scale) for p, q in zip(a, b))
    if isinstance(a, bool) or isinstance(a, str) or isinstance(a, int) and not isinstance(a, float):
        return a == b
    if math.isnan(a) or math.isinf(a):
        return (math.isnan(a) and math.isnan(b)) or a == b
    return abs(a - b) <= TOLERANCE * max(scale, abs(a))


def assert_same_step(python, native, where=""):
    (u1, r1), (u2, r2) = python, native
    assert _same(u1, u2), (where, u1, u2, r1, r2)
    for name in FIELDS:
        assert _same(getattr(r1, name), getattr(r2, name)), (where, name, r1, r2)


@pytest.fixture(scope="module", params=NATIVE)
def plant_name(request):
    return request.param


def _cores(artifact, config=None):
    native, note = make_core(artifact, config)
    assert note is None and isinstance(native, NativeCore), note
    return ControllerCore(artifact, config), native


def _bounds(artifact, widen=0.3):
    envelope, op = artifact.envelope, artifact.operating_point
    bounds = []
    for name, x in zip(artifact.states, op):
        lo, hi = envelope.get(name, (x - 1.0, x + 1.0))
        extra = widen * (hi - lo)
        bounds.append((lo - extra, hi + extra))
    return bounds


def test_every_bundled_plant_gets_a_native_step_and_plant():
    for name in NATIVE:
        core, note = make_core(built_artifact(BUNDLED / f"{name}.yaml"))
        assert core.backend == "native" and note is None, (name, note)
        plant, note = make_plant(built_artifact(BUNDLED / f"{name}.yaml"))
        assert plant.backend == "native" and note is None, (name, note)


def test_a_chain_form_law_runs_in_python_and_says_why(monkeypatch):
    from test_runtime_core import _chain_form_artifact, chain_text

    core, note = make_core(_chain_form_artifact(chain_text(2), monkeypatch))
    assert type(core) is ControllerCore
    assert note == "native step unavailable, using Python: the chain-form law is evaluated from jets; no native " \
                   "form yet"


def test_the_single_elastic_joint_is_the_same_on_both_backends():
    # Spong 1987's single elastic joint (tests/plants/elastic_joint.yaml), its law in jet2 form in C
    artifact = built_artifact(REFERENCE / "elastic_joint.yaml")
    python, native = _cores(artifact)
    rng = np.random.default_rng(5)
    x0 = np.array(artifact.operating_point)
    ref = python.hold_reference(list(x0))
    for k in range(200):
        x = (x0 + rng.normal(0, 0.3, len(x0))).tolist()
        assert_same_step(python.step(x, ref, 0.001 * (k + 1)), native.step(x, ref, 0.001 * (k + 1)), k)


# -- the same steps -----------------------------------------------------------------------------

WATCHDOG_CASES = st.fixed_dictionaries({
    "sigma_scale": st.sampled_from([1.0, 1.0, 3.0, 30.0]),          # raise the levels: damped and safe steps
    "safe_kind": st.sampled_from(["zero", "hold", "fixed"]),
    "rate": st.sampled_from([None, None, 50.0, 5.0]),               # rate limits that cut
    "box": st.sampled_from([1.0, 1.0, 0.05]),                       # box limits scaled down: saturation
    "envelope_action": st.sampled_from(["stop", "warn", "safe"]),
    "divergence": st.sampled_from([None, None, 0.05]),
    "integral_limit": st.sampled_from([math.inf, 0.01]),
})


def _config(artifact, case):
    base = WatchdogConfig.from_artifact(artifact)
    m, chains = len(artifact.inputs), len(artifact.outputs)
    k = case["sigma_scale"]
    limits = tuple((lo * case["box"], hi * case["box"]) for lo, hi in base.input_limits)
    safe_value = tuple(0.5 * (lo + hi) + 0.25 * (hi - lo) for lo, hi in limits)
    return base.with_overrides(
        sigma_warn=base.sigma_warn * k, sigma_act=base.sigma_act * k, sigma_stop=base.sigma_stop * k,
        safe_kind=case["safe_kind"], safe_value=safe_value if case["safe_kind"] == "fixed" else (0.0,) * m,
        rate_limits=(math.inf,) * m if case["rate"] is None else (case["rate"],) * m, input_limits=limits,
        envelope_action=case["envelope_action"], integral_limit=case["integral_limit"],
        divergence_error=(math.inf,) * chains if case["divergence"] is None else (case["divergence"],) * chains,
        divergence_time=0.02, hold_time=0.01)


@settings(max_examples=40, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture, HealthCheck.data_too_large])
@given(data=st.data(), case=WATCHDOG_CASES)
def test_both_backends_give_the_same_commands_modes_and_records(plant_name, data, case):
    artifact = built_artifact(BUNDLED / f"{plant_name}.yaml")
    python, native = _cores(artifact, _config(artifact, case))
    bounds = _bounds(artifact)
    reference_size = python.reference_size
    t = 0.0
    for k in range(data.draw(st.integers(5, 40), label="steps")):
        x = [data.draw(st.floats(lo, hi), label="x") for lo, hi in bounds]
        kind = data.draw(st.sampled_from(["ok"] * 12 + ["nan", "short", "back", "stale", "future", "bad_ref"]),
                         label="kind")
        ref = python.hold_reference(artifact.operating_point)
        ref = [r + data.draw(st.floats(-0.2, 0.2), label="ref") for r in ref]
        t += 0.002
        stamp, now = t, t + data.draw(st.floats(0.0, 0.004), label="latency")
        if kind == "nan":
            x[data.draw(st.integers(0, len(x) - 1), label="where")] = math.nan
        elif kind == "short":
            x = x[:-1]
        elif kind == "back":
            stamp = t - 0.01
        elif kind == "stale":
            now = t + 10.0
        elif kind == "future":
            now = t - 10.0
        elif kind == "bad_ref":
            ref = ref[:reference_size - 1]
        assert_same_step(python.step(x, ref, stamp, now=now), native.step(x, ref, stamp, now=now), (k, kind))
    assert _same(python.integrators, native.integrators) and _same(python.last_command, native.last_command)
    assert python.last_t == native.last_t


def _drive(core, artifact, steps=600):
    """A path through the envelope and beyond it, and back, with a gap; the records."""
    bounds = _bounds(artifact, widen=0.6)
    rng = np.random.default_rng(7)
    centre = np.array(artifact.operating_point, dtype=float)
    out = []
    ref = core.hold_reference(list(centre))
    for k in range(steps):
        phase = k / steps
        x = centre + np.array([(hi - lo) * 0.6 * math.sin(2 * math.pi * phase * (1 + i % 3))
                               for i, (lo, hi) in enumerate(bounds)]) + rng.normal(0, 1e-3, len(centre))
        t = 0.002 * k + (0.5 if k > steps // 2 else 0.0)
        out.append(core.step([float(v) for v in x], ref, t, now=t + (0.3 if k == steps // 2 + 1 else 0.0)))
    return out


@pytest.mark.parametrize("name", NATIVE)
def test_a_drive_through_every_watchdog_situation_is_the_same_on_both_backends(name):
    artifact = built_artifact(BUNDLED / f"{name}.yaml")
    base = WatchdogConfig.from_artifact(artifact)
    m = len(artifact.inputs)
    config = base.with_overrides(sigma_warn=base.sigma_warn * 40, sigma_act=base.sigma_act * 40,
                                 sigma_stop=base.sigma_stop * 20, safe_kind="hold", hold_time=0.5,
                                 rate_limits=(200.0,) * m, envelope_action="stop")
    python, native = _cores(artifact, config)
    seen = set()
    for k, (a, b) in enumerate(zip(_drive(python, artifact), _drive(native, artifact))):
        assert_same_step(a, b, k)
        seen.add(a[1].mode)
        seen.add("saturated" if any(a[1].saturated) else "free")
    # the drive is only a test of equality where it reaches the watchdogs' branches
    assert {"stopping", "saturated"} <= seen and seen & {"nominal", "damped"}, seen


def test_the_damped_held_and_safe_branches_are_the_same_on_both_backends():
    # the pick arm stretched (q2 = 0) is singular: sigma_min ~ |sin q2|
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    config = WatchdogConfig.from_artifact(artifact, envelope_action="warn", safe_kind="hold", hold_time=0.004)
    python, native = _cores(artifact, config)
    ref = python.hold_reference([0.4, 0.9, 0.0, 0.0])
    modes = set()
    for k, q2 in enumerate(np.concatenate([np.linspace(0.9, -0.3, 300), np.linspace(-0.3, 0.9, 300)])):
        x, t = [0.4, float(q2), 0.05, -0.1], 0.002 * (k + 1)
        a, b = python.step(x, ref, t), native.step(x, ref, t)
        assert_same_step(a, b, k)
        modes.add(a[1].mode)
    assert {"nominal", "damped", "held", "safe"} <= modes, modes


def test_settings_changed_mid_run_and_a_reset_act_the_same_on_both_backends():
    artifact = built_artifact(BUNDLED / "loader_arm.yaml")
    python, native = _cores(artifact)
    x = list(artifact.operating_point)
    ref = python.hold_reference(x)
    ref[0] += 0.3
    for k in range(40):
        if k == 10:
            for core in (python, native):
                core.config = core.config.with_overrides(rate_limits=(1.0,) * 6, safe_kind="fixed",
                                                         safe_value=(0.5,) * 6)
        if k == 25:
            python.reset()
            native.reset()
        t = 0.002 * (k + 1) if k < 25 else 0.002 * (k - 24)
        assert_same_step(python.step(x, ref, t), native.step(x, ref, t), k)
    assert native.config.rate_limits == (1.0,) * 6


@pytest.mark.parametrize("value", [np.array, tuple, lambda v: [int(round(x)) for x in v],
                                   lambda v: [str(x) for x in v], lambda v: [np.float32(x) for x in v]],
                         ids=["numpy", "tuple", "ints", "text", "float32"])
def test_arguments_of_other_types_are_converted_as_the_python_core_converts_them(value):
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    python, native = _cores(artifact)
    x = [0.4, 0.9, 0.05, -0.1]
    ref = python.hold_reference(x)
    for k in range(3):
        t = 0.002 * (k + 1)
        assert_same_step(python.step(value(x), value(ref), t, t), native.step(value(x), value(ref), t, t))
    for bad in (None, ["a"] * 4, [object()] * 4, 3.0, [10 ** 400] * 4):
        t += 0.002
        assert_same_step(python.step(bad, ref, t), native.step(bad, ref, t), repr(bad)[:20])
        assert_same_step(python.step(x, bad, t, now=t), native.step(x, bad, t, now=t), repr(bad)[:20])
    for stamp in ("0.5", None, math.nan, math.inf, np.float64(9.0), 10):
        assert_same_step(python.step(x, ref, stamp), native.step(x, ref, stamp), repr(stamp))
    assert_same_step(python.safe_step(11.0, "no_state"), native.safe_step(11.0, "no_state"))
    assert_same_step(python.safe_step(11.1, "bad_message", final=True),
                     native.safe_step(11.1, "bad_message", final=True))
    assert python.is_stale(11.2) == native.is_stale(11.2)


@pytest.mark.parametrize("name", NATIVE)
def test_the_closed_loop_is_the_same_on_both_backends(name):
    artifact = built_artifact(BUNDLED / f"{name}.yaml")
    x0 = artifact.operating_point
    base = ControllerCore(artifact).output_values(x0)
    reference = make_reference("smooth", artifact.relative_degree, base, 0.05, duration=0.5)
    runs = {backend: simulate(artifact, SimSettings(duration=1.0, reference=reference, backend=backend))
            for backend in ("python", "native")}
    python, native = runs["python"], runs["native"]
    assert native.backend == ("native", "native") and python.backend == ("python", "python")
    assert len(python.t) == len(native.t) and python.mode == native.mode and python.reason == native.reason
    for name_ in ("x", "u", "y", "sigma_min", "condition"):
        # relative to each signal's range over the run: a closed loop feeds rounding back through
        # its gains (the elastic arm's fourth-order chains), so a step's tiny value is no scale
        a, b = getattr(python, name_), getattr(native, name_)
        scale = np.maximum(1.0, np.max(np.abs(a), axis=0))
        assert np.all(np.abs(a - b) <= TOLERANCE * scale), (name_, np.max(np.abs(a - b) / scale))


# -- the plant ----------------------------------------------------------------------------------

@pytest.mark.parametrize("name", NATIVE)
def test_the_native_plant_integrates_as_the_python_plant(name):
    artifact = built_artifact(BUNDLED / f"{name}.yaml")
    python, native = NumericPlant(artifact), NativePlant(artifact)
    rng = np.random.default_rng(3)
    for _ in range(20):
        x = (np.array(artifact.operating_point) + rng.normal(0, 0.2, python.n)).tolist()
        u = rng.normal(0, 1.0, python.m).tolist()
        for a, b in ((python.derivative(x, u), native.derivative(x, u)),
                     (python.rk4(x, u, 0.002, 4), native.rk4(np.array(x), tuple(u), 0.002, 4))):
            assert np.all(np.abs(np.subtract(a, b)) <= TOLERANCE * np.maximum(1.0, np.abs(a)))


def test_a_plant_undefined_at_a_state_raises_in_both_backends():
    text = ("plant: root\nstates: [x]\ninputs: [u]\ndynamics: {x: sqrt(x) + u}\noutputs: {y: x}\n"
            "operating_point: {x: 1.0}\ndesign: {poles: {y: [-2]}}\n")
    artifact = built_artifact(text)
    for plant in (NumericPlant(artifact), NativePlant(artifact)):
        with pytest.raises((ArithmeticError, ValueError)):
            plant.derivative([-1.0], [0.0])
        with pytest.raises((ArithmeticError, ValueError)):
            plant.rk4([-1.0], [0.0], 0.01)
    python, native = _cores(artifact)
    assert_same_step(python.step([-1.0], [0.0, 0.0], 0.1), native.step([-1.0], [0.0, 0.0], 0.1))
    assert native.step([-1.0], [0.0, 0.0], 0.2)[1].reason == "model_not_finite"
    with pytest.raises(ArithmeticError):
        native.output_values([-1.0])


# -- fallback, cache, lifetime --------------------------------------------------------------------

@pytest.fixture
def fresh_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("LINZ_ROS_CACHE", str(tmp_path / "cache"))
    return tmp_path / "cache" / "native"


def test_without_a_c_compiler_the_python_core_is_used_with_one_line_saying_why(fresh_cache, monkeypatch, tmp_path):
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    monkeypatch.delenv("CC", raising=False)
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    core, note = make_core(artifact)
    assert type(core) is ControllerCore
    assert note == "native step unavailable, using Python: no C compiler found (CC, cc or gcc on PATH)"
    plant, note = make_plant(artifact)
    assert type(plant) is NumericPlant and note.startswith("native plant unavailable, using Python: no C compiler")
    result = simulate(artifact, SimSettings(duration=0.1))
    assert result.backend == ("python", "python")
    assert "native step unavailable, using Python: no C compiler found (CC, cc or gcc on PATH)" in result.notes


def test_linz_sim_on_a_machine_without_a_compiler_says_so_and_runs_in_python(tmp_path):
    empty = tmp_path / "bin"
    empty.mkdir()
    env = {key: value for key, value in os.environ.items() if key != "CC"}
    env.update(PATH=str(empty), LINZ_ROS_CACHE=str(tmp_path / "cache"))
    done = subprocess.run([sys.executable, "-m", "linz_ros.cli", "sim", str(BUNDLED / "pick_arm.yaml"),
                           "--duration", "0.2", "--no-plots", "--out", str(tmp_path / "out")],
                          capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "note: native step unavailable, using Python: no C compiler found (CC, cc or gcc on PATH)" in done.stdout
    assert "python control step, python plant" in done.stdout
    assert "Traceback" not in done.stderr


def test_a_failed_compile_falls_back_with_the_compilers_first_error(fresh_cache, monkeypatch):
    monkeypatch.setattr(_build, "FLAGS", _build.FLAGS + ("-fno-such-option-anywhere",))
    core, note = make_core(built_artifact(BUNDLED / "mast_camera.yaml"))
    assert type(core) is ControllerCore
    assert note.startswith("native step unavailable, using Python: the C compiler failed: ") and "error" in note
    assert "\n" not in note


def test_without_cffi_the_python_core_is_used(monkeypatch):
    from linz_ros.runtime.native import _core

    monkeypatch.setitem(sys.modules, "cffi", None)
    monkeypatch.setattr(_core, "_FFI", None)
    core, note = make_core(built_artifact(BUNDLED / "mast_camera.yaml"))
    assert type(core) is ControllerCore and note.endswith("cffi is not installed (pip install 'linz_ros[native]')")


def test_compiled_code_is_cached_by_artifact_and_not_compiled_again(fresh_cache, monkeypatch):
    artifact = built_artifact(BUNDLED / "survey_boat.yaml")
    make_core(artifact)
    built = sorted(p.name for p in fresh_cache.iterdir() if not p.name.endswith(".sha256"))
    assert len(built) == 1 and artifact.sha256[:12] in built[0]
    assert (fresh_cache / (built[0] + ".sha256")).is_file()
    calls = []
    monkeypatch.setattr(_build.subprocess, "run", lambda *a, **k: calls.append(a) or pytest.fail("compiled again"))
    core, note = make_core(artifact)
    assert core.backend == "native" and note is None and not calls
    other = built_artifact(BUNDLED / "pick_arm.yaml")
    monkeypatch.undo()
    monkeypatch.setenv("LINZ_ROS_CACHE", str(fresh_cache.parent))
    make_core(other)
    assert len([p for p in fresh_cache.iterdir() if not p.name.endswith(".sha256")]) == 2


@pytest.mark.parametrize("keep", [0, 100, 5000, 0.5])
def test_a_damaged_cached_library_is_built_again_not_loaded(fresh_cache, keep):
    # a library cut short (a power cut before the disk caught up) would crash the loader; built and
    # loaded in child processes, as a library this process has mapped must never be cut under it
    script = ("import sys; sys.path.insert(0, 'tests'); from support import BUNDLED, built_artifact; "
              "from linz_ros.runtime.native import make_core, make_plant; "
              "a = built_artifact(BUNDLED / 'survey_boat.yaml'); c, n = make_core(a); p, m = make_plant(a); "
              "print(c.backend, p.backend, n, m)")

    def run():
        return subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300,
                              cwd=Path(__file__).resolve().parent.parent)
    assert run().returncode == 0
    for library in (p for p in fresh_cache.iterdir() if not p.name.endswith(".sha256")):
        data = library.read_bytes()
        library.write_bytes(data[:int(len(data) * keep) if isinstance(keep, float) else keep])
    done = run()
    assert done.returncode == 0, done.stderr
    assert done.stdout.split() == ["native", "native", "None", "None"]


def test_a_compiler_named_in_cc_that_is_not_there_is_said(fresh_cache, monkeypatch):
    monkeypatch.setenv("CC", "/nonexistent/cc")
    core, note = make_core(built_artifact(BUNDLED / "pick_arm.yaml"))
    assert type(core) is ControllerCore
    assert note == "native step unavailable, using Python: CC='/nonexistent/cc' is not an executable on PATH"


def test_an_unwritable_cache_folder_falls_back_to_one_temporary_folder(tmp_path, monkeypatch):
    blocker = tmp_path / "file"
    blocker.write_text("")
    monkeypatch.setenv("LINZ_ROS_CACHE", str(blocker / "sub"))
    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    first, _ = make_core(artifact)
    second, _ = make_core(artifact)
    assert first.backend == second.backend == "native"
    assert len({path.parent for path in (_build.compiled_step(artifact).path, _build.compiled_plant(artifact).path)}) == 1


def test_the_native_plant_refuses_vectors_of_the_wrong_length():
    plant = NativePlant(built_artifact(BUNDLED / "pick_arm.yaml"))
    with pytest.raises(ValueError, match="expected 4 state values, got 3"):
        plant.rk4([0.0] * 3, [0.0, 0.0], 0.01)
    with pytest.raises(ValueError, match="expected 2 inputs, got 1"):
        plant.derivative([0.0] * 4, [0.0])
    with pytest.raises(ConfigError, match="parameters: expected"):
        NativePlant(built_artifact(BUNDLED / "pick_arm.yaml"), [1.0])


def test_a_long_divergence_window_at_a_high_rate_is_judged_the_same_by_both_backends():
    # a half-window of 100 s at 1 kHz: 100,000 steps, more than any fixed buffer of the past would hold
    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    config = WatchdogConfig.from_artifact(artifact, divergence_time=200.0, divergence_action="safe",
                                          envelope_action="warn")
    python, native = _cores(artifact, config)
    x = list(artifact.operating_point)
    base = python.hold_reference(x)
    bound = config.divergence_error[0]
    records = []
    for k in range(200_200):
        t = 0.001 * k
        # rises to 3 over the first half-window, tops it once early in the second, then decays slowly: the
        # divergence rests on a value 99 s old among 99,000 later, smaller ones
        size = 2.0 + t / 100.0 if t < 100.0 else 3.5 if t <= 101.0 else 2.9 - (t - 101.0) * 1e-4
        ref = list(base)
        ref[0] = base[0] - size * bound
        a, b = python.step(x, ref, t), native.step(x, ref, t)
        if k % 1000 == 0 or a[1].reason != "ok":
            assert_same_step(a, b, k)
            records.append(a[1].reason)
    assert "diverging" in records


def test_a_native_core_is_freed_when_dropped_and_its_step_outlives_nothing():
    core, _ = make_core(built_artifact(BUNDLED / "pick_arm.yaml"))
    step = core.step
    alive = weakref.ref(core)
    del core
    gc.collect()
    assert alive() is None
    # the fast entry keeps the context's memory alive; its way back to the core is gone
    u, record = step([0.4, 0.9, 0.05, -0.1], [0.0] * 6, 0.1)
    assert record.reason in ("ok", "near_singular", "outside_envelope") and len(u) == 2
    with pytest.raises(ReferenceError):
        step(np.zeros(4), [0.0] * 6, 0.2)


def test_an_unknown_backend_is_refused_by_name():
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    with pytest.raises(ConfigError, match="backend: expected one of native, python, got 'gpu'"):
        make_core(artifact, backend="gpu")
    with pytest.raises(ConfigError, match="--backend: expected one of native, python, got 'gpu'"):
        simulate(artifact, SimSettings(duration=0.1, backend="gpu"))


# -- code from the parse tree only ---------------------------------------------------------------

@pytest.mark.parametrize("name", NATIVE)
def test_emitted_c_holds_only_our_own_tokens(name):
    artifact = built_artifact(BUNDLED / f"{name}.yaml")
    for program in ("dynamics", "law"):
        symbol = "linz_dynamics" if program == "dynamics" else "linz_law_jets" if artifact.elastic else "linz_law"
        source = _build.program_source(artifact, program, symbol)
        assert not c_words_not_ours(source)
        assert '"' not in source.split("\n", 1)[1] and "#" not in source.split("\n", 1)[1]


def test_a_tampered_artifact_never_reaches_the_c_compiler(monkeypatch):
    from linz_ros.artifact import artifact_from_text, seal
    from linz_ros.codegen import build_document
    from linz_ros.errors import ArtifactError
    from linz_ros.model import load_plant
    from linz_ros.synthesis import synthesise

    document = build_document(synthesise(load_plant(BUNDLED / "mast_camera.yaml")), points=4)[0]
    compiled = []
    monkeypatch.setattr(_build.subprocess, "run", lambda *a, **k: compiled.append(a) or pytest.fail("compiled"))
    for evil in ('pan); system("true"); (pan', "pan /* */ + 1", "pan\n#include <stdlib.h>\n", "__builtin_trap()",
                 "pan[0]", "exit(0)"):
        document["programs"]["law"]["outputs"][0][2][0] = evil
        with pytest.raises(ArtifactError):
            make_core(artifact_from_text(seal(document)))
    assert not compiled
