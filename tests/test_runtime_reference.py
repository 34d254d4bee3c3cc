"""Reference generators: values and derivatives (checked by finite differences), parsing."""

import math

import numpy as np
import pytest

from linz_ros.errors import ConfigError
from linz_ros.runtime import extrapolate_reference, make_reference, parse_reference


@pytest.mark.parametrize("kind, options", [("sine", {"period": 1.7, "at": 0.2}),
                                           ("smooth", {"duration": 1.3, "at": 0.2}),
                                           ("ring", {"period": 3.1, "at": 0.2}),
                                           ("eight", {"period": 3.1, "at": 0.2})])
def test_derivatives_are_the_derivatives_of_the_value(kind, options):
    ref = make_reference(kind, [4, 4], [0.5, -0.2], 0.3, **options)
    h = 1e-4
    for t in np.linspace(0.25, 1.4, 13):
        now, ahead, behind = ref.sample(t), ref.sample(t + h), ref.sample(t - h)
        for j in list(range(4)) + list(range(5, 9)):
            derivative = (ahead[j] - behind[j]) / (2 * h)
            assert now[j + 1] == pytest.approx(derivative, rel=1e-5, abs=1e-5 * (1 + abs(now[j + 1])))


def test_the_closed_paths_start_at_the_base_point_and_close_after_a_period():
    for kind in ("ring", "eight"):
        ref = make_reference(kind, [2, 2, 2], [1.0, 2.0, 3.0], 0.5, period=4.0, at=1.0)
        assert ref.sample(0.5) == [1.0, 0.0, 0.0, 2.0, 0.0, 0.0, 3.0, 0.0, 0.0]
        start, lap = np.array(ref.sample(1.0)), np.array(ref.sample(5.0))
        assert start[[0, 3, 6]] == pytest.approx([1.0, 2.0, 3.0]) and np.allclose(start, lap, atol=1e-12)
        assert ref.sample(2.7)[6:] == [3.0, 0.0, 0.0]                 # the third output holds
    # the ring's centre lies a radius to the left of the start; the eight crosses itself there
    ring = make_reference("ring", [1, 1], [0.0, 0.0], 0.5, period=4.0)
    assert [ring.sample(2.0)[0], ring.sample(2.0)[2]] == pytest.approx([0.0, 1.0], abs=1e-12)
    eight = make_reference("eight", [1, 1], [0.0, 0.0], 0.5, period=4.0)
    assert [eight.sample(2.0)[0], eight.sample(2.0)[2]] == pytest.approx([0.0, 0.0], abs=1e-12)


def test_a_closed_path_needs_two_outputs():
    with pytest.raises(ConfigError, match="eight draws a path with the first two outputs"):
        make_reference("eight", [2], [0.0], 1.0)


def test_smooth_move_starts_and_ends_at_rest_with_the_right_values():
    ref = make_reference("smooth", [3], [1.0], -2.0, duration=2.0, at=1.0)
    assert ref.sample(0.5) == [1.0, 0.0, 0.0, 0.0]
    start, end = ref.sample(1.0), ref.sample(3.0)
    assert start[0] == pytest.approx(1.0) and np.allclose(start[1:], 0.0, atol=1e-12)
    assert end[0] == pytest.approx(-1.0) and np.allclose(end[1:], 0.0, atol=1e-9)
    assert ref.sample(2.0)[0] == pytest.approx(0.0)     # half way, by symmetry
    assert ref.sample(9.0) == [-1.0, 0.0, 0.0, 0.0]


def test_step_sine_and_hold_values():
    assert make_reference("step", [1, 2], [0.0, 1.0], [2.0, -1.0], at=1.0).sample(1.5) == [2.0, 0.0, 0.0, 0.0, 0.0]
    sine = make_reference("sine", [1], [0.0], 2.0, period=4.0)
    assert sine.sample(1.0) == pytest.approx([2.0, 0.0], abs=1e-12)
    assert make_reference("hold", [2], [3.0]).sample(5.0) == [3.0, 0.0, 0.0]


def test_parse_reference_reads_per_output_amplitudes():
    ref = parse_reference("step:tool_x=0.05,tool_y=-0.02,at=0.5", [2, 2], [0.4, 0.5], ["tool_x", "tool_y"])
    assert ref.sample(1.0) == pytest.approx([0.45, 0, 0, 0.48, 0, 0])
    assert parse_reference("sine:amplitude=1,period=2", [1], [0.0], ["y"]).amplitude == [1.0]


@pytest.mark.parametrize("text, words", [
    ("ramp:amplitude=1", "unknown kind 'ramp'"),
    ("step:amplitude", "expected key=value"),
    ("step:amplitude=big", "amplitude: expected a number, got 'big'"),
    ("step:period=2", "unknown key 'period' for step"),
    ("sine:period=0", "period and duration must be positive"),
    ("smooth:duration=-1", "period and duration must be positive"),
    ("smooth:duration=1e-200,y=1", "must be at least 0.0001 s"),
    ("sine:period=1e-200,amplitude=1", "must be at least 0.0001 s"),
])
def test_bad_reference_text_is_one_line(text, words):
    with pytest.raises(ConfigError, match="reference") as info:
        parse_reference(text, [2], [0.0], ["y"])
    assert words in str(info.value)


def test_extrapolation_is_exact_for_polynomials_of_the_chain_degree_and_converges_otherwise():
    # a cubic y = 1 - t + 2 t^2 + 0.5 t^3 in a chain of degree 3: Taylor is exact at any dt
    def cubic(t):
        return [1 - t + 2 * t ** 2 + 0.5 * t ** 3, -1 + 4 * t + 1.5 * t ** 2, 4 + 3 * t, 3.0]
    two_chains = cubic(0.3) + [0.7, 0.0, 0.0, 0.0]
    assert extrapolate_reference(two_chains, [3, 3], 0.25) == pytest.approx(cubic(0.55) + [0.7, 0.0, 0.0, 0.0])
    assert extrapolate_reference(two_chains, [3, 3], 0.0) == pytest.approx(two_chains)
    # a smooth move of order 2: the error of the value falls as dt^3 (the held second derivative)
    ref = make_reference("smooth", [2], [0.0], 0.4, duration=1.0)
    errors = [abs(extrapolate_reference(ref.sample(0.3), [2], dt)[0] - ref.sample(0.3 + dt)[0])
              for dt in (0.02, 0.01)]
    assert 6.0 < errors[0] / errors[1] < 10.0
    held = abs(ref.sample(0.3)[0] - ref.sample(0.31)[0])
    assert errors[1] < 1e-3 * held            # far closer than holding the sample


@pytest.mark.parametrize("spec, words", [
    ("smooth:amplitude=0.1,duration=1e308", "reference duration: expected at most 1e[+]06 s"),
    ("sine:amplitude=0.1,period=2e6", "reference period: expected at most"),
    ("step:amplitude=0.1,at=-2e6", "reference at: expected at most"),
])
def test_times_past_the_longest_are_one_line(spec, words):
    with pytest.raises(ConfigError, match=words):
        parse_reference(spec, [2], [0.0], ["y"])


def test_a_base_that_is_not_finite_is_refused():
    with pytest.raises(ConfigError, match="reference base: expected a finite number, got nan"):
        make_reference("smooth", [2], [math.nan], 1.0, duration=1.0)
